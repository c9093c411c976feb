//! LAPACK backend: ndarray-linalg over the system OpenBLAS (`--features lapack`).

use ndarray::{Array1, Array2, ArrayView2};
use ndarray_linalg::{Cholesky, Diag, Eigh, SolveTriangular, UPLO};

pub(super) const NAME: &str = "lapack (ndarray-linalg, OpenBLAS)";

pub(super) fn cholesky_lower(a: &Array2<f64>) -> Option<Array2<f64>> {
    a.cholesky(UPLO::Lower).ok()
}

pub(super) fn solve_lower_block(l: &Array2<f64>, rows: ArrayView2<'_, f64>) -> Array2<f64> {
    // Right-hand sides as columns (d x m), in the layout LAPACK expects.
    let rhs = rows.t().as_standard_layout().into_owned();
    match l.solve_triangular(UPLO::Lower, Diag::NonUnit, &rhs) {
        Ok(solved) => solved.reversed_axes().as_standard_layout().into_owned(),
        // Positive pivots were checked by the caller, so trtrs cannot report singularity.
        Err(_) => Array2::from_elem(rows.raw_dim(), f64::NAN),
    }
}

pub(super) fn symmetric_eigen(a: &Array2<f64>) -> Option<(Array1<f64>, Array2<f64>)> {
    a.eigh(UPLO::Lower).ok()
}
