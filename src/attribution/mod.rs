//! Attribution estimators over groups of features.
//!
//! [`coalitions`] draws the mask design for the Shapley kernel; [`shapley`] turns the
//! model's values on those masks into Shapley-value estimates with standard errors. The
//! perturbation families (deletion, replacement) supply the values; both use the same
//! design, so that any difference between their attributions comes from the fill alone.
//! [`integrated_gradients`] is the path family's estimator, over the rules of
//! [`quadrature`].

pub mod coalitions;
pub mod integrated_gradients;
pub mod quadrature;
pub mod shapley;

pub use coalitions::CoalitionDesign;
pub use integrated_gradients::{integrated_gradients, PathAttribution};
pub use quadrature::QuadratureRule;
pub use shapley::{estimate_shapley, estimate_shapley_with_noise, ShapleyEstimate, ValueNoise};
