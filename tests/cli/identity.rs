//! Row identity and provenance: `--id-column` in every command's records, supplied
//! explanations joined by id (any row order) and matched to groups by name (any column
//! order), group-named CSV columns, `schema`/`seed`/`alpha`, and `audit --findings`.
//!
//! The checks are behavioural (which row's numbers land where, which errors are raised);
//! the numbers themselves are compared between two runs of kilter that must agree.
//!
//! Data: the open wine corpus (reference-corpora/wine.csv, UCI "Wine", Forina et al.;
//! reference-corpora/PROVENANCE.md). The id column added to its rows is a synthetic label,
//! not data.

use std::path::Path;

use kilter::audit::{AuditRecord, BaselineRecord};
use kilter::profile::ScoreRecord;

use crate::harness::{
    fit_wine, kilter, one_layer_model, read_records, repo, temp_dir, write_model,
};

/// Audited wine rows.
const ROWS: usize = 6;

/// The wine corpus's feature names (its header without `cultivar`) and its first `ROWS`
/// data lines, cultivar included.
fn wine_rows() -> (Vec<String>, Vec<String>) {
    let text = std::fs::read_to_string(repo("reference-corpora/wine.csv")).unwrap();
    let mut lines = text.lines();
    let header: Vec<String> = lines.next().unwrap().split(',').map(String::from).collect();
    assert_eq!(header.last().map(String::as_str), Some("cultivar"));
    let features = header[..header.len() - 1].to_vec();
    (features, lines.take(ROWS).map(String::from).collect())
}

/// The id of wine row `r` (one holds a comma, so the file needs quoting).
fn id_of(r: usize) -> String {
    if r == 2 {
        "lot 3, cask 2".into()
    } else {
        format!("w-{r}")
    }
}

fn quoted(id: &str) -> String {
    if id.contains(',') {
        format!("\"{id}\"")
    } else {
        id.to_string()
    }
}

/// Writes `in.csv`: the wine rows with a `sample` id column first; fits `w.kprofile` and
/// writes a linear model `m.json`.
fn prepare(dir: &Path) -> Vec<String> {
    let (features, lines) = wine_rows();
    let mut text = format!("sample,{},cultivar\n", features.join(","));
    for (r, line) in lines.iter().enumerate() {
        text += &format!("{},{line}\n", quoted(&id_of(r)));
    }
    std::fs::write(dir.join("in.csv"), text).unwrap();
    fit_wine(dir, &["--holdout", "0"]);
    let weights: Vec<f64> = (0..features.len())
        .map(|i| [0.4, -0.3, 0.2, -0.05, 0.01][i % 5])
        .collect();
    write_model(
        &dir.join("m.json"),
        &one_layer_model("linear", &weights, 0.0),
    );
    features
}

/// Made-up explanation values of row `r`, group `g` (the audit only compares them).
fn explanation(r: usize, g: usize) -> f64 {
    ((r * 13 + g * 5) % 7) as f64 - 3.0 + 0.25 * g as f64
}

/// Writes an explanations file: rows in `row_order`, with the id column when `ids`,
/// columns in `column_order` named by `names` (group names, or anything).
fn write_explanations(
    path: &Path,
    names: &[String],
    column_order: &[usize],
    row_order: &[usize],
    ids: bool,
) {
    let mut header: Vec<String> = column_order.iter().map(|&c| names[c].clone()).collect();
    if ids {
        header.insert(0, "sample".into());
    }
    let mut text = header.join(",") + "\n";
    for &r in row_order {
        let mut cells: Vec<String> = column_order
            .iter()
            .map(|&c| format!("{:?}", explanation(r, c)))
            .collect();
        if ids {
            cells.insert(0, quoted(&id_of(r)));
        }
        text += &(cells.join(",") + "\n");
    }
    std::fs::write(path, text).unwrap();
}

const AUDIT_SETTINGS: [&str; 8] = [
    "--samples",
    "60",
    "--draws",
    "2",
    "--steps",
    "16",
    "--seed",
    "3",
];

fn audit(dir: &Path, extra: &[&str]) -> crate::harness::Run {
    let mut args = vec![
        "audit",
        "--profile",
        "w.kprofile",
        "--model",
        "m.json",
        "--input",
        "in.csv",
        "--label-column",
        "cultivar",
    ];
    args.extend_from_slice(&AUDIT_SETTINGS);
    args.extend_from_slice(extra);
    kilter(dir, &args)
}

#[test]
fn every_command_puts_the_row_id_beside_the_row() {
    let dir = temp_dir();
    let d = dir.path();
    let features = prepare(d);
    let expected: Vec<Option<String>> = (0..ROWS).map(|r| Some(id_of(r))).collect();
    let common = ["--input", "in.csv", "--label-column", "cultivar"];
    let id = ["--id-column", "sample"];

    let mut score = vec!["score", "--profile", "w.kprofile", "--out", "s.jsonl"];
    score.extend_from_slice(&common);
    score.extend_from_slice(&id);
    kilter(d, &score).expect_status(0);
    let scores: Vec<ScoreRecord> = read_records(&d.join("s.jsonl"));
    let ids: Vec<Option<String>> = scores.iter().map(|r| r.id.clone()).collect();
    assert_eq!(ids, expected);

    let mut predict = vec!["predict", "--model", "m.json", "--out", "p.jsonl"];
    predict.extend_from_slice(&common);
    predict.extend_from_slice(&id);
    kilter(d, &predict).expect_status(0);
    let predicted: Vec<serde_json::Value> = read_records(&d.join("p.jsonl"));
    for (r, record) in predicted.iter().enumerate() {
        assert_eq!(record["row"], r);
        assert_eq!(record["id"], id_of(r).as_str());
    }

    let mut baseline = vec![
        "--quiet",
        "baseline",
        "--profile",
        "w.kprofile",
        "--model",
        "m.json",
        "--candidates",
        "zero,mean",
        "--out",
        "b.jsonl",
        "--report",
        "b.html",
    ];
    baseline.extend_from_slice(&common);
    baseline.extend_from_slice(&AUDIT_SETTINGS);
    baseline.extend_from_slice(&id);
    kilter(d, &baseline).expect_status(0);
    let ranked: Vec<BaselineRecord> = read_records(&d.join("b.jsonl"));
    let ids: Vec<Option<String>> = ranked.iter().map(|r| r.id.clone()).collect();
    assert_eq!(ids, expected);
    for record in &ranked {
        assert_eq!(record.schema, "kilter.baseline/2");
        assert_eq!((record.seed, record.alpha), (3, 0.01));
    }
    let html = std::fs::read_to_string(d.join("b.html")).unwrap();
    assert!(html.contains("w-4 (row 4)"), "the report names rows by id");

    let run = audit(
        d,
        &[
            "--id-column",
            "sample",
            "--out",
            "a.jsonl",
            "--report",
            "a.html",
            "--alpha",
            "0.05",
        ],
    );
    run.expect_status(0);
    let audited: Vec<AuditRecord> = read_records(&d.join("a.jsonl"));
    let ids: Vec<Option<String>> = audited.iter().map(|r| r.id.clone()).collect();
    assert_eq!(ids, expected);
    for record in &audited {
        assert_eq!(record.schema, "kilter.audit/2");
        assert_eq!((record.seed, record.alpha), (3, 0.05));
        assert_eq!(
            record.groups, features,
            "one group per wine feature, in order"
        );
    }
    let html = std::fs::read_to_string(d.join("a.html")).unwrap();
    assert!(
        html.contains("lot 3, cask 2 (row 2)"),
        "the report names rows by id"
    );

    // Without --id-column there is no id field (the id column must then be dropped as a
    // label to leave numbers only).
    let run = audit(
        d,
        &[
            "--label-column",
            "sample",
            "--out",
            "plain.jsonl",
            "--alpha",
            "0.05",
        ],
    );
    run.expect_status(0);
    let plain: Vec<AuditRecord> = read_records(&d.join("plain.jsonl"));
    assert!(plain.iter().all(|r| r.id.is_none()));
    let text = std::fs::read_to_string(d.join("plain.jsonl")).unwrap();
    assert!(!text.contains("\"id\""));
    // The same numbers either way: ids are labels.
    for (a, b) in audited.iter().zip(&plain) {
        assert_eq!(a.families, b.families);
    }
}

#[test]
fn explanations_join_by_id_in_any_row_and_column_order() {
    let dir = temp_dir();
    let d = dir.path();
    let features = prepare(d);
    let g = features.len();
    let in_order: Vec<usize> = (0..ROWS).collect();
    let shuffled = [4, 0, 5, 2, 1, 3];
    let columns: Vec<usize> = (0..g).collect();
    let reversed: Vec<usize> = (0..g).rev().collect();
    let unnamed: Vec<String> = (0..g).map(|c| format!("e{c}")).collect();

    // Reference: by position, columns in group order under names that are not groups.
    write_explanations(&d.join("pos.csv"), &unnamed, &columns, &in_order, false);
    // By id: rows shuffled, columns reversed but named by group.
    write_explanations(&d.join("ids.csv"), &features, &reversed, &shuffled, true);
    // By position, columns reversed and named by group.
    write_explanations(&d.join("named.csv"), &features, &reversed, &in_order, false);

    let mut records = Vec::new();
    for file in ["pos.csv", "ids.csv", "named.csv"] {
        let out = format!("{file}.jsonl");
        audit(
            d,
            &[
                "--quiet",
                "--id-column",
                "sample",
                "--explanations",
                file,
                "--out",
                &out,
            ],
        )
        .expect_status(0);
        let got: Vec<AuditRecord> = read_records(&d.join(&out));
        assert_eq!(got.len(), ROWS);
        assert!(got.iter().all(|r| r.supplied.is_some()));
        records.push(got);
    }
    assert_eq!(records[1], records[0], "joined by id = joined by position");
    assert_eq!(records[2], records[0], "columns matched by group name");
    // The supplied values did reach the audit: a different file gives other agreement.
    write_explanations(&d.join("other.csv"), &unnamed, &columns, &shuffled, false);
    audit(
        d,
        &[
            "--quiet",
            "--id-column",
            "sample",
            "--explanations",
            "other.csv",
            "--out",
            "o.jsonl",
        ],
    )
    .expect_status(0);
    let other: Vec<AuditRecord> = read_records(&d.join("o.jsonl"));
    assert_ne!(other, records[0]);
    // The summary and the --fail-under message name rows by id.
    let lowest = other
        .iter()
        .min_by(|a, b| a.reliability.total_cmp(&b.reliability))
        .unwrap();
    assert!(lowest.reliability < 0.7, "made-up explanations score low");
    let named = format!("{} (row {}): ", id_of(lowest.row), lowest.row);
    let run = audit(
        d,
        &[
            "--id-column",
            "sample",
            "--explanations",
            "other.csv",
            "--fail-under",
            "0.99",
        ],
    );
    run.expect_status(3).expect_stderr(&[
        &format!("    {named}"),
        &format!(
            "lowest {:.3}, {}",
            lowest.reliability,
            &named[..named.len() - 2]
        ),
    ]);
}

#[test]
fn ids_that_do_not_pair_up_are_named() {
    let dir = temp_dir();
    let d = dir.path();
    let features = prepare(d);
    let columns: Vec<usize> = (0..features.len()).collect();
    // The input's row 3 ("w-3") has no explanation.
    write_explanations(
        &d.join("missing.csv"),
        &features,
        &columns,
        &[0, 1, 2, 4, 5],
        true,
    );
    // An explanation for a row the input does not have.
    write_explanations(
        &d.join("extra.csv"),
        &features,
        &columns,
        &[0, 1, 2, 3, 4, 5],
        true,
    );
    let mut text = std::fs::read_to_string(d.join("extra.csv")).unwrap();
    text += &format!("w-99,{}\n", vec!["1.0"; features.len()].join(","));
    std::fs::write(d.join("extra.csv"), text).unwrap();
    // "w-5" twice (and "w-4" absent, which is reported second).
    write_explanations(
        &d.join("twice.csv"),
        &features,
        &columns,
        &[0, 1, 2, 3, 5, 5],
        true,
    );
    for (file, fragments) in [
        (
            "missing.csv",
            vec!["missing.csv", "\"w-3\"", "row 4 of in.csv"],
        ),
        ("extra.csv", vec!["extra.csv", "row 7", "\"w-99\""]),
        ("twice.csv", vec!["twice.csv", "rows 5 and 6", "\"w-5\""]),
    ] {
        audit(
            d,
            &[
                "--id-column",
                "sample",
                "--explanations",
                file,
                "--out",
                "a.jsonl",
            ],
        )
        .expect_status(2)
        .expect_stderr(&fragments);
        assert!(!d.join("a.jsonl").exists(), "{file}: no records file");
    }
    // A duplicated id in the input is named too.
    write_explanations(
        &d.join("all.csv"),
        &features,
        &columns,
        &[0, 1, 2, 3, 4, 5],
        true,
    );
    let input = std::fs::read_to_string(d.join("in.csv")).unwrap();
    std::fs::write(d.join("in.csv"), input.replace("w-4,", "w-1,")).unwrap();
    audit(
        d,
        &[
            "--id-column",
            "sample",
            "--explanations",
            "all.csv",
            "--out",
            "a.jsonl",
        ],
    )
    .expect_status(2)
    .expect_stderr(&["in.csv", "rows 2 and 5", "\"w-1\""]);
    // Without ids in the explanations, rows pair by position and their counts must match.
    write_explanations(&d.join("short.csv"), &features, &columns, &[0, 1, 2], false);
    audit(
        d,
        &[
            "--id-column",
            "sample",
            "--explanations",
            "short.csv",
            "--out",
            "a.jsonl",
        ],
    )
    .expect_status(2)
    .expect_stderr(&["short.csv", "holds 3 rows"]);
}

#[test]
fn csv_records_name_attribution_columns_by_group() {
    let dir = temp_dir();
    let d = dir.path();
    let features = prepare(d);
    audit(d, &["--quiet", "--id-column", "sample", "--out", "a.csv"]).expect_status(0);
    let mut reader = csv::Reader::from_path(d.join("a.csv")).unwrap();
    let header: Vec<String> = reader.headers().unwrap().iter().map(String::from).collect();
    for family in ["deletion", "replacement", "interpolation"] {
        for name in &features {
            let column = format!("families.{family}.attribution.{name}");
            assert!(header.contains(&column), "{column} missing from {header:?}");
        }
        assert!(!header.contains(&format!("families.{family}.attribution.0")));
    }
    for column in ["schema", "row", "id", "seed", "alpha", "groups"] {
        assert!(header.contains(&column.to_string()), "{column} missing");
    }
    let rows: Vec<csv::StringRecord> = reader.records().map(Result::unwrap).collect();
    assert_eq!(rows.len(), ROWS);
    let at = |name: &str| header.iter().position(|h| h == name).unwrap();
    assert_eq!(&rows[2][at("id")], "lot 3, cask 2");
    assert_eq!(&rows[2][at("schema")], "kilter.audit/2");
}

#[test]
fn the_findings_file_has_a_line_per_row_matching_its_record() {
    let dir = temp_dir();
    let d = dir.path();
    let features = prepare(d);
    let columns: Vec<usize> = (0..features.len()).collect();
    write_explanations(
        &d.join("e.csv"),
        &features,
        &columns,
        &[5, 4, 3, 2, 1, 0],
        true,
    );
    let flags = [
        "--quiet",
        "--id-column",
        "sample",
        "--explanations",
        "e.csv",
        "--out",
        "a.jsonl",
    ];
    let mut with = flags.to_vec();
    with.extend(["--findings", "f.csv"]);
    audit(d, &with).expect_status(0);
    let records: Vec<AuditRecord> = read_records(&d.join("a.jsonl"));
    let mut reader = csv::Reader::from_path(d.join("f.csv")).unwrap();
    assert_eq!(
        reader.headers().unwrap().iter().collect::<Vec<_>>(),
        [
            "row",
            "id",
            "verdict",
            "reliability",
            "finding",
            "groups_blamed",
            "reason"
        ]
    );
    let lines: Vec<csv::StringRecord> = reader.records().map(Result::unwrap).collect();
    assert_eq!(lines.len(), records.len());
    let mut named = 0;
    for (line, record) in lines.iter().zip(&records) {
        assert_eq!(line[0].parse::<usize>().unwrap(), record.row);
        assert_eq!(Some(&line[1]), record.id.as_deref());
        let verdict = serde_json::to_value(record.verdict).unwrap();
        assert_eq!(line[2], *verdict.as_str().unwrap());
        assert_eq!(line[3].parse::<f64>().unwrap(), record.reliability);
        match record.findings.first() {
            Some(first) => {
                named += 1;
                assert_eq!(&line[4], first.code);
                assert_eq!(line[5], first.groups.join(";"));
                assert_eq!(&line[6], first.reason);
            }
            None => assert!(line[4].is_empty() && line[5].is_empty() && line[6].is_empty()),
        }
    }
    assert!(named > 0, "made-up explanations draw findings");
    // Without ids the id column stays, empty.
    audit(
        d,
        &[
            "--quiet",
            "--label-column",
            "sample",
            "--findings",
            "plain.csv",
        ],
    )
    .expect_status(0);
    let mut reader = csv::Reader::from_path(d.join("plain.csv")).unwrap();
    let first = reader.records().next().unwrap().unwrap();
    assert_eq!((&first[0], &first[1]), ("0", ""));
    // The findings file is checked like any output, before any work.
    for (path, message) in [
        ("in.csv", "is also an input"),
        ("e.csv", "is also an input"),
        ("b.csv", "is also an input"),
        ("f.txt", "--findings"),
        ("no/such/f.csv", "does not exist"),
    ] {
        let mut args = flags.to_vec();
        args[6] = "b.csv";
        args.extend(["--findings", path]);
        audit(d, &args).expect_status(2).expect_stderr(&[message]);
        assert!(!d.join("b.csv").exists());
    }
}
