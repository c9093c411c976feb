//! The indexes against a naive search (the oracle: every distance computed directly,
//! sorted), on seeded data built to stress them: duplicates, points far from the origin and
//! close to each other, mixed scales, values too large for single precision. The exact
//! indexes (brute force, k-d tree) must give the naive answer; the approximate one must
//! return the exact distances of the rows it returns, ascending, never the query itself
//! in-sample.

use ndarray::Array2;
use proptest::prelude::*;

use kilter::neighbours::{
    ApproximateIndex, ApproximateSettings, BruteForceIndex, Exclusion, NeighbourIndex, TreeIndex,
    MAX_TREE_DIM,
};

fn naive(
    rows: &Array2<f64>,
    queries: &Array2<f64>,
    k: usize,
    exclude_self: bool,
) -> Vec<Vec<(f64, usize)>> {
    queries
        .outer_iter()
        .enumerate()
        .map(|(qi, q)| {
            let mut all: Vec<(f64, usize)> = rows
                .outer_iter()
                .enumerate()
                .filter(|(ri, _)| !(exclude_self && *ri == qi))
                .map(|(ri, r)| {
                    let d2: f64 = q.iter().zip(r.iter()).map(|(a, b)| (a - b) * (a - b)).sum();
                    (d2, ri)
                })
                .collect();
            all.sort_by(|a, b| a.0.total_cmp(&b.0).then(a.1.cmp(&b.1)));
            all.truncate(k);
            all
        })
        .collect()
}

fn check(rows: Array2<f64>, queries: Array2<f64>, k: usize, exclusion: Exclusion) {
    check_index(
        &BruteForceIndex::new(rows.clone()),
        &rows,
        &queries,
        k,
        exclusion,
    );
}

fn check_index(
    index: &dyn NeighbourIndex,
    rows: &Array2<f64>,
    queries: &Array2<f64>,
    k: usize,
    exclusion: Exclusion,
) {
    let got = index.k_nearest(queries.view(), k, exclusion).unwrap();
    // One more than k, so that a tie across the k-th place is visible.
    let want = naive(rows, queries, k + 1, exclusion == Exclusion::SameIndex);
    for (qi, expected) in want.iter().enumerate() {
        for (j, &(d2, ri)) in expected.iter().take(k).enumerate() {
            assert_eq!(
                got.distances[[qi, j]],
                d2.sqrt(),
                "query {qi}, neighbour {j}"
            );
            // Indices must match wherever the distance is not tied with a neighbour's.
            let tied = expected
                .iter()
                .enumerate()
                .any(|(i, e)| i != j && e.0 == d2);
            if !tied {
                assert_eq!(got.indices[[qi, j]], ri, "query {qi}, neighbour {j}");
            }
        }
    }
}

/// A seeded case: rows uniform in `[offset, offset + 1 + j)` per column `j` with every
/// `duplicate_every`-th row a copy of the one before, 37 queries from the same law, and a
/// `k` below the number of rows. Proptest controls the sizes, scale and seed.
#[derive(Debug, Clone)]
struct Case {
    rows: Array2<f64>,
    queries: Array2<f64>,
    k: usize,
}

fn stress_case(max_n: usize, dims: std::ops::RangeInclusive<usize>) -> impl Strategy<Value = Case> {
    (
        12usize..max_n,
        dims,
        1usize..12,
        0i32..9,
        2usize..50,
        any::<u64>(),
    )
        .prop_map(|(n, d, k, offset_exponent, duplicate_every, seed)| {
            let offset = 10f64.powi(offset_exponent);
            let mut state = seed | 1;
            let mut next = move || {
                // xorshift: a small seeded generator so that proptest controls the data.
                state ^= state << 13;
                state ^= state >> 7;
                state ^= state << 17;
                (state >> 11) as f64 / (1u64 << 53) as f64
            };
            let mut rows =
                Array2::from_shape_fn((n, d), |(_, j)| offset + next() * (1.0 + j as f64));
            for r in (duplicate_every..n).step_by(duplicate_every) {
                let copy = rows.row(r - 1).to_owned();
                rows.row_mut(r).assign(&copy);
            }
            let queries =
                Array2::from_shape_fn((37, d), |(_, j)| offset + next() * (1.0 + j as f64));
            Case {
                rows,
                queries,
                k: k.min(n - 1),
            }
        })
}

/// The approximate index's answer: the right shape, the exact distance of every row it
/// returns, ascending, and in-sample never the query's own index.
fn check_approximate(rows: &Array2<f64>, queries: &Array2<f64>, k: usize, exclusion: Exclusion) {
    let index = ApproximateIndex::new(rows.clone(), ApproximateSettings::default()).unwrap();
    let got = index.k_nearest(queries.view(), k, exclusion).unwrap();
    assert_eq!(got.indices.dim(), (queries.nrows(), k));
    for (qi, q) in queries.outer_iter().enumerate() {
        for j in 0..k {
            let ri = got.indices[[qi, j]];
            assert!(
                exclusion == Exclusion::None || ri != qi,
                "query {qi} found itself"
            );
            let d2: f64 = q
                .iter()
                .zip(rows.row(ri).iter())
                .map(|(a, b)| (a - b) * (a - b))
                .sum();
            assert_eq!(
                got.distances[[qi, j]],
                d2.sqrt(),
                "query {qi}, neighbour {j}"
            );
            if j > 0 {
                assert!(got.distances[[qi, j - 1]] <= got.distances[[qi, j]]);
            }
        }
    }
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(48))]

    #[test]
    fn fast_index_equals_naive_search(case in stress_case(1500, 1..=39)) {
        let Case { rows, queries, k } = case;
        check(rows.clone(), queries, k, Exclusion::None);
        check(rows.clone(), rows, k, Exclusion::SameIndex);
    }

    #[test]
    fn tree_index_equals_naive_search(case in stress_case(1500, 1..=MAX_TREE_DIM)) {
        let Case { rows, queries, k } = case;
        let index = TreeIndex::new(rows.clone()).unwrap();
        check_index(&index, &rows, &queries, k, Exclusion::None);
        check_index(&index, &rows, &rows, k, Exclusion::SameIndex);
    }
}

proptest! {
    // Each case builds a graph on one thread; fewer cases keep the suite quick.
    #![proptest_config(ProptestConfig::with_cases(12))]

    #[test]
    fn approximate_index_returns_exact_distances(case in stress_case(800, 1..=39)) {
        let Case { rows, queries, k } = case;
        check_approximate(&rows, &queries, k, Exclusion::None);
        check_approximate(&rows, &rows, k, Exclusion::SameIndex);
    }
}

#[test]
fn values_beyond_single_precision_are_searched_exactly() {
    let rows = Array2::from_shape_fn((300, 3), |(i, j)| {
        1e20 * ((i * 7 + j * 3) % 11) as f64 + i as f64 * 1e6
    });
    let queries = rows.slice(ndarray::s![0..20, ..]).mapv(|v| v * 1.0000001);
    check(rows.clone(), queries.clone(), 5, Exclusion::None);
    let tree = TreeIndex::new(rows.clone()).unwrap();
    check_index(&tree, &rows, &queries, 5, Exclusion::None);
}

/// Rows on a circle around the query at radii 1 + i·1e-9: single precision cannot order
/// them, so the index must notice the thin margin and fall back to exact search.
#[test]
fn distances_closer_than_single_precision_are_still_ordered() {
    let n = 500;
    let rows = Array2::from_shape_fn((n, 2), |(i, j)| {
        let angle = i as f64 * 2.399963;
        let radius = 1.0 + (n - i) as f64 * 1e-9;
        if j == 0 {
            radius * angle.cos()
        } else {
            radius * angle.sin()
        }
    });
    let queries = Array2::zeros((1, 2));
    let index = BruteForceIndex::new(rows.clone());
    let got = index.k_nearest(queries.view(), 5, Exclusion::None).unwrap();
    assert_eq!(got.indices.row(0).to_vec(), vec![499, 498, 497, 496, 495]);
    check(rows.clone(), queries.clone(), 5, Exclusion::None);
    let tree = TreeIndex::new(rows.clone()).unwrap();
    check_index(&tree, &rows, &queries, 5, Exclusion::None);
}

/// `fit --index`: the exact tree and brute force give byte-identical records (both are
/// exact searches: the definition of the k nearest neighbours); the approximate graph is
/// stored in the profile, reloaded by `score`, and `fit` reports its recall. Breast cancer
/// in `pca:5` (dimension 5, where `auto` takes the tree) and standardized (dimension 30).
#[test]
fn every_index_kind_fits_scores_and_reports() {
    let dir = crate::harness::temp_dir();
    let corpus = crate::harness::repo("reference-corpora/breast_cancer.csv");
    let corpus = corpus.to_str().unwrap();
    for embed in ["pca:5", "standardize"] {
        let mut records = Vec::new();
        for index in ["exact", "tree", "auto", "approximate"] {
            let profile = format!("{}-{index}.kprofile", embed.replace(':', ""));
            let fit = crate::harness::kilter(
                dir.path(),
                &[
                    "fit",
                    "--reference",
                    corpus,
                    "--label-column",
                    "diagnosis",
                    "--embed",
                    embed,
                    "--index",
                    index,
                    "--out",
                    &profile,
                ],
            );
            if index == "tree" && embed == "standardize" {
                // 30 dimensions: beyond what the tree takes, refused before any output.
                fit.expect_status(2).expect_stderr(&["16"]);
                assert!(!dir.path().join(&profile).exists());
                continue;
            }
            fit.expect_status(0);
            if index == "approximate" {
                assert!(fit.stdout.contains("recall at k"), "{}", fit.stdout);
            }
            let out = format!("{}-{index}.jsonl", embed.replace(':', ""));
            crate::harness::kilter(
                dir.path(),
                &[
                    "score",
                    "--profile",
                    &profile,
                    "--input",
                    corpus,
                    "--label-column",
                    "diagnosis",
                    "--out",
                    &out,
                ],
            )
            .expect_status(0);
            records.push((index, std::fs::read(dir.path().join(&out)).unwrap()));
        }
        let exact = &records[0].1;
        for (index, bytes) in &records[1..] {
            let scores = crate::harness::read_scores(
                &dir.path()
                    .join(format!("{}-{index}.jsonl", embed.replace(':', ""))),
            );
            assert_eq!(scores.len(), 569);
            assert!(scores
                .iter()
                .all(|s| s.p_combined > 0.0 && s.p_combined <= 1.0));
            if *index != "approximate" {
                assert!(
                    bytes == exact,
                    "{embed}: {index} differs from the brute force"
                );
            }
        }
    }
}
