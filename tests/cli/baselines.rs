//! `kilter baseline`: baseline candidates ranked on open data.
//!
//! Sources:
//! - Erion, Janizek, Sturmfels, Lundberg & Lee (2021) define expected gradients; that its
//!   attribution of a linear model is `wᵢ (xᵢ - mean of the baselines)` follows from
//!   completeness (Sundararajan, Taly & Yan 2017).
//! - Composite midpoint rule: error O(M⁻²) on a smooth integrand (Abramowitz & Stegun 1964).
//! - Data: the open wine, breast-cancer and digits corpora (reference-corpora/, UCI).

use std::path::Path;

use ndarray::{array, Axis};

use kilter::attribution::{integrated_gradients, QuadratureRule};
use kilter::audit::BaselineRecord;
use kilter::models::FiniteDifference;

use crate::families::linear;
use crate::harness::{kilter, read_records, repo, temp_dir, write_csv};

fn write_model(path: &Path, json: serde_json::Value) {
    crate::harness::write_model(path, &json);
}

fn read_baselines(path: &Path) -> Vec<BaselineRecord> {
    read_records(path)
}

fn head(source: &Path, lines: usize, target: &Path) {
    let text: String = std::fs::read_to_string(source)
        .unwrap()
        .lines()
        .take(lines + 1)
        .map(|l| format!("{l}\n"))
        .collect();
    std::fs::write(target, text).unwrap();
}

/// A smooth logistic-of-tanh network over `d` inputs, with fixed weights.
fn smooth_model(d: usize) -> serde_json::Value {
    let hidden: Vec<Vec<f64>> = (0..4)
        .map(|h| {
            (0..d)
                .map(|i| ((h * 5 + i * 3) % 7) as f64 / 14.0 - 0.2)
                .collect()
        })
        .collect();
    serde_json::json!({
        "format": "kilter-model", "version": 1, "kind": "mlp", "inputs": d,
        "layers": [
            {"weights": hidden, "bias": [0.1, -0.1, 0.2, 0.0], "activation": "tanh"},
            {"weights": [[1.0, -0.8, 0.6, 0.9]], "bias": [0.0], "activation": "sigmoid"}
        ]
    })
}

#[test]
fn expected_gradients_of_a_linear_model_average_the_baselines() {
    // Erion et al. (2021): attributions averaged over baselines x'₁..x'_N. For a linear
    // model each path gives wᵢ (xᵢ - x'ⱼᵢ) (completeness), so the average is
    // wᵢ (xᵢ - mean_j x'ⱼᵢ).
    let w = [1.5, -0.5, 2.0, 0.25];
    let model = linear(&w, 0.1);
    let x = array![1.0, 2.0, -1.0, 0.5];
    let baselines = array![
        [0.0, 0.0, 0.0, 0.0],
        [1.0, -1.0, 2.0, 3.0],
        [-2.0, 0.5, 1.0, -1.0]
    ];
    let mean = baselines.mean_axis(Axis(0)).unwrap();
    let fd = FiniteDifference::new(&[1.0; 4], f64::EPSILON);
    let ig = integrated_gradients(
        &model,
        &fd,
        x.view(),
        baselines.view(),
        0,
        QuadratureRule::Midpoint,
        5,
    )
    .unwrap();
    for i in 0..4 {
        let expected = w[i] * (x[i] - mean[i]);
        assert!((ig.per_feature[i] - expected).abs() < 1e-12, "{i}");
    }
    assert!(ig.completeness_gap < 1e-12);
}

#[test]
fn zero_is_never_recommended_when_the_data_lie_far_from_it() {
    // Wine's raw features have means far from zero (proline about 750, magnesium about
    // 100): the zero vector is off the data, and must never be recommended.
    let dir = temp_dir();
    let d = dir.path();
    let wine = repo("reference-corpora/wine.csv");
    kilter(
        d,
        &[
            "--quiet",
            "fit",
            "--reference",
            wine.to_str().unwrap(),
            "--label-column",
            "cultivar",
            "--holdout",
            "0",
            "--out",
            "w.kprofile",
        ],
    )
    .expect_status(0);
    head(&wine, 12, &d.join("q.csv"));
    // Weights on standardized scales, folded into raw units.
    let scale = [
        0.8, 1.1, 0.3, 3.3, 14.0, 0.6, 1.0, 0.12, 0.57, 2.3, 0.23, 0.7, 315.0,
    ];
    let mean = [
        13.0, 2.3, 2.4, 19.5, 99.7, 2.3, 2.0, 0.36, 1.6, 5.1, 0.96, 2.6, 747.0,
    ];
    let signs = [
        1.0, -0.5, 0.3, -0.8, 0.2, 0.6, 1.0, -0.4, 0.3, 0.9, -0.7, 0.8, 1.2,
    ];
    let weights: Vec<f64> = (0..13).map(|i| signs[i] / scale[i]).collect();
    let bias: f64 = -(0..13).map(|i| weights[i] * mean[i]).sum::<f64>();
    write_model(
        &d.join("m.json"),
        serde_json::json!({
            "format": "kilter-model", "version": 1, "kind": "logistic", "inputs": 13,
            "layers": [{"weights": [weights], "bias": [bias], "activation": "sigmoid"}]
        }),
    );
    kilter(
        d,
        &[
            "baseline",
            "--profile",
            "w.kprofile",
            "--model",
            "m.json",
            "--input",
            "q.csv",
            "--label-column",
            "cultivar",
            "--out",
            "b.jsonl",
        ],
    )
    .expect_status(0)
    .expect_stderr(&["ranked 6 candidates on 12 rows"]);
    let records = read_baselines(&d.join("b.jsonl"));
    assert_eq!(records.len(), 12);
    for r in &records {
        assert_ne!(r.recommended, "zero", "row {}", r.row);
        let zero = r.candidates.iter().find(|c| c.name == "zero").unwrap();
        // 2/179 ≈ 0.0112 is the smallest p of 178 calibration rows: zero is more extreme
        // than every one of them.
        assert!(
            zero.baseline_p < 0.0113,
            "row {}: zero at p {}",
            r.row,
            zero.baseline_p
        );
        assert_eq!(zero.score, 0.0, "row {}", r.row);
        assert_eq!(r.candidates.len(), 6);
        assert_eq!(r.candidates[0].name, r.recommended);
        for pair in r.candidates.windows(2) {
            assert!(pair[0].score >= pair[1].score, "best first");
        }
    }
}

#[test]
fn zero_can_be_recommended_on_standardized_data_centred_at_zero() {
    let dir = temp_dir();
    let d = dir.path();
    let (names, values) = {
        let m = crate::families::breast_cancer_standardized();
        (
            m.names[..6].to_vec(),
            m.values.slice(ndarray::s![.., ..6]).to_owned(),
        )
    };
    write_csv(&d.join("ref.csv"), &names, &values);
    write_csv(
        &d.join("q.csv"),
        &names,
        &values.slice(ndarray::s![..20, ..]).to_owned(),
    );
    kilter(
        d,
        &[
            "--quiet",
            "fit",
            "--reference",
            "ref.csv",
            "--holdout",
            "0",
            "--out",
            "p.kprofile",
        ],
    )
    .expect_status(0);
    write_model(&d.join("m.json"), smooth_model(6));
    kilter(
        d,
        &[
            "--quiet",
            "baseline",
            "--profile",
            "p.kprofile",
            "--model",
            "m.json",
            "--input",
            "q.csv",
            "--target",
            "1",
            "--out",
            "b.jsonl",
        ],
    )
    .expect_status(0);
    let records = read_baselines(&d.join("b.jsonl"));
    let zero_wins = records.iter().filter(|r| r.recommended == "zero").count();
    for r in &records {
        let zero = r.candidates.iter().find(|c| c.name == "zero").unwrap();
        assert!(
            zero.baseline_p >= 0.5,
            "row {}: zero at p {}",
            r.row,
            zero.baseline_p
        );
    }
    assert!(zero_wins >= 1, "zero recommended on no row of 20");
}

#[test]
fn completeness_of_the_recommended_baseline_improves_at_the_midpoint_rate() {
    // Midpoint rule on a smooth model: doubling --steps divides the completeness gap by
    // about 4, for the candidate recommended at the coarsest setting followed through.
    let dir = temp_dir();
    let d = dir.path();
    let fit = repo("tests/golden/breast_cancer_fit.csv");
    kilter(
        d,
        &[
            "--quiet",
            "fit",
            "--reference",
            fit.to_str().unwrap(),
            "--label-column",
            "diagnosis",
            "--holdout",
            "0",
            "--out",
            "bc.kprofile",
        ],
    )
    .expect_status(0);
    head(
        &repo("tests/golden/breast_cancer_query.csv"),
        4,
        &d.join("q.csv"),
    );
    // The network sees standardized inputs: a first identity layer folds the scaling in.
    let options = kilter::corpus::CsvOptions {
        label_columns: vec!["diagnosis".into()],
        ..Default::default()
    };
    let data = kilter::corpus::read_matrix(&fit, &options).unwrap().values;
    let mean = data.mean_axis(Axis(0)).unwrap();
    let sd = data.std_axis(Axis(0), 0.0);
    let scaling: Vec<Vec<f64>> = (0..30)
        .map(|i| {
            (0..30)
                .map(|j| if i == j { 1.0 / sd[i] } else { 0.0 })
                .collect()
        })
        .collect();
    let shift: Vec<f64> = (0..30).map(|i| -mean[i] / sd[i]).collect();
    let mut model = smooth_model(30);
    let layers = model["layers"].as_array_mut().unwrap();
    layers.insert(
        0,
        serde_json::json!({"weights": scaling, "bias": shift, "activation": "identity"}),
    );
    write_model(&d.join("m.json"), model);
    let gaps = |steps: &str| {
        let out = format!("b{steps}.jsonl");
        kilter(
            d,
            &[
                "--quiet",
                "baseline",
                "--profile",
                "bc.kprofile",
                "--model",
                "m.json",
                "--input",
                "q.csv",
                "--label-column",
                "diagnosis",
                "--target",
                "1",
                "--steps",
                steps,
                "--samples",
                "200",
                "--out",
                &out,
            ],
        )
        .expect_status(0);
        read_baselines(&d.join(out))
    };
    let coarse = gaps("8");
    let middle = gaps("16");
    let fine = gaps("32");
    for r in 0..coarse.len() {
        let name = &coarse[r].recommended;
        let gap = |records: &[BaselineRecord]| {
            records[r]
                .candidates
                .iter()
                .find(|c| &c.name == name)
                .unwrap()
                .completeness_gap
        };
        let (g8, g16, g32) = (gap(&coarse), gap(&middle), gap(&fine));
        for (a, b) in [(g8, g16), (g16, g32)] {
            let ratio = a / b;
            assert!(
                (3.0..5.5).contains(&ratio),
                "row {r}, {name}: gap {a:e} -> {b:e} (ratio {ratio})"
            );
        }
    }
}

#[test]
fn a_blurred_digit_lies_on_the_data_more_often_than_a_black_one() {
    // 40 digits of the open 8 x 8 corpus; candidates zero (a black image) and blur:1.
    let dir = temp_dir();
    let d = dir.path();
    let digits = repo("reference-corpora/digits_8x8.csv");
    kilter(
        d,
        &[
            "--quiet",
            "fit",
            "--reference",
            digits.to_str().unwrap(),
            "--label-column",
            "digit",
            "--embed",
            "none",
            "--holdout",
            "0",
            "--out",
            "digits.kprofile",
        ],
    )
    .expect_status(0);
    head(&digits, 40, &d.join("q.csv"));
    let weights: Vec<f64> = (0..64)
        .map(|i| ((i * 7) % 11) as f64 / 55.0 - 0.09)
        .collect();
    write_model(
        &d.join("m.json"),
        serde_json::json!({
            "format": "kilter-model", "version": 1, "kind": "logistic", "inputs": 64,
            "layers": [{"weights": [weights], "bias": [-0.5], "activation": "sigmoid"}]
        }),
    );
    kilter(
        d,
        &[
            "--quiet",
            "baseline",
            "--profile",
            "digits.kprofile",
            "--model",
            "m.json",
            "--input",
            "q.csv",
            "--label-column",
            "digit",
            "--image",
            "8x8",
            "--patch",
            "2",
            "--candidates",
            "zero,blur:1",
            "--samples",
            "300",
            "--out",
            "b.jsonl",
        ],
    )
    .expect_status(0);
    let records = read_baselines(&d.join("b.jsonl"));
    let on_data = |name: &str| {
        records
            .iter()
            .filter(|r| {
                r.candidates
                    .iter()
                    .find(|c| c.name == name)
                    .unwrap()
                    .baseline_p
                    >= 0.01
            })
            .count()
    };
    let (blurred, black) = (on_data("blur:1"), on_data("zero"));
    assert!(
        blurred > black,
        "on the data (p >= 0.01): blurred {blurred} of 40, black {black} of 40"
    );
    eprintln!("digits on the data (p >= 0.01): blurred {blurred} of 40, black {black} of 40");
}

#[test]
fn baseline_refuses_bad_candidates_before_writing() {
    let dir = temp_dir();
    let d = dir.path();
    let wine = repo("reference-corpora/wine.csv");
    kilter(
        d,
        &[
            "--quiet",
            "fit",
            "--reference",
            wine.to_str().unwrap(),
            "--label-column",
            "cultivar",
            "--out",
            "w.kprofile",
        ],
    )
    .expect_status(0);
    head(&wine, 2, &d.join("q.csv"));
    let weights = vec![0.1; 13];
    write_model(
        &d.join("m.json"),
        serde_json::json!({
            "format": "kilter-model", "version": 1, "kind": "linear", "inputs": 13,
            "layers": [{"weights": [weights], "bias": [0.0], "activation": "identity"}]
        }),
    );
    for (candidates, message) in [
        ("zero,blurred", "--candidates"),
        ("blur:1", "blur:S only for images"),
        ("uniform:0", "--candidates"),
    ] {
        kilter(
            d,
            &[
                "baseline",
                "--profile",
                "w.kprofile",
                "--model",
                "m.json",
                "--input",
                "q.csv",
                "--label-column",
                "cultivar",
                "--candidates",
                candidates,
                "--out",
                "b.jsonl",
            ],
        )
        .expect_status(2)
        .expect_stderr(&[message]);
        assert!(!d.join("b.jsonl").exists());
    }
}
