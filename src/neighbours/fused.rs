//! The exact search's candidate pass as one micro-kernel per instruction set: a block of
//! approximate squared distances (6 queries x 16 rows with AVX2, 12 x 32 with AVX-512) is
//! accumulated in vector registers and screened against the queries' worst candidates
//! while still in them, so the distances are never written to memory and scanned again,
//! and nothing is packed per call but the query block.
//!
//! The design is the usual one for blocked matrix products (Goto and van de Geijn,
//! "Anatomy of High-Performance Matrix Multiplication", ACM TOMS 34(3), 2008): the
//! indexed rows are stored once, at index time, in panels of 16 rows whose coordinates
//! interleave (one 64-byte line per coordinate), so a panel is read in order and stays in
//! the first-level cache while every group of queries of a block (packed the same way,
//! a group's values of one coordinate side by side) streams past it. Each step of the
//! AVX2 inner loop is two loads of a panel, six broadcasts and twelve fused multiply-adds;
//! of the AVX-512 loop, one load from each of two panels, twelve broadcasts and
//! twenty-four fused multiply-adds.

use std::arch::x86_64::{
    __m256, __m512, _mm256_cmp_ps, _mm256_fmadd_ps, _mm256_load_ps, _mm256_movemask_ps,
    _mm256_set1_ps, _mm256_setzero_ps, _mm256_storeu_ps, _mm512_cmp_ps_mask, _mm512_fmadd_ps,
    _mm512_load_ps, _mm512_set1_ps, _mm512_setzero_ps, _mm512_storeu_ps, _CMP_LT_OQ,
};

use super::brute_force::{Line, LINE_LANES};
use super::{Candidates, Exclusion};

/// Indexed rows per panel: one operand line (two AVX2 registers, one AVX-512 register).
pub(super) const PANEL_ROWS: usize = LINE_LANES;
/// Queries per AVX2 group: six broadcasts against two panel registers fill twelve
/// accumulators, which with the two panel registers and a broadcast leave one of AVX2's
/// sixteen free.
pub(super) const AVX2_GROUP: usize = 6;
/// Queries per AVX-512 group: twelve broadcasts against two panels' registers fill
/// twenty-four accumulators of AVX-512's thirty-two.
pub(super) const AVX512_GROUP: usize = 12;
/// The widest operand (embedded dimension + 2) the AVX2 pass takes: a panel of this width
/// is 24 KiB and still leaves room in a 32 KiB first-level cache for the queries streaming
/// past. Wider data goes through the blocked product, which splits the inner dimension.
pub(super) const AVX2_MAX_WIDTH: usize = 384;
/// The widest operand the AVX-512 pass takes: its two panels of this width are 36 KiB,
/// within the 48 KiB first-level caches of the processors that have AVX-512.
pub(super) const AVX512_MAX_WIDTH: usize = 288;

/// Where a kernel's offers go: `lists[i]` belongs to query `first_query + i`, and under
/// [`Exclusion::SameIndex`] no query is offered the indexed row of its own number.
pub(super) struct Targets<'a> {
    pub(super) lists: &'a mut [Candidates],
    pub(super) first_query: usize,
    pub(super) exclusion: Exclusion,
}

/// Queries in the layout the kernels read: `augmented` holds `m` rows of `width` values one
/// after another; the result holds groups of `group` queries, each group `width` steps of
/// `group` values, the last group padded with zeros.
pub(super) fn pack_queries(augmented: &[f32], m: usize, width: usize, group: usize) -> Vec<f32> {
    let groups = m.div_ceil(group);
    let mut packed = vec![0.0_f32; groups * group * width];
    for (qi, row) in augmented.chunks_exact(width).take(m).enumerate() {
        let block = &mut packed[(qi / group) * group * width..];
        let lane = qi % group;
        for (c, &v) in row.iter().enumerate() {
            block[c * group + lane] = v;
        }
    }
    packed
}

/// The worst candidate of each query, as the bound its entries must beat, for groups of
/// `group`; the padding queries of the last group get -inf, which nothing beats.
fn bounds_of(lists: &[Candidates], group: usize) -> Vec<f32> {
    let mut worst = vec![f32::NEG_INFINITY; lists.len().div_ceil(group) * group];
    for (bound, list) in worst.iter_mut().zip(lists) {
        *bound = list.worst() as f32;
    }
    worst
}

/// Offers the entries a mask marks below their query's bound: `values[i][offset]` is the
/// approximate distance of query `first + i` to indexed row `row_start + offset`.
#[inline]
fn offer_marked<const Q: usize, const R: usize>(
    values: &[[f32; R]; Q],
    marks: [u32; Q],
    bounds: &mut [f32],
    (first, row_start): (usize, usize),
    targets: &mut Targets<'_>,
) {
    for (i, mut mask) in marks.into_iter().enumerate() {
        let qi = first + i;
        while mask != 0 {
            let offset = mask.trailing_zeros() as usize;
            mask &= mask - 1;
            let value = values[i][offset];
            // The bound may have tightened since the mask was taken.
            if value < bounds[i] {
                let ri = row_start + offset;
                if targets.exclusion == Exclusion::SameIndex && ri == targets.first_query + qi {
                    continue;
                }
                let list = &mut targets.lists[qi];
                list.offer(f64::from(value), ri);
                bounds[i] = list.worst() as f32;
            }
        }
    }
}

/// Offers every indexed row of `panels` (`width` lines per panel; a padding row has an
/// infinite distance) to the candidate lists of the queries in `packed` (from
/// [`pack_queries`] with groups of [`AVX2_GROUP`]).
///
/// # Safety
/// The processor must support AVX2 and FMA.
#[target_feature(enable = "avx2,fma")]
pub(super) unsafe fn nominate_avx2(
    panels: &[Line],
    width: usize,
    packed: &[f32],
    targets: &mut Targets<'_>,
) {
    const Q: usize = AVX2_GROUP;
    if targets.lists.is_empty() || width == 0 {
        return;
    }
    let mut worst = bounds_of(targets.lists, Q);
    for (p, panel) in panels.chunks_exact(width).enumerate() {
        for (g, group) in packed.chunks_exact(Q * width).enumerate() {
            let acc = avx2_tile(group, panel);
            let first = g * Q;
            let bounds = &mut worst[first..first + Q];
            let mut marks = [0_u32; Q];
            let mut any = 0_u32;
            for (i, mark) in marks.iter_mut().enumerate() {
                let bound = _mm256_set1_ps(bounds[i]);
                let low = _mm256_movemask_ps(_mm256_cmp_ps::<_CMP_LT_OQ>(acc[2 * i], bound));
                let high = _mm256_movemask_ps(_mm256_cmp_ps::<_CMP_LT_OQ>(acc[2 * i + 1], bound));
                *mark = (low as u32) | ((high as u32) << 8);
                any |= *mark;
            }
            // Once the lists have filled, almost every block has no entry below its bound.
            if any == 0 {
                continue;
            }
            let mut values = [[0.0_f32; PANEL_ROWS]; Q];
            for (i, row) in values.iter_mut().enumerate() {
                // SAFETY: `row` holds 16 floats, two unaligned stores of 8 fit.
                unsafe {
                    _mm256_storeu_ps(row.as_mut_ptr(), acc[2 * i]);
                    _mm256_storeu_ps(row.as_mut_ptr().add(8), acc[2 * i + 1]);
                }
            }
            let row_start = p * PANEL_ROWS;
            offer_marked(&values, marks, bounds, (first, row_start), targets);
        }
    }
}

/// The 6 x 16 block of products of one query group and one panel: accumulator `2i` holds
/// query `i` against the panel's first eight rows, `2i + 1` against the last eight.
#[target_feature(enable = "avx2,fma")]
#[inline]
fn avx2_tile(group: &[f32], panel: &[Line]) -> [__m256; 2 * AVX2_GROUP] {
    let mut acc = [_mm256_setzero_ps(); 2 * AVX2_GROUP];
    for (a, line) in group.chunks_exact(AVX2_GROUP).zip(panel) {
        // SAFETY: `line` is 64-byte aligned and holds 16 floats: both aligned loads are in
        // bounds.
        let (low, high) = unsafe {
            (
                _mm256_load_ps(line.0.as_ptr()),
                _mm256_load_ps(line.0.as_ptr().add(8)),
            )
        };
        for i in 0..AVX2_GROUP {
            let q = _mm256_set1_ps(a[i]);
            acc[2 * i] = _mm256_fmadd_ps(q, low, acc[2 * i]);
            acc[2 * i + 1] = _mm256_fmadd_ps(q, high, acc[2 * i + 1]);
        }
    }
    acc
}

/// As [`nominate_avx2`], with AVX-512 registers: panels are taken two at a time (the last
/// alone if their number is odd) and queries twelve at a time, `packed` from
/// [`pack_queries`] with groups of [`AVX512_GROUP`].
///
/// # Safety
/// The processor must support AVX-512F.
#[target_feature(enable = "avx512f")]
pub(super) unsafe fn nominate_avx512(
    panels: &[Line],
    width: usize,
    packed: &[f32],
    targets: &mut Targets<'_>,
) {
    if targets.lists.is_empty() || width == 0 {
        return;
    }
    let mut worst = bounds_of(targets.lists, AVX512_GROUP);
    let count = panels.len() / width;
    let mut p = 0;
    while p < count {
        let panel = |offset: usize| &panels[(p + offset) * width..(p + offset + 1) * width];
        let row_start = p * PANEL_ROWS;
        if p + 1 < count {
            let pair = [panel(0), panel(1)];
            avx512_panels::<2>(pair, packed, width, &mut worst, row_start, targets);
            p += 2;
        } else {
            avx512_panels::<1>([panel(0)], packed, width, &mut worst, row_start, targets);
            p += 1;
        }
    }
}

/// Every query group of `packed` against `P` consecutive panels starting at indexed row
/// `row_start`.
#[target_feature(enable = "avx512f")]
#[inline]
fn avx512_panels<const P: usize>(
    panels: [&[Line]; P],
    packed: &[f32],
    width: usize,
    worst: &mut [f32],
    row_start: usize,
    targets: &mut Targets<'_>,
) {
    const Q: usize = AVX512_GROUP;
    for (g, group) in packed.chunks_exact(Q * width).enumerate() {
        let acc = avx512_tile::<P>(group, panels);
        let first = g * Q;
        let bounds = &mut worst[first..first + Q];
        let mut marks = [0_u32; Q];
        let mut any = 0_u32;
        for (i, mark) in marks.iter_mut().enumerate() {
            let bound = _mm512_set1_ps(bounds[i]);
            for (j, &a) in acc[i].iter().enumerate() {
                let below = _mm512_cmp_ps_mask::<_CMP_LT_OQ>(a, bound);
                *mark |= u32::from(below) << (PANEL_ROWS * j);
            }
            any |= *mark;
        }
        if any == 0 {
            continue;
        }
        // Room for two panels' rows whatever `P`; a one-panel tile marks only the first 16.
        let mut values = [[0.0_f32; 2 * PANEL_ROWS]; Q];
        for (i, row) in values.iter_mut().enumerate() {
            for (j, &a) in acc[i].iter().enumerate() {
                // SAFETY: `row` holds 32 floats and `j < P <= 2`: the store of 16 fits.
                unsafe { _mm512_storeu_ps(row.as_mut_ptr().add(PANEL_ROWS * j), a) };
            }
        }
        offer_marked(&values, marks, bounds, (first, row_start), targets);
    }
}

/// The 12 x 16P block of products of one query group and `P` panels: `acc[i][j]` holds
/// query `i` against panel `j`'s sixteen rows.
#[target_feature(enable = "avx512f")]
#[inline]
fn avx512_tile<const P: usize>(group: &[f32], panels: [&[Line]; P]) -> [[__m512; P]; AVX512_GROUP] {
    let mut acc = [[_mm512_setzero_ps(); P]; AVX512_GROUP];
    for (c, a) in group.chunks_exact(AVX512_GROUP).enumerate() {
        let mut lines = [_mm512_setzero_ps(); P];
        for (line, panel) in lines.iter_mut().zip(panels) {
            // SAFETY: every panel holds `width` lines, one per step of `group`, each 64-byte
            // aligned and 16 floats long: the aligned load is in bounds.
            *line = unsafe { _mm512_load_ps(panel[c].0.as_ptr()) };
        }
        for i in 0..AVX512_GROUP {
            let q = _mm512_set1_ps(a[i]);
            for j in 0..P {
                acc[i][j] = _mm512_fmadd_ps(q, lines[j], acc[i][j]);
            }
        }
    }
    acc
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Packing: query q's coordinate c lands at group q / g, step c, lane q % g; the last
    /// group's missing lanes are zero.
    #[test]
    fn queries_pack_a_group_to_a_step() {
        for group in [AVX2_GROUP, AVX512_GROUP] {
            let (m, width) = (group + 1, 3);
            let augmented: Vec<f32> = (0..m * width).map(|v| v as f32 + 1.0).collect();
            let packed = pack_queries(&augmented, m, width, group);
            assert_eq!(packed.len(), 2 * group * width);
            for q in 0..m {
                for c in 0..width {
                    let at = (q / group) * group * width + c * group + q % group;
                    assert_eq!(packed[at], augmented[q * width + c]);
                }
            }
            for c in 0..width {
                for lane in 1..group {
                    assert_eq!(packed[group * width + c * group + lane], 0.0);
                }
            }
        }
    }
}
