//! Pure-Rust backend: nalgebra's Cholesky and symmetric eigen-solver, and a batched
//! forward substitution of its own.

use nalgebra::DMatrix;
use ndarray::{Array1, Array2, ArrayView2, Axis};

pub(super) const NAME: &str = "pure-rust (nalgebra)";

fn to_nalgebra(a: ArrayView2<'_, f64>) -> DMatrix<f64> {
    DMatrix::from_fn(a.nrows(), a.ncols(), |i, j| a[[i, j]])
}

fn from_nalgebra(m: &DMatrix<f64>) -> Array2<f64> {
    Array2::from_shape_fn((m.nrows(), m.ncols()), |(i, j)| m[(i, j)])
}

pub(super) fn cholesky_lower(a: &Array2<f64>) -> Option<Array2<f64>> {
    let m = to_nalgebra(a.view());
    let factor = nalgebra::Cholesky::new(m)?;
    Some(from_nalgebra(&factor.l()))
}

/// Right-hand sides solved together: a d x 64 block of them stays in a core's second-level
/// cache for d up to a few hundred.
const RHS_LANES: usize = 64;

/// Forward substitution for every row of `rows`, vectorised across the rows: the rows are
/// transposed so that each step of the substitution updates one coordinate of 64 rows at
/// once. Each row goes through exactly the operations of a substitution on its own, in the
/// same order (`yᵢ = bᵢ / Lᵢᵢ`, then `bⱼ -= yᵢ Lⱼᵢ` for `j > i`, as nalgebra's
/// column-oriented solve does), so its solution does not depend on the rows solved with it.
pub(super) fn solve_lower_block(l: &Array2<f64>, rows: ArrayView2<'_, f64>) -> Array2<f64> {
    let (m, d) = rows.dim();
    let mut out = Array2::<f64>::zeros((m, d));
    let mut work = vec![0.0_f64; d * RHS_LANES.min(m.max(1))];
    for (chunk, mut out_chunk) in rows
        .axis_chunks_iter(Axis(0), RHS_LANES)
        .zip(out.axis_chunks_iter_mut(Axis(0), RHS_LANES))
    {
        let w = chunk.nrows();
        let work = &mut work[..d * w];
        for (c, row) in chunk.outer_iter().enumerate() {
            for (i, &v) in row.iter().enumerate() {
                work[i * w + c] = v;
            }
        }
        for i in 0..d {
            let pivot = l[[i, i]];
            let (solved, rest) = work.split_at_mut((i + 1) * w);
            let y = &mut solved[i * w..];
            for v in y.iter_mut() {
                *v /= pivot;
            }
            for (j, target) in rest.chunks_exact_mut(w).enumerate() {
                let factor = l[[i + 1 + j, i]];
                for (b, &yi) in target.iter_mut().zip(y.iter()) {
                    *b -= yi * factor;
                }
            }
        }
        for (c, mut row) in out_chunk.outer_iter_mut().enumerate() {
            for (i, v) in row.iter_mut().enumerate() {
                *v = work[i * w + c];
            }
        }
    }
    out
}

pub(super) fn symmetric_eigen(a: &Array2<f64>) -> Option<(Array1<f64>, Array2<f64>)> {
    let m = to_nalgebra(a.view());
    let eigen = nalgebra::SymmetricEigen::try_new(m, 1e-15, 10_000)?;
    let values = Array1::from_iter(eigen.eigenvalues.iter().cloned());
    Some((values, from_nalgebra(&eigen.eigenvectors)))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The batched substitution performs nalgebra's own column-oriented solve (the
    /// general-purpose reference it replaces), so the two agree to the last bit: a
    /// 37-dimensional factor and 150 rows, which make two full blocks of 64 and a remainder.
    #[test]
    fn the_batched_substitution_matches_nalgebra_to_the_bit() {
        let d = 37;
        let l = Array2::from_shape_fn((d, d), |(i, j)| match i.cmp(&j) {
            std::cmp::Ordering::Less => 0.0,
            std::cmp::Ordering::Equal => 1.5 + (i as f64 * 0.37).sin(),
            std::cmp::Ordering::Greater => ((i * 13 + j * 7) % 11) as f64 / 9.0 - 0.6,
        });
        let rows = Array2::from_shape_fn((150, d), |(i, j)| {
            ((i * 31 + j * 17) % 29) as f64 / 3.0 - 4.7
        });
        let ours = solve_lower_block(&l, rows.view());
        let factor = to_nalgebra(l.view());
        let mut reference = to_nalgebra(rows.t());
        assert!(factor.solve_lower_triangular_mut(&mut reference));
        let reference = from_nalgebra(&reference).reversed_axes();
        for (x, y) in ours.iter().zip(reference.iter()) {
            assert_eq!(x.to_bits(), y.to_bits(), "{x} against nalgebra's {y}");
        }
    }
}
