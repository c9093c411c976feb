//! `kilter audit --method`: the recomputation of a declared method against exact values.
//!
//! Source: `tests/golden/declared/generate_declared.py` (numpy only; version in
//! `tests/golden/declared/versions.txt`), which evaluates the breast-cancer network
//! `tests/golden/models/mlp.json` layer by layer and computes, for six feature groups,
//! occlusion `f(x) - f(x with group g set to the fill)` and Shapley values by enumerating
//! every coalition with the weights `|S|! (m - |S| - 1)! / m!` (Shapley 1953), with the
//! value function `v(S) = f(x with the groups outside S set to the fill)`. The mean fill is
//! the column mean of every row of `tests/golden/breast_cancer_fit.csv`, the rows the
//! profile is fitted on with `--holdout 0`. Data: UCI breast cancer (reference-corpora/).
//!
//! kilter computes occlusion directly and Shapley values by the kernel-weighted regression
//! over its coalition design, which with six groups (62 proper coalitions, fewer than the
//! default 1,024 masks) enumerates every coalition and is exact.

use serde::Deserialize;

use kilter::audit::AuditRecord;

use crate::harness::{kilter, read_records, repo, temp_dir};
use crate::tolerance::EXACT_ATTRIBUTION_ABSOLUTE as EXACT_ABSOLUTE;

#[derive(Deserialize)]
struct Golden {
    label_column: String,
    target: usize,
    group_names: Vec<String>,
    groups: Vec<Vec<usize>>,
    predictions: Vec<f64>,
    cases: Vec<Case>,
}

#[derive(Deserialize)]
struct Case {
    method: String,
    rows: Vec<Row>,
}

#[derive(Deserialize)]
struct Row {
    row: usize,
    attribution: Vec<f64>,
    expected_value: Option<f64>,
}

#[test]
fn declared_occlusion_and_shapley_equal_their_exact_values() {
    let golden: Golden = serde_json::from_str(
        &std::fs::read_to_string(repo("tests/golden/declared/declared.json")).expect("golden file"),
    )
    .expect("golden JSON");
    let dir = temp_dir();
    let d = dir.path();
    let reference = repo("tests/golden/breast_cancer_fit.csv");
    let input = repo("tests/golden/declared/queries.csv");
    let model = repo("tests/golden/models/mlp.json");
    let label = golden.label_column.as_str();
    std::fs::write(
        d.join("groups.json"),
        serde_json::to_string(&golden.groups).unwrap(),
    )
    .unwrap();
    #[rustfmt::skip]
    kilter(d, &[
        "--quiet", "fit", "--reference", reference.to_str().unwrap(), "--label-column", label,
        "--holdout", "0", "--out", "p.kprofile",
    ])
    .expect_status(0);
    let target = golden.target.to_string();
    for case in &golden.cases {
        // The exact values themselves, supplied as the explanation (one column per group,
        // and the label column the input files carry).
        let mut csv = format!("{},{label}\n", golden.group_names.join(","));
        for row in &case.rows {
            let cells: Vec<String> = row.attribution.iter().map(|v| format!("{v:?}")).collect();
            csv.push_str(&format!("{},0\n", cells.join(",")));
        }
        std::fs::write(d.join("explanations.csv"), csv).unwrap();
        #[rustfmt::skip]
        kilter(d, &[
            "--quiet", "audit", "--profile", "p.kprofile", "--input", input.to_str().unwrap(),
            "--label-column", label, "--model", model.to_str().unwrap(),
            "--groups", "groups.json", "--explanations", "explanations.csv",
            "--method", &case.method, "--target", &target, "--baseline", "mean",
            "--out", "audit.jsonl",
        ])
        .expect_status(0);
        let records: Vec<AuditRecord> = read_records(&d.join("audit.jsonl"));
        assert_eq!(records.len(), case.rows.len());
        let mut worst = 0.0_f64;
        for (record, want) in records.iter().zip(&case.rows) {
            assert_eq!(record.row, want.row);
            let at = format!("{} row {}", case.method, want.row);
            assert!(
                (record.prediction - golden.predictions[want.row]).abs() <= EXACT_ABSOLUTE,
                "{at}: prediction {} vs {}",
                record.prediction,
                golden.predictions[want.row]
            );
            let twin = record
                .declared
                .as_ref()
                .expect("the recomputation is recorded");
            assert_eq!(twin.method, case.method);
            assert_eq!(twin.attribution.len(), want.attribution.len());
            for (g, (got, exact)) in twin.attribution.iter().zip(&want.attribution).enumerate() {
                worst = worst.max((got - exact).abs());
                assert!(
                    (got - exact).abs() <= EXACT_ABSOLUTE,
                    "{at} group {}: kilter {got}, exact {exact}",
                    golden.group_names[g]
                );
            }
            if let Some(empty) = want.expected_value {
                let deletion = &record.families.deletion;
                assert!(deletion.exhaustive, "{at}: the design is not exhaustive");
                assert!(
                    (deletion.expected_value - empty).abs() <= EXACT_ABSOLUTE,
                    "{at}: v(empty) {} vs {empty}",
                    deletion.expected_value
                );
            }
        }
        eprintln!(
            "{}: largest difference from the exact values {worst:.2e}",
            case.method
        );
    }
}
