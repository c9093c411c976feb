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
