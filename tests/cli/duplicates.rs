//! The local outlier factor of a reference corpus whose rows repeat.
//!
//! Source: `tests/golden/duplicates/generate_duplicates.py` (scikit-learn's
//! `LocalOutlierFactor` in novelty mode with brute-force neighbours, and kilter's documented
//! definition written out in numpy over scikit-learn's `NearestNeighbors`), run on the wine
//! split of `tests/golden/` (UCI wine); library versions in
//! `tests/golden/duplicates/versions.txt`.
//!
//! The two definitions differ on purpose: scikit-learn counts copies in the k-distance, so
//! a row with k or more copies has a k-distance of 0 and the LOF of its neighbours
//! explodes; kilter takes the k-distance over distinct locations (`src/neighbours/lof.rs`).
//! They coincide when no row repeats.

use std::path::Path;

use serde::Deserialize;

use crate::harness::{kilter, read_scores, repo, temp_dir};
use crate::tolerance::{relative_difference, GOLDEN_RELATIVE};

#[derive(Deserialize)]
struct Golden {
    k: usize,
    copies: Vec<usize>,
    duplicated_rows: usize,
    sklearn_duplicated: Vec<f64>,
    sklearn_distinct: Vec<f64>,
    distinct_k_distance: Vec<f64>,
}

fn golden() -> Golden {
    let text = std::fs::read_to_string(repo("tests/golden/duplicates/duplicates.json"))
        .expect("golden file");
    serde_json::from_str(&text).expect("golden JSON")
}

/// The wine fit rows, row `i` repeated `copies[i]` times (lines copied verbatim).
fn write_duplicated(path: &Path, copies: &[usize]) -> usize {
    let text = std::fs::read_to_string(repo("tests/golden/wine_fit.csv")).expect("wine fit");
    let mut lines = text.lines();
    let mut out = format!("{}\n", lines.next().expect("header"));
    let mut rows = 0;
    for (line, &n) in lines.zip(copies) {
        for _ in 0..n {
            out.push_str(line);
            out.push('\n');
            rows += 1;
        }
    }
    std::fs::write(path, out).expect("write the duplicated corpus");
    rows
}

/// Fits `reference` (standardized, k neighbours, every row fitted) with `index` and
/// scores the wine query rows; their LOF.
fn lof_of_queries(dir: &Path, reference: &Path, k: usize, index: &str) -> Vec<f64> {
    let query = repo("tests/golden/wine_query.csv");
    let k = k.to_string();
    let profile = format!("{index}.kprofile");
    let scores = format!("{index}.jsonl");
    #[rustfmt::skip]
    kilter(dir, &[
        "--quiet", "fit", "--reference", reference.to_str().unwrap(),
        "--label-column", "cultivar", "--k", &k, "--holdout", "0", "--index", index,
        "--out", &profile,
    ])
    .expect_status(0);
    #[rustfmt::skip]
    kilter(dir, &[
        "--quiet", "score", "--profile", &profile, "--input", query.to_str().unwrap(),
        "--label-column", "cultivar", "--out", &scores,
    ])
    .expect_status(0);
    read_scores(&dir.join(&scores))
        .iter()
        .map(|r| r.lof)
        .collect()
}

fn assert_close(got: &[f64], want: &[f64], what: &str) -> f64 {
    assert_eq!(got.len(), want.len());
    let mut worst = 0.0_f64;
    for (row, (a, b)) in got.iter().zip(want).enumerate() {
        let rel = relative_difference(*a, *b);
        worst = worst.max(rel);
        assert!(
            rel <= GOLDEN_RELATIVE,
            "query row {row}: LOF {a}, {what} {b} (relative {rel:.2e})"
        );
    }
    worst
}

/// On 1,479 rows holding 142 distinct ones, scikit-learn's LOF of 26 of the 36 ordinary
/// query rows is above 1e6 (the golden file shows it); kilter's stays of ordinary size and
/// equals its documented definition computed independently, through the exact brute force
/// and the exact k-d tree alike.
#[test]
fn duplicated_rows_leave_the_lof_of_ordinary_rows_ordinary() {
    let golden = golden();
    let exploded = golden
        .sklearn_duplicated
        .iter()
        .filter(|&&v| v > 1e6)
        .count();
    assert!(
        2 * exploded > golden.sklearn_duplicated.len(),
        "the corpus no longer shows the failure: {:?}",
        golden.sklearn_duplicated
    );
    let dir = temp_dir();
    let reference = dir.path().join("duplicated.csv");
    assert_eq!(
        write_duplicated(&reference, &golden.copies),
        golden.duplicated_rows
    );
    for index in ["exact", "tree"] {
        let lof = lof_of_queries(dir.path(), &reference, golden.k, index);
        for (row, (&ours, &theirs)) in lof.iter().zip(&golden.sklearn_duplicated).enumerate() {
            assert!(
                ours.is_finite() && ours < 10.0,
                "{index}: query row {row}: LOF {ours} (scikit-learn, copies counted: {theirs})"
            );
        }
        let worst = assert_close(&lof, &golden.distinct_k_distance, "definition");
        eprintln!(
            "{index}: largest LOF {:.4}, scikit-learn's {:.4e}; largest relative difference \
             from the definition {worst:.2e}",
            lof.iter().fold(0.0_f64, |m, v| m.max(*v)),
            golden
                .sklearn_duplicated
                .iter()
                .fold(0.0_f64, |m, v| m.max(*v)),
        );
    }
}

/// Fitted on the distinct rows alone, where the definitions coincide, kilter's LOF is
/// scikit-learn's.
#[test]
fn distinct_rows_give_scikit_learns_lof() {
    let golden = golden();
    let dir = temp_dir();
    let lof = lof_of_queries(
        dir.path(),
        &repo("tests/golden/wine_fit.csv"),
        golden.k,
        "exact",
    );
    let worst = assert_close(&lof, &golden.sklearn_distinct, "scikit-learn");
    eprintln!("largest relative difference from scikit-learn {worst:.2e}");
}
