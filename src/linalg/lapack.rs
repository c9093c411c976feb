//! LAPACK backend: ndarray-linalg over the system OpenBLAS (`--features lapack`).
//!
//! ndarray-linalg copies and transposes any row-major (C-layout) operand before handing it to
//! LAPACK, which works column-major. The functions below therefore build their operands in
//! column-major (Fortran) layout themselves, so each call makes exactly one copy of its input
//! and the results come back in the layout the rest of the crate expects.
//!
//! Threads: [`super::solve_lower_rows`] calls [`solve_lower_block`] from several rayon threads
//! at once, and a threaded OpenBLAS may start its own threads inside each call. Should that
//! oversubscribe the cores, OpenBLAS's thread count is set from outside the program
//! (`OPENBLAS_NUM_THREADS=1`); this file deliberately does not change it.

use ndarray::{Array1, Array2, ArrayView2, ShapeBuilder};
use ndarray_linalg::{Cholesky, Diag, Eigh, SolveTriangularInplace, UPLO};

pub(super) const NAME: &str = "lapack (ndarray-linalg, OpenBLAS)";

/// A column-major copy of the symmetric matrix whose lower triangle is that of `a`: the
/// strict upper triangle of `a` is never read, as in the pure-Rust backend, whichever
/// triangle LAPACK ends up reading after ndarray-linalg's layout handling.
fn symmetric_from_lower(a: &Array2<f64>) -> Array2<f64> {
    let n = a.nrows();
    assert_eq!(a.ncols(), n, "a symmetric matrix must be square");
    Array2::from_shape_fn(
        (n, n).f(),
        |(i, j)| {
            if i >= j {
                a[[i, j]]
            } else {
                a[[j, i]]
            }
        },
    )
}

pub(super) fn cholesky_lower(a: &Array2<f64>) -> Option<Array2<f64>> {
    // dpotrf on the lower triangle; ndarray-linalg zeroes the strict upper triangle of the
    // result. Failure (info > 0) means a leading minor is not positive definite.
    let factor = symmetric_from_lower(a).cholesky(UPLO::Lower).ok()?;
    Some(factor.as_standard_layout().into_owned())
}

pub(super) fn solve_lower_block(l: &Array2<f64>, rows: ArrayView2<'_, f64>) -> Array2<f64> {
    let (m, d) = rows.dim();
    assert_eq!(
        l.dim(),
        (d, d),
        "the factor must be square with the rows' dimension"
    );
    if m == 0 || d == 0 {
        return Array2::zeros((m, d));
    }
    // One right-hand side per call: OpenBLAS picks its triangular-solve kernel by the number
    // of right-hand sides, and different kernels round differently, so solving a batch at
    // once would make a row's distance depend on how many rows came with it (seen on an
    // AVX-512 machine: one row alone and the same row among three differed in the last
    // digits). Row by row, every row gets the same answer in any batch, as with the pure-Rust
    // backend's column-by-column substitution. The factor is column-major so dtrtrs reads
    // it without a copy.
    let mut factor = Array2::<f64>::zeros((d, d).f());
    factor.assign(l);
    let mut out = Array2::<f64>::zeros((m, d));
    let mut rhs = Array2::<f64>::zeros((d, 1).f());
    for (row, mut target) in rows.outer_iter().zip(out.outer_iter_mut()) {
        rhs.column_mut(0).assign(&row);
        match factor.solve_triangular_inplace(UPLO::Lower, Diag::NonUnit, &mut rhs) {
            Ok(solved) => target.assign(&solved.column(0)),
            Err(error) => {
                // Positive pivots were checked by the caller, so dtrtrs cannot report a
                // singular factor; anything else is a bug in the arguments.
                debug_assert!(false, "triangular solve failed: {error}");
                target.fill(f64::NAN);
            }
        }
    }
    out
}

pub(super) fn symmetric_eigen(a: &Array2<f64>) -> Option<(Array1<f64>, Array2<f64>)> {
    // dsyev on the lower triangle: eigenvalues ascending, unit eigenvectors as columns.
    let (values, vectors) = symmetric_from_lower(a).eigh(UPLO::Lower).ok()?;
    Some((values, vectors.as_standard_layout().into_owned()))
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::{array, s};

    /// A symmetric positive definite test matrix: B Bᵀ + n I for a fixed, dense B.
    fn spd(n: usize) -> Array2<f64> {
        let b = Array2::from_shape_fn((n, n), |(i, j)| {
            (((i * 7 + j * 13) % 17) as f64 - 8.0) / 5.0 + 0.01 * (i as f64)
        });
        b.dot(&b.t()) + Array2::<f64>::eye(n) * n as f64
    }

    /// Textbook Cholesky-Banachiewicz, for comparison.
    fn reference_cholesky(a: &Array2<f64>) -> Array2<f64> {
        let n = a.nrows();
        let mut l = Array2::<f64>::zeros((n, n));
        for i in 0..n {
            for j in 0..=i {
                let s: f64 = (0..j).map(|k| l[[i, k]] * l[[j, k]]).sum();
                l[[i, j]] = if i == j {
                    (a[[i, i]] - s).sqrt()
                } else {
                    (a[[i, j]] - s) / l[[j, j]]
                };
            }
        }
        l
    }

    fn max_abs_diff(x: &Array2<f64>, y: &Array2<f64>) -> f64 {
        assert_eq!(x.dim(), y.dim());
        x.iter()
            .zip(y.iter())
            .map(|(p, q)| (p - q).abs())
            .fold(0.0, f64::max)
    }

    #[test]
    fn cholesky_matches_the_textbook_algorithm_and_ignores_the_upper_triangle() {
        let a = spd(9);
        let expected = reference_cholesky(&a);
        let mut scribbled = a.clone();
        for i in 0..9 {
            for j in i + 1..9 {
                scribbled[[i, j]] = 1e6;
            }
        }
        for input in [&a, &scribbled] {
            let l = cholesky_lower(input).unwrap();
            assert!(l.is_standard_layout());
            assert!(max_abs_diff(&l, &expected) < 1e-12, "{l:?}");
            assert!(max_abs_diff(&l.dot(&l.t()), &a) < 1e-10);
        }
        // A Fortran-layout input gives the same factor.
        let fortran = a.t().as_standard_layout().into_owned().reversed_axes();
        assert!(!fortran.is_standard_layout());
        assert!(max_abs_diff(&cholesky_lower(&fortran).unwrap(), &expected) < 1e-12);
    }

    #[test]
    fn indefinite_matrix_has_no_factor() {
        assert!(cholesky_lower(&array![[1.0, 2.0], [2.0, 1.0]]).is_none());
    }

    #[test]
    fn block_solve_is_forward_substitution_on_every_row_of_any_view() {
        let d = 7;
        let l = reference_cholesky(&spd(d));
        let wide =
            Array2::from_shape_fn((40, 2 * d), |(i, j)| ((i * 31 + j * 11) % 23) as f64 - 11.0);
        // Every other column of a wider matrix: neither C- nor F-contiguous.
        let strided = wide.slice(s![.., ..;2]);
        // The transpose of a d x m matrix: Fortran layout.
        let tall = wide
            .slice(s![.., ..d])
            .t()
            .as_standard_layout()
            .into_owned();
        let fortran = tall.t();
        let one_row = wide.slice(s![3..4, ..d]);
        for rows in [strided, fortran, one_row] {
            let y = solve_lower_block(&l, rows);
            assert_eq!(y.dim(), rows.dim());
            assert!(y.is_standard_layout());
            for (b, yi) in rows.outer_iter().zip(y.outer_iter()) {
                // L y = b, row by row.
                let mut expected = vec![0.0; d];
                for i in 0..d {
                    let s: f64 = (0..i).map(|k| l[[i, k]] * expected[k]).sum();
                    expected[i] = (b[i] - s) / l[[i, i]];
                }
                for i in 0..d {
                    assert!((yi[i] - expected[i]).abs() < 1e-12 * (1.0 + expected[i].abs()));
                }
            }
        }
        assert_eq!(
            solve_lower_block(&l, wide.slice(s![0..0, ..d])).dim(),
            (0, d)
        );
    }

    #[test]
    fn eigenvectors_are_unit_columns_and_the_upper_triangle_is_ignored() {
        let n = 8;
        let a = spd(n);
        let mut scribbled = a.clone();
        for i in 0..n {
            for j in i + 1..n {
                scribbled[[i, j]] = -3.0;
            }
        }
        let (values, vectors) = symmetric_eigen(&scribbled).unwrap();
        assert!(vectors.is_standard_layout());
        for c in 0..n {
            let v = vectors.column(c);
            let av = a.dot(&v);
            for i in 0..n {
                assert!((av[i] - values[c] * v[i]).abs() < 1e-10 * values[c].abs().max(1.0));
            }
            assert!((v.dot(&v) - 1.0).abs() < 1e-12);
        }
        let trace: f64 = a.diag().sum();
        assert!((values.sum() - trace).abs() < 1e-10 * trace);
    }
}
