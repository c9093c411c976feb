//! Feature kinds on a real table: the RAND Health Insurance Experiment sample
//! (reference-corpora/randhie_sample.csv, public domain, from statsmodels; provenance in
//! reference-corpora/PROVENANCE.md). Its columns are a count of visits (`mdvis`), a
//! binary indicator (`idp`), and self-rated health one-hot encoded with "excellent" left
//! out (`hlthg`, `hlthf`, `hlthp`), as the statsmodels documentation of the dataset
//! describes them; the rest are continuous. The model is scikit-learn's logistic
//! regression over them (tests/models/make_randhie.py, versions beside it).
//!
//! Checked: the kinds read off the data; replacement draws that are values each column
//! takes (a Gaussian draws 0.4 of a yes/no column; that is common practice, not a
//! source); `--sampler auto` choosing and saying so; a fill that sets columns to values
//! they never take named as such.

use kilter::corpus::{read_matrix, CsvOptions};
use kilter::perturbation::{ConditionalGaussian, NearestRows, PerturbationFamily};
use kilter::profile::{FeatureKind, ProfileSettings};
use ndarray::Array2;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

use crate::harness::{kilter, read_records, repo, temp_dir};
use kilter::audit::AuditRecord;

fn sample_path() -> std::path::PathBuf {
    repo("reference-corpora/randhie_sample.csv")
}

fn options() -> CsvOptions {
    CsvOptions {
        id_columns: Vec::new(),
        label_columns: vec!["limited".into()],
    }
}

#[test]
fn the_kinds_of_a_real_tables_columns_are_read_off_the_data() {
    let table = read_matrix(&sample_path(), &options()).unwrap();
    let profile = ProfileSettings::default().fit(&table).unwrap();
    let kinds = profile.feature_distribution().unwrap().kinds();
    use FeatureKind::*;
    assert_eq!(
        kinds.kinds(),
        &[
            Integer,
            Continuous,
            Binary,
            Continuous,
            Continuous,
            Continuous,
            OneHot(0),
            OneHot(0),
            OneHot(0)
        ]
    );
    assert!(
        kinds.blocks()[0].has_reference_level,
        "excellent health is left out"
    );
}

#[test]
fn replacement_draws_are_values_each_column_takes() {
    let table = read_matrix(&sample_path(), &options()).unwrap();
    let profile = ProfileSettings::default().fit(&table).unwrap();
    let reference = profile.feature_distribution().unwrap();
    let kinds = reference.kinds();
    let gaussian = ConditionalGaussian::new(
        reference.location().clone(),
        reference.covariance().clone(),
        4,
    )
    .with_kinds(kinds);
    let neighbours = NearestRows::new(
        std::sync::Arc::new(reference.rows().to_owned()),
        reference.scale(),
        4,
    );
    let mut rng = ChaCha8Rng::seed_from_u64(7);
    let d = 9;
    for (name, family) in [
        ("gaussian", &gaussian as &dyn PerturbationFamily),
        ("neighbours", &neighbours as &dyn PerturbationFamily),
    ] {
        for r in (0..table.rows()).step_by(97) {
            // Every pattern that keeps one column and masks the rest, and the reverse.
            for c in 0..d {
                for keep_only in [true, false] {
                    let kept: Vec<bool> = (0..d).map(|i| (i == c) == keep_only).collect();
                    let mut out = Array2::zeros((4, d));
                    family
                        .fill(table.values.row(r), &kept, &mut rng, out.view_mut())
                        .unwrap();
                    for draw in out.rows() {
                        for (i, v) in draw.iter().enumerate() {
                            assert!(kinds.admits(i, *v), "{name}: column {i} drawn as {v}");
                        }
                        let health: f64 = draw.iter().skip(6).sum();
                        assert!(health == 0.0 || health == 1.0, "{name}: {draw}");
                    }
                }
            }
        }
    }
}

fn audit(dir: &std::path::Path, extra: &[&str]) -> (Vec<AuditRecord>, String) {
    let model = repo("tests/models/randhie_logistic.json");
    let mut args = vec![
        "audit",
        "--profile",
        "r.kprofile",
        "--model",
        model.to_str().unwrap(),
        "--input",
        "q.csv",
        "--label-column",
        "limited",
        "--target",
        "1",
        "--samples",
        "200",
        "--out",
        "a.jsonl",
    ];
    args.extend_from_slice(extra);
    let run = kilter(dir, &args);
    run.expect_status(0);
    (read_records(&dir.join("a.jsonl")), run.stderr.clone())
}

#[test]
fn the_sampler_is_chosen_by_kind_and_an_invalid_fill_is_named() {
    let dir = temp_dir();
    let d = dir.path();
    let sample = sample_path();
    let fit = kilter(
        d,
        &[
            "fit",
            "--reference",
            sample.to_str().unwrap(),
            "--label-column",
            "limited",
            "--out",
            "r.kprofile",
        ],
    );
    fit.expect_status(0);
    assert!(
        fit.stdout
            .contains("feature kinds    binary idp; integer mdvis; one-hot (hlthg, hlthf, hlthp)"),
        "{}",
        fit.stdout
    );
    let text = std::fs::read_to_string(&sample).unwrap();
    let lines: Vec<&str> = text.lines().collect();
    let rows: Vec<&str> = (1..lines.len()).step_by(300).map(|i| lines[i]).collect();
    std::fs::write(
        d.join("q.csv"),
        format!("{}\n{}\n", lines[0], rows.join("\n")),
    )
    .unwrap();

    let (records, stderr) = audit(d, &["--fill", "mean"]);
    assert!(
        stderr.contains(
            "neighbours, chosen for binary idp; coarse integer mdvis; one-hot (hlthg, hlthf, hlthp)"
        ),
        "{stderr}"
    );
    for r in &records {
        assert_eq!(r.families.replacement.fill, "neighbours");
        // Nine features, the health block one group: seven groups.
        assert_eq!(r.families.deletion.attribution.len(), 7);
        let note = r
            .findings
            .iter()
            .find(|f| f.code == "fill-not-a-value")
            .expect("the mean fill is named");
        // Visits are a count with a spread of 4.5: 2.9 visits is not a value it takes.
        for column in ["idp", "hlthg", "mdvis"] {
            assert!(note.reason.contains(column), "{}", note.reason);
        }
    }
    let (records, _) = audit(d, &["--fill", "typical"]);
    for r in &records {
        assert!(r.findings.iter().all(|f| f.code != "fill-not-a-value"));
    }
    // The issue this answers: Gaussian draws for these columns fell further from the
    // data than zero deletion did. Drawn from the nearest rows, they stay close.
    let (records, _) = audit(d, &["--fill", "zero"]);
    let median = |v: &mut Vec<f64>| {
        v.sort_by(f64::total_cmp);
        v[v.len() / 2]
    };
    let replacement = median(
        &mut records
            .iter()
            .map(|r| r.families.replacement.median_p)
            .collect(),
    );
    let deletion = median(
        &mut records
            .iter()
            .map(|r| r.families.deletion.median_p)
            .collect(),
    );
    assert!(
        replacement > deletion,
        "replacement {replacement}, zero deletion {deletion}"
    );
}

#[test]
fn fit_leaves_rows_with_missing_cells_out_and_says_so() {
    // The documented rule: reference rows with a missing cell (empty, NA, n/a, NaN, null,
    // ?) are left out of the profile; rows to score must be complete.
    let dir = temp_dir();
    let d = dir.path();
    let text = std::fs::read_to_string(sample_path()).unwrap();
    let mut lines: Vec<String> = text.lines().map(str::to_string).collect();
    let blank = |line: &str, column: usize, marker: &str| {
        let mut cells: Vec<&str> = line.split(',').collect();
        cells[column] = marker;
        cells.join(",")
    };
    for (row, column, marker) in [(5, 0, ""), (9, 2, "NA"), (11, 2, "n/a"), (40, 6, "NaN")] {
        lines[row] = blank(&lines[row], column, marker);
    }
    std::fs::write(d.join("holes.csv"), lines.join("\n") + "\n").unwrap();
    let fit = kilter(
        d,
        &[
            "fit",
            "--reference",
            "holes.csv",
            "--label-column",
            "limited",
            "--holdout",
            "0",
            "--out",
            "h.kprofile",
        ],
    );
    fit.expect_status(0);
    assert!(
        fit.stdout.contains("reference rows   2996 (2996 fitted)"),
        "{}",
        fit.stdout
    );
    assert!(
        fit.stdout.contains(
            "missing cells    4 reference rows left out (missing cells: idp 2, mdvis 1, hlthg 1)"
        ),
        "{}",
        fit.stdout
    );
    std::fs::write(d.join("q.csv"), format!("{}\n{}\n", lines[0], lines[9])).unwrap();
    kilter(
        d,
        &[
            "score",
            "--profile",
            "h.kprofile",
            "--input",
            "q.csv",
            "--label-column",
            "limited",
        ],
    )
    .expect_status(2)
    .expect_stderr(&["row 1", "column \"idp\"", "must be complete"]);
}
