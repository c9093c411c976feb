//! The squared Mahalanobis distance through a Cholesky factor, and its chi-square tail.

use ndarray::{Array1, Array2, ArrayView2};
use statrs::distribution::{ChiSquared, ContinuousCDF};

use super::covariance::CovarianceEstimate;
use crate::error::{Error, Result};
use crate::linalg;

/// A location and the Cholesky factor of a covariance, ready to measure distances.
#[derive(Debug, Clone)]
pub struct MahalanobisModel {
    location: Array1<f64>,
    factor: Array2<f64>,
}

impl MahalanobisModel {
    /// Factors the covariance. A covariance that is not numerically positive definite is
    /// reported as [`Error::SingularCovariance`] with the number of rows behind it.
    pub fn new(estimate: &CovarianceEstimate, rows: usize) -> Result<Self> {
        let factor =
            linalg::cholesky_lower(&estimate.covariance).ok_or(Error::SingularCovariance {
                dim: estimate.covariance.nrows(),
                rows,
            })?;
        Ok(MahalanobisModel {
            location: estimate.location.clone(),
            factor,
        })
    }

    /// Embedded dimension.
    pub fn dim(&self) -> usize {
        self.location.len()
    }

    /// `d²(x) = (x - m)ᵀ Σ⁻¹ (x - m) = ‖L⁻¹(x - m)‖²` for every row, with `Σ = L Lᵀ`:
    /// one batched forward substitution, no explicit inverse.
    pub fn squared_distances(&self, rows: ArrayView2<'_, f64>) -> Array1<f64> {
        let centred = &rows - &self.location;
        let whitened = linalg::solve_lower_rows(&self.factor, centred.view());
        Array1::from_iter(whitened.outer_iter().map(|w| w.dot(&w)))
    }
}

/// Upper-tail probability of `d2` under the chi-square distribution with `df` degrees of
/// freedom: the chance that a Gaussian reference row lies at least this far out.
pub fn chi_square_tail(d2: f64, df: usize) -> f64 {
    match ChiSquared::new(df as f64) {
        Ok(chi2) => chi2.sf(d2.max(0.0)),
        Err(_) => f64::NAN,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::stats::CovarianceMethod;
    use ndarray::array;

    /// Chi-square critical values from the NIST/SEMATECH e-Handbook of Statistical
    /// Methods, section 1.3.6.7.4 (table of upper critical values, printed to 3 decimals):
    /// the tail at the tabled value must equal the table's probability to within the
    /// rounding of the table.
    #[test]
    fn chi_square_tail_matches_the_nist_table() {
        let table = [
            // (df, upper-tail probability, critical value)
            (1, 0.05, 3.841),
            (1, 0.01, 6.635),
            (5, 0.05, 11.070),
            (10, 0.05, 18.307),
            (10, 0.01, 23.209),
            (20, 0.05, 31.410),
            (30, 0.01, 50.892),
        ];
        for (df, p, x) in table {
            let got = chi_square_tail(x, df);
            assert!(
                (got - p).abs() < 2e-4 * p.max(0.01) / 0.01,
                "df {df}: tail at {x} is {got}, table says {p}"
            );
        }
    }

    /// With covariance I and location 0, d² is the squared Euclidean norm.
    #[test]
    fn identity_covariance_gives_squared_norm() {
        let x = array![[-1.0, -1.0], [1.0, -1.0], [-1.0, 1.0], [1.0, 1.0]];
        let estimate = CovarianceMethod::Empirical.estimate(x.view()).unwrap();
        let model = MahalanobisModel::new(&estimate, 4).unwrap();
        let d2 = model.squared_distances(array![[3.0, 4.0]].view());
        assert!((d2[0] - 25.0).abs() < 1e-12);
    }
}
