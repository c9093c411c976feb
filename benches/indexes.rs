//! Criterion benchmarks of the three neighbour indexes: build and query times of the
//! brute-force, k-d tree and approximate (HNSW) indexes on seeded standard Gaussian rows
//! at (n, d) = (200,000, 4), (200,000, 8), (200,000, 16) and (50,000, 32), 10,000 queries
//! from the same distribution, k = 10; the approximate index's recall against the exact
//! answer is printed for each shape.
//!
//! `cargo bench --bench indexes`. The approximate build is single-threaded (that is what
//! makes it deterministic) and takes minutes at 200,000 rows, so it is timed once with a
//! wall clock and printed rather than sampled by criterion. The tree stops at 16
//! dimensions; at 32 it is skipped.

use std::hint::black_box;
use std::time::Instant;

use criterion::{criterion_group, criterion_main, BenchmarkId, Criterion};
use ndarray::Array2;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};

use kilter::neighbours::{
    recall, ApproximateIndex, ApproximateSettings, BruteForceIndex, Exclusion, NeighbourIndex,
    TreeIndex, MAX_TREE_DIM,
};

const SHAPES: [(usize, usize); 4] = [(200_000, 4), (200_000, 8), (200_000, 16), (50_000, 32)];
const QUERIES: usize = 10_000;
const K: usize = 10;

fn gaussian_rows(rows: usize, dim: usize, seed: u64) -> Array2<f64> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    Array2::from_shape_fn((rows, dim), |_| StandardNormal.sample(&mut rng))
}

fn query(index: &dyn NeighbourIndex, queries: &Array2<f64>) {
    black_box(
        index
            .k_nearest(queries.view(), K, Exclusion::None)
            .expect("search"),
    );
}

fn indexes(c: &mut Criterion) {
    for (n, d) in SHAPES {
        let rows = gaussian_rows(n, d, 1);
        let queries = gaussian_rows(QUERIES, d, 2);
        let shape = format!("{n}x{d}");
        let mut group = c.benchmark_group(format!("indexes_{shape}_{QUERIES}_queries_k{K}"));
        group.sample_size(10);

        group.bench_function(BenchmarkId::new("build", "brute_force"), |b| {
            b.iter(|| black_box(BruteForceIndex::new(rows.clone())))
        });
        let brute = BruteForceIndex::new(rows.clone());
        group.bench_function(BenchmarkId::new("query", "brute_force"), |b| {
            b.iter(|| query(&brute, &queries))
        });

        if d <= MAX_TREE_DIM {
            group.bench_function(BenchmarkId::new("build", "tree"), |b| {
                b.iter(|| black_box(TreeIndex::new(rows.clone()).expect("tree")))
            });
            let tree = TreeIndex::new(rows.clone()).expect("tree");
            group.bench_function(BenchmarkId::new("query", "tree"), |b| {
                b.iter(|| query(&tree, &queries))
            });
        } else {
            println!("{shape}: tree skipped (dimension {d} > {MAX_TREE_DIM})");
        }

        let started = Instant::now();
        let approximate =
            ApproximateIndex::new(rows.clone(), ApproximateSettings::default()).expect("graph");
        println!(
            "{shape}: approximate build (one thread, default settings) {:.1} s",
            started.elapsed().as_secs_f64()
        );
        group.bench_function(BenchmarkId::new("query", "approximate"), |b| {
            b.iter(|| query(&approximate, &queries))
        });
        group.finish();

        let exact = brute
            .k_nearest(queries.view(), K, Exclusion::None)
            .expect("search");
        let found = approximate
            .k_nearest(queries.view(), K, Exclusion::None)
            .expect("search");
        println!(
            "{shape}: approximate recall at {K} = {:.4}",
            recall(&exact, &found)
        );
    }
}

criterion_group!(benches, indexes);
criterion_main!(benches);
