//! `fit` and `score` against golden values from scikit-learn and scipy.
//!
//! Source: `tests/golden/generate.py` (scikit-learn's EmpiricalCovariance, LedoitWolf,
//! StandardScaler, PCA, NearestNeighbors, LocalOutlierFactor in novelty mode; scipy's
//! chi2.sf), run on the UCI wine and breast-cancer corpora split into fit and query rows;
//! library versions in `tests/golden/versions.txt`.

use serde::Deserialize;

use kilter::corpus::{read_matrix, CsvOptions};
use kilter::embedding::EmbeddingSpec;
use kilter::neighbours::IndexChoice;
use kilter::profile::ProfileSettings;
use kilter::stats::CovarianceMethod;

use crate::harness::{kilter, read_scores, repo, temp_dir};
use crate::tolerance::{
    relative_difference, GOLDEN_RELATIVE, ILL_CONDITIONED_RELATIVE, P_VALUE_ABSOLUTE,
};

#[derive(Deserialize)]
struct Golden {
    config: GoldenConfig,
    shrinkage: Option<f64>,
    embedded_dim: usize,
    n_fit: usize,
    location: Vec<f64>,
    covariance: Vec<Vec<f64>>,
    covariance_condition_number: f64,
    cal_mahalanobis: Vec<f64>,
    cal_knn: Vec<f64>,
    near_ties: Vec<serde_json::Value>,
    rows: Vec<GoldenRow>,
}

#[derive(Deserialize)]
struct GoldenConfig {
    embed: String,
    covariance: String,
    k: usize,
}

#[derive(Deserialize)]
struct GoldenRow {
    row: usize,
    mahalanobis_d2: f64,
    chi2_p: f64,
    knn_kth: f64,
    knn_mean: f64,
    lof: f64,
    p_mahalanobis: f64,
    p_knn: f64,
    p_combined: f64,
    off_manifold: bool,
}

const CONFIGS: [&str; 6] = [
    "none_empirical_k10",
    "none_ledoit-wolf_k10",
    "standardize_empirical_k10",
    "standardize_ledoit-wolf_k10",
    "pca5_ledoit-wolf_k10",
    "standardize_ledoit-wolf_k3",
];

fn label_column(corpus: &str) -> &'static str {
    match corpus {
        "wine" => "cultivar",
        _ => "diagnosis",
    }
}

fn load(corpus: &str, config: &str) -> Golden {
    let path = repo(&format!("tests/golden/{corpus}_{config}.json"));
    serde_json::from_str(&std::fs::read_to_string(&path).expect("golden file"))
        .expect("golden JSON")
}

fn tolerance(golden: &Golden) -> f64 {
    if golden.covariance_condition_number > 1e10 {
        ILL_CONDITIONED_RELATIVE
    } else {
        GOLDEN_RELATIVE
    }
}

/// Runs `kilter fit` and `kilter score` as a user would and compares every field.
fn check_scores(corpus: &str, config: &str) {
    let golden = load(corpus, config);
    let dir = temp_dir();
    let fit = repo(&format!("tests/golden/{corpus}_fit.csv"));
    let query = repo(&format!("tests/golden/{corpus}_query.csv"));
    let k = golden.config.k.to_string();
    kilter(
        dir.path(),
        &[
            "fit",
            "--reference",
            fit.to_str().unwrap(),
            "--label-column",
            label_column(corpus),
            "--embed",
            &golden.config.embed,
            "--covariance",
            &golden.config.covariance,
            "--k",
            &k,
            "--holdout",
            "0",
            "--out",
            "p.kprofile",
        ],
    )
    .expect_status(0);
    kilter(
        dir.path(),
        &[
            "score",
            "--profile",
            "p.kprofile",
            "--input",
            query.to_str().unwrap(),
            "--label-column",
            label_column(corpus),
            "--out",
            "s.jsonl",
        ],
    )
    .expect_status(0);
    let records = read_scores(&dir.path().join("s.jsonl"));
    assert_eq!(records.len(), golden.rows.len());
    let tol = tolerance(&golden);
    let mut worst = 0.0_f64;
    for (got, want) in records.iter().zip(&golden.rows) {
        assert_eq!(got.row, want.row);
        for (field, a, b) in [
            ("mahalanobis_d2", got.mahalanobis_d2, want.mahalanobis_d2),
            ("chi2_p", got.chi2_p, want.chi2_p),
            ("knn_kth", got.knn_kth, want.knn_kth),
            ("knn_mean", got.knn_mean, want.knn_mean),
            ("lof", got.lof, want.lof),
        ] {
            let rel = relative_difference(a, b);
            worst = worst.max(rel);
            assert!(
                rel <= tol,
                "{corpus} {config} row {}: {field} is {a}, scikit-learn/scipy say {b} (relative {rel:.2e} > {tol:.0e})",
                want.row
            );
        }
        assert!(
            golden.near_ties.is_empty(),
            "near ties need per-row handling"
        );
        for (field, a, b) in [
            ("p_mahalanobis", got.p_mahalanobis, want.p_mahalanobis),
            ("p_knn", got.p_knn, want.p_knn),
            ("p_combined", got.p_combined, want.p_combined),
        ] {
            assert!(
                (a - b).abs() <= P_VALUE_ABSOLUTE,
                "{corpus} {config} row {}: {field} is {a}, expected {b}",
                want.row
            );
        }
        assert_eq!(got.off_manifold, want.off_manifold, "row {}", want.row);
    }
    eprintln!("{corpus} {config}: largest relative difference {worst:.2e}");
}

/// The fitted statistics themselves, through the library: location, covariance,
/// the Ledoit-Wolf intensity and the sorted calibration scores.
fn check_fitted(corpus: &str, config: &str) {
    let golden = load(corpus, config);
    let options = CsvOptions {
        id_columns: vec![],
        label_columns: vec![label_column(corpus).to_string()],
    };
    let reference =
        read_matrix(&repo(&format!("tests/golden/{corpus}_fit.csv")), &options).unwrap();
    let settings = ProfileSettings {
        embed: golden.config.embed.parse::<EmbeddingSpec>().unwrap(),
        covariance: golden
            .config
            .covariance
            .parse::<CovarianceMethod>()
            .unwrap(),
        k: golden.config.k,
        holdout: 0.0,
        seed: 0,
        // The k-d tree for the 5-dimensional PCA cases, the brute force for the rest:
        // both must give scikit-learn's neighbours.
        index: IndexChoice::Auto,
    };
    let profile = settings.fit(&reference).unwrap();
    assert_eq!(profile.fitted_rows(), golden.n_fit);
    assert_eq!(profile.embedded_dim(), golden.embedded_dim);
    match (profile.shrinkage(), golden.shrinkage) {
        (Some(a), Some(b)) => assert!(
            relative_difference(a, b) <= GOLDEN_RELATIVE,
            "{corpus} {config}: shrinkage {a}, scikit-learn {b}"
        ),
        (None, None) => {}
        other => panic!("{corpus} {config}: shrinkage {other:?}"),
    }
    let estimate = profile.estimate();
    let scale = estimate
        .covariance
        .iter()
        .fold(0.0_f64, |m, v| m.max(v.abs()));
    for (i, row) in golden.covariance.iter().enumerate() {
        for (j, &want) in row.iter().enumerate() {
            let got = estimate.covariance[[i, j]];
            // PCA components carry an arbitrary sign: compare the covariance of the
            // projections up to the sign of each off-diagonal entry.
            let got = if golden.config.embed.starts_with("pca") {
                got.abs()
            } else {
                got
            };
            let want = if golden.config.embed.starts_with("pca") {
                want.abs()
            } else {
                want
            };
            assert!(
                (got - want).abs() <= GOLDEN_RELATIVE * scale,
                "{corpus} {config}: covariance[{i}][{j}] {got} vs {want}"
            );
        }
        let loc = estimate.location[i];
        assert!(
            (loc.abs() - golden.location[i].abs()).abs()
                <= GOLDEN_RELATIVE * golden.location[i].abs().max(1.0),
            "{corpus} {config}: location[{i}] {loc} vs {}",
            golden.location[i]
        );
    }
    let tol = tolerance(&golden);
    for (name, got, want) in [
        (
            "mahalanobis",
            profile.calibration_mahalanobis().sorted(),
            &golden.cal_mahalanobis,
        ),
        ("knn", profile.calibration_knn().sorted(), &golden.cal_knn),
    ] {
        assert_eq!(got.len(), want.len());
        for (a, b) in got.iter().zip(want) {
            assert!(
                relative_difference(*a, *b) <= tol,
                "{corpus} {config}: calibration {name} {a} vs {b}"
            );
        }
    }
}

macro_rules! golden_tests {
    ($($name:ident: $corpus:literal, $config:literal;)*) => {$(
        #[test]
        fn $name() {
            check_scores($corpus, $config);
            check_fitted($corpus, $config);
        }
    )*};
}

golden_tests! {
    wine_none_empirical: "wine", "none_empirical_k10";
    wine_none_ledoit_wolf: "wine", "none_ledoit-wolf_k10";
    wine_standardize_empirical: "wine", "standardize_empirical_k10";
    wine_standardize_ledoit_wolf: "wine", "standardize_ledoit-wolf_k10";
    wine_pca5_ledoit_wolf: "wine", "pca5_ledoit-wolf_k10";
    wine_standardize_ledoit_wolf_k3: "wine", "standardize_ledoit-wolf_k3";
    breast_cancer_none_empirical: "breast_cancer", "none_empirical_k10";
    breast_cancer_none_ledoit_wolf: "breast_cancer", "none_ledoit-wolf_k10";
    breast_cancer_standardize_empirical: "breast_cancer", "standardize_empirical_k10";
    breast_cancer_standardize_ledoit_wolf: "breast_cancer", "standardize_ledoit-wolf_k10";
    breast_cancer_pca5_ledoit_wolf: "breast_cancer", "pca5_ledoit-wolf_k10";
    breast_cancer_standardize_ledoit_wolf_k3: "breast_cancer", "standardize_ledoit-wolf_k3";
}

#[test]
fn every_golden_configuration_is_tested() {
    for corpus in ["wine", "breast_cancer"] {
        for config in CONFIGS {
            assert!(repo(&format!("tests/golden/{corpus}_{config}.json")).exists());
        }
    }
}
