//! Statistics of the reference corpus: covariance estimation, the squared Mahalanobis
//! distance, the chi-square tail and conformal p-values.

pub mod conformal;
pub mod covariance;
pub mod mahalanobis;

pub use conformal::{combine_p_values, CalibrationScores};
pub use covariance::{CovarianceEstimate, CovarianceMethod};
pub use mahalanobis::{chi_square_tail, MahalanobisModel};
