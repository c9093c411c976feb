//! The fast exact index against a naive search (the oracle: every distance computed
//! directly, sorted), on seeded data built to stress it: duplicates, points far from the
//! origin and close to each other, mixed scales, values too large for single precision.

use ndarray::Array2;
use proptest::prelude::*;

use kilter::neighbours::{BruteForceIndex, Exclusion, NeighbourIndex};

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
    let index = BruteForceIndex::new(rows.clone());
    let got = index.k_nearest(queries.view(), k, exclusion).unwrap();
    // One more than k, so that a tie across the k-th place is visible.
    let want = naive(&rows, &queries, k + 1, exclusion == Exclusion::SameIndex);
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

proptest! {
    #![proptest_config(ProptestConfig::with_cases(48))]

    #[test]
    fn fast_index_equals_naive_search(
        n in 12usize..1500,
        d in 1usize..40,
        k in 1usize..12,
        offset_exponent in 0i32..9,
        duplicate_every in 2usize..50,
        seed in any::<u64>(),
    ) {
        let offset = 10f64.powi(offset_exponent);
        let mut state = seed | 1;
        let mut next = move || {
            // xorshift: a small seeded generator so that proptest controls the data.
            state ^= state << 13; state ^= state >> 7; state ^= state << 17;
            (state >> 11) as f64 / (1u64 << 53) as f64
        };
        let mut rows = Array2::from_shape_fn((n, d), |(_, j)| offset + next() * (1.0 + j as f64));
        for r in (duplicate_every..n).step_by(duplicate_every) {
            let copy = rows.row(r - 1).to_owned();
            rows.row_mut(r).assign(&copy);
        }
        let queries = Array2::from_shape_fn((37, d), |(_, j)| offset + next() * (1.0 + j as f64));
        let k = k.min(n - 1);
        check(rows.clone(), queries, k, Exclusion::None);
        check(rows.clone(), rows, k, Exclusion::SameIndex);
    }
}

#[test]
fn values_beyond_single_precision_are_searched_exactly() {
    let rows = Array2::from_shape_fn((300, 3), |(i, j)| {
        1e20 * ((i * 7 + j * 3) % 11) as f64 + i as f64 * 1e6
    });
    let queries = rows.slice(ndarray::s![0..20, ..]).mapv(|v| v * 1.0000001);
    check(rows, queries, 5, Exclusion::None);
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
    check(rows, queries, 5, Exclusion::None);
}
