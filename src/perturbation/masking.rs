//! Evaluating a mask design under one family: the masked inputs, the model's answers and
//! the Shapley-value estimate from them.
//!
//! For coalition S (the kept groups) the value is `v(S) = E[f(x with the groups outside S
//! filled)]`, estimated by the mean of the family's draws. `v(full) = f(x)`. The empty
//! coalition anchors the efficiency constraint `Σ φ = f(x) - v(∅)`, so its value gets
//! [`EMPTY_DRAWS_FACTOR`] times the draws of the other coalitions. Features in no group are
//! kept in every coalition. Every filled input of the row goes to the model in one call.
//!
//! Each mask's draws are independent of the other masks'. The variance of each `v(S)` is
//! estimated from its own draws (from the means of antithetic pairs, for a family that
//! draws in pairs) and handed to [`estimate_shapley_with_noise`]. On an enumerated design
//! the Shapley values' standard errors are those variances propagated through the linear
//! estimator (summed over many masks, the rough per-mask estimates give a steady total);
//! deletion's single exact fill gives 0. On a sampled design the standard errors are the
//! spread of the estimate over the design's independent coalition-and-complement pairs,
//! which holds both the draw of the masks and the noise of their values; only the empty
//! coalition's variance, shared by every pair, is propagated on top of it.

use ndarray::{Array2, ArrayView1};
use rand_chacha::ChaCha8Rng;

use super::PerturbationFamily;
use crate::attribution::{
    estimate_shapley_with_noise, CoalitionDesign, ShapleyEstimate, ValueNoise,
};
use crate::error::Result;
use crate::groups::Groups;
use crate::models::{check_target, Model};

/// The empty coalition's value is the mean over this many times the draws per mask
/// (for a random fill; a deterministic fill needs one).
pub const EMPTY_DRAWS_FACTOR: usize = 8;

/// One family's evaluation of a design on one row.
#[derive(Debug, Clone)]
pub struct MaskedGame {
    /// `v(S)` for each coalition of the design.
    pub values: Vec<f64>,
    /// `v(∅)`: the model's expected score with every group filled.
    pub empty: f64,
    /// `f(x)`.
    pub full: f64,
    /// Every filled input, coalition by coalition, the empty coalition's last.
    pub inputs: Array2<f64>,
    /// The Shapley-value estimate with standard errors.
    pub estimate: ShapleyEstimate,
}

/// Per-feature kept flags of a coalition of groups: features in no group are kept.
pub fn kept_features(groups: &Groups, coalition: &[bool]) -> Vec<bool> {
    let mut kept = vec![true; groups.features()];
    for (g, &keep) in coalition.iter().enumerate() {
        if !keep {
            for &i in groups.members(g) {
                kept[i] = false;
            }
        }
    }
    kept
}

/// Evaluates `design` on `input` with `family`'s fill; `full` is f(x) for the target.
#[allow(clippy::too_many_arguments)]
pub fn evaluate_design(
    model: &dyn Model,
    family: &dyn PerturbationFamily,
    input: ArrayView1<'_, f64>,
    groups: &Groups,
    design: &CoalitionDesign,
    target: usize,
    full: f64,
    rng: &mut ChaCha8Rng,
) -> Result<MaskedGame> {
    let d = input.len();
    let per_mask = family.draws().max(1);
    let empty_draws = if per_mask == 1 {
        1
    } else {
        per_mask * EMPTY_DRAWS_FACTOR
    };
    let coalitions = design.coalitions();
    let total = coalitions.len() * per_mask + empty_draws;
    let mut inputs = Array2::<f64>::zeros((total, d));
    for (k, coalition) in coalitions.iter().enumerate() {
        let kept = kept_features(groups, coalition);
        let block = inputs.slice_mut(ndarray::s![k * per_mask..(k + 1) * per_mask, ..]);
        family.fill(input, &kept, rng, block)?;
    }
    let empty_kept = kept_features(groups, &vec![false; groups.len()]);
    family.fill(
        input,
        &empty_kept,
        rng,
        inputs.slice_mut(ndarray::s![total - empty_draws.., ..]),
    )?;
    let answers = model.predict(inputs.view())?;
    check_target(&answers, target)?;
    let scores = answers.column(target);
    let paired = family.paired_draws();
    let (values, variances): (Vec<f64>, Vec<f64>) = (0..coalitions.len())
        .map(|k| {
            let draws = scores
                .slice(ndarray::s![k * per_mask..(k + 1) * per_mask])
                .to_vec();
            mean_and_variance_of_mean(&draws, paired)
        })
        .unzip();
    let (empty, empty_variance) = mean_and_variance_of_mean(
        &scores.slice(ndarray::s![total - empty_draws..]).to_vec(),
        paired,
    );
    let noise = (per_mask > 1).then_some(ValueNoise {
        coalitions: &variances,
        empty: empty_variance,
    });
    let estimate = estimate_shapley_with_noise(design, &values, empty, full, noise)?;
    Ok(MaskedGame {
        values,
        empty,
        full,
        inputs,
        estimate,
    })
}

/// Mean of the draws and the estimated variance of that mean. The units are the draws,
/// or the means of consecutive pairs when the draws are antithetic pairs (an odd last
/// draw is its own unit); with a single unit the variance is unknown and taken as 0.
fn mean_and_variance_of_mean(draws: &[f64], paired: bool) -> (f64, f64) {
    let units: Vec<f64> = if paired {
        draws
            .chunks(2)
            .map(|c| c.iter().sum::<f64>() / c.len() as f64)
            .collect()
    } else {
        draws.to_vec()
    };
    let mean = draws.iter().sum::<f64>() / draws.len() as f64;
    if units.len() < 2 {
        return (mean, 0.0);
    }
    let n = units.len() as f64;
    let unit_mean = units.iter().sum::<f64>() / n;
    let ss: f64 = units.iter().map(|v| (v - unit_mean).powi(2)).sum();
    (mean, ss / (n - 1.0) / n)
}
