//! `kilter audit`: agreement statistics against scipy, the reliability score on cases
//! whose truth is known by construction, and the command's behaviour.
//!
//! Sources:
//! - scipy.stats.spearmanr / kendalltau goldens: tests/golden/agreement/ (generator script
//!   and library versions committed beside them).
//! - Lundberg & Lee (2017): deletion to c of a linear model gives wᵢ (xᵢ - c).
//! - Slack, Hilgard, Jia, Singh & Lakkaraju (AIES 2020): a model that switches to an
//!   innocuous feature off the data manifold (tests/models/manifold_switching_model.py).
//! - Saturating units make gradients vanish where the contribution is largest (common
//!   practice, no source).
//!
//! Data: the open breast-cancer, wine and digits corpora (reference-corpora/, UCI).

use std::path::Path;
use std::process::Command;

use ndarray::{Array2, Axis};
use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use serde::Deserialize;

use kilter::audit::agreement::Agreement;
use kilter::audit::{AuditRecord, Verdict};
use kilter::models::Model;

use crate::families::{breast_cancer_standardized, network};
use crate::harness::{
    kilter, listing, one_layer_model, read_records, repo, temp_dir, write_csv, write_model,
};

fn read_audit(path: &Path) -> Vec<AuditRecord> {
    read_records(path)
}

fn str(p: &Path) -> &str {
    p.to_str().unwrap()
}

/// The first `d` standardized breast-cancer features, each column shuffled on its own
/// when `independent` (real marginals, no dependence).
fn breast_cancer_columns(d: usize, independent: bool) -> (Vec<String>, Array2<f64>) {
    let m = breast_cancer_standardized();
    let mut values = m.values.slice(ndarray::s![.., ..d]).to_owned();
    if independent {
        let mut rng = ChaCha8Rng::seed_from_u64(19);
        for mut column in values.columns_mut() {
            let mut v = column.to_vec();
            v.shuffle(&mut rng);
            column.assign(&ndarray::Array1::from(v));
        }
    }
    (m.names[..d].to_vec(), values)
}

/// Writes reference.csv and queries.csv, fits p.kprofile (in-sample calibration, so the
/// p-values reach below 0.01 with 569 rows).
fn prepare(dir: &Path, names: &[String], reference: &Array2<f64>, queries: &Array2<f64>) {
    write_csv(&dir.join("reference.csv"), names, reference);
    write_csv(&dir.join("queries.csv"), names, queries);
    kilter(
        dir,
        &[
            "--quiet",
            "fit",
            "--reference",
            "reference.csv",
            "--holdout",
            "0",
            "--out",
            "p.kprofile",
        ],
    )
    .expect_status(0);
}

fn audit(dir: &Path, model: &[&str], extra: &[&str]) -> crate::harness::Run {
    let mut args = vec!["audit", "--profile", "p.kprofile", "--input", "queries.csv"];
    args.extend_from_slice(model);
    args.extend_from_slice(extra);
    kilter(dir, &args)
}

/// Efficiency: deletion and replacement attributions sum to f(x) - v(∅); the reported
/// completeness gap is the one the record's numbers imply.
fn check_sums(record: &AuditRecord) {
    for family in [&record.families.deletion, &record.families.replacement] {
        let sum: f64 = family.attribution.iter().sum();
        let expected = record.prediction - family.expected_value;
        assert!((sum - expected).abs() < 1e-9, "{} vs {expected}", sum);
    }
    let path = &record.families.interpolation;
    let expected = record.prediction - path.prediction_at_baseline;
    let gap = (path.attribution.iter().sum::<f64>() - expected).abs() / expected.abs().max(1e-12);
    assert!((gap - path.completeness_gap).abs() < 1e-9 * gap.max(1.0));
    assert!((0.0..=1.0).contains(&record.reliability));
}

#[derive(Deserialize)]
struct GoldenCase {
    name: String,
    a: Vec<f64>,
    b: Vec<f64>,
    spearman: f64,
    kendall_tau: f64,
}

#[derive(Deserialize)]
struct Goldens {
    cases: Vec<GoldenCase>,
}

#[test]
fn agreement_statistics_match_scipy() {
    let text = std::fs::read_to_string(repo("tests/golden/agreement/agreement.json")).unwrap();
    let goldens: Goldens = serde_json::from_str(&text).unwrap();
    assert!(goldens.cases.len() >= 9);
    for case in &goldens.cases {
        let got = Agreement::between(&case.a, &case.b, 3);
        assert!(
            (got.spearman - case.spearman).abs() < 1e-12,
            "{}: spearman {} vs scipy {}",
            case.name,
            got.spearman,
            case.spearman
        );
        assert!(
            (got.kendall_tau - case.kendall_tau).abs() < 1e-12,
            "{}: kendall {} vs scipy {}",
            case.name,
            got.kendall_tau,
            case.kendall_tau
        );
    }
}

#[test]
fn a_linear_model_on_independent_features_is_reliable() {
    // Deletion to the mean and replacement from the data agree when the features are
    // independent and the model additive: every row must come out reliable, and the
    // deletion attribution is wᵢ (xᵢ - meanᵢ) exactly (Lundberg & Lee 2017).
    let dir = temp_dir();
    let (names, values) = breast_cancer_columns(6, true);
    let queries = values.slice(ndarray::s![..12, ..]).to_owned();
    prepare(dir.path(), &names, &values, &queries);
    let w = [0.9, -0.6, 0.4, 0.0, 1.3, -0.2];
    write_model(
        &dir.path().join("linear.json"),
        &one_layer_model("linear", &w, 0.3),
    );
    let mean = values.mean_axis(Axis(0)).unwrap();
    // 16 draws per mask: on rows near the mean the attributions are small, and with fewer
    // draws the samplers' noise alone is a large share of them (checked below).
    for (sampler, draws) in [("gaussian", "16"), ("marginal", "16"), ("neighbours", "16")] {
        let out = format!("{sampler}.jsonl");
        audit(
            dir.path(),
            &["--model", "linear.json"],
            &[
                "--fill",
                "mean",
                "--sampler",
                sampler,
                "--draws",
                draws,
                "--out",
                &out,
                "--quiet",
            ],
        )
        .expect_status(0);
        let records = read_audit(&dir.path().join(&out));
        assert_eq!(records.len(), 12);
        for r in &records {
            check_sums(r);
            for g in 0..6 {
                let expected = w[g] * (queries[[r.row, g]] - mean[g]);
                assert!((r.families.deletion.attribution[g] - expected).abs() < 1e-9);
            }
            assert_eq!(
                r.verdict,
                Verdict::Reliable,
                "{sampler}, row {}: {:.3} {:?}",
                r.row,
                r.reliability,
                r.reasons
            );
        }
    }
}

#[test]
fn replacement_noise_does_not_touch_the_verdict_on_deletion() {
    // The same linear case with 2 marginal draws per mask: replacement is noisy, but the
    // verdict judges deletion (exact here: every mask is evaluated), whose story is the
    // model's own on the data (for a linear model the on-data effect equals the occlusion
    // attribution w_g (x_g - c_g); by construction).
    let dir = temp_dir();
    let (names, values) = breast_cancer_columns(6, true);
    let queries = values.slice(ndarray::s![..12, ..]).to_owned();
    prepare(dir.path(), &names, &values, &queries);
    write_model(
        &dir.path().join("linear.json"),
        &one_layer_model("linear", &[0.9, -0.6, 0.4, 0.0, 1.3, -0.2], 0.3),
    );
    audit(
        dir.path(),
        &["--model", "linear.json"],
        &[
            "--fill",
            "mean",
            "--sampler",
            "marginal",
            "--draws",
            "2",
            "--out",
            "a.jsonl",
            "--quiet",
        ],
    )
    .expect_status(0);
    let records = read_audit(&dir.path().join("a.jsonl"));
    for r in &records {
        assert_eq!(r.subject, "deletion");
        assert!(
            r.evidence.story_penalty < 0.02,
            "row {}: {:?}",
            r.row,
            r.reasons
        );
        // The unused feature gets exactly zero from deletion and from the probes.
        assert_eq!(r.families.deletion.attribution[3], 0.0, "row {}", r.row);
        assert_eq!(r.on_data.effect[3], Some(0.0), "row {}", r.row);
        assert_eq!(
            r.verdict,
            Verdict::Reliable,
            "row {}: {:?}",
            r.row,
            r.reasons
        );
    }
}

#[test]
fn a_model_that_switches_features_off_the_manifold_is_caught() {
    // Slack et al. (AIES 2020): the model uses mean_radius on data-like inputs and
    // mean_texture when radius departs from its correlated perimeter and area. Zero-filled
    // masks break that correlation, so deletion explanations point at texture; replacement
    // keeps the inputs on the manifold and points at radius and its correlates.
    let dir = temp_dir();
    let (names, values) = breast_cancer_columns(6, false);
    let picked: Vec<usize> = (0..values.nrows())
        .filter(|&r| values[[r, 0]].abs() > 1.0 && values[[r, 1]].abs() > 1.0)
        .take(10)
        .collect();
    assert_eq!(picked.len(), 10);
    let queries = values.select(Axis(0), &picked);
    prepare(dir.path(), &names, &values, &queries);
    let script = repo("tests/models/manifold_switching_model.py");
    let command = format!("python3 {}", script.display());
    audit(
        dir.path(),
        &["--model-cmd", &command],
        &["--target", "1", "--out", "a.jsonl", "--quiet"],
    )
    .expect_status(0);
    let records = read_audit(&dir.path().join("a.jsonl"));
    let top = |a: &[f64]| kilter::audit::agreement::top_k(a, 1)[0];
    let texture_share = |a: &[f64]| a[1].abs() / a.iter().map(|v| v.abs()).sum::<f64>();
    let mut misled = 0;
    for r in &records {
        check_sums(r);
        let replacement = &r.families.replacement;
        assert!(
            replacement.off_manifold_rate <= 0.02,
            "row {}: replacement inputs off-manifold at {}",
            r.row,
            replacement.off_manifold_rate
        );
        assert_ne!(
            top(&replacement.attribution),
            1,
            "replacement never blames texture"
        );
        // Misled: deletion gives texture at least 40% of its attribution mass, where
        // replacement gives it less than 15%.
        assert!(
            texture_share(&replacement.attribution) < 0.15,
            "row {}",
            r.row
        );
        if texture_share(&r.families.deletion.attribution) >= 0.4 {
            misled += 1;
            assert_eq!(
                r.verdict,
                Verdict::Unreliable,
                "row {}: deletion blames texture yet scores {:.3}: {:?}",
                r.row,
                r.reliability,
                r.reasons
            );
            assert!(
                r.reasons[0].contains("zero-filled inputs"),
                "{:?}",
                r.reasons
            );
        }
        assert_ne!(r.verdict, Verdict::Reliable, "row {}", r.row);
    }
    assert!(misled >= 5, "deletion misled on {misled} of 10 rows");
}

#[test]
fn gradients_of_saturated_units_mislead_and_the_audit_says_so() {
    // Features 0 and 1 pass through steep tanh units (saturated for |z| > 0.5), the others
    // through gentle ones. On rows where the steep units saturate, gradient × input gives
    // features 0 and 1 almost nothing although they carry the largest contributions;
    // replacement and integrated gradients both rank them first.
    let dir = temp_dir();
    let (names, values) = breast_cancer_columns(6, true);
    let picked: Vec<usize> = (0..values.nrows())
        .filter(|&r| values[[r, 0]].abs() > 1.0 && values[[r, 1]].abs() > 1.0)
        .take(6)
        .collect();
    let queries = values.select(Axis(0), &picked);
    prepare(dir.path(), &names, &values, &queries);
    let steep = [6.0, 6.0, 0.3, 0.3, 0.3, 0.3];
    let hidden: Vec<Vec<f64>> = (0..6)
        .map(|i| {
            (0..6)
                .map(|j| if i == j { steep[i] } else { 0.0 })
                .collect()
        })
        .collect();
    let json = serde_json::json!({
        "format": "kilter-model", "version": 1, "kind": "mlp", "inputs": 6,
        "layers": [
            {"weights": hidden, "bias": [0.0, 0.0, 0.0, 0.0, 0.0, 0.0], "activation": "tanh"},
            {"weights": [[1.0, 1.0, 1.0, 1.0, 1.0, 1.0]], "bias": [0.0], "activation": "identity"}
        ]
    });
    std::fs::write(dir.path().join("steep.json"), json.to_string()).unwrap();
    let model = network(json);
    let mean = values.mean_axis(Axis(0)).unwrap();
    let gradients = model.gradients(queries.view(), 0).unwrap().unwrap();
    let supplied = &gradients * &(&queries - &mean);
    write_csv(
        &dir.path().join("gradient_x_input.csv"),
        &names[..6],
        &supplied,
    );

    let args = [
        "--fill",
        "mean",
        "--steps",
        "32",
        "--rule",
        "gauss-legendre",
        "--top-k",
        "2",
        "--baseline",
        "mean",
        "--quiet",
    ];
    let mut with = args.to_vec();
    with.extend_from_slice(&[
        "--explanations",
        "gradient_x_input.csv",
        "--out",
        "with.jsonl",
    ]);
    audit(dir.path(), &["--model", "steep.json"], &with).expect_status(0);
    let mut without = args.to_vec();
    without.extend_from_slice(&["--out", "without.jsonl"]);
    audit(dir.path(), &["--model", "steep.json"], &without).expect_status(0);
    let with = read_audit(&dir.path().join("with.jsonl"));
    let without = read_audit(&dir.path().join("without.jsonl"));
    for (a, b) in with.iter().zip(&without) {
        check_sums(a);
        let supplied = a.supplied.as_ref().expect("supplied agreement");
        assert_eq!(
            a.agreement.replacement_interpolation.top_k_overlap, 1.0,
            "row {}",
            a.row
        );
        assert!(supplied.replacement.top_k_overlap < 0.5, "row {}", a.row);
        assert_eq!(
            b.verdict,
            Verdict::Reliable,
            "row {}: {:?}",
            b.row,
            b.reasons
        );
        assert_ne!(
            a.verdict,
            Verdict::Reliable,
            "row {}: {:.3}",
            a.row,
            a.reliability
        );
        assert!(a.reasons.iter().any(|r| r.contains("supplied explanation")));
    }
}

#[test]
fn fail_under_exits_3_after_writing_every_record() {
    let dir = temp_dir();
    let (names, values) = breast_cancer_columns(6, false);
    let queries = values.slice(ndarray::s![..5, ..]).to_owned();
    prepare(dir.path(), &names, &values, &queries);
    let script = repo("tests/models/manifold_switching_model.py");
    let command = format!("python3 {}", script.display());
    let run = audit(
        dir.path(),
        &["--model-cmd", &command],
        &[
            "--target",
            "1",
            "--fail-under",
            "0.99",
            "--out",
            "a.jsonl",
            "--samples",
            "200",
        ],
    );
    run.expect_status(3)
        .expect_stderr(&["reliability below --fail-under 0.99", "audited 5 rows"]);
    assert_eq!(read_audit(&dir.path().join("a.jsonl")).len(), 5);
    audit(
        dir.path(),
        &["--model-cmd", &command],
        &["--fail-under", "1.5", "--out", "b.jsonl"],
    )
    .expect_status(2)
    .expect_stderr(&["--fail-under"]);
}

#[test]
fn bad_settings_are_refused_before_anything_is_written() {
    let dir = temp_dir();
    let (names, values) = breast_cancer_columns(4, false);
    let queries = values.slice(ndarray::s![..3, ..]).to_owned();
    prepare(dir.path(), &names, &values, &queries);
    write_model(
        &dir.path().join("m.json"),
        &one_layer_model("linear", &[1.0, 0.5, -0.5, 0.2], 0.0),
    );
    let before = listing(dir.path());
    for (flags, message) in [
        (vec!["--sampler", "copula"], "--sampler"),
        (vec!["--fill", "half"], "--fill"),
        (vec!["--rule", "simpson"], "--rule"),
        (vec!["--baseline", "blurred"], "--baseline"),
        (vec!["--samples", "0"], "--samples"),
        (vec!["--samples", "5"], "at least 10 masks for 4 groups"),
        (vec!["--steps", "1", "--rule", "trapezoid"], "--steps"),
        (vec!["--alpha", "1.5"], "--alpha"),
        (vec!["--target", "3"], "--target"),
        (vec!["--image", "2x3", "--patch", "1"], "--image"),
        (vec!["--groups", "missing.json"], "missing.json"),
    ] {
        let mut extra = flags.clone();
        extra.extend_from_slice(&["--out", "a.jsonl"]);
        audit(dir.path(), &["--model", "m.json"], &extra)
            .expect_status(2)
            .expect_stderr(&[message]);
        assert_eq!(listing(dir.path()), before, "{flags:?} left a file behind");
    }
    // Supplied explanations must have one row per input and one column per group.
    write_csv(
        &dir.path().join("short.csv"),
        &names[..3],
        &values.slice(ndarray::s![..3, ..3]).to_owned(),
    );
    audit(
        dir.path(),
        &["--model", "m.json"],
        &["--explanations", "short.csv", "--out", "a.jsonl"],
    )
    .expect_status(2)
    .expect_stderr(&["short.csv", "one column per group (4)"]);
    assert!(!dir.path().join("a.jsonl").exists());
}

#[test]
fn records_do_not_depend_on_the_thread_count() {
    let dir = temp_dir();
    let (names, values) = breast_cancer_columns(6, false);
    let queries = values.slice(ndarray::s![..20, ..]).to_owned();
    prepare(dir.path(), &names, &values, &queries);
    write_model(
        &dir.path().join("m.json"),
        &one_layer_model("logistic", &[1.0, -0.5, 0.8, 0.3, -1.0, 0.4], 0.2),
    );
    let run = |threads: &str, out: &str| {
        let status = Command::new(env!("CARGO_BIN_EXE_kilter"))
            .args([
                "--quiet",
                "audit",
                "--profile",
                "p.kprofile",
                "--model",
                "m.json",
                "--input",
                "queries.csv",
                "--samples",
                "300",
                "--seed",
                "9",
                "--out",
                out,
            ])
            .env("RAYON_NUM_THREADS", threads)
            .current_dir(dir.path())
            .status()
            .unwrap();
        assert!(status.success());
        std::fs::read(dir.path().join(out)).unwrap()
    };
    let one = run("1", "one.jsonl");
    let three = run("3", "three.jsonl");
    assert!(one == three, "records differ between 1 and 3 threads");
    let other_seed = Command::new(env!("CARGO_BIN_EXE_kilter"))
        .args([
            "--quiet",
            "audit",
            "--profile",
            "p.kprofile",
            "--model",
            "m.json",
            "--input",
            "queries.csv",
            "--samples",
            "300",
            "--seed",
            "10",
            "--out",
            "ten.jsonl",
        ])
        .current_dir(dir.path())
        .status()
        .unwrap();
    assert!(other_seed.success());
    assert!(std::fs::read(dir.path().join("ten.jsonl")).unwrap() != one);
}

#[test]
fn csv_records_flatten_families_and_join_reasons() {
    let dir = temp_dir();
    let (names, values) = breast_cancer_columns(5, false);
    let queries = values.slice(ndarray::s![..4, ..]).to_owned();
    prepare(dir.path(), &names, &values, &queries);
    let script = repo("tests/models/manifold_switching_model.py");
    let _ = script;
    write_model(
        &dir.path().join("m.json"),
        &one_layer_model("linear", &[1.0, 0.5, -0.5, 0.2, 0.1], 0.0),
    );
    audit(
        dir.path(),
        &["--model", "m.json"],
        &["--out", "a.csv", "--quiet"],
    )
    .expect_status(0);
    let text = std::fs::read_to_string(dir.path().join("a.csv")).unwrap();
    let mut lines = text.lines();
    let header: Vec<&str> = lines.next().unwrap().split(',').collect();
    for column in [
        "row",
        // Attribution columns are named by group (here a feature's name).
        "families.deletion.attribution.mean_radius",
        "families.deletion.attribution.mean_smoothness",
        "families.replacement.off_manifold_rate",
        "families.interpolation.completeness_gap",
        "agreement.deletion~replacement.spearman",
        "reliability",
        "verdict",
        "reasons",
    ] {
        assert!(header.contains(&column), "{column} missing from {header:?}");
    }
    assert_eq!(lines.count(), 4);
}

#[test]
fn onnx_models_image_patches_and_named_groups() {
    // ONNX (no gradients of its own: finite differences) on the breast-cancer query split.
    let dir = temp_dir();
    let d = dir.path();
    let fit = repo("tests/golden/breast_cancer_fit.csv");
    let query = repo("tests/golden/breast_cancer_query.csv");
    let onnx = repo("tests/golden/models/lr.onnx");
    kilter(
        d,
        &[
            "--quiet",
            "fit",
            "--reference",
            str(&fit),
            "--label-column",
            "diagnosis",
            "--holdout",
            "0",
            "--out",
            "bc.kprofile",
        ],
    )
    .expect_status(0);
    let head: String = std::fs::read_to_string(&query)
        .unwrap()
        .lines()
        .take(4)
        .map(|l| format!("{l}\n"))
        .collect();
    std::fs::write(d.join("q.csv"), head).unwrap();
    kilter(
        d,
        &[
            "--quiet",
            "audit",
            "--profile",
            "bc.kprofile",
            "--model",
            str(&onnx),
            "--input",
            "q.csv",
            "--label-column",
            "diagnosis",
            "--samples",
            "400",
            "--out",
            "bc.jsonl",
        ],
    )
    .expect_status(0);
    let records = read_audit(&d.join("bc.jsonl"));
    assert_eq!(records.len(), 3);
    for r in &records {
        assert_eq!(r.families.deletion.attribution.len(), 30);
        assert_eq!(
            r.families.interpolation.gradients,
            kilter::models::GradientMethod::FiniteDifference
        );
        // Efficiency holds whatever the model; ONNX computes in float32.
        let sum: f64 = r.families.deletion.attribution.iter().sum();
        assert!((sum - (r.prediction - r.families.deletion.expected_value)).abs() < 1e-9);
    }

    // Images: 8 x 8 digits in 4 x 4 patches, a linear model over the 64 pixels. Digits have
    // constant pixels, so the profile measures distances on the raw pixels.
    let digits = repo("reference-corpora/digits_8x8.csv");
    kilter(
        d,
        &[
            "--quiet",
            "fit",
            "--reference",
            str(&digits),
            "--label-column",
            "digit",
            "--embed",
            "none",
            "--out",
            "digits.kprofile",
        ],
    )
    .expect_status(0);
    let head: String = std::fs::read_to_string(&digits)
        .unwrap()
        .lines()
        .take(3)
        .map(|l| format!("{l}\n"))
        .collect();
    std::fs::write(d.join("digits.csv"), head).unwrap();
    let weights: Vec<f64> = (0..64).map(|i| ((i * 5) % 7) as f64 / 7.0 - 0.4).collect();
    write_model(
        &d.join("pixels.json"),
        &one_layer_model("linear", &weights, 0.0),
    );
    kilter(
        d,
        &[
            "--quiet",
            "audit",
            "--profile",
            "digits.kprofile",
            "--model",
            "pixels.json",
            "--input",
            "digits.csv",
            "--label-column",
            "digit",
            "--image",
            "8x8",
            "--patch",
            "4",
            "--sampler",
            "neighbours",
            "--out",
            "digits.jsonl",
        ],
    )
    .expect_status(0);
    for r in read_audit(&d.join("digits.jsonl")) {
        check_sums(&r);
        assert_eq!(r.families.deletion.attribution.len(), 4);
        // Four groups: every coalition is evaluated, so no sampling error.
        assert!(r
            .families
            .deletion
            .standard_errors
            .iter()
            .all(|&s| s == 0.0));
    }

    // Named groups on wine; features in no group stay fixed.
    let wine = repo("reference-corpora/wine.csv");
    kilter(
        d,
        &[
            "--quiet",
            "fit",
            "--reference",
            str(&wine),
            "--label-column",
            "cultivar",
            "--out",
            "wine.kprofile",
        ],
    )
    .expect_status(0);
    let head: String = std::fs::read_to_string(&wine)
        .unwrap()
        .lines()
        .take(3)
        .map(|l| format!("{l}\n"))
        .collect();
    std::fs::write(d.join("wine.csv"), head).unwrap();
    let header: Vec<String> = std::fs::read_to_string(&wine)
        .unwrap()
        .lines()
        .next()
        .unwrap()
        .split(',')
        .filter(|c| *c != "cultivar")
        .map(str::to_string)
        .collect();
    let groups = serde_json::json!([[header[0], header[1]], [header[2]], [3, 4, 5]]);
    std::fs::write(d.join("groups.json"), groups.to_string()).unwrap();
    let weights: Vec<f64> = (0..13).map(|i| 0.1 * i as f64 - 0.5).collect();
    write_model(
        &d.join("wine_model.json"),
        &one_layer_model("linear", &weights, 0.0),
    );
    kilter(
        d,
        &[
            "--quiet",
            "audit",
            "--profile",
            "wine.kprofile",
            "--model",
            "wine_model.json",
            "--input",
            "wine.csv",
            "--label-column",
            "cultivar",
            "--groups",
            "groups.json",
            "--fill",
            "mean",
            "--out",
            "wine.jsonl",
        ],
    )
    .expect_status(0);
    for r in read_audit(&d.join("wine.jsonl")) {
        check_sums(&r);
        assert_eq!(r.families.deletion.attribution.len(), 3);
    }
}

#[test]
fn failing_models_stop_the_audit_without_a_partial_file() {
    // A model process that dies after two answers, one that answers NaN, and one that
    // hangs: exit status 1, the cause named, and no records file left behind (SPEC: exit
    // status; outputs written whole or not at all).
    let dir = temp_dir();
    let (names, values) = breast_cancer_columns(4, false);
    let queries = values.slice(ndarray::s![..6, ..]).to_owned();
    prepare(dir.path(), &names, &values, &queries);
    let script = |body: &str| {
        format!(
            "import json, sys\nn = 0\nfor line in sys.stdin:\n    rows = json.loads(line)[\"inputs\"]\n    n += 1\n{body}\n"
        )
    };
    let cases = [
        (
            "dies.py",
            script(
                "    if n > 2:\n        sys.exit(3)\n    print(json.dumps({\"outputs\": [[0.5, 0.5] for _ in rows]}), flush=True)",
            ),
            "exited without answering",
        ),
        (
            "nan.py",
            script(
                "    out = [[0.5, 0.5] for _ in rows]\n    if n > 1:\n        out[0][1] = float('nan')\n    print(json.dumps({\"outputs\": out}), flush=True)",
            ),
            "answered wrongly",
        ),
        (
            "hangs.py",
            script(
                "    if n > 1:\n        import time\n        time.sleep(30)\n    print(json.dumps({\"outputs\": [[0.5, 0.5] for _ in rows]}), flush=True)",
            ),
            "did not answer within 2 s",
        ),
    ];
    for (file, body, fragment) in cases {
        std::fs::write(dir.path().join(file), body).unwrap();
        let command = format!("python3 {file}");
        let run = audit(
            dir.path(),
            &["--model-cmd", &command, "--model-timeout", "2"],
            &["--samples", "64", "--out", "a.jsonl", "--quiet"],
        );
        run.expect_status(1);
        assert!(
            run.stderr.to_lowercase().contains(fragment),
            "{file}: stderr lacks {fragment:?}:\n{}",
            run.stderr
        );
        assert!(
            !dir.path().join("a.jsonl").exists(),
            "{file} left a records file"
        );
    }
}

#[test]
fn bad_inputs_to_audit_are_refused_with_their_place_named() {
    // Groups that do not fit, explanations with a bad cell, an input of other columns, a
    // model of another width and a damaged profile: exit status 2, the file and place
    // named, nothing written (SPEC: exit status; input files).
    let dir = temp_dir();
    let d = dir.path();
    let (names, values) = breast_cancer_columns(4, false);
    let queries = values.slice(ndarray::s![..3, ..]).to_owned();
    prepare(d, &names, &values, &queries);
    write_model(
        &d.join("m.json"),
        &one_layer_model("linear", &[1.0, 0.5, -0.5, 0.2], 0.0),
    );
    write_model(
        &d.join("wide.json"),
        &one_layer_model("linear", &[1.0; 5], 0.0),
    );
    std::fs::write(d.join("groups.json"), "[[0, 1], [7]]").unwrap();
    let mut explanations = names.join(",");
    explanations.push_str("\n1,2,3,4\n1,nan,3,4\n1,2,3,4\n");
    std::fs::write(d.join("explained.csv"), explanations).unwrap();
    write_csv(
        &d.join("narrow.csv"),
        &names[..3],
        &values.slice(ndarray::s![..3, ..3]).to_owned(),
    );
    let profile = std::fs::read(d.join("p.kprofile")).unwrap();
    std::fs::write(d.join("cut.kprofile"), &profile[..profile.len() / 2]).unwrap();
    let before = listing(d);
    let cases: [(&[&str], &[&str]); 5] = [
        (
            &["--model", "m.json", "--groups", "groups.json"],
            &["groups.json", "7"],
        ),
        (
            &["--model", "m.json", "--explanations", "explained.csv"],
            &["explained.csv", "row 2", "mean_texture"],
        ),
        (&["--model", "wide.json"], &["takes 5 features", "has 4"]),
        (
            &["--model", "m.json", "--input", "narrow.csv"],
            &["narrow.csv", "3 feature columns"],
        ),
        (
            &["--model", "m.json", "--profile", "cut.kprofile"],
            &["cut.kprofile", "truncated"],
        ),
    ];
    for (flags, fragments) in cases {
        let mut args = vec!["audit"];
        if !flags.contains(&"--profile") {
            args.extend(["--profile", "p.kprofile"]);
        }
        if !flags.contains(&"--input") {
            args.extend(["--input", "queries.csv"]);
        }
        args.extend_from_slice(flags);
        args.extend(["--out", "a.jsonl"]);
        kilter(d, &args).expect_status(2).expect_stderr(fragments);
        assert_eq!(listing(d), before, "{flags:?} left a file behind");
    }
}

#[test]
fn supplied_occlusion_for_another_output_is_named_and_the_right_one_matches_its_twin() {
    // A logistic model's two outputs are 1 - p and p, so class 1's occlusion is exactly
    // class 0's negated: supplied class-1 values audited as class 0 must name --target 1.
    // The occlusion itself, f(x) - f(x with feature g at the reference mean), is computed
    // here from the model's own answers (the definition of occlusion), and kilter's
    // recomputation of the declared method must equal it.
    let dir = temp_dir();
    let (names, values) = breast_cancer_columns(6, true);
    let queries = values.slice(ndarray::s![..8, ..]).to_owned();
    prepare(dir.path(), &names, &values, &queries);
    let json = one_layer_model("logistic", &[1.2, -0.8, 0.5, 0.0, 0.9, -0.3], 0.2);
    write_model(&dir.path().join("logistic.json"), &json);
    let model = network(json);
    let mean = values.mean_axis(Axis(0)).unwrap();
    let original = model.predict(queries.view()).unwrap();
    let mut occlusion = Array2::<f64>::zeros(queries.dim());
    for g in 0..6 {
        let mut filled = queries.clone();
        filled.column_mut(g).fill(mean[g]);
        let answers = model.predict(filled.view()).unwrap();
        for r in 0..queries.nrows() {
            occlusion[[r, g]] = original[[r, 1]] - answers[[r, 1]];
        }
    }
    write_csv(&dir.path().join("occlusion1.csv"), &names, &occlusion);
    for target in ["0", "1"] {
        let out = format!("t{target}.jsonl");
        audit(
            dir.path(),
            &["--model", "logistic.json"],
            &[
                "--explanations",
                "occlusion1.csv",
                "--method",
                "occlusion:mean",
                "--target",
                target,
                "--out",
                &out,
                "--quiet",
            ],
        )
        .expect_status(0);
        for r in read_audit(&dir.path().join(&out)) {
            assert_eq!(r.subject, "supplied");
            assert_eq!(r.method.as_deref(), Some("occlusion:mean"));
            let wrong = r.findings.iter().find(|f| f.code == "wrong-target");
            if target == "0" {
                let finding = wrong.expect("wrong target named");
                assert!(finding.reason.contains("--target 1"), "{}", finding.reason);
                assert_eq!(r.findings[0].code, "wrong-target");
                assert_eq!(r.verdict, Verdict::Unreliable, "row {}", r.row);
            } else {
                assert!(wrong.is_none(), "row {}: {:?}", r.row, r.reasons);
                let distance = r.evidence.declared_distance.unwrap();
                assert!(distance < 1e-9, "row {}: {distance}", r.row);
                let twin = r.declared.as_ref().expect("the recomputation is recorded");
                assert_eq!(twin.method, "occlusion:mean");
                for (g, (k, own)) in twin
                    .attribution
                    .iter()
                    .zip(occlusion.row(r.row))
                    .enumerate()
                {
                    assert!(
                        (k - own).abs() < 1e-9,
                        "row {} group {g}: {k} vs {own}",
                        r.row
                    );
                }
            }
        }
    }
}

#[test]
fn a_tree_ensembles_verdicts_do_not_hinge_on_the_path_family() {
    // A gradient-boosted tree ensemble (tests/golden/models/wine_gb.onnx, scikit-learn
    // GradientBoostingClassifier on the wine corpus) is piecewise-constant by construction:
    // its gradient is zero almost everywhere, so integrated gradients cannot describe it
    // (common practice). The verdict must not move when only the path family changes, and
    // the record must say the family does not apply.
    let dir = temp_dir();
    let d = dir.path();
    crate::harness::fit_wine(d, &["--holdout", "0"]);
    let wine = std::fs::read_to_string(repo("reference-corpora/wine.csv")).unwrap();
    let lines: Vec<&str> = wine.lines().collect();
    let picked: Vec<&str> = [1, 40, 70, 100, 130, 160]
        .iter()
        .map(|&i| lines[i])
        .collect();
    std::fs::write(
        d.join("q.csv"),
        format!("{}\n{}\n", lines[0], picked.join("\n")),
    )
    .unwrap();
    let model = repo("tests/golden/models/wine_gb.onnx");
    let run = |baseline: &str, steps: &str, out: &str| {
        kilter(
            d,
            &[
                "--quiet",
                "audit",
                "--profile",
                "w.kprofile",
                "--model",
                str(&model),
                "--input",
                "q.csv",
                "--label-column",
                "cultivar",
                "--samples",
                "128",
                "--baseline",
                baseline,
                "--steps",
                steps,
                "--seed",
                "3",
                "--out",
                out,
            ],
        )
        .expect_status(0);
        read_audit(&d.join(out))
    };
    let zero = run("zero", "64", "zero.jsonl");
    let mean = run("mean", "16", "mean.jsonl");
    for (a, b) in zero.iter().zip(&mean) {
        assert!(a.on_data.piecewise_constant, "row {}", a.row);
        assert!(!a.families.interpolation.applicable, "row {}", a.row);
        let why = a.families.interpolation.not_applicable.as_deref().unwrap();
        assert!(why.contains("piecewise-constant"), "{why}");
        assert_ne!(
            a.families.interpolation.attribution, b.families.interpolation.attribution,
            "row {}: the two runs must differ in the path family",
            a.row
        );
        assert_eq!(a.reliability, b.reliability, "row {}", a.row);
        assert_eq!(a.verdict, b.verdict, "row {}", a.row);
        let codes = |r: &AuditRecord| {
            r.findings
                .iter()
                .map(|f| f.code.clone())
                .collect::<Vec<_>>()
        };
        assert_eq!(codes(a), codes(b), "row {}", a.row);
        for f in &a.findings {
            assert_ne!(f.code, "path-off-data", "row {}", a.row);
            assert!(
                !f.reason.contains("completeness"),
                "row {}: {}",
                a.row,
                f.reason
            );
        }
    }
}
