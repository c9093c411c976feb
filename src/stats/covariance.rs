//! Covariance estimation: the maximum-likelihood estimate and Ledoit-Wolf shrinkage.

use std::fmt;
use std::str::FromStr;

use ndarray::{Array1, Array2, ArrayView2, Axis};
use serde::{Deserialize, Serialize};

use crate::error::{Error, Result};

/// How the covariance of the embedded reference rows is estimated.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum CovarianceMethod {
    /// The maximum-likelihood estimate, `S = (1/n) Σ (xₖ - x̄)(xₖ - x̄)ᵀ`.
    Empirical,
    /// Ledoit & Wolf (2004) shrinkage of `S` toward `μI`.
    LedoitWolf,
}

impl FromStr for CovarianceMethod {
    type Err = Error;
    fn from_str(text: &str) -> Result<Self> {
        match text {
            "empirical" => Ok(CovarianceMethod::Empirical),
            "ledoit-wolf" => Ok(CovarianceMethod::LedoitWolf),
            _ => Err(Error::InvalidSetting {
                flag: "--covariance",
                value: text.to_string(),
                expected: "one of empirical, ledoit-wolf".into(),
            }),
        }
    }
}

impl fmt::Display for CovarianceMethod {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(match self {
            CovarianceMethod::Empirical => "empirical",
            CovarianceMethod::LedoitWolf => "ledoit-wolf",
        })
    }
}

/// A fitted location and covariance.
#[derive(Debug, Clone, PartialEq)]
pub struct CovarianceEstimate {
    /// The mean of the rows.
    pub location: Array1<f64>,
    /// The covariance estimate.
    pub covariance: Array2<f64>,
    /// The Ledoit-Wolf shrinkage intensity δ* in [0, 1], `None` for the empirical estimate.
    pub shrinkage: Option<f64>,
}

impl CovarianceMethod {
    /// Estimates the location and covariance of `rows` (one observation per row).
    ///
    /// Ledoit & Wolf (2004), "A well-conditioned estimator for large-dimensional covariance
    /// matrices", J. Multivariate Analysis 88: with centred rows xₖ, `S = XᵀX/n`,
    /// `μ = tr(S)/d`, `δ² = ‖S - μI‖²_F`, `β̄² = (1/n²) Σₖ ‖xₖxₖᵀ - S‖²_F` and
    /// `β² = min(β̄², δ²)`, the estimate is `(1 - s) S + s μ I` with `s = β²/δ²`
    /// (Frobenius norms; the paper's 1/d normalisation cancels in the ratio).
    /// `Σₖ ‖xₖxₖᵀ - S‖²_F = Σₖ ‖xₖ‖⁴ - n ‖S‖²_F` because `Σₖ xₖᵀ S xₖ = n ‖S‖²_F`, which
    /// makes the intensity O(n d) instead of O(n d²).
    pub fn estimate(self, rows: ArrayView2<'_, f64>) -> Result<CovarianceEstimate> {
        let n = rows.nrows();
        let d = rows.ncols();
        if n < 2 {
            return Err(Error::TooFewRows {
                what: "estimating a covariance".into(),
                needed: 2,
                found: n,
            });
        }
        let location = rows.mean_axis(Axis(0)).expect("at least two rows");
        let centred = &rows - &location;
        let sample = centred.t().dot(&centred) / n as f64;
        let (covariance, shrinkage) = match self {
            CovarianceMethod::Empirical => (sample, None),
            CovarianceMethod::LedoitWolf => {
                let mu = sample.diag().sum() / d as f64;
                let sample_sq = sample.iter().map(|v| v * v).sum::<f64>();
                // ‖S - μI‖² = ‖S‖² - 2μ tr(S) + dμ².
                let delta = sample_sq - 2.0 * mu * sample.diag().sum() + d as f64 * mu * mu;
                let fourth: f64 = centred
                    .outer_iter()
                    .map(|x| {
                        let sq = x.dot(&x);
                        sq * sq
                    })
                    .sum();
                let beta_bar = (fourth / n as f64 - sample_sq) / n as f64;
                let beta = beta_bar.min(delta).max(0.0);
                let s = if delta > 0.0 { beta / delta } else { 0.0 };
                let mut shrunk = sample * (1.0 - s);
                for i in 0..d {
                    shrunk[[i, i]] += s * mu;
                }
                (shrunk, Some(s))
            }
        };
        Ok(CovarianceEstimate {
            location,
            covariance,
            shrinkage,
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    /// Hand-worked: rows (0,0), (2,0), (0,2), (2,2) have mean (1,1) and MLE covariance I.
    #[test]
    fn empirical_divides_by_n() {
        let x = array![[0.0, 0.0], [2.0, 0.0], [0.0, 2.0], [2.0, 2.0]];
        let e = CovarianceMethod::Empirical.estimate(x.view()).unwrap();
        assert_eq!(e.location, array![1.0, 1.0]);
        assert!((e.covariance[[0, 0]] - 1.0).abs() < 1e-15);
        assert!(e.covariance[[0, 1]].abs() < 1e-15);
        assert_eq!(e.shrinkage, None);
    }

    /// When S is already a multiple of I, δ² = 0 and nothing is shrunk.
    #[test]
    fn ledoit_wolf_leaves_a_scaled_identity_alone() {
        let x = array![[0.0, 0.0], [2.0, 0.0], [0.0, 2.0], [2.0, 2.0]];
        let e = CovarianceMethod::LedoitWolf.estimate(x.view()).unwrap();
        assert_eq!(e.shrinkage, Some(0.0));
        assert!((e.covariance[[1, 1]] - 1.0).abs() < 1e-15);
    }

    #[test]
    fn ledoit_wolf_intensity_is_a_fraction() {
        let x = array![
            [1.0, 2.0, 0.5],
            [2.0, 4.1, 0.4],
            [3.0, 6.2, 0.7],
            [4.0, 7.9, 0.1]
        ];
        let e = CovarianceMethod::LedoitWolf.estimate(x.view()).unwrap();
        let s = e.shrinkage.unwrap();
        assert!((0.0..=1.0).contains(&s), "{s}");
    }
}
