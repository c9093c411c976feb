//! Criterion benchmarks of model evaluations per second through each adapter: kilter's
//! JSON network, ONNX in-process, and a child process on the line protocol, at 1, 64 and
//! 1024 rows per `predict` call; plus back-propagated gradients of the JSON network and
//! finite-difference gradients of the ONNX model.
//!
//! The models are the breast-cancer MLP of `tests/golden/models/` (30 inputs, hidden layers
//! of 16 and 8 units) as `mlp.json` and `mlp.onnx`; the inputs are the 114 query rows of
//! `tests/golden/breast_cancer_query.csv`, repeated to fill a batch. Throughput counts
//! input rows.
//!
//! The line-protocol model is a tiny Python script, written to a temporary directory at
//! start, that parses each request and answers `[0.5, 0.5]` for every row: it measures
//! the protocol's cost (serialising, the pipe round trip, parsing on both sides), not a
//! model's work. Its adapter's batch size equals the rows per call, so every call is one
//! request; `line_protocol_predict/rows/1_per_request_round_trip` is the per-request
//! overhead.
//!
//! `cargo bench --bench models`

use std::hint::black_box;
use std::path::Path;
use std::time::Duration;

use criterion::{criterion_group, criterion_main, BenchmarkId, Criterion, Throughput};
use ndarray::Array2;

use kilter::corpus::{read_matrix, CsvOptions};
use kilter::models::{LineProtocolModel, Model, NetworkModel};

const BATCHES: [usize; 3] = [1, 64, 1024];
/// The output whose gradient is taken: P(class 1).
const TARGET: usize = 1;

/// A line-protocol model that answers two constant outputs per input row.
const CONSTANT_MODEL: &str = r#"import json
import sys

for line in sys.stdin:
    rows = len(json.loads(line)["inputs"])
    sys.stdout.write('{"outputs": [' + ",".join(["[0.5, 0.5]"] * rows) + "]}\n")
    sys.stdout.flush()
"#;

fn golden(relative: &str) -> std::path::PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join(relative)
}

/// The query rows, repeated to `rows` rows.
fn input_rows(rows: usize) -> Array2<f64> {
    let options = CsvOptions {
        label_columns: vec!["diagnosis".into()],
        ..Default::default()
    };
    let matrix = read_matrix(&golden("tests/golden/breast_cancer_query.csv"), &options)
        .expect("read the query rows");
    let values = matrix.values;
    let (n, d) = values.dim();
    Array2::from_shape_fn((rows, d), |(r, c)| values[[r % n, c]])
}

fn configure(group: &mut criterion::BenchmarkGroup<'_, criterion::measurement::WallTime>) {
    group.sample_size(10);
    group.warm_up_time(Duration::from_secs(1));
    group.measurement_time(Duration::from_secs(3));
}

/// `predict` of `rows`-row batches, one group per adapter.
fn bench_predict(c: &mut Criterion, group_name: &str, model: &dyn Model, batches: &[usize]) {
    let mut group = c.benchmark_group(group_name);
    configure(&mut group);
    for &rows in batches {
        let inputs = input_rows(rows);
        group.throughput(Throughput::Elements(rows as u64));
        group.bench_with_input(BenchmarkId::new("rows", rows), &inputs, |b, x| {
            b.iter(|| black_box(model.predict(black_box(x.view())).expect("predict")))
        });
    }
    group.finish();
}

fn json_mlp(c: &mut Criterion) {
    let model = NetworkModel::load(&golden("tests/golden/models/mlp.json")).expect("mlp.json");
    bench_predict(c, "json_mlp_predict", &model, &BATCHES);

    let mut group = c.benchmark_group("json_mlp_backprop_gradients");
    configure(&mut group);
    for rows in [64, 1024] {
        let inputs = input_rows(rows);
        group.throughput(Throughput::Elements(rows as u64));
        group.bench_with_input(BenchmarkId::new("rows", rows), &inputs, |b, x| {
            b.iter(|| {
                black_box(
                    model
                        .gradients(black_box(x.view()), TARGET)
                        .expect("gradients")
                        .expect("back-propagation"),
                )
            })
        });
    }
    group.finish();
}

#[cfg(feature = "onnx")]
fn onnx_mlp(c: &mut Criterion) {
    use kilter::models::onnx::OnnxModel;
    use kilter::models::FiniteDifference;

    let model = OnnxModel::load(&golden("tests/golden/models/mlp.onnx"), None).expect("mlp.onnx");
    bench_predict(c, "onnx_mlp_predict", &model, &BATCHES);

    // The same 1024-row call with rayon limited to one thread: the chunks run one after
    // another, which shows what spreading them across cores gains.
    let one_thread = rayon::ThreadPoolBuilder::new()
        .num_threads(1)
        .build()
        .expect("a one-thread pool");
    let mut group = c.benchmark_group("onnx_mlp_predict_one_thread");
    configure(&mut group);
    let inputs = input_rows(1024);
    group.throughput(Throughput::Elements(1024));
    group.bench_with_input(BenchmarkId::new("rows", 1024), &inputs, |b, x| {
        b.iter(|| {
            one_thread.install(|| black_box(model.predict(black_box(x.view())).expect("predict")))
        })
    });
    group.finish();

    let d = model.input_dim().expect("declared width");
    let differences = FiniteDifference::new(&vec![1.0; d], model.precision());
    let mut group = c.benchmark_group("onnx_mlp_finite_difference_gradients");
    configure(&mut group);
    let inputs = input_rows(64);
    group.throughput(Throughput::Elements(64));
    group.bench_with_input(BenchmarkId::new("rows", 64), &inputs, |b, x| {
        b.iter(|| {
            black_box(
                differences
                    .gradients(&model, black_box(x.view()), TARGET)
                    .expect("finite differences"),
            )
        })
    });
    group.finish();
}

#[cfg(not(feature = "onnx"))]
fn onnx_mlp(_c: &mut Criterion) {}

fn line_protocol(c: &mut Criterion) {
    let dir = tempfile::tempdir().expect("temp dir");
    let script = dir.path().join("constant_model.py");
    std::fs::write(&script, CONSTANT_MODEL).expect("write the model script");
    let command = format!("exec python3 '{}'", script.display());

    let mut group = c.benchmark_group("line_protocol_predict");
    configure(&mut group);
    for rows in BATCHES {
        let model = LineProtocolModel::start(&command, rows, Duration::from_secs(60))
            .expect("start the model process");
        let inputs = input_rows(rows);
        // The first answer fixes the output width; keep it out of the timings.
        model.predict(inputs.view()).expect("first answer");
        let id = if rows == 1 {
            BenchmarkId::new("rows", "1_per_request_round_trip")
        } else {
            BenchmarkId::new("rows", rows)
        };
        group.throughput(Throughput::Elements(rows as u64));
        group.bench_with_input(id, &inputs, |b, x| {
            b.iter(|| black_box(model.predict(black_box(x.view())).expect("predict")))
        });
    }
    group.finish();
}

criterion_group!(benches, json_mlp, onnx_mlp, line_protocol);
criterion_main!(benches);
