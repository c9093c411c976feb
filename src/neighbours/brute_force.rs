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

use super::{
    check_request, exact_squared_distance, exhaustive, nearest_first, search_in_blocks, Candidates,
    Exclusion, NeighbourIndex, Neighbours,
};
use crate::error::Result;

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
                exact.sort_by(nearest_first);
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
        exhaustive(self.rows.view(), query, own, k, exclusion)
    }
}

impl NeighbourIndex for BruteForceIndex {
    fn rows(&self) -> ArrayView2<'_, f64> {
        self.rows.view()
    }

    fn k_nearest(
        &self,
        queries: ArrayView2<'_, f64>,
        k: usize,
        exclusion: Exclusion,
    ) -> Result<Neighbours> {
        check_request(self.len(), self.dim(), queries, k, exclusion)?;
        Ok(search_in_blocks(queries, k, |block, first| {
            self.search_block(block, first, k, exclusion)
        }))
    }
}

#[cfg(test)]
mod tests {
    use super::super::conformance;
    use super::*;

    conformance::shared_tests!(BruteForceIndex::new);
}
