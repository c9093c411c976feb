//! The linear-algebra backend: the few dense decompositions kilter needs.
//!
//! Two interchangeable implementations sit behind the same four functions. The default is
//! pure Rust (nalgebra's decompositions), so that `cargo build` works on any machine; the
//! cargo feature `lapack` swaps in ndarray-linalg over the system OpenBLAS and compiles the
//! pure-Rust path out. Both are run by the same test suite and must agree to 1e-9 relative.
//!
//! Conventions shared by both backends, so that results do not depend on the backend:
//! Cholesky factors are lower triangular; eigenvalues come in descending order with each
//! eigenvector's largest-magnitude component made positive.

use ndarray::{Array1, Array2, ArrayView2, Axis};
use rayon::prelude::*;

#[cfg(feature = "lapack")]
mod lapack;
#[cfg(feature = "lapack")]
use lapack as backend;

#[cfg(not(feature = "lapack"))]
mod pure;
#[cfg(not(feature = "lapack"))]
use pure as backend;

/// The name of the backend compiled in, for summaries and records.
pub const BACKEND: &str = backend::NAME;

/// Smallest ratio of the smallest to the largest Cholesky pivot accepted. Pivots scale as
/// the square roots of eigenvalues, so this refuses condition numbers beyond about 1e14,
/// where double-precision solves keep fewer than two correct digits; an exactly singular
/// matrix factors with a pivot ratio near √ε ≈ 1.5e-8 and is refused.
const MIN_PIVOT_RATIO: f64 = 1e-7;

/// Rows per parallel block of a batched triangular solve: small enough that a few thousand
/// rows still make several blocks per core.
const SOLVE_BLOCK_ROWS: usize = 256;

/// Lower Cholesky factor `L` with `a = L Lᵀ`, or `None` when `a` is not (numerically)
/// positive definite. Only the lower triangle of `a` is read.
pub fn cholesky_lower(a: &Array2<f64>) -> Option<Array2<f64>> {
    let l = backend::cholesky_lower(a)?;
    // A factor with a pivot this small relative to the largest is useless for solves:
    // treat the matrix as singular rather than return distances dominated by round-off.
    let diag = l.diag();
    let max = diag.iter().cloned().fold(0.0_f64, f64::max);
    let min = diag.iter().cloned().fold(f64::INFINITY, f64::min);
    if !min.is_finite() || min <= 0.0 || min < max * MIN_PIVOT_RATIO {
        return None;
    }
    Some(l)
}

/// Solves `L yᵢ = bᵢ` for every row `bᵢ` of `rows` (forward substitution), in parallel
/// blocks. Returns the solutions as rows.
pub fn solve_lower_rows(l: &Array2<f64>, rows: ArrayView2<'_, f64>) -> Array2<f64> {
    let d = l.nrows();
    assert_eq!(
        rows.ncols(),
        d,
        "right-hand sides must have the factor's dimension"
    );
    let mut out = Array2::<f64>::zeros(rows.raw_dim());
    out.axis_chunks_iter_mut(Axis(0), SOLVE_BLOCK_ROWS)
        .into_par_iter()
        .zip(
            rows.axis_chunks_iter(Axis(0), SOLVE_BLOCK_ROWS)
                .into_par_iter(),
        )
        .for_each(|(mut out_block, in_block)| {
            let solved = backend::solve_lower_block(l, in_block);
            out_block.assign(&solved);
        });
    out
}

/// Solves `Lᵀ x = b` by back substitution, for the second half of a Cholesky solve of a
/// small system (`A x = b` with `A = L Lᵀ`). Shared by both backends: it is a few lines
/// of O(d²) work on vectors no larger than the embedded dimension.
pub fn solve_upper_from_lower(l: &Array2<f64>, b: ndarray::ArrayView1<'_, f64>) -> Array1<f64> {
    let d = l.nrows();
    let mut x = b.to_owned();
    for i in (0..d).rev() {
        let mut v = x[i];
        for j in i + 1..d {
            v -= l[[j, i]] * x[j];
        }
        x[i] = v / l[[i, i]];
    }
    x
}

/// Eigen-decomposition of a symmetric matrix: eigenvalues in descending order and the
/// matching unit eigenvectors as columns, signs fixed so the largest-magnitude component
/// of each is positive. `None` if the decomposition fails.
pub fn symmetric_eigen(a: &Array2<f64>) -> Option<(Array1<f64>, Array2<f64>)> {
    let (values, vectors) = backend::symmetric_eigen(a)?;
    let mut order: Vec<usize> = (0..values.len()).collect();
    order.sort_by(|&i, &j| values[j].total_cmp(&values[i]));
    let sorted_values = Array1::from_iter(order.iter().map(|&i| values[i]));
    let mut sorted_vectors = Array2::<f64>::zeros(vectors.raw_dim());
    for (target, &source) in order.iter().enumerate() {
        let column = vectors.column(source);
        let pivot =
            column.iter().cloned().fold(
                0.0_f64,
                |best, v| if v.abs() > best.abs() { v } else { best },
            );
        let sign = if pivot < 0.0 { -1.0 } else { 1.0 };
        sorted_vectors
            .column_mut(target)
            .assign(&column.mapv(|v| v * sign));
    }
    Some((sorted_values, sorted_vectors))
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    /// Worked example (any linear-algebra text): [[4, 12, -16], [12, 37, -43],
    /// [-16, -43, 98]] = L Lᵀ with L = [[2, 0, 0], [6, 1, 0], [-8, 5, 3]].
    #[test]
    fn cholesky_of_the_textbook_matrix() {
        let a = array![
            [4.0, 12.0, -16.0],
            [12.0, 37.0, -43.0],
            [-16.0, -43.0, 98.0]
        ];
        let l = cholesky_lower(&a).unwrap();
        let expected = array![[2.0, 0.0, 0.0], [6.0, 1.0, 0.0], [-8.0, 5.0, 3.0]];
        for (x, y) in l.iter().zip(expected.iter()) {
            assert!((x - y).abs() < 1e-12, "{l:?}");
        }
        let b = array![[2.0, 7.0, 2.0]];
        // L y = b: y1 = 1, y2 = 7 - 6 = 1, y3 = (2 + 8 - 5) / 3 = 5/3.
        let y = solve_lower_rows(&l, b.view());
        assert!((y[[0, 0]] - 1.0).abs() < 1e-12);
        assert!((y[[0, 1]] - 1.0).abs() < 1e-12);
        assert!((y[[0, 2]] - 5.0 / 3.0).abs() < 1e-12);
    }

    /// A row's solution must not depend on the rows solved with it, to the last bit, or a
    /// record would change with the size of its input (determinism, common practice for
    /// reproducible scoring). A 40-dimensional factor and 300 rows: each row solved alone
    /// equals the same row solved in the batch, in both backends.
    #[test]
    fn a_row_solves_the_same_alone_and_in_a_batch() {
        let d = 40;
        let a = Array2::from_shape_fn((d, d), |(i, j)| {
            let base = 1.0 / (1.0 + (i as f64 - j as f64).abs());
            if i == j {
                base + d as f64
            } else {
                base
            }
        });
        let l = cholesky_lower(&a).unwrap();
        let rows = Array2::from_shape_fn((300, d), |(i, j)| {
            ((i * 31 + j * 17) % 23) as f64 / 7.0 - 1.3
        });
        let batch = solve_lower_rows(&l, rows.view());
        for i in [0, 1, 2, 150, 299] {
            let alone = solve_lower_rows(&l, rows.slice(ndarray::s![i..i + 1, ..]));
            for (x, y) in alone.iter().zip(batch.row(i).iter()) {
                assert_eq!(
                    x.to_bits(),
                    y.to_bits(),
                    "row {i}: {x} alone, {y} in the batch"
                );
            }
        }
    }

    #[test]
    fn singular_matrix_has_no_factor() {
        let a = array![[1.0, 2.0], [2.0, 4.0]];
        assert!(cholesky_lower(&a).is_none());
    }

    /// [[2, 1], [1, 2]] has eigenvalues 3 and 1 with eigenvectors (1, 1)/√2 and (1, -1)/√2.
    #[test]
    fn eigen_of_a_two_by_two() {
        let a = array![[2.0, 1.0], [1.0, 2.0]];
        let (values, vectors) = symmetric_eigen(&a).unwrap();
        assert!((values[0] - 3.0).abs() < 1e-12 && (values[1] - 1.0).abs() < 1e-12);
        let h = std::f64::consts::FRAC_1_SQRT_2;
        assert!((vectors[[0, 0]] - h).abs() < 1e-12 && (vectors[[1, 0]] - h).abs() < 1e-12);
        assert!((vectors[[0, 1]].abs() - h).abs() < 1e-12);
        assert!((vectors[[0, 1]] + vectors[[1, 1]]).abs() < 1e-12);
    }
}
