//! Pure-Rust backend: nalgebra's Cholesky, triangular solve and symmetric eigen-solver.

use nalgebra::DMatrix;
use ndarray::{Array1, Array2, ArrayView2};

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

pub(super) fn solve_lower_block(l: &Array2<f64>, rows: ArrayView2<'_, f64>) -> Array2<f64> {
    let factor = to_nalgebra(l.view());
    // Right-hand sides as columns: d x m.
    let mut rhs = to_nalgebra(rows.t());
    let solved = factor.solve_lower_triangular_mut(&mut rhs);
    debug_assert!(
        solved,
        "a Cholesky factor with positive pivots is invertible"
    );
    from_nalgebra(&rhs).reversed_axes()
}

pub(super) fn symmetric_eigen(a: &Array2<f64>) -> Option<(Array1<f64>, Array2<f64>)> {
    let m = to_nalgebra(a.view());
    let eigen = nalgebra::SymmetricEigen::try_new(m, 1e-15, 10_000)?;
    let values = Array1::from_iter(eigen.eigenvalues.iter().cloned());
    Some((values, from_nalgebra(&eigen.eigenvectors)))
}
