//! Encoder embeddings: `kilter fit --embed onnx:FILE` measures every distance in the
//! encoder's output space (feature-space Mahalanobis distance, Lee, Lee, Lee & Shin 2018,
//! NeurIPS), and the profile keeps the encoder so that it stays self-contained.
//!
//! The encoder under test is scikit-learn's StandardScaler + PCA(5) exported to ONNX by
//! `tests/golden/models/generate_models.py` (scikit-learn 1.9.1, skl2onnx 1.20.0): its
//! distances must equal those of kilter's own `--embed pca:5`, and scikit-learn's golden
//! values for the same configuration (`tests/golden/breast_cancer_pca5_ledoit-wolf_k10.json`).

use kilter::profile::ScoreRecord;
use serde::Deserialize;

use crate::harness::{kilter, read_scores, repo, temp_dir};
use crate::tolerance::{relative_difference, FLOAT32_ENCODER_RELATIVE};

fn fit_and_score(dir: &std::path::Path, embed: &str, name: &str) -> Vec<ScoreRecord> {
    let fit = repo("tests/golden/breast_cancer_fit.csv");
    let query = repo("tests/golden/breast_cancer_query.csv");
    let profile = format!("{name}.kprofile");
    let scores = format!("{name}.jsonl");
    let run = kilter(
        dir,
        &[
            "fit",
            "--reference",
            fit.to_str().unwrap(),
            "--label-column",
            "diagnosis",
            "--embed",
            embed,
            "--holdout",
            "0",
            "--out",
            &profile,
        ],
    );
    run.expect_status(0);
    assert!(
        run.stdout.contains("30 features -> 5 dimensions"),
        "{}",
        run.stdout
    );
    kilter(
        dir,
        &[
            "score",
            "--profile",
            &profile,
            "--input",
            query.to_str().unwrap(),
            "--label-column",
            "diagnosis",
            "--out",
            &scores,
        ],
    )
    .expect_status(0);
    read_scores(&dir.join(scores))
}

#[derive(Deserialize)]
struct GoldenRows {
    rows: Vec<GoldenRow>,
}

#[derive(Deserialize)]
struct GoldenRow {
    mahalanobis_d2: f64,
    knn_kth: f64,
    knn_mean: f64,
    lof: f64,
}

#[test]
#[cfg_attr(not(feature = "onnx"), ignore = "needs the onnx feature")]
fn a_pca_encoder_gives_the_distances_of_pca_embedding() {
    let dir = temp_dir();
    // Copy the encoder in, fit, then delete it: scoring must need only the profile.
    let encoder = dir.path().join("pca5.onnx");
    std::fs::copy(repo("tests/golden/models/pca5_encoder.onnx"), &encoder).unwrap();
    let through_encoder = fit_and_score(dir.path(), "onnx:pca5.onnx", "encoder");
    std::fs::remove_file(&encoder).unwrap();
    let again = kilter(
        dir.path(),
        &[
            "score",
            "--profile",
            "encoder.kprofile",
            "--input",
            repo("tests/golden/breast_cancer_query.csv")
                .to_str()
                .unwrap(),
            "--label-column",
            "diagnosis",
        ],
    );
    again.expect_status(0);

    let built_in = fit_and_score(dir.path(), "pca:5", "builtin");
    let golden: GoldenRows = serde_json::from_str(
        &std::fs::read_to_string(repo("tests/golden/breast_cancer_pca5_ledoit-wolf_k10.json"))
            .unwrap(),
    )
    .unwrap();
    let mut worst = 0.0_f64;
    for ((a, b), g) in through_encoder.iter().zip(&built_in).zip(&golden.rows) {
        for (field, x, y, z) in [
            (
                "mahalanobis_d2",
                a.mahalanobis_d2,
                b.mahalanobis_d2,
                g.mahalanobis_d2,
            ),
            ("knn_kth", a.knn_kth, b.knn_kth, g.knn_kth),
            ("knn_mean", a.knn_mean, b.knn_mean, g.knn_mean),
            ("lof", a.lof, b.lof, g.lof),
        ] {
            let rel = relative_difference(x, y).max(relative_difference(x, z));
            worst = worst.max(rel);
            assert!(
                rel <= FLOAT32_ENCODER_RELATIVE,
                "row {}: {field} through the encoder {x}, pca:5 {y}, scikit-learn {z}",
                a.row
            );
        }
    }
    eprintln!("encoder vs pca:5 and scikit-learn: largest relative difference {worst:.2e}");
}

#[test]
fn encoder_settings_are_checked() {
    let dir = temp_dir();
    let fit = repo("tests/golden/breast_cancer_fit.csv");
    let base = [
        "fit",
        "--reference",
        fit.to_str().unwrap(),
        "--label-column",
        "diagnosis",
        "--out",
        "p.kprofile",
    ];
    let mut args = base.to_vec();
    args.extend(["--embed", "onnx:"]);
    kilter(dir.path(), &args)
        .expect_status(2)
        .expect_stderr(&["--embed"]);
    let mut args = base.to_vec();
    args.extend(["--embed", "onnx:absent.onnx"]);
    kilter(dir.path(), &args)
        .expect_status(2)
        .expect_stderr(&["absent.onnx"]);
    assert!(!dir.path().join("p.kprofile").exists());
}
