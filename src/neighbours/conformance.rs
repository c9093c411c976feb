//! The behaviour every neighbour index must share, as test functions each index's tests
//! call with its own constructor: hand-worked cases (derivations beside them) and a
//! comparison with the brute-force index on seeded data built to be awkward.

use ndarray::{array, s, Array2};
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};

use super::{BruteForceIndex, Exclusion, NeighbourIndex};

/// The hand-worked tests of this file as `#[test]` functions, for an index's test module:
/// `shared_tests!(build);` with `build: fn(Array2<f64>) -> impl NeighbourIndex`.
macro_rules! shared_tests {
    ($build:expr) => {
        #[test]
        fn neighbours_on_a_line() {
            $crate::neighbours::conformance::neighbours_on_a_line($build);
        }

        #[test]
        fn self_exclusion_is_by_index_so_duplicates_count() {
            $crate::neighbours::conformance::self_exclusion_is_by_index_so_duplicates_count($build);
        }

        #[test]
        fn duplicates_push_the_query_out_of_its_own_neighbours() {
            $crate::neighbours::conformance::duplicates_push_the_query_out($build);
        }

        #[test]
        fn ties_go_to_the_lower_index() {
            $crate::neighbours::conformance::ties_go_to_the_lower_index($build);
        }

        #[test]
        fn k_beyond_the_rows_is_refused() {
            $crate::neighbours::conformance::k_beyond_the_rows_is_refused($build);
        }

        #[test]
        fn exact_despite_cancellation() {
            $crate::neighbours::conformance::exact_despite_cancellation($build);
        }
    };
}
pub(crate) use shared_tests;

/// Hand-worked: points on a line at 0, 1, 3, 6, 10; the query 2.9 has neighbours
/// 3 (0.1), 1 (1.9), 0 (2.9), and 6 (3.1) only fourth.
pub(crate) fn neighbours_on_a_line<I: NeighbourIndex>(build: impl Fn(Array2<f64>) -> I) {
    let index = build(array![[0.0], [1.0], [3.0], [6.0], [10.0]]);
    let nn = index
        .k_nearest(array![[2.9]].view(), 3, Exclusion::None)
        .unwrap();
    assert_eq!(nn.indices.row(0).to_vec(), vec![2, 1, 0]);
    let d = nn.distances.row(0).to_vec();
    assert!(
        (d[0] - 0.1).abs() < 1e-12 && (d[1] - 1.9).abs() < 1e-12 && (d[2] - 2.9).abs() < 1e-12,
        "{d:?}"
    );
}

/// Hand-worked: rows 0 and 1 coincide, row 2 is far. Excluding itself, row 0's nearest is
/// its duplicate 1 at distance 0, row 1's is 0, and row 2's is 0 (tied with 1 at
/// distance 4√2, the lower index first).
pub(crate) fn self_exclusion_is_by_index_so_duplicates_count<I: NeighbourIndex>(
    build: impl Fn(Array2<f64>) -> I,
) {
    let index = build(array![[1.0, 1.0], [1.0, 1.0], [5.0, 5.0]]);
    let nn = index
        .k_nearest(index.rows(), 1, Exclusion::SameIndex)
        .unwrap();
    assert_eq!(nn.indices.column(0).to_vec(), vec![1, 0, 0]);
    assert_eq!(nn.distances[[0, 0]], 0.0);
    assert_eq!(nn.distances[[2, 0]], 32.0_f64.sqrt());
}

/// Hand-worked: five identical rows and one at distance 1. With k = 2 and self-exclusion,
/// row 3's two nearest are rows 0 and 1 (distance 0, lowest indices), so its own index,
/// tied with them, is pushed out rather than dropped from a list of three; row 0's are 1
/// and 2; the lone row 5's are 0 and 1 at distance 1.
pub(crate) fn duplicates_push_the_query_out<I: NeighbourIndex>(build: impl Fn(Array2<f64>) -> I) {
    let rows = array![[2.0], [2.0], [2.0], [2.0], [2.0], [3.0]];
    let index = build(rows);
    let nn = index
        .k_nearest(index.rows(), 2, Exclusion::SameIndex)
        .unwrap();
    assert_eq!(nn.indices.row(0).to_vec(), vec![1, 2]);
    assert_eq!(nn.indices.row(3).to_vec(), vec![0, 1]);
    assert_eq!(nn.indices.row(4).to_vec(), vec![0, 1]);
    assert_eq!(nn.indices.row(5).to_vec(), vec![0, 1]);
    assert_eq!(nn.distances.row(3).to_vec(), vec![0.0, 0.0]);
    assert_eq!(nn.distances.row(5).to_vec(), vec![1.0, 1.0]);
}

/// Hand-worked: rows at 4, -1, 1, -1 (indices 0..3); the query 0 is at distance 1 from
/// rows 1, 2 and 3 and 4 from row 0, so its three nearest are 1, 2, 3 in index order.
pub(crate) fn ties_go_to_the_lower_index<I: NeighbourIndex>(build: impl Fn(Array2<f64>) -> I) {
    let index = build(array![[4.0], [-1.0], [1.0], [-1.0]]);
    let nn = index
        .k_nearest(array![[0.0]].view(), 3, Exclusion::None)
        .unwrap();
    assert_eq!(nn.indices.row(0).to_vec(), vec![1, 2, 3]);
    assert_eq!(nn.distances.row(0).to_vec(), vec![1.0, 1.0, 1.0]);
}

/// Two rows: at most two neighbours for a new point, one in-sample; no k = 0; queries of
/// another width and in-sample queries of another count are refused too.
pub(crate) fn k_beyond_the_rows_is_refused<I: NeighbourIndex>(build: impl Fn(Array2<f64>) -> I) {
    let index = build(array![[1.0], [2.0]]);
    let query = array![[0.0]];
    assert!(index.k_nearest(query.view(), 3, Exclusion::None).is_err());
    assert!(index.k_nearest(query.view(), 0, Exclusion::None).is_err());
    assert!(index.k_nearest(query.view(), 2, Exclusion::None).is_ok());
    assert!(index
        .k_nearest(index.rows(), 2, Exclusion::SameIndex)
        .is_err());
    assert!(index
        .k_nearest(array![[0.0, 1.0]].view(), 1, Exclusion::None)
        .is_err());
    assert!(index
        .k_nearest(query.view(), 1, Exclusion::SameIndex)
        .is_err());
}

/// Points far from the origin, close to each other: the product form cancels almost
/// every digit, the exact re-ranking must still order them. Row 17 is the query shifted
/// by 1e-6 in each of 3 coordinates, so its distance is √3·1e-6 (to the rounding of
/// coordinates near 1e8, whose spacing is 1.5e-8).
pub(crate) fn exact_despite_cancellation<I: NeighbourIndex>(build: impl Fn(Array2<f64>) -> I) {
    let base = 1e8;
    let rows = Array2::from_shape_fn((50, 3), |(i, j)| base + (i * 3 + j) as f64 * 1e-4);
    let index = build(rows.clone());
    let query = rows.slice(s![17..18, ..]).mapv(|v| v + 1e-6);
    let nn = index.k_nearest(query.view(), 1, Exclusion::None).unwrap();
    assert_eq!(nn.indices[[0, 0]], 17);
    let expected = (3.0_f64 * 1e-12).sqrt();
    assert!((nn.distances[[0, 0]] - expected).abs() < 1e-9 * expected.max(1e-9) + 1e-7);
}

/// Seeded standard Gaussian rows made awkward for an index: the first coordinate rounded
/// to an integer (many rows share it, and distances tie exactly), every seventh row a copy
/// of the one before (duplicates), and every eleventh shifted far out (1e3).
pub(crate) fn awkward_rows(n: usize, d: usize, seed: u64) -> Array2<f64> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut rows = Array2::from_shape_fn((n, d), |_| StandardNormal.sample(&mut rng));
    rows.column_mut(0).mapv_inplace(|v: f64| v.round());
    for r in 1..n {
        if r % 7 == 0 {
            let copy = rows.row(r - 1).to_owned();
            rows.row_mut(r).assign(&copy);
        } else if r % 11 == 0 {
            rows.row_mut(r).mapv_inplace(|v| v + 1e3);
        }
    }
    rows
}

/// Every point of the integer grid `{0, ..., side - 1}^d` once, in a seeded shuffled order,
/// so that many distinct rows lie at exactly the same distance from a grid query and the
/// lower index must win ties that no coordinate order decides.
pub(crate) fn lattice_rows(side: usize, d: usize, seed: u64) -> Array2<f64> {
    use rand::seq::SliceRandom;
    let n = side.pow(d as u32);
    let mut order: Vec<usize> = (0..n).collect();
    order.shuffle(&mut ChaCha8Rng::seed_from_u64(seed));
    Array2::from_shape_fn((n, d), |(i, j)| {
        ((order[i] / side.pow(j as u32)) % side) as f64
    })
}

/// Seeded standard Gaussian rows, nothing more.
pub(crate) fn gaussian_rows(n: usize, d: usize, seed: u64) -> Array2<f64> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    Array2::from_shape_fn((n, d), |_| StandardNormal.sample(&mut rng))
}

/// The index gives exactly the brute-force answer (indices and distances, to the bit) for
/// new queries and in-sample.
pub(crate) fn equals_brute_force(index: &dyn NeighbourIndex, queries: &Array2<f64>, k: usize) {
    let oracle = BruteForceIndex::new(index.rows().to_owned());
    for (exclusion, queries) in [
        (Exclusion::None, queries.view()),
        (Exclusion::SameIndex, index.rows()),
    ] {
        let want = oracle.k_nearest(queries, k, exclusion).unwrap();
        let got = index.k_nearest(queries, k, exclusion).unwrap();
        for qi in 0..want.indices.nrows() {
            assert_eq!(
                got.indices.row(qi),
                want.indices.row(qi),
                "{exclusion:?}, query {qi}, dim {}",
                index.dim()
            );
            assert_eq!(
                got.distances.row(qi),
                want.distances.row(qi),
                "{exclusion:?}, query {qi}, dim {}",
                index.dim()
            );
        }
    }
}
