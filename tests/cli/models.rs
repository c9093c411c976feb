//! Models through `kilter predict`: kilter's JSON networks, the line protocol with the
//! shipped example script, and every way a model process can fail (SPEC: Model line
//! protocol; exit status 1 for a failed model, 2 for a bad model file or usage).

use std::path::Path;

use ndarray::{array, Array2};

use kilter::models::{LineProtocolModel, Model, NetworkModel};

use crate::harness::{kilter, listing, repo, temp_dir, Run};

/// Three invented pipe segments in the demo's column order.
const SEGMENTS: &str = "segment_id,pressure_inlet_kpa,pressure_mid_kpa,pressure_outlet_kpa,flow_l_per_s,vibration_mm_per_s,pipe_age_years,diameter_mm,soil_corrosivity,water_temp_c,chlorine_mg_per_l,turbidity_ntu,repairs_last_5y
a,470,455,440,8.5,1.1,35,200,4.0,12,0.8,0.4,1
b,520,500,470,14.0,1.6,70,150,7.5,15,0.5,0.6,4
c,430,425,421,3.2,0.6,10,300,2.0,9,1.0,0.3,0
";

/// The example script's logistic model written as a kilter network file, with its
/// standardization folded into the weights: w' = w / s, b' = b - Σ w m / s.
fn example_as_network(dir: &Path) -> std::path::PathBuf {
    let means = [
        480.0, 467.0, 454.0, 9.0, 1.2, 44.0, 200.0, 4.5, 13.0, 0.75, 0.45, 1.6,
    ];
    let scales = [
        45.0, 46.0, 48.0, 5.0, 0.5, 24.0, 71.0, 2.0, 5.0, 0.21, 0.12, 1.4,
    ];
    let weights = [
        0.4, -0.2, -0.6, 0.3, 0.5, 0.9, -0.3, 0.6, 0.1, -0.4, 0.3, 0.7,
    ];
    let folded: Vec<f64> = weights.iter().zip(scales).map(|(w, s)| w / s).collect();
    let bias = -1.0
        - (0..12)
            .map(|i| weights[i] * means[i] / scales[i])
            .sum::<f64>();
    let json = serde_json::json!({
        "format": "kilter-model", "version": 1, "kind": "logistic", "inputs": 12,
        "layers": [{"weights": [folded], "bias": [bias], "activation": "sigmoid"}]
    });
    let path = dir.join("pipe_risk.json");
    std::fs::write(&path, json.to_string()).unwrap();
    path
}

fn predict(dir: &Path, model: &[&str], extra: &[&str]) -> Run {
    let mut args = vec!["predict"];
    args.extend_from_slice(model);
    args.extend(["--input", "segments.csv", "--id-column", "segment_id"]);
    args.extend_from_slice(extra);
    kilter(dir, &args)
}

fn outputs(run: &Run) -> Vec<Vec<f64>> {
    run.stdout
        .lines()
        .enumerate()
        .map(|(i, line)| {
            let v: serde_json::Value = serde_json::from_str(line).unwrap();
            assert_eq!(v["row"], i);
            v["outputs"]
                .as_array()
                .unwrap()
                .iter()
                .map(|x| x.as_f64().unwrap())
                .collect()
        })
        .collect()
}

fn setup() -> tempfile::TempDir {
    let dir = temp_dir();
    std::fs::write(dir.path().join("segments.csv"), SEGMENTS).unwrap();
    dir
}

fn example_command() -> String {
    format!("python3 {}", repo("examples/pipe_risk_model.py").display())
}

/// The same logistic model through the line protocol and as a kilter network file
/// agrees to rounding: the protocol carries doubles without loss.
#[test]
fn example_script_and_network_file_agree() {
    let dir = setup();
    let network = example_as_network(dir.path());
    let command = example_command();
    let via_protocol = predict(
        dir.path(),
        &["--model-cmd", &command, "--batch-size", "2"],
        &[],
    );
    let via_file = predict(dir.path(), &["--model", network.to_str().unwrap()], &[]);
    let (a, b) = (
        outputs(via_protocol.expect_status(0)),
        outputs(via_file.expect_status(0)),
    );
    assert_eq!(a.len(), 3);
    for (x, y) in a.iter().flatten().zip(b.iter().flatten()) {
        assert!((x - y).abs() < 1e-12, "{x} vs {y}");
    }
    // Probabilities of the two classes.
    assert!(a
        .iter()
        .all(|r| r.len() == 2 && (r[0] + r[1] - 1.0).abs() < 1e-12));
}

/// Gradients answered by the process equal the network's back-propagated ones, which for
/// a logistic model are p (1 - p) w (the analytic gradient).
#[test]
fn gradients_through_the_protocol() {
    let dir = setup();
    let network = NetworkModel::load(&example_as_network(dir.path())).unwrap();
    let process =
        LineProtocolModel::start(&example_command(), 2, std::time::Duration::from_secs(30))
            .unwrap();
    let x: Array2<f64> = array![
        [470.0, 455.0, 440.0, 8.5, 1.1, 35.0, 200.0, 4.0, 12.0, 0.8, 0.4, 1.0],
        [520.0, 500.0, 470.0, 14.0, 1.6, 70.0, 150.0, 7.5, 15.0, 0.5, 0.6, 4.0],
        [430.0, 425.0, 421.0, 3.2, 0.6, 10.0, 300.0, 2.0, 9.0, 1.0, 0.3, 0.0]
    ];
    for target in 0..2 {
        let a = process
            .gradients(x.view(), target)
            .unwrap()
            .expect("the script gives gradients");
        let b = network.gradients(x.view(), target).unwrap().unwrap();
        for (u, v) in a.iter().zip(b.iter()) {
            assert!((u - v).abs() <= 1e-12 * v.abs().max(1e-6), "{u} vs {v}");
        }
    }
}

/// A process that gives no gradients is asked once, then left alone.
#[test]
fn a_model_without_gradients_says_so() {
    let script = r#"while read line; do echo '{"outputs": [[0.25], [0.75]]}'; done"#;
    let model = LineProtocolModel::start(script, 2, std::time::Duration::from_secs(10)).unwrap();
    let x = array![[1.0], [2.0]];
    assert!(model.gradients(x.view(), 0).unwrap().is_none());
    assert!(model.gradients(x.view(), 0).unwrap().is_none());
    assert_eq!(model.predict(x.view()).unwrap(), array![[0.25], [0.75]]);
}

fn fails(command: &str, extra: &[&str], status: i32, fragments: &[&str]) {
    let dir = setup();
    let mut args = vec!["--model-cmd", command];
    args.extend_from_slice(extra);
    predict(dir.path(), &args, &["--out", "out.jsonl"])
        .expect_status(status)
        .expect_stderr(fragments);
    assert_eq!(
        listing(dir.path()),
        vec!["segments.csv"],
        "no output on failure"
    );
}

#[test]
fn model_processes_that_fail_are_reported() {
    fails(
        "exit 3",
        &[],
        1,
        &["exited without answering", "exit status: 3"],
    );
    fails(
        "read line; echo not json",
        &[],
        1,
        &["not JSON", "not json"],
    );
    fails(
        r#"read line; echo '{"outputs": [[1.0]]}'"#,
        &[],
        1,
        &["1 output rows for 3 inputs"],
    );
    fails(
        r#"read line; echo '{"outputs": [[NaN], [1], [1]]}'"#,
        &[],
        1,
        &["not JSON"],
    );
    fails(
        r#"read line; echo '{"error": "weights file missing"}'"#,
        &[],
        1,
        &["reported an error: weights file missing"],
    );
    fails(
        r#"read line; echo '{"result": 1}'"#,
        &[],
        1,
        &["no \"outputs\""],
    );
    fails("echo 'Traceback: boom' >&2; exit 1", &[], 1, &["boom"]);
    // Dies after the first of two batches.
    fails(
        r#"read line; echo '{"outputs": [[1.0], [1.0]]}'; exit 0"#,
        &["--batch-size", "2"],
        1,
        &["exited without answering"],
    );
    // Answers of changing width.
    fails(
        r#"read l; echo '{"outputs": [[1.0], [1.0]]}'; read l; echo '{"outputs": [[1.0, 2.0]]}'"#,
        &["--batch-size", "2"],
        1,
        &["2 outputs per row, earlier 1"],
    );
}

#[test]
fn a_hanging_model_is_stopped_at_the_timeout() {
    let started = std::time::Instant::now();
    fails(
        "sleep 30",
        &["--model-timeout", "0.5"],
        1,
        &["did not answer within 0.5 s"],
    );
    // Not a timing assertion on kilter's speed: only that the 30 s child was not awaited.
    assert!(
        started.elapsed().as_secs() < 25,
        "the hanging child was waited for"
    );
}

#[test]
fn a_model_flooding_stderr_still_works() {
    let dir = setup();
    let flood = r#"head -c 3000000 /dev/zero | tr '\0' x >&2; while read l; do echo '{"outputs": [[0.1], [0.2], [0.3]]}'; done"#;
    let run = predict(dir.path(), &["--model-cmd", flood], &[]);
    assert_eq!(
        outputs(run.expect_status(0)),
        vec![vec![0.1], vec![0.2], vec![0.3]]
    );
}

#[test]
fn bad_model_files_and_flags_are_usage_errors() {
    let dir = setup();
    predict(dir.path(), &["--model", "absent.json"], &[])
        .expect_status(2)
        .expect_stderr(&["absent.json"]);
    std::fs::write(dir.path().join("bad.json"), "{\"format\": \"kilter-model\"").unwrap();
    predict(dir.path(), &["--model", "bad.json"], &[])
        .expect_status(2)
        .expect_stderr(&["bad.json", "not a valid kilter model file"]);
    std::fs::write(dir.path().join("m.txt"), "x").unwrap();
    predict(dir.path(), &["--model", "m.txt"], &[])
        .expect_status(2)
        .expect_stderr(&[".json", ".onnx"]);
    let narrow = serde_json::json!({"format": "kilter-model", "version": 1, "kind": "linear", "inputs": 3,
        "layers": [{"weights": [[1.0, 2.0, 3.0]], "bias": [0.0], "activation": "identity"}]});
    std::fs::write(dir.path().join("narrow.json"), narrow.to_string()).unwrap();
    predict(dir.path(), &["--model", "narrow.json"], &[])
        .expect_status(2)
        .expect_stderr(&["takes 3 features, the data has 12"]);
    predict(
        dir.path(),
        &["--model", "narrow.json", "--model-cmd", "cat"],
        &[],
    )
    .expect_status(2);
    kilter(dir.path(), &["predict", "--input", "segments.csv"]).expect_status(2);
    predict(
        dir.path(),
        &["--model-cmd", "cat", "--batch-size", "0"],
        &[],
    )
    .expect_status(2)
    .expect_stderr(&["--batch-size"]);
}
