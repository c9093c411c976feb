//! Tolerances of the comparisons with outside references, in one place.

/// Agreement with scikit-learn and scipy on well-conditioned problems (every
/// configuration but one): both sides compute in double precision with different
/// operation orders, which leaves differences around 1e-13; 1e-9 leaves room for the
/// longer dot products of larger corpora.
pub const GOLDEN_RELATIVE: f64 = 1e-9;

/// The raw (unstandardized) breast-cancer features have a covariance with condition
/// number 6.7e11: scikit-learn's own squared distances differ from a plain
/// `numpy.linalg.solve` by 1.7e-8 there (measured by the generator script), so no two
/// implementations can agree more closely than about cond x eps.
pub const ILL_CONDITIONED_RELATIVE: f64 = 1e-6;

/// Exactness of conformal p-values, which are ratios of counts.
pub const P_VALUE_ABSOLUTE: f64 = 1e-12;

/// Relative difference with a floor that keeps zeros comparable.
pub fn relative_difference(a: f64, b: f64) -> f64 {
    (a - b).abs() / a.abs().max(b.abs()).max(1e-300)
}

/// Float32 inference (ONNX graphs exported with a float input) against scikit-learn's
/// double-precision predict_proba: a probability is bounded, and single-precision
/// evaluation of these small graphs leaves errors near 1e-7 (measured maxima are in the
/// report of each test); 1e-5 is the bound the adapter is held to.
pub const FLOAT32_PROBABILITY: f64 = 1e-5;

/// Unbounded float32 outputs (logits, principal-component scores) are compared relative to
/// the sum of the absolute terms of their dot products, the scale of their rounding error.
pub const FLOAT32_RELATIVE_TO_TERMS: f64 = 1e-5;

/// kilter's JSON networks compute in double precision like scikit-learn, with the scaler
/// folded into the first layer, which changes the order of the operations only.
pub const DOUBLE_PROBABILITY: f64 = 1e-9;

/// Back-propagated against analytic gradients, both in double precision.
pub const GRADIENT_RELATIVE: f64 = 1e-12;

/// Attributions recomputed by kilter against exact values computed by definition in numpy
/// (occlusion, Shapley values by enumeration) for the same network in double precision:
/// only the order of the sums and, for Shapley values, the kernel regression's solve
/// differ, which leaves differences near 1e-13 (measured largest: 1.2e-13).
pub const EXACT_ATTRIBUTION_ABSOLUTE: f64 = 1e-9;

/// Distances through a single-precision ONNX encoder against double-precision PCA: the
/// encoder's components carry relative errors near 1e-7 of the terms they sum; the
/// largest difference measured on the breast-cancer query rows is 5e-7, and 1e-5 leaves
/// a factor of 20 for other corpora.
pub const FLOAT32_ENCODER_RELATIVE: f64 = 1e-5;
