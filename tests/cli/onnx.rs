//! Model adapters against scikit-learn: ONNX models run in-process, and kilter's own JSON
//! network files, on the 114 query rows of the breast-cancer corpus.
//!
//! Source of every expected value: `tests/golden/models/expected.json`, written by
//! `tests/golden/models/generate_models.py` with scikit-learn 1.9.1, skl2onnx 1.20.0,
//! onnx 1.23.2 and numpy 2.4.6 (the versions are recorded in the file and checked below).
//! The models were trained by the same script on the fit rows of the same split.

use std::collections::BTreeMap;
use std::path::PathBuf;

use kilter::models::{Model, ModelSource};
use kilter::Error;
use ndarray::{Array2, ArrayView2, Axis};
use serde::Deserialize;

use crate::harness::repo;
use crate::tolerance::{
    DOUBLE_PROBABILITY, FLOAT32_PROBABILITY, FLOAT32_RELATIVE_TO_TERMS, GRADIENT_RELATIVE,
};

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct Expected {
    versions: BTreeMap<String, serde_json::Value>,
    query_rows: usize,
    features: Vec<String>,
    models: BTreeMap<String, Reference>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct Reference {
    predict_proba: Option<Vec<Vec<f64>>>,
    predict: Option<Vec<f64>>,
    decision_function: Option<Vec<f64>>,
    gradient_p1: Option<Vec<Vec<f64>>>,
    standardized_head: Option<Vec<Vec<f64>>>,
    transform: Option<Vec<Vec<f64>>>,
    explained_variance_ratio: Option<Vec<f64>>,
    n_iter: Option<usize>,
}

fn expected() -> Expected {
    let path = repo("tests/golden/models/expected.json");
    serde_json::from_str(&std::fs::read_to_string(path).expect("expected.json")).expect("parses")
}

fn reference(name: &str) -> Reference {
    expected()
        .models
        .remove(name)
        .unwrap_or_else(|| panic!("expected.json has no model {name}"))
}

fn matrix(rows: &[Vec<f64>]) -> Array2<f64> {
    let width = rows[0].len();
    let flat: Vec<f64> = rows.iter().flatten().copied().collect();
    Array2::from_shape_vec((rows.len(), width), flat).expect("rectangular")
}

/// The 30 features of the breast-cancer query rows (the `diagnosis` label dropped).
fn query_rows() -> Array2<f64> {
    corpus_query_rows("breast_cancer", "diagnosis")
}

/// The features of a corpus's query rows, its last column (the label) dropped.
fn corpus_query_rows(corpus: &str, label: &str) -> Array2<f64> {
    let text = std::fs::read_to_string(repo(&format!("tests/golden/{corpus}_query.csv")))
        .expect("query rows");
    let mut lines = text.lines();
    let header: Vec<&str> = lines.next().expect("header").split(',').collect();
    assert_eq!(header.last(), Some(&label));
    let rows: Vec<Vec<f64>> = lines
        .map(|line| {
            let cells: Vec<&str> = line.split(',').collect();
            cells[..cells.len() - 1]
                .iter()
                .map(|c| c.parse::<f64>().expect("a number"))
                .collect()
        })
        .collect();
    matrix(&rows)
}

fn model_path(file: &str) -> PathBuf {
    repo(&format!("tests/golden/models/{file}"))
}

fn load(file: &str, output: Option<&str>) -> kilter::Result<Box<dyn Model>> {
    ModelSource::File {
        path: model_path(file),
        output: output.map(str::to_string),
    }
    .load()
}

fn max_abs_difference(a: ArrayView2<'_, f64>, b: ArrayView2<'_, f64>) -> f64 {
    assert_eq!(a.dim(), b.dim(), "shapes differ");
    a.iter()
        .zip(b.iter())
        .map(|(x, y)| (x - y).abs())
        .fold(0.0, f64::max)
}

/// Runs `file` on the query rows and compares with scikit-learn's `predict_proba`.
fn check_probabilities(file: &str, model: &str, tolerance: f64) -> f64 {
    check_probabilities_on(query_rows(), file, model, tolerance)
}

fn check_probabilities_on(x: Array2<f64>, file: &str, model: &str, tolerance: f64) -> f64 {
    let want = matrix(
        reference(model)
            .predict_proba
            .as_ref()
            .expect("predict_proba"),
    );
    let got = load(file, None)
        .expect("loads")
        .predict(x.view())
        .expect("answers");
    let worst = max_abs_difference(got.view(), want.view());
    eprintln!("{file}: max |kilter - scikit-learn predict_proba| = {worst:.3e}");
    assert!(
        worst <= tolerance,
        "{file}: max difference {worst:e} exceeds {tolerance:e}"
    );
    worst
}

#[test]
fn reference_file_records_its_sources() {
    // The versions the generator recorded (generate_models.py, versions()).
    let e = expected();
    for key in ["python", "numpy", "sklearn", "skl2onnx", "onnx"] {
        assert!(e.versions.contains_key(key), "versions lack {key}");
    }
    assert_eq!(e.query_rows, query_rows().nrows());
    assert_eq!(e.features.len(), 30);
    for model in [
        "lr",
        "mlp",
        "rf",
        "gb",
        "gb_regressor",
        "rf_regressor",
        "pca5_encoder",
    ] {
        assert!(e.models.contains_key(model), "expected.json lacks {model}");
    }
    assert!(e.models["mlp"].n_iter.is_some());
    assert_eq!(
        e.models["pca5_encoder"]
            .explained_variance_ratio
            .as_ref()
            .map(Vec::len),
        Some(5)
    );
}

// ONNX classifiers exported by skl2onnx (zipmap=False) against scikit-learn 1.9.1's
// predict_proba (generate_models.py).

#[test]
#[cfg_attr(not(feature = "onnx"), ignore = "needs the onnx feature")]
fn onnx_logistic_regression_matches_scikit_learn() {
    // Pipeline(StandardScaler, LogisticRegression): ONNX Scaler + LinearClassifier.
    check_probabilities("lr.onnx", "lr", FLOAT32_PROBABILITY);
}

#[test]
#[cfg_attr(not(feature = "onnx"), ignore = "needs the onnx feature")]
fn onnx_multilayer_perceptron_matches_scikit_learn() {
    // Pipeline(StandardScaler, MLPClassifier(16, 8), relu): MatMul/Add/Relu/Sigmoid.
    check_probabilities("mlp.onnx", "mlp", FLOAT32_PROBABILITY);
}

#[test]
#[cfg_attr(not(feature = "onnx"), ignore = "needs the onnx feature")]
fn onnx_random_forest_matches_scikit_learn() {
    // RandomForestClassifier(20 trees, depth 6): ONNX-ML TreeEnsembleClassifier.
    check_probabilities("rf.onnx", "rf", FLOAT32_PROBABILITY);
}

#[test]
#[cfg_attr(not(feature = "onnx"), ignore = "needs the onnx feature")]
fn onnx_gradient_boosting_matches_scikit_learn() {
    // GradientBoostingClassifier(30): TreeEnsembleClassifier with a logistic transform.
    check_probabilities("gb.onnx", "gb", FLOAT32_PROBABILITY);
}

#[test]
#[cfg_attr(not(feature = "onnx"), ignore = "needs the onnx feature")]
fn onnx_three_class_tree_ensembles_match_scikit_learn() {
    // Wine corpus (13 features, three cultivars), query rows of tests/golden/wine_query.csv:
    // GradientBoostingClassifier (softmax transform over three class scores) and
    // RandomForestClassifier, against scikit-learn 1.9.1's predict_proba
    // (generate_models.py).
    for (file, model) in [("wine_gb.onnx", "wine_gb"), ("wine_rf.onnx", "wine_rf")] {
        let x = corpus_query_rows("wine", "cultivar");
        check_probabilities_on(x, file, model, FLOAT32_PROBABILITY);
    }
}

#[test]
#[cfg_attr(not(feature = "onnx"), ignore = "needs the onnx feature")]
fn onnx_double_input_is_fed_in_double_precision() {
    // The LR pipeline exported with a double input: the graph computes in double
    // precision throughout, so it agrees with scikit-learn 1.9.1 like kilter's own
    // double-precision networks do.
    let worst = check_probabilities("lr_double.onnx", "lr", DOUBLE_PROBABILITY);
    assert!(worst < FLOAT32_PROBABILITY);
    let model = load("lr_double.onnx", None).unwrap();
    assert_eq!(model.precision(), f64::EPSILON);
    let single = load("lr.onnx", None).unwrap();
    assert_eq!(single.precision(), f32::EPSILON as f64);
}

/// Compares regression outputs `[rows, 1]` with scikit-learn's `predict`.
fn check_regressor(file: &str, model: &str) {
    let x = query_rows();
    let want = reference(model).predict.expect("predict");
    let got = load(file, None)
        .expect("loads")
        .predict(x.view())
        .expect("answers");
    assert_eq!(got.dim(), (want.len(), 1));
    let want = Array2::from_shape_vec((want.len(), 1), want).unwrap();
    let worst = max_abs_difference(got.view(), want.view());
    eprintln!("{file}: max |kilter - scikit-learn predict| = {worst:.3e}");
    // Targets are 0/1, so the predictions are bounded like probabilities.
    assert!(worst <= FLOAT32_PROBABILITY, "{file}: {worst:e}");
}

#[test]
#[cfg_attr(not(feature = "onnx"), ignore = "needs the onnx feature")]
fn onnx_gradient_boosting_regressor_matches_scikit_learn() {
    // GradientBoostingRegressor(30) of the 0/1 label: ONNX-ML TreeEnsembleRegressor (SUM),
    // against scikit-learn 1.9.1's predict (generate_models.py).
    check_regressor("gb_regressor.onnx", "gb_regressor");
}

#[test]
#[cfg_attr(not(feature = "onnx"), ignore = "needs the onnx feature")]
fn onnx_random_forest_regressor_matches_scikit_learn() {
    // RandomForestRegressor(10 trees, depth 5): TreeEnsembleRegressor (AVERAGE), against
    // scikit-learn 1.9.1's predict (generate_models.py).
    check_regressor("rf_regressor.onnx", "rf_regressor");
}

/// Sum over features of |x_j w_j| for each row: the scale of a dot product's rounding.
fn term_scale(x: ArrayView2<'_, f64>, w: ArrayView2<'_, f64>) -> Array2<f64> {
    x.mapv(f64::abs).dot(&w.mapv(f64::abs))
}

#[test]
#[cfg_attr(not(feature = "onnx"), ignore = "needs the onnx feature")]
fn onnx_rank_one_output_counts_as_one_column() {
    // lr_logit_rank1.onnx answers X w' + b' with shape [N]; the reference is scikit-learn
    // 1.9.1's LogisticRegression decision_function (generate_models.py).
    let x = query_rows();
    let want = reference("lr")
        .decision_function
        .expect("decision_function");
    let got = load("lr_logit_rank1.onnx", None)
        .unwrap()
        .predict(x.view())
        .unwrap();
    assert_eq!(got.dim(), (want.len(), 1));
    // Weights of the folded LR, from kilter's JSON copy written by the same script.
    let file: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(model_path("lr.json")).unwrap()).unwrap();
    let w: Vec<f64> = file["layers"][0]["weights"][0]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_f64().unwrap())
        .collect();
    let w = Array2::from_shape_vec((w.len(), 1), w).unwrap();
    let scale = term_scale(x.view(), w.view());
    let mut worst = 0.0f64;
    for (r, z) in want.iter().enumerate() {
        let relative = (got[[r, 0]] - z).abs() / scale[[r, 0]];
        worst = worst.max(relative);
    }
    eprintln!("lr_logit_rank1.onnx: max |difference| / sum |x w| = {worst:.3e}");
    assert!(worst <= FLOAT32_RELATIVE_TO_TERMS, "{worst:e}");
}

#[test]
#[cfg_attr(not(feature = "onnx"), ignore = "needs the onnx feature")]
fn onnx_encoder_matches_scikit_learn_pca() {
    // pca5_encoder.onnx: Pipeline(StandardScaler, PCA(5)); reference: scikit-learn 1.9.1's
    // transform of the query rows (generate_models.py).
    let x = query_rows();
    let want = matrix(&reference("pca5_encoder").transform.expect("transform"));
    let got = load("pca5_encoder.onnx", None)
        .unwrap()
        .predict(x.view())
        .unwrap();
    assert_eq!(got.dim(), want.dim());
    // Standardized features are of order 1 and the components are unit vectors, so the
    // rounding scale of a score is about sum_j |z_j|; bound it by the row's largest score
    // times the 30 features, and compare relative to that.
    let mut worst = 0.0f64;
    for (g, w) in got.axis_iter(Axis(0)).zip(want.axis_iter(Axis(0))) {
        let scale = 30.0 * w.iter().fold(1.0f64, |m, v| m.max(v.abs()));
        for (a, b) in g.iter().zip(w.iter()) {
            worst = worst.max((a - b).abs() / scale);
        }
    }
    eprintln!("pca5_encoder.onnx: max |difference| / (30 max |score|) = {worst:.3e}");
    assert!(worst <= FLOAT32_RELATIVE_TO_TERMS, "{worst:e}");
}

#[test]
#[cfg_attr(not(feature = "onnx"), ignore = "needs the onnx feature")]
fn fixed_batch_model_runs_any_number_of_rows() {
    // lr_batch16.onnx has input [16, 30]: 37 rows are two full batches and a padded one.
    // Reference: scikit-learn 1.9.1's predict_proba of the same pipeline (generate_models.py).
    let x = query_rows();
    let want = matrix(&reference("lr").predict_proba.unwrap());
    let model = load("lr_batch16.onnx", None).unwrap();
    for rows in [37, 1, 16, 32, x.nrows()] {
        let got = model.predict(x.slice(ndarray::s![..rows, ..])).unwrap();
        let worst = max_abs_difference(got.view(), want.slice(ndarray::s![..rows, ..]));
        eprintln!("lr_batch16.onnx, {rows} rows: max difference {worst:.3e}");
        assert!(worst <= FLOAT32_PROBABILITY, "{rows} rows: {worst:e}");
    }
    assert_eq!(model.preferred_batch() % 16, 0);
    assert!(
        model.describe().contains("[16, 30]"),
        "{}",
        model.describe()
    );
}

#[test]
#[cfg_attr(not(feature = "onnx"), ignore = "needs the onnx feature")]
fn large_inputs_split_across_threads_agree_with_scikit_learn() {
    // 40 copies of the query rows (4560 rows) run as at least nine parallel chunks (a
    // chunk is at most 512 rows); every copy must give scikit-learn 1.9.1's predict_proba
    // (generate_models.py).
    let x = query_rows();
    let copies = 40;
    let views: Vec<ArrayView2<'_, f64>> = (0..copies).map(|_| x.view()).collect();
    let big = ndarray::concatenate(Axis(0), &views).unwrap();
    let want = matrix(&reference("mlp").predict_proba.unwrap());
    let model = load("mlp.onnx", None).unwrap();
    let got = model.predict(big.view()).unwrap();
    assert_eq!(got.nrows(), big.nrows());
    for k in 0..copies {
        let part = got.slice(ndarray::s![k * x.nrows()..(k + 1) * x.nrows(), ..]);
        let worst = max_abs_difference(part, want.view());
        assert!(worst <= FLOAT32_PROBABILITY, "copy {k}: {worst:e}");
    }
}

#[test]
#[cfg_attr(not(feature = "onnx"), ignore = "needs the onnx feature")]
fn onnx_models_leave_gradients_to_finite_differences() {
    let x = query_rows();
    let model = load("mlp.onnx", None).unwrap();
    assert!(model.gradients(x.view(), 1).unwrap().is_none());
    assert_eq!(model.input_dim(), Some(30));
    assert_eq!(model.precision(), f32::EPSILON as f64);
}

#[test]
#[cfg_attr(not(feature = "onnx"), ignore = "needs the onnx feature")]
fn named_output_is_used() {
    // Naming the default output explicitly gives the same answers (scikit-learn 1.9.1's
    // predict_proba via generate_models.py), and an intermediate value can be named too.
    let x = query_rows();
    let want = matrix(&reference("lr").predict_proba.unwrap());
    let model = load("lr.onnx", Some("probabilities")).unwrap();
    let got = model.predict(x.view()).unwrap();
    assert!(max_abs_difference(got.view(), want.view()) <= FLOAT32_PROBABILITY);

    // The Scaler's output against scikit-learn 1.9.1's StandardScaler.transform of the
    // first ten query rows (generate_models.py).
    let head = matrix(&reference("lr").standardized_head.unwrap());
    let scaled = load("lr.onnx", Some("variable"))
        .unwrap()
        .predict(x.slice(ndarray::s![..head.nrows(), ..]))
        .unwrap();
    let worst = max_abs_difference(scaled.view(), head.view());
    eprintln!("lr.onnx output \"variable\": max difference {worst:.3e}");
    // Standardized values are of order 1 (at most about 10 here); float32 rounding of
    // (x - mean) * (1 / scale) leaves a few units of 1e-7 of that.
    assert!(worst <= FLOAT32_PROBABILITY * 10.0, "{worst:e}");
}

// kilter's JSON networks against scikit-learn 1.9.1 (double precision both sides).

#[test]
fn json_logistic_regression_matches_scikit_learn() {
    // lr.json: the LR pipeline with the scaler folded into the weights; reference:
    // scikit-learn 1.9.1 predict_proba (generate_models.py).
    check_probabilities("lr.json", "lr", DOUBLE_PROBABILITY);
}

#[test]
fn json_multilayer_perceptron_matches_scikit_learn() {
    // mlp.json: MLPClassifier(16, 8) weights, one sigmoid output unit answered as
    // [1 - p, p]; reference: scikit-learn 1.9.1 predict_proba (generate_models.py).
    check_probabilities("mlp.json", "mlp", DOUBLE_PROBABILITY);
}

#[test]
fn json_logistic_gradient_matches_the_analytic_one() {
    // Reference: dP(class 1)/dx = p (1 - p) w' with p (1 - p) computed as
    // expit(z) expit(-z) from scikit-learn 1.9.1's decision_function (generate_models.py).
    // kilter takes the sigmoid's derivative from the logit the same way, so the two agree
    // to rounding on every row, saturated predictions included.
    let x = query_rows();
    let r = reference("lr");
    let want = matrix(&r.gradient_p1.unwrap());
    let model = load("lr.json", None).unwrap();
    let got = model
        .gradients(x.view(), 1)
        .unwrap()
        .expect("exact gradients");
    assert_eq!(got.dim(), want.dim());
    let mut worst = 0.0f64;
    for ((row, col), &g) in got.indexed_iter() {
        let w = want[[row, col]];
        let relative = (g - w).abs() / w.abs().max(1e-300);
        assert!(
            relative <= GRADIENT_RELATIVE,
            "row {row} col {col}: {g:e} vs {w:e} (relative {relative:e})"
        );
        worst = worst.max(relative);
    }
    eprintln!("lr.json gradient: max relative difference {worst:.3e}");
}

// Refusals: typed errors, exit status 2.

#[test]
#[cfg_attr(not(feature = "onnx"), ignore = "needs the onnx feature")]
fn garbage_and_truncated_files_are_model_file_errors() {
    let dir = crate::harness::temp_dir();
    let garbage = dir.path().join("garbage.onnx");
    std::fs::write(&garbage, b"this is not a protobuf \xff\xfe\x00\x01 at all").unwrap();
    let bytes = std::fs::read(model_path("mlp.onnx")).unwrap();
    let truncated = dir.path().join("truncated.onnx");
    std::fs::write(&truncated, &bytes[..bytes.len() / 2]).unwrap();
    let empty = dir.path().join("empty.onnx");
    std::fs::write(&empty, b"").unwrap();
    for path in [&garbage, &truncated, &empty] {
        let source = ModelSource::File {
            path: path.clone(),
            output: None,
        };
        match source.load().map(|m| m.describe()) {
            Err(e @ Error::ModelFile { .. }) => {
                assert_eq!(e.exit_status(), 2);
                let message = e.to_string();
                assert!(message.contains(&path.display().to_string()), "{message}");
                assert!(message.contains("ONNX"), "{message}");
            }
            other => panic!(
                "{}: expected a ModelFile error, got {other:?}",
                path.display()
            ),
        }
    }
}

#[test]
#[cfg_attr(not(feature = "onnx"), ignore = "needs the onnx feature")]
fn unknown_output_name_lists_the_outputs() {
    let e = load("lr.onnx", Some("nope"))
        .map(|m| m.describe())
        .expect_err("refused");
    assert_eq!(e.exit_status(), 2);
    let message = e.to_string();
    assert!(
        matches!(
            e,
            Error::InvalidSetting {
                flag: "--model-output",
                ..
            }
        ),
        "{message}"
    );
    for fragment in ["nope", "label (int64)", "probabilities (float)"] {
        assert!(message.contains(fragment), "{message}");
    }
    let e = load("lr.onnx", Some("label"))
        .map(|m| m.describe())
        .expect_err("an int64 output is refused");
    let message = e.to_string();
    assert!(
        message.contains("int64") && message.contains("floating-point"),
        "{message}"
    );
}

#[test]
#[cfg_attr(not(feature = "onnx"), ignore = "needs the onnx feature")]
fn zipmap_is_refused_with_export_advice() {
    // skl2onnx's default classifier export ends in ZipMap (a list of maps), which the
    // runtime does not implement.
    match load("lr_zipmap.onnx", None).map(|m| m.describe()) {
        Err(e @ Error::OnnxOperator { .. }) => {
            assert_eq!(e.exit_status(), 2);
            let message = e.to_string();
            assert!(message.contains("ZipMap"), "{message}");
            assert!(message.contains("'zipmap': False"), "{message}");
        }
        other => panic!("expected an OnnxOperator error, got {other:?}"),
    }
}

#[test]
#[cfg_attr(not(feature = "onnx"), ignore = "needs the onnx feature")]
fn zipmap_export_still_answers_from_its_probability_tensor() {
    // Naming the tensor that feeds ZipMap leaves ZipMap out of the run; the answers are
    // scikit-learn 1.9.1's predict_proba (generate_models.py).
    let x = query_rows();
    let want = matrix(&reference("lr").predict_proba.unwrap());
    let model = load("lr_zipmap.onnx", Some("probabilities")).unwrap();
    let got = model.predict(x.view()).unwrap();
    assert!(max_abs_difference(got.view(), want.view()) <= FLOAT32_PROBABILITY);
}

#[test]
#[cfg_attr(not(feature = "onnx"), ignore = "needs the onnx feature")]
fn wrong_input_width_is_refused() {
    let x = query_rows();
    for file in ["lr.onnx", "lr_batch16.onnx", "rf.onnx"] {
        let model = load(file, None).unwrap();
        match model.predict(x.slice(ndarray::s![.., ..29])) {
            Err(Error::ModelInputWidth {
                expected, found, ..
            }) => assert_eq!((expected, found), (30, 29)),
            other => panic!("{file}: expected ModelInputWidth, got {other:?}"),
        }
    }
}

#[test]
#[cfg(not(feature = "onnx"))]
fn onnx_files_need_the_onnx_feature() {
    match load("lr.onnx", None).map(|m| m.describe()) {
        Err(e @ Error::ModelFile { .. }) => assert!(e.to_string().contains("feature")),
        other => panic!("expected a ModelFile error, got {other:?}"),
    }
}

// Through the binary: `kilter predict`.

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct PredictRecord {
    row: usize,
    outputs: Vec<f64>,
}

#[test]
#[cfg_attr(not(feature = "onnx"), ignore = "needs the onnx feature")]
fn predict_command_answers_like_scikit_learn() {
    // Every ONNX classifier and JSON network through `kilter predict`, against
    // scikit-learn 1.9.1's predict_proba (generate_models.py).
    let dir = crate::harness::temp_dir();
    let query = repo("tests/golden/breast_cancer_query.csv");
    for (file, model, tolerance) in [
        ("lr.onnx", "lr", FLOAT32_PROBABILITY),
        ("mlp.onnx", "mlp", FLOAT32_PROBABILITY),
        ("rf.onnx", "rf", FLOAT32_PROBABILITY),
        ("gb.onnx", "gb", FLOAT32_PROBABILITY),
        ("lr_batch16.onnx", "lr", FLOAT32_PROBABILITY),
        ("lr.json", "lr", DOUBLE_PROBABILITY),
        ("mlp.json", "mlp", DOUBLE_PROBABILITY),
    ] {
        let out = dir.path().join(format!("{file}.jsonl"));
        crate::harness::kilter(
            dir.path(),
            &[
                "predict",
                "--model",
                model_path(file).to_str().unwrap(),
                "--input",
                query.to_str().unwrap(),
                "--label-column",
                "diagnosis",
                "--out",
                out.to_str().unwrap(),
            ],
        )
        .expect_status(0);
        let records: Vec<PredictRecord> = std::fs::read_to_string(&out)
            .unwrap()
            .lines()
            .map(|l| serde_json::from_str(l).expect("a predict record"))
            .collect();
        let want = reference(model).predict_proba.unwrap();
        assert_eq!(records.len(), want.len(), "{file}");
        for (i, (record, expected)) in records.iter().zip(&want).enumerate() {
            assert_eq!(record.row, i);
            assert_eq!(record.outputs.len(), expected.len());
            for (a, b) in record.outputs.iter().zip(expected) {
                assert!((a - b).abs() <= tolerance, "{file} row {i}: {a} vs {b}");
            }
        }
    }
}

#[test]
#[cfg_attr(not(feature = "onnx"), ignore = "needs the onnx feature")]
fn predict_command_refuses_bad_models_with_status_2() {
    let dir = crate::harness::temp_dir();
    let garbage = dir.path().join("garbage.onnx");
    std::fs::write(&garbage, b"\x08\x07garbage, not a model").unwrap();
    let query = repo("tests/golden/breast_cancer_query.csv");
    let run = |model: &std::path::Path, extra: &[&str]| {
        let mut args = vec![
            "predict",
            "--model",
            model.to_str().unwrap(),
            "--input",
            query.to_str().unwrap(),
            "--label-column",
            "diagnosis",
        ];
        args.extend_from_slice(extra);
        crate::harness::kilter(dir.path(), &args)
    };
    run(&garbage, &[]).expect_status(2).expect_stderr(&[
        "kilter: error:",
        "garbage.onnx",
        "not an ONNX model",
    ]);
    run(&model_path("lr.onnx"), &["--model-output", "nope"])
        .expect_status(2)
        .expect_stderr(&["nope", "label (int64)", "probabilities (float)"]);
    run(&model_path("lr_zipmap.onnx"), &[])
        .expect_status(2)
        .expect_stderr(&["ZipMap", "'zipmap': False"]);
    // The query file with its label kept has 31 columns, the model takes 30.
    let run_wide = crate::harness::kilter(
        dir.path(),
        &[
            "predict",
            "--model",
            model_path("rf.onnx").to_str().unwrap(),
            "--input",
            query.to_str().unwrap(),
        ],
    );
    run_wide
        .expect_status(2)
        .expect_stderr(&["takes 30 features", "31"]);
}

#[test]
#[cfg_attr(not(feature = "onnx"), ignore = "needs the onnx feature")]
fn every_truncation_and_byte_flip_is_a_typed_outcome() {
    // SPEC: no input makes kilter panic. Every prefix of lr.onnx, and the file with each
    // byte in turn flipped, must load or be refused with a typed error of exit status 2
    // (a damaged model file); a model that loads must answer through a typed result. A
    // panic escaping the adapter fails this test.
    let dir = crate::harness::temp_dir();
    let bytes = std::fs::read(model_path("lr.onnx")).unwrap();
    let path = dir.path().join("damaged.onnx");
    let x = query_rows();
    let (mut loaded, mut refused, mut guarded) = (0usize, 0usize, 0usize);
    let mut check = |data: &[u8], what: String| {
        std::fs::write(&path, data).unwrap();
        let source = ModelSource::File {
            path: path.clone(),
            output: None,
        };
        match source.load() {
            Ok(model) => {
                loaded += 1;
                // A damaged model may answer wrongly or fail, but through a typed result.
                if let Err(e) = model.predict(x.view()) {
                    assert!(e.exit_status() >= 1, "{what}: {e}");
                }
            }
            Err(e) => {
                refused += 1;
                assert!(
                    matches!(
                        e,
                        Error::ModelFile { .. }
                            | Error::OnnxOperator { .. }
                            | Error::InvalidSetting { .. }
                    ),
                    "{what}: {e:?}"
                );
                assert_eq!(e.exit_status(), 2, "{what}: {e}");
                if e.to_string().contains("runtime failed") {
                    guarded += 1;
                }
            }
        }
    };
    for end in 0..bytes.len() {
        check(&bytes[..end], format!("prefix of {end} bytes"));
    }
    for i in 0..bytes.len() {
        let mut flipped = bytes.clone();
        flipped[i] ^= 0x5a;
        check(&flipped, format!("byte {i} flipped"));
    }
    eprintln!(
        "damaged lr.onnx: {loaded} loaded, {refused} refused ({guarded} by the runtime's own \
         assertions, caught)"
    );
    assert!(
        refused > bytes.len(),
        "every strict prefix at least is refused"
    );
}
