//! Exact brute-force k-nearest-neighbour search at matrix-multiply speed.
//!
//! Distances to a block of indexed rows come from one matrix product,
//! `‖q - r‖² = ‖q‖² + ‖r‖² - 2 q·r`, which is fast but loses digits when the distance is
//! small next to the norms. So the product only nominates candidates: each query keeps a
//! few more than `k`, their distances are then recomputed exactly as sums of squared
//! differences, and a query whose margin cannot rule out a missed neighbour is searched
//! again exhaustively with exact distances. The answer is therefore exact, not approximate.

use ndarray::{s, Array1, Array2, ArrayView1, ArrayView2, Axis};
use rayon::prelude::*;

use super::{Exclusion, NeighbourIndex, Neighbours};
use crate::error::{Error, Result};

/// Queries per parallel task.
const QUERY_BLOCK: usize = 128;
/// Indexed rows per matrix-product tile.
const ROW_TILE: usize = 1024;
/// Extra candidates kept per query beyond k for the exact re-ranking.
const EXTRA_CANDIDATES: usize = 8;
/// Relative size of the round-off in `‖q‖² + ‖r‖² - 2 q·r`, with a wide safety factor
/// over the few ulps a dot product of moderate length accumulates.
const CANCELLATION_TOLERANCE: f64 = 1e-10;

/// Exhaustive exact search over rows held in memory.
#[derive(Debug, Clone)]
pub struct BruteForceIndex {
    rows: Array2<f64>,
    squared_norms: Array1<f64>,
    max_squared_norm: f64,
}

impl BruteForceIndex {
    /// Indexes the rows (copied into standard layout).
    pub fn new(rows: Array2<f64>) -> Self {
        let rows = rows.as_standard_layout().into_owned();
        let squared_norms = Array1::from_iter(rows.outer_iter().map(|r| r.dot(&r)));
        let max_squared_norm = squared_norms.iter().cloned().fold(0.0, f64::max);
        BruteForceIndex {
            rows,
            squared_norms,
            max_squared_norm,
        }
    }
}

/// A bounded list of the best candidates so far, sorted ascending by distance.
struct Candidates {
    capacity: usize,
    items: Vec<(f64, usize)>,
}

impl Candidates {
    fn new(capacity: usize) -> Self {
        Candidates {
            capacity,
            items: Vec::with_capacity(capacity + 1),
        }
    }

    fn worst(&self) -> f64 {
        if self.items.len() < self.capacity {
            f64::INFINITY
        } else {
            self.items[self.items.len() - 1].0
        }
    }

    #[inline]
    fn offer(&mut self, d2: f64, index: usize) {
        if d2 >= self.worst() && self.items.len() >= self.capacity {
            return;
        }
        let at = self
            .items
            .partition_point(|&(d, i)| d < d2 || (d == d2 && i < index));
        self.items.insert(at, (d2, index));
        if self.items.len() > self.capacity {
            self.items.pop();
        }
    }
}

#[inline]
fn exact_squared_distance(a: ArrayView1<'_, f64>, b: ArrayView1<'_, f64>) -> f64 {
    a.iter()
        .zip(b.iter())
        .map(|(x, y)| {
            let t = x - y;
            t * t
        })
        .sum()
}

impl BruteForceIndex {
    fn search_block(
        &self,
        queries: ArrayView2<'_, f64>,
        first_query: usize,
        k: usize,
        exclusion: Exclusion,
    ) -> Vec<Vec<(f64, usize)>> {
        let n = self.rows.nrows();
        let keep = (k + EXTRA_CANDIDATES).min(n);
        let query_norms: Vec<f64> = queries.outer_iter().map(|q| q.dot(&q)).collect();
        let mut lists: Vec<Candidates> = (0..queries.nrows())
            .map(|_| Candidates::new(keep))
            .collect();

        for tile_start in (0..n).step_by(ROW_TILE) {
            let tile_end = (tile_start + ROW_TILE).min(n);
            let tile = self.rows.slice(s![tile_start..tile_end, ..]);
            let products = queries.dot(&tile.t());
            for (qi, list) in lists.iter_mut().enumerate() {
                let own = first_query + qi;
                let qn = query_norms[qi];
                let row = products.row(qi);
                for (offset, &p) in row.iter().enumerate() {
                    let ri = tile_start + offset;
                    if exclusion == Exclusion::SameIndex && ri == own {
                        continue;
                    }
                    let approx = qn + self.squared_norms[ri] - 2.0 * p;
                    list.offer(approx, ri);
                }
            }
        }

        lists
            .into_iter()
            .enumerate()
            .map(|(qi, list)| {
                let query = queries.row(qi);
                let own = first_query + qi;
                let boundary = list.items.last().map(|&(d, _)| d).unwrap_or(f64::INFINITY);
                let mut exact: Vec<(f64, usize)> = list
                    .items
                    .iter()
                    .map(|&(_, ri)| (exact_squared_distance(query, self.rows.row(ri)), ri))
                    .collect();
                exact.sort_by(|a, b| a.0.total_cmp(&b.0).then(a.1.cmp(&b.1)));
                exact.truncate(k);
                // Any row not nominated has approximate distance >= boundary, hence exact
                // distance >= boundary - tolerance. If that could beat our k-th, re-search.
                let tolerance =
                    CANCELLATION_TOLERANCE * (query_norms[qi] + self.max_squared_norm) + 1e-300;
                let kth = exact.last().map(|&(d, _)| d).unwrap_or(0.0);
                let complete =
                    list.items.len() == n - usize::from(exclusion == Exclusion::SameIndex);
                if !complete && boundary - tolerance <= kth {
                    exact = self.exhaustive(query, own, k, exclusion);
                }
                exact
            })
            .collect()
    }

    /// Exact distances to every row; the fallback for ill-separated queries.
    fn exhaustive(
        &self,
        query: ArrayView1<'_, f64>,
        own: usize,
        k: usize,
        exclusion: Exclusion,
    ) -> Vec<(f64, usize)> {
        let mut list = Candidates::new(k);
        for (ri, row) in self.rows.outer_iter().enumerate() {
            if exclusion == Exclusion::SameIndex && ri == own {
                continue;
            }
            list.offer(exact_squared_distance(query, row), ri);
        }
        list.items
    }
}

impl NeighbourIndex for BruteForceIndex {
    fn len(&self) -> usize {
        self.rows.nrows()
    }

    fn dim(&self) -> usize {
        self.rows.ncols()
    }

    fn rows(&self) -> ArrayView2<'_, f64> {
        self.rows.view()
    }

    fn k_nearest(
        &self,
        queries: ArrayView2<'_, f64>,
        k: usize,
        exclusion: Exclusion,
    ) -> Result<Neighbours> {
        let available = self.len() - usize::from(exclusion == Exclusion::SameIndex).min(self.len());
        if k == 0 || k > available {
            return Err(Error::InvalidSetting {
                flag: "--k",
                value: k.to_string(),
                expected: format!(
                    "between 1 and {available} (the number of reference rows a point can have as neighbours)"
                ),
            });
        }
        if queries.ncols() != self.dim() {
            return Err(Error::InvalidSetting {
                flag: "queries",
                value: format!("{} columns", queries.ncols()),
                expected: format!("{} columns, the index's dimension", self.dim()),
            });
        }
        if exclusion == Exclusion::SameIndex && queries.nrows() != self.len() {
            return Err(Error::InvalidSetting {
                flag: "queries",
                value: format!("{} rows", queries.nrows()),
                expected: format!("{} rows for in-sample search", self.len()),
            });
        }
        let m = queries.nrows();
        let blocks: Vec<Vec<Vec<(f64, usize)>>> = queries
            .axis_chunks_iter(Axis(0), QUERY_BLOCK)
            .into_par_iter()
            .enumerate()
            .map(|(b, block)| self.search_block(block, b * QUERY_BLOCK, k, exclusion))
            .collect();
        let mut indices = Array2::<usize>::zeros((m, k));
        let mut distances = Array2::<f64>::zeros((m, k));
        for (qi, list) in blocks.into_iter().flatten().enumerate() {
            for (j, (d2, ri)) in list.into_iter().enumerate() {
                indices[[qi, j]] = ri;
                distances[[qi, j]] = d2.max(0.0).sqrt();
            }
        }
        Ok(Neighbours { indices, distances })
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    /// Hand-worked: points on a line at 0, 1, 3, 6, 10; the query 2.9 has neighbours
    /// 3 (0.1), 1 (1.9), 0 (2.9), and 6 (3.1) only fourth.
    #[test]
    fn neighbours_on_a_line() {
        let index = BruteForceIndex::new(array![[0.0], [1.0], [3.0], [6.0], [10.0]]);
        let nn = index
            .k_nearest(array![[2.9]].view(), 3, Exclusion::None)
            .unwrap();
        assert_eq!(nn.indices.row(0).to_vec(), vec![2, 1, 0]);
        let d = nn.distances.row(0).to_vec();
        assert!(
            (d[0] - 0.1).abs() < 1e-12 && (d[1] - 1.9).abs() < 1e-12 && (d[2] - 2.9).abs() < 1e-12
        );
    }

    #[test]
    fn self_exclusion_is_by_index_so_duplicates_count() {
        let index = BruteForceIndex::new(array![[1.0, 1.0], [1.0, 1.0], [5.0, 5.0]]);
        let nn = index
            .k_nearest(index.rows(), 1, Exclusion::SameIndex)
            .unwrap();
        assert_eq!(nn.indices.column(0).to_vec(), vec![1, 0, 0]);
        assert_eq!(nn.distances[[0, 0]], 0.0);
    }

    #[test]
    fn k_beyond_the_rows_is_refused() {
        let index = BruteForceIndex::new(array![[1.0], [2.0]]);
        assert!(index
            .k_nearest(array![[0.0]].view(), 3, Exclusion::None)
            .is_err());
        assert!(index
            .k_nearest(index.rows(), 2, Exclusion::SameIndex)
            .is_err());
    }

    /// Points far from the origin, close to each other: the product form cancels almost
    /// every digit, the exact re-ranking must still order them.
    #[test]
    fn exact_despite_cancellation() {
        let base = 1e8;
        let rows = Array2::from_shape_fn((50, 3), |(i, j)| base + (i * 3 + j) as f64 * 1e-4);
        let index = BruteForceIndex::new(rows.clone());
        let query = rows.slice(s![17..18, ..]).mapv(|v| v + 1e-6);
        let nn = index.k_nearest(query.view(), 1, Exclusion::None).unwrap();
        assert_eq!(nn.indices[[0, 0]], 17);
        let expected = (3.0_f64 * 1e-12).sqrt();
        assert!((nn.distances[[0, 0]] - expected).abs() < 1e-9 * expected.max(1e-9) + 1e-7);
    }
}
