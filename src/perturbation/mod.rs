//! Perturbation families: how a masking explanation fills the groups it masks.
//!
//! A masking explanation evaluates the model on copies of the input in which some groups
//! are kept and the others replaced. [`PerturbationFamily`] is that seam: given the input
//! and which features are kept, a family writes filled copies. kilter's two masking
//! families share one mask design per row ([`masking`]), so that any difference between
//! their attributions comes from the fill alone:
//!
//! - deletion ([`Deletion`]): masked features set to a constant (zero, the reference mean,
//!   or a value), which is what occlusion and most sampled explanations do;
//! - replacement: masked features drawn from the data given the kept ones, by the
//!   conditional Gaussian of the profile ([`ConditionalGaussian`]), from the reference
//!   rows nearest in the kept features ([`NearestRows`]), or from independent reference
//!   rows ([`MarginalRows`]).
//!
//! The third family, interpolation, is a path rather than a fill; it lives in
//! [`crate::attribution::integrated_gradients`].

mod conditional_gaussian;
mod deletion;
pub mod masking;
mod reference_rows;

use ndarray::{ArrayView1, ArrayViewMut2};
use rand_chacha::ChaCha8Rng;

use crate::error::Result;

pub use conditional_gaussian::ConditionalGaussian;
pub use deletion::{Deletion, FillValue};
pub use reference_rows::{MarginalRows, NearestRows};

/// A way of filling masked features.
pub trait PerturbationFamily: Send + Sync {
    /// The fill as named on the command line ("zero", "gaussian"), for records.
    fn describe(&self) -> String;

    /// Filled copies per mask: 1 for a deterministic fill, the number of draws otherwise.
    fn draws(&self) -> usize;

    /// Whether consecutive draws are antithetic pairs (the second mirrors the first about
    /// the conditional mean), so that the pair, not the draw, is the unit of variance.
    fn paired_draws(&self) -> bool {
        false
    }

    /// Writes `out.nrows()` filled copies of `input`: features with `kept[i]` keep their
    /// value, the others are filled. `rng` is the only source of randomness.
    fn fill(
        &self,
        input: ArrayView1<'_, f64>,
        kept: &[bool],
        rng: &mut ChaCha8Rng,
        out: ArrayViewMut2<'_, f64>,
    ) -> Result<()>;
}
