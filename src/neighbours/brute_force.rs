//! Exact brute-force k-nearest-neighbour search at matrix-multiply speed.
//!
//! Squared distances to a tile of indexed rows come from one single-precision matrix
//! product, `‖q - r‖² = ‖q‖² + ‖r‖² - 2 q·r`, with the norms folded into the product as two
//! extra coordinates (`[q, ‖q‖², 1] · [-2r, 1, ‖r‖²]`), so the product is already the
//! distance and nothing is added afterwards. Rows are centred at the index's mean first
//! (centring leaves distances unchanged and keeps the norms, and so the cancellation, small).
//! The product runs in the `gemm` crate's blocked kernels (AVX-512 where the processor has
//! it, chosen at run time), one query block per thread; the indexed rows are stored tile by
//! tile, already transposed, in the layout those kernels read fastest.
//!
//! That pass only nominates candidates: each query keeps a few more than `k`, their
//! distances are recomputed exactly in double precision as sums of squared differences, and
//! a query whose margin cannot rule out a missed neighbour under a worst-case bound on the
//! single-precision error is searched again exhaustively in double precision. The answer
//! is therefore exact, not approximate; the fast pass only decides where to look.

use ndarray::{Array1, Array2, ArrayView1, ArrayView2, Axis};
use rayon::prelude::*;

#[cfg(target_arch = "x86_64")]
use super::fused;
use super::{
    check_request, exact_squared_distance, exhaustive, nearest_first, search_in_blocks, Candidates,
    Exclusion, NeighbourIndex, Neighbours,
};
use crate::error::Result;

/// Indexed rows per matrix-product tile: a 256 x 256 f32 tile of products is 256 KiB, which
/// stays in a core's second-level cache between the product writing it and the scan reading
/// it (measured on W1 of `benches/peer.py`: 1,024-row tiles cost a fifth more CPU time,
/// 128-row tiles no less).
const ROW_TILE: usize = 256;
/// Extra candidates kept per query beyond k for the exact re-ranking.
const EXTRA_CANDIDATES: usize = 8;
/// Entries per block of the candidate scan: one bit each in a `u32` mask.
const SCAN_LANES: usize = 32;
/// Beyond this magnitude a centred coordinate's square could overflow single precision;
/// such data is searched in double precision throughout.
const SINGLE_PRECISION_LIMIT: f64 = 1e15;

/// Values per line of the candidate pass's operand.
pub(super) const LINE_LANES: usize = 16;

/// Sixteen values of the candidate pass's operand, aligned to a cache line, so that the
/// fused kernel's panels (one line per coordinate) start on line boundaries.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
#[repr(C, align(64))]
pub(super) struct Line(pub(super) [f32; LINE_LANES]);

// SAFETY: `Line` is `repr(C)`, sixteen `f32` (64 bytes) with an alignment of 64, so it has
// no padding, and every bit pattern is a valid value.
unsafe impl bytemuck::Zeroable for Line {}
// SAFETY: as above; `Line` is `Copy` and `'static`.
unsafe impl bytemuck::Pod for Line {}

/// How the candidate pass computes and screens its products, chosen once per index from
/// what the processor has.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum CandidatePass {
    /// Products of a query block and a tile of rows in the `gemm` crate's blocked kernels,
    /// written to a buffer and then scanned. The operand is stored tile after tile: for the
    /// tile of rows `t·ROW_TILE..`, a `(dim + 2) x tile_len` row-major block.
    Product,
    /// Kilter's own AVX2 micro-kernel, which screens each 6 x 16 block of products while it
    /// is still in registers (see `fused`). The operand is stored in panels of 16 rows,
    /// `dim + 2` lines each, the last panel padded with rows at infinite distance.
    #[cfg(target_arch = "x86_64")]
    FusedAvx2,
    /// The same with AVX-512 registers and 12 x 32 blocks, on the same panels.
    #[cfg(target_arch = "x86_64")]
    FusedAvx512,
}

impl CandidatePass {
    /// The widest fused kernel the processor has, for operands whose panels fit its
    /// first-level cache; the blocked product elsewhere (other processors, wider data).
    fn detect(width: usize) -> Self {
        #[cfg(target_arch = "x86_64")]
        {
            if std::arch::is_x86_feature_detected!("avx512f") {
                if width <= fused::AVX512_MAX_WIDTH {
                    return CandidatePass::FusedAvx512;
                }
            } else if std::arch::is_x86_feature_detected!("avx2")
                && std::arch::is_x86_feature_detected!("fma")
                && width <= fused::AVX2_MAX_WIDTH
            {
                return CandidatePass::FusedAvx2;
            }
        }
        let _ = width;
        CandidatePass::Product
    }

    /// Whether this machine can run the pass.
    #[cfg_attr(not(target_arch = "x86_64"), allow(dead_code))]
    fn runs_here(self) -> bool {
        match self {
            CandidatePass::Product => true,
            #[cfg(target_arch = "x86_64")]
            CandidatePass::FusedAvx2 => {
                std::arch::is_x86_feature_detected!("avx2")
                    && std::arch::is_x86_feature_detected!("fma")
            }
            #[cfg(target_arch = "x86_64")]
            CandidatePass::FusedAvx512 => std::arch::is_x86_feature_detected!("avx512f"),
        }
    }
}

/// Exhaustive exact search over rows held in memory.
#[derive(Debug, Clone)]
pub struct BruteForceIndex {
    rows: Array2<f64>,
    center: Array1<f64>,
    pass: CandidatePass,
    /// The candidate pass's right-hand operand in the layout `pass` reads: each indexed row
    /// `r_j` as the column `[-2 (r_j - center), 1, ‖r_j - center‖²]` in single precision.
    /// Held in cache lines so that the fused kernel's panels are aligned.
    operand: Vec<Line>,
    max_centred_norm: f64,
    single_precision: bool,
}

impl BruteForceIndex {
    /// Indexes the rows (copied into standard layout).
    pub fn new(rows: Array2<f64>) -> Self {
        let pass = CandidatePass::detect(rows.ncols() + 2);
        Self::with_pass(rows, pass)
    }

    /// Whether this machine runs the candidate pass in the AVX-512 kernel (for data of
    /// moderate width), which moves the point where the k-d tree stops being faster.
    pub fn has_wide_kernel() -> bool {
        #[cfg(target_arch = "x86_64")]
        {
            CandidatePass::FusedAvx512.runs_here()
        }
        #[cfg(not(target_arch = "x86_64"))]
        {
            false
        }
    }

    /// Indexes the rows for the candidate pass given.
    pub(crate) fn with_pass(rows: Array2<f64>, pass: CandidatePass) -> Self {
        // No copy of a million-row matrix that is already in standard layout, and no
        // double-precision centred copy: the single-precision operand is filled row by row.
        let rows = if rows.is_standard_layout() {
            rows
        } else {
            rows.as_standard_layout().into_owned()
        };
        let (n, d) = rows.dim();
        let center = rows.mean_axis(Axis(0)).unwrap_or_else(|| Array1::zeros(d));
        let width = d + 2;
        // Blocks of rows with the stride each is stored at: whole tiles for the product,
        // padded panels for the fused kernel.
        let (block_rows, stored) = match pass {
            CandidatePass::Product => (ROW_TILE, width * n),
            #[cfg(target_arch = "x86_64")]
            CandidatePass::FusedAvx2 | CandidatePass::FusedAvx512 => (
                fused::PANEL_ROWS,
                width * n.next_multiple_of(fused::PANEL_ROWS),
            ),
        };
        let mut operand: Vec<Line> = crate::memory::zeroed_vec(stored.div_ceil(LINE_LANES));
        let values: &mut [f32] = &mut bytemuck::cast_slice_mut(&mut operand)[..stored];
        // Blocks are independent: filled in parallel, each reporting its largest centred
        // magnitude and norm.
        let (largest, max_centred_norm) = values
            .par_chunks_mut(block_rows * width)
            .zip(rows.axis_chunks_iter(Axis(0), block_rows).into_par_iter())
            .map(|(block, block_rows)| fill_block(block, block_rows, center.view()))
            .reduce(|| (0.0, 0.0), |a, b| (a.0.max(b.0), a.1.max(b.1)));
        BruteForceIndex {
            rows,
            center,
            pass,
            operand,
            max_centred_norm,
            single_precision: largest < SINGLE_PRECISION_LIMIT,
        }
    }

    /// Worst-case error of one single-precision distance `[q, ‖q‖², 1] · [-2r, 1, ‖r‖²]`:
    /// accumulating its `d + 2` products costs at most about `(d + 2)` units of 2⁻²⁴ times
    /// the sum of their magnitudes, itself at most `2 (‖q‖² + ‖r‖²)` (Higham, "Accuracy and
    /// Stability of Numerical Algorithms", 2nd ed., §3.1, for the inner product), and
    /// rounding the coordinates to single precision moves the distance by at most about
    /// four more such units. That is `(d + 4) ε (‖q‖² + ‖r‖²)` with ε = 2⁻²³; doubled for
    /// margin.
    fn single_precision_error(&self, query_norm: f64) -> f64 {
        let d = self.rows.ncols() as f64;
        2.0 * (d + 4.0) * f64::from(f32::EPSILON) * (query_norm + self.max_centred_norm)
    }

    /// The operand block of the tile starting at row `tile_start`, and its length (the
    /// product's layout).
    fn tile(&self, tile_start: usize) -> (&[f32], usize) {
        let width = self.rows.ncols() + 2;
        let len = ROW_TILE.min(self.rows.nrows() - tile_start);
        let values: &[f32] = bytemuck::cast_slice(&self.operand);
        (&values[tile_start * width..][..len * width], len)
    }
}

/// Writes `row - center` rounded to single precision into `out`. Returns the squared norm
/// of the rounded coordinates (the vector the product sees, so rows and queries are
/// measured alike) and the largest centred magnitude before rounding. The norm is summed in
/// eight interleaved partial sums, so that the loop vectorises instead of waiting on one
/// chain of additions; it only feeds the approximate pass and its error bound.
#[inline]
fn centre_rounded(
    row: ArrayView1<'_, f64>,
    center: ArrayView1<'_, f64>,
    out: &mut [f32],
) -> (f64, f64) {
    const LANES: usize = 8;
    let mut norms = [0.0_f64; LANES];
    let mut largest = [0.0_f64; LANES];
    let mut step = |lane: usize, o: &mut f32, v: f64, m: f64| {
        let t = v - m;
        largest[lane] = largest[lane].max(t.abs());
        *o = t as f32;
        norms[lane] += f64::from(*o) * f64::from(*o);
    };
    match (row.as_slice(), center.as_slice()) {
        (Some(row), Some(center)) => {
            let (out_lanes, out_rest) = out.as_chunks_mut::<LANES>();
            let (row_lanes, row_rest) = row.as_chunks::<LANES>();
            let (center_lanes, center_rest) = center.as_chunks::<LANES>();
            for ((o, v), m) in out_lanes.iter_mut().zip(row_lanes).zip(center_lanes) {
                for lane in 0..LANES {
                    step(lane, &mut o[lane], v[lane], m[lane]);
                }
            }
            for ((o, &v), &m) in out_rest.iter_mut().zip(row_rest).zip(center_rest) {
                step(0, o, v, m);
            }
        }
        _ => {
            for (i, ((o, &v), &m)) in out
                .iter_mut()
                .zip(row.iter())
                .zip(center.iter())
                .enumerate()
            {
                step(i % LANES, o, v, m);
            }
        }
    }
    (
        norms.iter().sum(),
        largest.iter().copied().fold(0.0, f64::max),
    )
}

/// Rows transposed per block of this many, so that both the reads and the writes of the
/// transposition touch whole cache lines.
const TRANSPOSE_BLOCK: usize = 16;

/// Fills one block of the operand (see [`BruteForceIndex::operand`]) from its rows: a
/// `(dim + 2) x stride` row-major block whose first `rows` columns are the rows and whose
/// remaining columns, if any, are padding rows at infinite distance (zero coordinates and
/// an infinite norm). Returns the largest centred magnitude and the largest centred norm.
fn fill_block(
    block: &mut [f32],
    rows: ArrayView2<'_, f64>,
    center: ArrayView1<'_, f64>,
) -> (f64, f64) {
    let (len, d) = rows.dim();
    let stride = block.len() / (d + 2);
    let mut largest = 0.0_f64;
    let mut max_norm = 0.0_f64;
    let mut centred = vec![0.0_f32; TRANSPOSE_BLOCK * d];
    for first in (0..len).step_by(TRANSPOSE_BLOCK) {
        let count = TRANSPOSE_BLOCK.min(len - first);
        for j in 0..count {
            let row = rows.row(first + j);
            let (norm, row_largest) = centre_rounded(row, center, &mut centred[j * d..(j + 1) * d]);
            largest = largest.max(row_largest);
            block[d * stride + first + j] = 1.0;
            block[(d + 1) * stride + first + j] = norm as f32;
            max_norm = max_norm.max(norm);
        }
        for c in 0..d {
            let column = &mut block[c * stride + first..][..count];
            for (j, slot) in column.iter_mut().enumerate() {
                *slot = -2.0 * centred[j * d + c];
            }
        }
    }
    // The product of any query with a padding row is 0 + ‖q‖² · 0 + 1 · ∞ = ∞, which no
    // bound is above.
    for j in len..stride {
        block[(d + 1) * stride + j] = f32::INFINITY;
    }
    (largest, max_norm)
}

/// `out = lhs · rhs` in single precision on the calling thread, all three row-major:
/// `lhs` is `m x k`, `rhs` is `k x n`, `out` is `m x n`.
fn product(out: &mut [f32], lhs: &[f32], rhs: &[f32], m: usize, n: usize, k: usize) {
    assert!(
        lhs.len() == m * k && rhs.len() == k * n && out.len() == m * n,
        "operand sizes must match the product's shape"
    );
    if m == 0 || n == 0 {
        return;
    }
    // SAFETY: the three slices hold exactly the m x k, k x n and m x n row-major matrices
    // described by the strides passed (checked above), `out` does not alias the operands
    // (it is borrowed mutably), and read_dst = false means `out`'s old contents are not read.
    unsafe {
        gemm::gemm(
            m,
            n,
            k,
            out.as_mut_ptr(),
            1,
            n as isize,
            false,
            lhs.as_ptr(),
            1,
            k as isize,
            rhs.as_ptr(),
            1,
            n as isize,
            0.0,
            1.0,
            false,
            false,
            false,
            gemm::Parallelism::None,
        );
    }
}

/// The instruction set the candidate scan is compiled for, chosen once per search from
/// what the processor has.
#[derive(Clone, Copy)]
enum ScanKernel {
    #[cfg(target_arch = "x86_64")]
    Avx512,
    #[cfg(target_arch = "x86_64")]
    Avx2,
    Portable,
}

impl ScanKernel {
    fn detect() -> Self {
        #[cfg(target_arch = "x86_64")]
        {
            if std::arch::is_x86_feature_detected!("avx512f") {
                return ScanKernel::Avx512;
            }
            if std::arch::is_x86_feature_detected!("avx2") {
                return ScanKernel::Avx2;
            }
        }
        ScanKernel::Portable
    }
}

/// One tile's products to scan: `len` approximate squared distances per query, the
/// queries' rows one after another, for the tile of indexed rows starting at `tile_start`.
#[derive(Clone, Copy)]
struct TileScan<'a> {
    approx: &'a [f32],
    len: usize,
    tile_start: usize,
    exclusion: Exclusion,
    first_query: usize,
}

impl TileScan<'_> {
    /// Offers each query's row to its candidate list, with the screens given; inlined into
    /// each caller so that the screens compile for the caller's instruction set.
    #[inline(always)]
    fn offer_rows(
        self,
        lists: &mut [Candidates],
        mask: impl Fn(&[f32], f32) -> u32 + Copy,
        any_below: impl Fn(&[f32], f32) -> bool + Copy,
    ) {
        let rows = self.approx.chunks_exact(self.len);
        for (qi, (row, list)) in rows.zip(lists.iter_mut()).enumerate() {
            let own = self.first_query + qi;
            scan_row_with(
                row,
                self.tile_start,
                list,
                self.exclusion,
                own,
                mask,
                any_below,
            );
        }
    }

    /// Offers the tile to the queries' candidate lists. Most entries lose to the current
    /// worst candidate, so rows and blocks of entries are first screened with vectorised
    /// comparisons, compiled for the instruction set `kernel` names.
    fn offer_to(self, kernel: ScanKernel, lists: &mut [Candidates]) {
        match kernel {
            #[cfg(target_arch = "x86_64")]
            // SAFETY: `ScanKernel::detect` chose this kernel: the processor has AVX-512F.
            ScanKernel::Avx512 => unsafe { self.offer_avx512(lists) },
            #[cfg(target_arch = "x86_64")]
            // SAFETY: `ScanKernel::detect` chose this kernel: the processor has AVX2.
            ScanKernel::Avx2 => unsafe { self.offer_avx2(lists) },
            ScanKernel::Portable => self.offer_rows(lists, mask_below, |row, bound| {
                row.iter().fold(false, |any, &v| any | (v < bound))
            }),
        }
    }

    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx512f")]
    unsafe fn offer_avx512(self, lists: &mut [Candidates]) {
        // Safe to call: the closures inherit this function's AVX-512F.
        let mask = |block: &[f32], bound| mask_below_avx512(block, bound);
        self.offer_rows(lists, mask, |row, bound| {
            row.chunks(SCAN_LANES)
                .fold(0, |any, block| any | mask(block, bound))
                != 0
        });
    }

    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx2")]
    unsafe fn offer_avx2(self, lists: &mut [Candidates]) {
        // Safe to call: the closures inherit this function's AVX2.
        self.offer_rows(
            lists,
            |block, bound| mask_below_avx2(block, bound),
            |row, bound| any_below_avx2(row, bound),
        );
    }
}

/// Bit `i` set where `block[i] < bound`: comparisons without an order to keep, so the
/// compiler vectorises them for whatever instruction set the caller enables.
#[inline(always)]
fn mask_below(block: &[f32], bound: f32) -> u32 {
    block
        .iter()
        .enumerate()
        .fold(0_u32, |mask, (i, &v)| mask | (u32::from(v < bound) << i))
}

/// [`mask_below`] for a full block, two AVX-512 comparisons straight into mask registers.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f")]
#[inline]
fn mask_below_avx512(block: &[f32], bound: f32) -> u32 {
    use std::arch::x86_64::{_mm512_cmp_ps_mask, _mm512_loadu_ps, _mm512_set1_ps, _CMP_LT_OQ};
    if block.len() != SCAN_LANES {
        return mask_below(block, bound);
    }
    // SAFETY: the block holds 32 floats (checked above), so both 16-float loads are in
    // bounds; unaligned loads need no alignment.
    unsafe {
        let bound = _mm512_set1_ps(bound);
        let low = _mm512_loadu_ps(block.as_ptr());
        let high = _mm512_loadu_ps(block.as_ptr().add(16));
        u32::from(_mm512_cmp_ps_mask::<_CMP_LT_OQ>(low, bound))
            | (u32::from(_mm512_cmp_ps_mask::<_CMP_LT_OQ>(high, bound)) << 16)
    }
}

/// [`mask_below`] for a full block with AVX2: four 8-float comparisons, OR-ed and tested
/// first, so that a block with no entry below the bound (the usual case) costs one branch;
/// otherwise each comparison's sign bits become 8 bits of the mask.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
#[inline]
fn mask_below_avx2(block: &[f32], bound: f32) -> u32 {
    use std::arch::x86_64::{
        _mm256_cmp_ps, _mm256_loadu_ps, _mm256_movemask_ps, _mm256_or_ps, _mm256_set1_ps,
        _mm256_testz_ps, _CMP_LT_OQ,
    };
    if block.len() != SCAN_LANES {
        return mask_below(block, bound);
    }
    // SAFETY: the block holds 32 floats (checked above), so the four 8-float loads are in
    // bounds; unaligned loads need no alignment.
    unsafe {
        let bound = _mm256_set1_ps(bound);
        let p = block.as_ptr();
        let c0 = _mm256_cmp_ps::<_CMP_LT_OQ>(_mm256_loadu_ps(p), bound);
        let c1 = _mm256_cmp_ps::<_CMP_LT_OQ>(_mm256_loadu_ps(p.add(8)), bound);
        let c2 = _mm256_cmp_ps::<_CMP_LT_OQ>(_mm256_loadu_ps(p.add(16)), bound);
        let c3 = _mm256_cmp_ps::<_CMP_LT_OQ>(_mm256_loadu_ps(p.add(24)), bound);
        let any = _mm256_or_ps(_mm256_or_ps(c0, c1), _mm256_or_ps(c2, c3));
        if _mm256_testz_ps(any, any) != 0 {
            return 0;
        }
        (_mm256_movemask_ps(c0) as u32)
            | ((_mm256_movemask_ps(c1) as u32) << 8)
            | ((_mm256_movemask_ps(c2) as u32) << 16)
            | ((_mm256_movemask_ps(c3) as u32) << 24)
    }
}

/// Whether any entry of `row` is below `bound`, eight at a time with AVX2: the comparisons
/// are OR-ed together and tested once at the end.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
#[inline]
fn any_below_avx2(row: &[f32], bound: f32) -> bool {
    use std::arch::x86_64::{
        _mm256_cmp_ps, _mm256_loadu_ps, _mm256_or_ps, _mm256_set1_ps, _mm256_setzero_ps,
        _mm256_testz_ps, _CMP_LT_OQ,
    };
    let (octets, rest) = row.as_chunks::<8>();
    // SAFETY: each load reads one 8-float chunk of `row`; unaligned loads need no
    // alignment.
    let any = unsafe {
        let bound_lanes = _mm256_set1_ps(bound);
        let mut any = _mm256_setzero_ps();
        for octet in octets {
            let below = _mm256_cmp_ps::<_CMP_LT_OQ>(_mm256_loadu_ps(octet.as_ptr()), bound_lanes);
            any = _mm256_or_ps(any, below);
        }
        _mm256_testz_ps(any, any) == 0
    };
    any || rest.iter().any(|&v| v < bound)
}

/// The scan itself, with the row screening `any_below` and the block screening `mask`
/// supply.
#[inline(always)]
fn scan_row_with(
    approx: &[f32],
    tile_start: usize,
    list: &mut Candidates,
    exclusion: Exclusion,
    own: usize,
    mask: impl Fn(&[f32], f32) -> u32,
    any_below: impl Fn(&[f32], f32) -> bool,
) {
    let mut worst = list.worst() as f32;
    // Once the list has filled, most rows of a tile hold no entry below its worst
    // candidate: one pass of comparisons over the whole row, with no branch inside, rules
    // them out.
    if !any_below(approx, worst) {
        return;
    }
    for (block_index, block) in approx.chunks(SCAN_LANES).enumerate() {
        // Most blocks hold no entry below the worst candidate: their mask is 0 and they cost
        // nothing more.
        let mut below = mask(block, worst);
        let base = tile_start + block_index * SCAN_LANES;
        while below != 0 {
            let offset = below.trailing_zeros() as usize;
            below &= below - 1;
            let value = block[offset];
            // The worst candidate may have improved since the mask was taken.
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
        let (n, d) = self.rows.dim();
        let width = d + 2;
        let keep = (k + EXTRA_CANDIDATES).min(n);
        let m = queries.nrows();
        // Each query as [q - center, ‖q - center‖², 1], rounded as the rows were.
        let mut augmented = vec![0.0_f32; m * width];
        let mut query_norms = Vec::with_capacity(m);
        // A query whose centred coordinates single precision cannot hold (1e20, or an
        // infinity from the embedding) is searched in double precision alone.
        let mut query_fits = Vec::with_capacity(m);
        for (out, q) in augmented.chunks_exact_mut(width).zip(queries.outer_iter()) {
            let (norm, largest) = centre_rounded(q, self.center.view(), &mut out[..d]);
            out[d] = norm as f32;
            out[d + 1] = 1.0;
            query_norms.push(norm);
            query_fits.push(largest < SINGLE_PRECISION_LIMIT && norm.is_finite());
        }
        let mut lists: Vec<Candidates> = (0..m).map(|_| Candidates::new(keep)).collect();
        match self.pass {
            CandidatePass::Product => {
                self.nominate_by_product(&augmented, &mut lists, first_query, exclusion)
            }
            #[cfg(target_arch = "x86_64")]
            CandidatePass::FusedAvx2 | CandidatePass::FusedAvx512 => {
                let avx512 = self.pass == CandidatePass::FusedAvx512;
                let group = if avx512 {
                    fused::AVX512_GROUP
                } else {
                    fused::AVX2_GROUP
                };
                let packed = fused::pack_queries(&augmented, m, width, group);
                let mut targets = fused::Targets {
                    lists: &mut lists,
                    first_query,
                    exclusion,
                };
                // SAFETY: the index chose this pass after seeing that the processor has its
                // instructions (AVX-512F, or AVX2 and FMA): `CandidatePass::detect`, or a
                // test that checked `runs_here`.
                unsafe {
                    if avx512 {
                        fused::nominate_avx512(&self.operand, width, &packed, &mut targets);
                    } else {
                        fused::nominate_avx2(&self.operand, width, &packed, &mut targets);
                    }
                }
            }
        }

        lists
            .into_iter()
            .enumerate()
            .map(|(qi, list)| {
                let query = queries.row(qi);
                let own = first_query + qi;
                if !query_fits[qi] {
                    return self.exhaustive(query, own, k, exclusion);
                }
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
                let error = self.single_precision_error(query_norms[qi]);
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

    /// The candidate pass through the blocked product: each tile of rows against the whole
    /// query block into a buffer, then scanned.
    fn nominate_by_product(
        &self,
        augmented: &[f32],
        lists: &mut [Candidates],
        first_query: usize,
        exclusion: Exclusion,
    ) {
        let (n, d) = self.rows.dim();
        let width = d + 2;
        let m = lists.len();
        let mut approx = vec![0.0_f32; m * ROW_TILE];
        let kernel = ScanKernel::detect();
        for tile_start in (0..n).step_by(ROW_TILE) {
            let (tile, len) = self.tile(tile_start);
            let approx = &mut approx[..m * len];
            product(approx, augmented, tile, m, len, width);
            let scan = TileScan {
                approx,
                len,
                tile_start,
                exclusion,
                first_query,
            };
            scan.offer_to(kernel, lists);
        }
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

    /// The shared hand-worked tests once more with each pass forced, so that every pass the
    /// machine can run is tested whichever one it chooses (a pass it cannot run gives way to
    /// the blocked product).
    fn forced(pass: CandidatePass) -> impl Fn(Array2<f64>) -> BruteForceIndex {
        let pass = if pass.runs_here() {
            pass
        } else {
            CandidatePass::Product
        };
        move |rows| BruteForceIndex::with_pass(rows, pass)
    }

    mod product_pass {
        use super::super::super::conformance;
        use super::*;
        conformance::shared_tests!(forced(CandidatePass::Product));
    }

    #[cfg(target_arch = "x86_64")]
    mod avx2_pass {
        use super::super::super::conformance;
        use super::*;
        conformance::shared_tests!(forced(CandidatePass::FusedAvx2));
    }

    #[cfg(target_arch = "x86_64")]
    mod avx512_pass {
        use super::super::super::conformance;
        use super::*;
        conformance::shared_tests!(forced(CandidatePass::FusedAvx512));
    }

    /// Every pass that runs here gives, for every query, the exhaustive double-precision
    /// answer (indices and distances to the bit), new queries and in-sample, on awkward rows
    /// (ties, duplicates, far outliers) and on a lattice (many exact ties), at sizes that
    /// leave partial panels, partial query groups and partial tiles, and at widths on both
    /// sides of the fused kernel's limit.
    #[test]
    fn every_pass_equals_the_exhaustive_search() {
        let passes = [
            CandidatePass::Product,
            #[cfg(target_arch = "x86_64")]
            CandidatePass::FusedAvx2,
            #[cfg(target_arch = "x86_64")]
            CandidatePass::FusedAvx512,
        ];
        let cases = [
            (conformance::awkward_rows(1, 1, 1), 1),
            (conformance::awkward_rows(15, 3, 2), 7),
            (conformance::awkward_rows(17, 2, 3), 13),
            (conformance::awkward_rows(300, 5, 4), 50),
            (conformance::awkward_rows(600, 34, 5), 37),
            (conformance::gaussian_rows(257, 256, 6), 9),
            (conformance::gaussian_rows(40, 400, 7), 5),
            (conformance::lattice_rows(5, 3, 8), 19),
        ];
        for pass in passes.into_iter().filter(|p| p.runs_here()) {
            for (rows, m) in &cases {
                let n = rows.nrows();
                let k = 4.min(n - 1).max(1);
                let index = BruteForceIndex::with_pass(rows.clone(), pass);
                let queries = conformance::gaussian_rows(*m, rows.ncols(), n as u64);
                for (exclusion, queries) in [
                    (Exclusion::None, queries.view()),
                    (Exclusion::SameIndex, rows.view()),
                ] {
                    if exclusion == Exclusion::SameIndex && n < 2 {
                        continue;
                    }
                    let got = index.k_nearest(queries, k, exclusion).unwrap();
                    for (qi, query) in queries.outer_iter().enumerate() {
                        let want = exhaustive(rows.view(), query, qi, k, exclusion);
                        let indices: Vec<usize> = want.iter().map(|&(_, i)| i).collect();
                        let distances: Vec<f64> = want.iter().map(|&(d, _)| d.sqrt()).collect();
                        let context = format!("{pass:?}, {exclusion:?}, n {n}, query {qi}");
                        assert_eq!(got.indices.row(qi).to_vec(), indices, "{context}");
                        assert_eq!(got.distances.row(qi).to_vec(), distances, "{context}");
                    }
                }
            }
        }
    }

    /// A padding row of the fused layout sits at infinite distance: its column is zero but
    /// for an infinite norm.
    #[cfg(target_arch = "x86_64")]
    #[test]
    fn padding_rows_are_infinitely_far() {
        let rows = conformance::gaussian_rows(3, 2, 9);
        let index = BruteForceIndex::with_pass(rows, CandidatePass::FusedAvx2);
        let values: &[f32] = bytemuck::cast_slice(&index.operand);
        assert_eq!(values.len(), 4 * LINE_LANES);
        for j in 3..LINE_LANES {
            let column: Vec<f32> = (0..4).map(|c| values[c * LINE_LANES + j]).collect();
            assert_eq!(column, vec![0.0, 0.0, 0.0, f32::INFINITY]);
        }
        for j in 0..3 {
            assert_eq!(values[2 * LINE_LANES + j], 1.0);
        }
    }

    /// The vector screens answer as the portable comparisons do, on rows of every length
    /// from 0 to 70 (whole blocks and remainders) with entries equal to, just below and
    /// just above the bound, and on the infinite bound of an unfilled list.
    #[cfg(target_arch = "x86_64")]
    #[test]
    fn vector_screens_agree_with_the_portable_comparisons() {
        let bounds = [1.0_f32, 0.0, -1.0, f32::INFINITY];
        for len in 0..=70 {
            for shift in 0..3 {
                let row: Vec<f32> = (0..len)
                    .map(|i| match (i * 7 + shift) % 5 {
                        0 => 1.0,
                        1 => 1.0 - f32::EPSILON,
                        2 => 1.0 + f32::EPSILON,
                        3 => 50.0,
                        _ => -3.0,
                    })
                    .collect();
                for &bound in &bounds {
                    let expected = row.iter().any(|&v| v < bound);
                    if std::arch::is_x86_feature_detected!("avx2") {
                        // SAFETY: the processor has just been seen to support AVX2.
                        let any = unsafe { any_below_avx2(&row, bound) };
                        assert_eq!(any, expected, "len {len}, bound {bound}");
                    }
                    for block in row.chunks(SCAN_LANES) {
                        let expected = mask_below(block, bound);
                        if std::arch::is_x86_feature_detected!("avx2") {
                            // SAFETY: as above.
                            assert_eq!(unsafe { mask_below_avx2(block, bound) }, expected);
                        }
                        if std::arch::is_x86_feature_detected!("avx512f") {
                            // SAFETY: the processor has just been seen to support AVX-512F.
                            assert_eq!(unsafe { mask_below_avx512(block, bound) }, expected);
                        }
                    }
                }
            }
        }
    }
}
