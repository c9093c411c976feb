//! Criterion benchmarks of the reference-profile work: reading a matrix, fitting a
//! profile, exact k-NN search, and scoring queries (workload W1 of the README: a
//! 50,000 x 32 reference, 20,000 queries, k = 10).
//!
//! `cargo bench --bench scoring`; `benches/peer.py` runs the same job with general-purpose
//! Python libraries for comparison.

use std::hint::black_box;
use std::io::Write;

use criterion::{criterion_group, criterion_main, Criterion};
use ndarray::Array2;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, Normal};

use kilter::corpus::{read_matrix, CsvOptions, FeatureMatrix};
use kilter::neighbours::{BruteForceIndex, Exclusion, NeighbourIndex};
use kilter::profile::ProfileSettings;

/// Correlated Gaussian rows: x = z A with a fixed random mixing matrix.
fn correlated_rows(rows: usize, dim: usize, seed: u64) -> Array2<f64> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let normal = Normal::new(0.0, 1.0).expect("unit normal");
    let mut mixing_rng = ChaCha8Rng::seed_from_u64(99);
    let mixing = Array2::from_shape_fn((dim, dim), |(i, j)| {
        f64::from(u8::from(i == j)) + normal.sample(&mut mixing_rng) / 6.0
    });
    let z = Array2::from_shape_fn((rows, dim), |_| normal.sample(&mut rng));
    z.dot(&mixing)
}

fn matrix(values: Array2<f64>) -> FeatureMatrix {
    FeatureMatrix {
        names: (0..values.ncols()).map(|i| format!("x{i}")).collect(),
        named: true,
        values,
        source: "generated".into(),
    }
}

fn w1(c: &mut Criterion) {
    let reference = matrix(correlated_rows(50_000, 32, 1));
    let queries = correlated_rows(20_000, 32, 2);
    let settings = ProfileSettings {
        holdout: 0.0,
        ..ProfileSettings::default()
    };
    let profile = settings.fit(&reference).expect("fit");
    let embedded_queries = profile.embed(queries.view()).expect("embed");
    let index = BruteForceIndex::new(profile.index().rows().to_owned());

    let mut group = c.benchmark_group("w1_50000x32_20000_queries_k10");
    group.sample_size(10);
    group.bench_function("knn_exact", |b| {
        b.iter(|| {
            black_box(
                index
                    .k_nearest(embedded_queries.view(), 10, Exclusion::None)
                    .expect("search"),
            )
        })
    });
    group.bench_function("score", |b| {
        b.iter(|| black_box(profile.score(queries.view(), 0, 0.01).expect("score")))
    });
    group.bench_function("fit_in_sample", |b| {
        b.iter(|| black_box(settings.fit(&reference).expect("fit")))
    });
    group.finish();
}

fn csv_reading(c: &mut Criterion) {
    let values = correlated_rows(100_000, 64, 3);
    let dir = tempfile::tempdir().expect("temp dir");
    let path = dir.path().join("table.csv");
    {
        let mut out = std::io::BufWriter::new(std::fs::File::create(&path).expect("create"));
        let header: Vec<String> = (0..64).map(|i| format!("x{i}")).collect();
        writeln!(out, "{}", header.join(",")).expect("write");
        for row in values.outer_iter() {
            let cells: Vec<String> = row.iter().map(|v| v.to_string()).collect();
            writeln!(out, "{}", cells.join(",")).expect("write");
        }
    }
    let mut group = c.benchmark_group("read_csv_100000x64");
    group.sample_size(10);
    group.bench_function("read_matrix", |b| {
        b.iter(|| black_box(read_matrix(&path, &CsvOptions::default()).expect("read")))
    });
    group.finish();
}

criterion_group!(benches, w1, csv_reading);
criterion_main!(benches);
