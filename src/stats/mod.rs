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
