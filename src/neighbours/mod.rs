//! Neighbour search in the embedded space, and the local outlier factor built on it.
//!
//! Three indexes answer the same [`NeighbourIndex`] question: [`BruteForceIndex`] (exact,
//! any dimension; the default and the test oracle), [`TreeIndex`] (exact, a k-d tree for
//! low embedded dimensions) and [`ApproximateIndex`] (a navigable small-world graph for very
//! large corpora; its distances are exact, its neighbour sets may miss some). This file also
//! holds what they share: the checks on a request, the exact distance, the bounded candidate
//! list and the exhaustive search every index can fall back on.

mod approximate;
mod brute_force;
#[cfg(test)]
mod conformance;
#[cfg(target_arch = "x86_64")]
mod fused;
mod lof;
mod reference;
mod tree;

use ndarray::{Array2, ArrayView1, ArrayView2, Axis};
use rayon::prelude::*;

use crate::error::{Error, IndexFault, Result};

pub use approximate::{ApproximateIndex, ApproximateSettings, GRAPH_CONNECTIONS};
pub use brute_force::BruteForceIndex;
pub use lof::LocalOutlierFactor;
pub use reference::{
    tree_auto_max_dim, IndexChoice, ReferenceIndex, TREE_AUTO_MAX_DIM,
    TREE_AUTO_MAX_DIM_WIDE_KERNEL,
};
pub use tree::{TreeIndex, MAX_TREE_DIM};

/// Whether a query may find itself among the indexed rows.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Exclusion {
    /// Queries are new points: every indexed row is a candidate.
    None,
    /// Query `i` is indexed row `i` (in-sample calibration): row `i` is not its own
    /// neighbour. Exclusion is by index, not by distance, so duplicates still count.
    SameIndex,
}

/// The k nearest indexed rows of each query, nearest first.
#[derive(Debug, Clone, PartialEq)]
pub struct Neighbours {
    /// `queries x k` indices into the indexed rows.
    pub indices: Array2<usize>,
    /// `queries x k` Euclidean distances, ascending along each row.
    pub distances: Array2<f64>,
}

impl Neighbours {
    /// Number of neighbours per query.
    pub fn k(&self) -> usize {
        self.indices.ncols()
    }
}

/// An index answering exact k-nearest-neighbour queries in Euclidean distance.
pub trait NeighbourIndex: Send + Sync {
    /// The rows the index holds.
    fn rows(&self) -> ArrayView2<'_, f64>;
    /// Number of indexed rows.
    fn len(&self) -> usize {
        self.rows().nrows()
    }
    /// Whether nothing is indexed.
    fn is_empty(&self) -> bool {
        self.len() == 0
    }
    /// Dimension of the indexed rows.
    fn dim(&self) -> usize {
        self.rows().ncols()
    }
    /// The `k` nearest indexed rows of every query row. `k` must not exceed the number of
    /// candidates (`len`, or `len - 1` under [`Exclusion::SameIndex`]).
    fn k_nearest(
        &self,
        queries: ArrayView2<'_, f64>,
        k: usize,
        exclusion: Exclusion,
    ) -> Result<Neighbours>;
}

/// Mean fraction of each query's exact `k` neighbours that the approximate answer found
/// (recall at k). Queries are paired by row; an exact row's indices are looked up in the
/// approximate row of the same query, whatever its width. No queries give 1.
pub fn recall(exact: &Neighbours, approximate: &Neighbours) -> f64 {
    recall_of_indices(exact.indices.view(), approximate.indices.view())
}

/// [`recall`] on the neighbour indices alone (`queries x k` each).
pub fn recall_of_indices(exact: ArrayView2<'_, usize>, approximate: ArrayView2<'_, usize>) -> f64 {
    let queries = exact.nrows().min(approximate.nrows());
    if queries == 0 || exact.ncols() == 0 {
        return 1.0;
    }
    let found: usize = exact
        .outer_iter()
        .zip(approximate.outer_iter())
        .map(|(want, got)| want.iter().filter(|i| got.iter().any(|g| g == *i)).count())
        .sum();
    found as f64 / (queries * exact.ncols()) as f64
}

/// The refusals every index makes before searching: `k` out of range, queries of the wrong
/// width, and in-sample search with a different number of queries than rows.
pub(crate) fn check_request(
    len: usize,
    dim: usize,
    queries: ArrayView2<'_, f64>,
    k: usize,
    exclusion: Exclusion,
) -> Result<()> {
    let available = len - usize::from(exclusion == Exclusion::SameIndex).min(len);
    if k == 0 || k > available {
        return Err(Error::InvalidSetting {
            flag: "--k",
            value: k.to_string(),
            expected: format!(
                "between 1 and {available} (the number of reference rows a point can have as neighbours)"
            ),
        });
    }
    if queries.ncols() != dim {
        return Err(Error::InvalidSetting {
            flag: "queries",
            value: format!("{} columns", queries.ncols()),
            expected: format!("{dim} columns, the index's dimension"),
        });
    }
    if exclusion == Exclusion::SameIndex && queries.nrows() != len {
        return Err(Error::InvalidSetting {
            flag: "queries",
            value: format!("{} rows", queries.nrows()),
            expected: format!("{len} rows for in-sample search"),
        });
    }
    Ok(())
}

/// Refuses a matrix holding NaN or an infinity, naming its first such row (1-based).
pub(crate) fn refuse_non_finite(
    index: &'static str,
    what: &'static str,
    matrix: ArrayView2<'_, f64>,
) -> Result<()> {
    match matrix
        .outer_iter()
        .position(|row| row.iter().any(|v| !v.is_finite()))
    {
        Some(row) => Err(Error::NeighbourIndex {
            index,
            fault: IndexFault::NotFinite { what, row: row + 1 },
        }),
        None => Ok(()),
    }
}

/// Squared Euclidean distance summed coordinate by coordinate in double precision (the
/// definition, in its order; contiguous rows take a slice loop without the strided
/// iterator's bookkeeping, which sums in the same order). Every index computes its
/// returned distances with this one function, so equal answers are equal to the last bit.
#[inline]
pub(crate) fn exact_squared_distance(a: ArrayView1<'_, f64>, b: ArrayView1<'_, f64>) -> f64 {
    match (a.as_slice(), b.as_slice()) {
        (Some(a), Some(b)) => a.iter().zip(b).fold(0.0, |sum, (x, y)| {
            let t = x - y;
            sum + t * t
        }),
        _ => a.iter().zip(b.iter()).fold(0.0, |sum, (x, y)| {
            let t = x - y;
            sum + t * t
        }),
    }
}

/// Orders `(squared distance, index)` pairs nearest first, ties by the lower index.
#[inline]
pub(crate) fn nearest_first(a: &(f64, usize), b: &(f64, usize)) -> std::cmp::Ordering {
    a.0.total_cmp(&b.0).then(a.1.cmp(&b.1))
}

/// A bounded list of the best candidates so far, sorted nearest first (ties by index).
pub(crate) struct Candidates {
    capacity: usize,
    pub(crate) items: Vec<(f64, usize)>,
}

impl Candidates {
    pub(crate) fn new(capacity: usize) -> Self {
        Candidates {
            capacity,
            items: Vec::with_capacity(capacity + 1),
        }
    }

    pub(crate) fn worst(&self) -> f64 {
        if self.items.len() < self.capacity {
            f64::INFINITY
        } else {
            self.items[self.items.len() - 1].0
        }
    }

    /// Inserts `(d2, index)` in order if it ranks before the worst candidate (nearer, or as
    /// near with a lower index), dropping the worst when the list is full. Offers arrive in increasing index order and mostly rank near
    /// the end, so the place is found by shifting entries back from the end, in place.
    #[inline]
    pub(crate) fn offer(&mut self, d2: f64, index: usize) {
        let full = self.items.len() >= self.capacity;
        if self.capacity == 0 {
            return;
        }
        if full {
            // Beaten or tied by a lower index: the offer ranks after the worst kept.
            let (d, i) = self.items[self.items.len() - 1];
            if d < d2 || (d == d2 && i < index) {
                return;
            }
        }
        let mut at = if full {
            self.items.len() - 1
        } else {
            self.items.push((d2, index));
            self.items.len() - 1
        };
        // Ties go by index, as in `nearest_first`; the distances here are never NaN.
        while at > 0 {
            let (d, i) = self.items[at - 1];
            if d < d2 || (d == d2 && i < index) {
                break;
            }
            self.items[at] = self.items[at - 1];
            at -= 1;
        }
        self.items[at] = (d2, index);
    }
}

/// Exact distances from `query` to every row: the `k` nearest as `(squared distance,
/// index)`, nearest first, leaving out row `own` under [`Exclusion::SameIndex`].
pub(crate) fn exhaustive(
    rows: ArrayView2<'_, f64>,
    query: ArrayView1<'_, f64>,
    own: usize,
    k: usize,
    exclusion: Exclusion,
) -> Vec<(f64, usize)> {
    let mut list = Candidates::new(k);
    for (ri, row) in rows.outer_iter().enumerate() {
        if exclusion == Exclusion::SameIndex && ri == own {
            continue;
        }
        list.offer(exact_squared_distance(query, row), ri);
    }
    list.items
}

/// Queries per parallel task.
const QUERY_BLOCK: usize = 256;

/// Answers the queries in parallel blocks: `search(block, first)` gives the lists of the
/// block whose first query is number `first`; the answer keeps the queries' order, so it
/// does not depend on the number of threads.
pub(crate) fn search_in_blocks<F>(queries: ArrayView2<'_, f64>, k: usize, search: F) -> Neighbours
where
    F: Fn(ArrayView2<'_, f64>, usize) -> Vec<Vec<(f64, usize)>> + Sync,
{
    let blocks: Vec<Vec<Vec<(f64, usize)>>> = queries
        .axis_chunks_iter(Axis(0), QUERY_BLOCK)
        .into_par_iter()
        .enumerate()
        .map(|(b, block)| search(block, b * QUERY_BLOCK))
        .collect();
    into_neighbours(blocks.into_iter().flatten(), queries.nrows(), k)
}

/// Packs per-query lists of `(squared distance, index)`, nearest first and `k` long, into
/// [`Neighbours`] with Euclidean distances.
fn into_neighbours(
    lists: impl IntoIterator<Item = Vec<(f64, usize)>>,
    queries: usize,
    k: usize,
) -> Neighbours {
    let mut indices = Array2::<usize>::zeros((queries, k));
    let mut distances = Array2::<f64>::zeros((queries, k));
    for (qi, list) in lists.into_iter().enumerate() {
        for (j, (d2, ri)) in list.into_iter().take(k).enumerate() {
            indices[[qi, j]] = ri;
            distances[[qi, j]] = d2.max(0.0).sqrt();
        }
    }
    Neighbours { indices, distances }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    /// Hand-worked: the first query's approximate answer holds 2 of its 3 exact neighbours
    /// (0 and 2), the second all 3 in another order; recall = (2 + 3) / 6.
    #[test]
    fn recall_is_the_mean_fraction_of_exact_neighbours_found() {
        let distances = Array2::zeros((2, 3));
        let exact = Neighbours {
            indices: array![[0, 1, 2], [3, 4, 5]],
            distances: distances.clone(),
        };
        let approximate = Neighbours {
            indices: array![[0, 2, 9], [5, 4, 3]],
            distances,
        };
        assert!((recall(&exact, &approximate) - 5.0 / 6.0).abs() < 1e-15);
        assert_eq!(recall(&exact, &exact), 1.0);
    }

    /// The bounded list keeps what a full sort of every offer keeps (the definition of
    /// the k smallest, ties by index): offers with many repeated distances, in index order as
    /// the scans make them and in scrambled order, for capacities 1 to 20.
    #[test]
    fn the_candidate_list_keeps_the_smallest_offers() {
        for capacity in 1..=20 {
            for scrambled in [false, true] {
                let offers: Vec<(f64, usize)> = (0..300)
                    .map(|i| {
                        let index = if scrambled { (i * 37) % 300 } else { i };
                        (((index * 7919) % 23) as f64 * 0.5, index)
                    })
                    .collect();
                let mut list = Candidates::new(capacity);
                for &(d2, index) in &offers {
                    list.offer(d2, index);
                }
                let mut sorted = offers.clone();
                sorted.sort_by(nearest_first);
                sorted.truncate(capacity);
                assert_eq!(
                    list.items, sorted,
                    "capacity {capacity}, scrambled {scrambled}"
                );
            }
        }
    }

    /// The strided path of the exact distance (a column of a matrix) and the slice path
    /// (the same numbers copied out) sum in the same order as the definition, so they
    /// agree with it and with each other to the last bit.
    #[test]
    fn strided_and_contiguous_distances_agree_to_the_bit() {
        for d in 0..14 {
            let a =
                Array2::from_shape_fn((d, 2), |(i, j)| (i as f64 * 1.37 + j as f64).sin() * 1e3);
            let b = Array2::from_shape_fn((d, 2), |(i, j)| (i as f64 * 0.71 - j as f64).cos());
            let strided = exact_squared_distance(a.column(0), b.column(1));
            let contiguous = exact_squared_distance(
                a.column(0).to_owned().view(),
                b.column(1).to_owned().view(),
            );
            assert_eq!(strided.to_bits(), contiguous.to_bits(), "d = {d}");
            let plain: f64 = a
                .column(0)
                .iter()
                .zip(b.column(1))
                .map(|(x, y)| (x - y) * (x - y))
                .sum();
            // (An empty sum is +0 here and -0 for `Sum`: equal, not the same bits.)
            assert!(
                strided.to_bits() == plain.to_bits() || strided == plain,
                "d = {d}"
            );
        }
    }
}
