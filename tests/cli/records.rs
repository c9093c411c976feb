//! Record output: JSON Lines and CSV, stdout, and output paths checked before any work.

use crate::harness::{fit_wine, kilter, listing, read_scores, repo, temp_dir};

#[test]
fn jsonl_csv_and_stdout_carry_the_same_records() {
    let dir = temp_dir();
    fit_wine(dir.path(), &["--holdout", "0"]);
    let wine = repo("reference-corpora/wine.csv");
    let input = wine.to_str().unwrap();
    let base = [
        "score",
        "--profile",
        "w.kprofile",
        "--input",
        input,
        "--label-column",
        "cultivar",
    ];
    let stdout = kilter(dir.path(), &base);
    stdout.expect_status(0);
    let mut args = base.to_vec();
    args.extend(["--out", "s.jsonl"]);
    kilter(dir.path(), &args).expect_status(0);
    assert_eq!(
        std::fs::read_to_string(dir.path().join("s.jsonl")).unwrap(),
        stdout.stdout
    );
    let records = read_scores(&dir.path().join("s.jsonl"));
    assert_eq!(records.len(), 178);
    assert!(records.iter().enumerate().all(|(i, r)| r.row == i));

    let mut args = base.to_vec();
    args.extend(["--out", "s.csv"]);
    kilter(dir.path(), &args).expect_status(0);
    let csv = std::fs::read_to_string(dir.path().join("s.csv")).unwrap();
    let mut lines = csv.lines();
    assert_eq!(
        lines.next().unwrap(),
        "row,mahalanobis_d2,chi2_p,knn_kth,knn_mean,lof,p_mahalanobis,p_knn,p_combined,off_manifold"
    );
    let first: Vec<&str> = lines.next().unwrap().split(',').collect();
    assert_eq!(first[0], "0");
    let d2: f64 = first[1].parse().unwrap();
    assert_eq!(d2, records[0].mahalanobis_d2);
    assert_eq!(csv.lines().count(), 179);
}

#[test]
fn alpha_sets_the_flag() {
    let dir = temp_dir();
    fit_wine(dir.path(), &["--holdout", "0"]);
    let wine = repo("reference-corpora/wine.csv");
    let run = kilter(
        dir.path(),
        &[
            "score",
            "--profile",
            "w.kprofile",
            "--input",
            wine.to_str().unwrap(),
            "--label-column",
            "cultivar",
            "--alpha",
            "0.5",
            "--out",
            "s.jsonl",
        ],
    );
    run.expect_status(0);
    let records = read_scores(&dir.path().join("s.jsonl"));
    assert!(records
        .iter()
        .all(|r| r.off_manifold == (r.p_combined < 0.5)));
    assert!(records.iter().any(|r| r.off_manifold) && records.iter().any(|r| !r.off_manifold));
    kilter(
        dir.path(),
        &[
            "score",
            "--profile",
            "w.kprofile",
            "--input",
            wine.to_str().unwrap(),
            "--alpha",
            "1.5",
        ],
    )
    .expect_status(2)
    .expect_stderr(&["--alpha"]);
}

#[test]
fn bad_output_paths_are_refused_before_any_work() {
    let dir = temp_dir();
    fit_wine(dir.path(), &["--holdout", "0"]);
    let wine = repo("reference-corpora/wine.csv");
    let input = wine.to_str().unwrap();
    let before = listing(dir.path());
    for (out, message) in [
        ("no/such/dir/s.jsonl", "does not exist"),
        ("w.kprofile", "is also an input"),
        ("s.txt", ".jsonl (JSON Lines) or .csv"),
    ] {
        kilter(
            dir.path(),
            &[
                "score",
                "--profile",
                "w.kprofile",
                "--input",
                input,
                "--label-column",
                "cultivar",
                "--out",
                out,
            ],
        )
        .expect_status(2)
        .expect_stderr(&[message]);
    }
    // fit refuses to overwrite its own reference.
    std::fs::copy(&wine, dir.path().join("ref.csv")).unwrap();
    let before_ref = std::fs::read(dir.path().join("ref.csv")).unwrap();
    kilter(
        dir.path(),
        &[
            "fit",
            "--reference",
            "ref.csv",
            "--label-column",
            "cultivar",
            "--out",
            "./ref.csv",
        ],
    )
    .expect_status(2)
    .expect_stderr(&["is also an input"]);
    assert_eq!(
        std::fs::read(dir.path().join("ref.csv")).unwrap(),
        before_ref
    );
    let mut expected = before.clone();
    expected.push("ref.csv".into());
    expected.sort();
    assert_eq!(listing(dir.path()), expected, "no stray files");
}

/// The README prints the reliability formula; the code's own text of it is the source.
#[test]
fn the_readme_prints_the_reliability_formula_the_code_states() {
    let readme = std::fs::read_to_string(repo("README.md")).unwrap();
    assert!(
        readme.contains(kilter::audit::reliability::FORMULA),
        "README.md's reliability formula differs from kilter::audit::reliability::FORMULA"
    );
}
