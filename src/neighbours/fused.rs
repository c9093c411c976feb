//! The exact search's candidate pass as one AVX2 micro-kernel: a 6 x 16 block of
//! approximate squared distances is accumulated in twelve vector registers and screened
//! against the six queries' worst candidates while still in them, so the distances are
//! never written to memory and scanned again, and nothing is packed per call.
//!
//! The design is the usual one for blocked matrix products (Goto and van de Geijn,
//! "Anatomy of High-Performance Matrix Multiplication", ACM TOMS 34(3), 2008): the
//! indexed rows are stored once, at index time, in panels of 16 rows whose coordinates
//! interleave (one 64-byte line per coordinate), so a panel is read in order and stays in
//! the first-level cache while every group of six queries of a block (packed the same way,
//! six to a coordinate) streams past it. Each step of the inner loop is two loads of the
//! panel, six broadcasts of query coordinates and twelve fused multiply-adds.

use std::arch::x86_64::{
    __m256, _mm256_cmp_ps, _mm256_fmadd_ps, _mm256_load_ps, _mm256_movemask_ps, _mm256_set1_ps,
    _mm256_setzero_ps, _mm256_storeu_ps, _CMP_LT_OQ,
};

use super::brute_force::{Line, LINE_LANES};
use super::{Candidates, Exclusion};

/// Indexed rows per panel: one operand line, two 8-float registers.
pub(super) const PANEL_ROWS: usize = LINE_LANES;
/// Queries per group: six broadcasts against two panel registers fill twelve accumulators,
/// which with the two panel registers and a broadcast leave one of AVX2's sixteen free.
pub(super) const QUERY_GROUP: usize = 6;
/// The widest operand (embedded dimension + 2) the fused pass takes: a panel of this width
/// is 24 KiB and still leaves room in a 32 KiB first-level cache for the queries streaming
/// past. Wider data goes through the blocked product, which splits the inner dimension.
pub(super) const MAX_WIDTH: usize = 384;

/// Queries in the layout the kernel reads: `augmented` holds `m` rows of `width` values one
/// after another; the result holds groups of six queries, each group `width` steps of six
/// values, the last group padded with zeros.
pub(super) fn pack_queries(augmented: &[f32], m: usize, width: usize) -> Vec<f32> {
    let groups = m.div_ceil(QUERY_GROUP);
    let mut packed = vec![0.0_f32; groups * QUERY_GROUP * width];
    for (qi, row) in augmented.chunks_exact(width).take(m).enumerate() {
        let group = &mut packed[(qi / QUERY_GROUP) * QUERY_GROUP * width..];
        let lane = qi % QUERY_GROUP;
        for (c, &v) in row.iter().enumerate() {
            group[c * QUERY_GROUP + lane] = v;
        }
    }
    packed
}

/// Offers every indexed row of `panels` (`width` lines per panel; a padding row has an
/// infinite distance) to the candidate lists of the queries in `packed` (from
/// [`pack_queries`]); `lists[i]` belongs to query `first_query + i`.
///
/// # Safety
/// The processor must support AVX2 and FMA.
#[target_feature(enable = "avx2,fma")]
pub(super) unsafe fn nominate(
    panels: &[Line],
    width: usize,
    packed: &[f32],
    lists: &mut [Candidates],
    first_query: usize,
    exclusion: Exclusion,
) {
    let m = lists.len();
    if m == 0 || width == 0 {
        return;
    }
    // The worst candidate of each query, as the bound its entries must beat; the padding
    // queries of the last group get -inf, which nothing beats.
    let mut worst = vec![f32::NEG_INFINITY; m.div_ceil(QUERY_GROUP) * QUERY_GROUP];
    for (bound, list) in worst.iter_mut().zip(lists.iter()) {
        *bound = list.worst() as f32;
    }
    for (p, panel) in panels.chunks_exact(width).enumerate() {
        let panel_start = p * PANEL_ROWS;
        for (g, group) in packed.chunks_exact(QUERY_GROUP * width).enumerate() {
            let acc = micro_tile(group, panel);
            let first = g * QUERY_GROUP;
            let bounds = &mut worst[first..first + QUERY_GROUP];
            let mut below = [0_u32; QUERY_GROUP];
            let mut any = 0_u32;
            for (i, mask) in below.iter_mut().enumerate() {
                let bound = _mm256_set1_ps(bounds[i]);
                let low = _mm256_movemask_ps(_mm256_cmp_ps::<_CMP_LT_OQ>(acc[2 * i], bound));
                let high = _mm256_movemask_ps(_mm256_cmp_ps::<_CMP_LT_OQ>(acc[2 * i + 1], bound));
                *mask = (low as u32) | ((high as u32) << 8);
                any |= *mask;
            }
            // Once the lists have filled, almost every block has no entry below its bound.
            if any == 0 {
                continue;
            }
            let mut values = [[0.0_f32; PANEL_ROWS]; QUERY_GROUP];
            for (i, row) in values.iter_mut().enumerate() {
                _mm256_storeu_ps(row.as_mut_ptr(), acc[2 * i]);
                _mm256_storeu_ps(row.as_mut_ptr().add(8), acc[2 * i + 1]);
            }
            for (i, mut mask) in below.into_iter().enumerate() {
                let qi = first + i;
                while mask != 0 {
                    let offset = mask.trailing_zeros() as usize;
                    mask &= mask - 1;
                    let value = values[i][offset];
                    // The bound may have tightened since the mask was taken.
                    if value < bounds[i] {
                        let ri = panel_start + offset;
                        if exclusion == Exclusion::SameIndex && ri == first_query + qi {
                            continue;
                        }
                        let list = &mut lists[qi];
                        list.offer(f64::from(value), ri);
                        bounds[i] = list.worst() as f32;
                    }
                }
            }
        }
    }
}

/// The 6 x 16 block of products of one query group and one panel: accumulator `2i` holds
/// query `i` against the panel's first eight rows, `2i + 1` against the last eight.
#[target_feature(enable = "avx2,fma")]
#[inline]
fn micro_tile(group: &[f32], panel: &[Line]) -> [__m256; 2 * QUERY_GROUP] {
    let mut acc = [_mm256_setzero_ps(); 2 * QUERY_GROUP];
    for (a, line) in group.chunks_exact(QUERY_GROUP).zip(panel) {
        // SAFETY: `line` is 64-byte aligned and holds 16 floats: both aligned loads are in
        // bounds.
        let (low, high) = unsafe {
            (
                _mm256_load_ps(line.0.as_ptr()),
                _mm256_load_ps(line.0.as_ptr().add(8)),
            )
        };
        for i in 0..QUERY_GROUP {
            let q = _mm256_set1_ps(a[i]);
            acc[2 * i] = _mm256_fmadd_ps(q, low, acc[2 * i]);
            acc[2 * i + 1] = _mm256_fmadd_ps(q, high, acc[2 * i + 1]);
        }
    }
    acc
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Packing: query q's coordinate c lands at group q / 6, step c, lane q % 6; the last
    /// group's missing lanes are zero.
    #[test]
    fn queries_pack_six_to_a_step() {
        let (m, width) = (7, 3);
        let augmented: Vec<f32> = (0..m * width).map(|v| v as f32 + 1.0).collect();
        let packed = pack_queries(&augmented, m, width);
        assert_eq!(packed.len(), 2 * QUERY_GROUP * width);
        for q in 0..m {
            for c in 0..width {
                let at = (q / 6) * 6 * width + c * 6 + q % 6;
                assert_eq!(packed[at], augmented[q * width + c]);
            }
        }
        for c in 0..width {
            for lane in 1..6 {
                assert_eq!(packed[6 * width + c * 6 + lane], 0.0);
            }
        }
    }
}
