//! Statistics of the reference corpus: covariance estimation, the squared Mahalanobis
//! distance, the chi-square tail, conformal p-values and the classifier two-sample test.

pub mod conformal;
pub mod covariance;
pub mod mahalanobis;
pub mod two_sample;

pub use conformal::{combine_p_values, CalibrationScores};
pub use covariance::{CovarianceEstimate, CovarianceMethod};
pub use mahalanobis::{chi_square_tail, MahalanobisModel};
pub use two_sample::detectability_auc;

/// Median of `values` (the mean of the two middle values for an even count); `None` when
/// empty.
pub fn median(values: &[f64]) -> Option<f64> {
    if values.is_empty() {
        return None;
    }
    let mut sorted = values.to_vec();
    sorted.sort_by(f64::total_cmp);
    let n = sorted.len();
    Some(if n % 2 == 1 {
        sorted[n / 2]
    } else {
        0.5 * (sorted[n / 2 - 1] + sorted[n / 2])
    })
}
