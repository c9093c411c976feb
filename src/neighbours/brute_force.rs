//! Exact brute-force k-nearest-neighbour search at matrix-multiply speed.
//!
//! Distances to a tile of indexed rows come from one single-precision matrix product,
//! `‖q - r‖² = ‖q‖² + ‖r‖² - 2 q·r`, on rows centred at the index's mean (centring leaves
//! distances unchanged and keeps the norms, and so the cancellation, small). That pass
//! only nominates candidates: each query keeps a few more than `k`, their distances are
//! recomputed exactly in double precision as sums of squared differences, and a query
//! whose margin cannot rule out a missed neighbour under a worst-case bound on the
//! single-precision error is searched again exhaustively in double precision. The answer
//! is therefore exact, not approximate; the fast pass only decides where to look.

use ndarray::{s, Array1, Array2, ArrayView1, ArrayView2, Axis};
use rayon::prelude::*;

use super::{Exclusion, NeighbourIndex, Neighbours};
use crate::error::{Error, Result};

/// Queries per parallel task.
const QUERY_BLOCK: usize = 256;
/// Indexed rows per matrix-product tile: a 256 x 1024 f32 tile of products is 1 MiB.
const ROW_TILE: usize = 1024;
/// Extra candidates kept per query beyond k for the exact re-ranking.
const EXTRA_CANDIDATES: usize = 8;
/// Width of the blocks in which the candidate scan first checks a block minimum.
const SCAN_LANES: usize = 16;
/// Beyond this magnitude a centred coordinate's square could overflow single precision;
/// such data is searched in double precision throughout.
const SINGLE_PRECISION_LIMIT: f64 = 1e15;

/// Exhaustive exact search over rows held in memory.
#[derive(Debug, Clone)]
pub struct BruteForceIndex {
    rows: Array2<f64>,
    center: Array1<f64>,
    /// `rows - center` in single precision, for the candidate pass.
    centred: Array2<f32>,
    /// `‖rows - center‖²` of the single-precision rows.
    centred_norms: Array1<f32>,
    max_centred_norm: f64,
    single_precision: bool,
}

impl BruteForceIndex {
    /// Indexes the rows (copied into standard layout).
    pub fn new(rows: Array2<f64>) -> Self {
        // No copy of a million-row matrix that is already in standard layout, and no
        // double-precision centred copy: the single-precision one is made row by row.
        let rows = if rows.is_standard_layout() {
            rows
        } else {
            rows.as_standard_layout().into_owned()
        };
        let center = rows
            .mean_axis(Axis(0))
            .unwrap_or_else(|| Array1::zeros(rows.ncols()));
        let mut centred = Array2::<f32>::zeros(rows.dim());
        let mut largest = 0.0_f64;
        for (mut out, row) in centred.outer_iter_mut().zip(rows.outer_iter()) {
            for ((o, &v), &c) in out.iter_mut().zip(row.iter()).zip(center.iter()) {
                let t = v - c;
                largest = largest.max(t.abs());
                *o = t as f32;
            }
        }
        let single_precision = largest < SINGLE_PRECISION_LIMIT;
        let centred_norms = Array1::from_iter(
            centred
                .outer_iter()
                .map(|r| r.iter().map(|&v| f64::from(v) * f64::from(v)).sum::<f64>() as f32),
        );
        let max_centred_norm = centred_norms
            .iter()
            .fold(0.0_f64, |m, &v| m.max(f64::from(v)));
        BruteForceIndex {
            rows,
            center,
            centred,
            centred_norms,
            max_centred_norm,
            single_precision,
        }
    }

    /// Worst-case error of one single-precision `‖q‖² + ‖r‖² - 2 q·r` over `d`
    /// coordinates: rounding the inputs and accumulating `d` products costs at most about
    /// `(d + 4)` units of 2⁻²⁴ relative to `‖q‖² + ‖r‖²` (Higham, "Accuracy and Stability of
    /// Numerical Algorithms", 2nd ed., §3.1, for the inner product); doubled for margin.
    fn single_precision_error(&self, query_norm: f64) -> f64 {
        let d = self.rows.ncols() as f64;
        2.0 * (d + 4.0) * f64::from(f32::EPSILON) * 0.5 * (query_norm + self.max_centred_norm)
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

/// Offers a row of approximate squared distances to a query's candidate list. Most
/// entries lose to the current worst candidate, so blocks are first screened by their
/// minimum, which compiles to vector instructions.
fn scan_row(
    approx: &[f32],
    tile_start: usize,
    list: &mut Candidates,
    exclusion: Exclusion,
    own: usize,
) {
    let mut worst = list.worst() as f32;
    for (block_index, block) in approx.chunks(SCAN_LANES).enumerate() {
        let block_min = block
            .iter()
            .fold(f32::INFINITY, |m, &v| if v < m { v } else { m });
        if block_min >= worst {
            continue;
        }
        let base = tile_start + block_index * SCAN_LANES;
        for (offset, &value) in block.iter().enumerate() {
            if value < worst {
                let ri = base + offset;
                if exclusion == Exclusion::SameIndex && ri == own {
                    continue;
                }
                list.offer(f64::from(value), ri);
                worst = list.worst() as f32;
            }
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
        if !self.single_precision {
            return queries
                .outer_iter()
                .enumerate()
                .map(|(qi, q)| self.exhaustive(q, first_query + qi, k, exclusion))
                .collect();
        }
        let n = self.rows.nrows();
        let keep = (k + EXTRA_CANDIDATES).min(n);
        let centred_queries = (&queries - &self.center).mapv(|v| v as f32);
        let query_norms: Vec<f32> = centred_queries
            .outer_iter()
            .map(|q| q.iter().map(|&v| f64::from(v) * f64::from(v)).sum::<f64>() as f32)
            .collect();
        let mut lists: Vec<Candidates> = (0..queries.nrows())
            .map(|_| Candidates::new(keep))
            .collect();
        let norms = self.centred_norms.as_slice().expect("contiguous norms");

        for tile_start in (0..n).step_by(ROW_TILE) {
            let tile_end = (tile_start + ROW_TILE).min(n);
            let tile = self.centred.slice(s![tile_start..tile_end, ..]);
            let mut approx = centred_queries.dot(&tile.t());
            let tile_norms = &norms[tile_start..tile_end];
            for (qi, (mut row, list)) in approx.outer_iter_mut().zip(lists.iter_mut()).enumerate() {
                let qn = query_norms[qi];
                let row = row.as_slice_mut().expect("a fresh product is contiguous");
                for (p, &rn) in row.iter_mut().zip(tile_norms) {
                    *p = qn + rn - 2.0 * *p;
                }
                scan_row(row, tile_start, list, exclusion, first_query + qi);
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
                // A row not nominated has approximate distance >= boundary, so its exact
                // distance is at least boundary - 2 x error. If that could beat the k-th
                // exact distance, the nomination may have missed it: search exhaustively.
                let error = self.single_precision_error(f64::from(query_norms[qi]));
                let kth = exact.last().map(|&(d, _)| d).unwrap_or(0.0);
                let candidates_available = n - usize::from(exclusion == Exclusion::SameIndex);
                let complete = list.items.len() >= candidates_available;
                if !complete && boundary - 2.0 * error <= kth {
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
