//! Integrated gradients (Sundararajan, Taly & Yan 2017, "Axiomatic attribution for deep
//! networks"), averaged over one or more baselines.
//!
//! ```text
//! IGᵢ(x; x') = (xᵢ - x'ᵢ) ∫₀¹ ∂f/∂xᵢ (x' + α (x - x')) dα
//!           ≈ (xᵢ - x'ᵢ) Σⱼ wⱼ ∂f/∂xᵢ (x' + αⱼ (x - x'))
//! ```
//!
//! With several baselines x'₁..x'_N the attributions are averaged, which is the
//! expected-gradients form (Erion et al. 2021) with the baselines as its sample.
//! Completeness, `Σᵢ IGᵢ = f(x) - f(x')`, holds for the exact integral of any
//! differentiable f; `completeness_gap` measures how far the quadrature is from it.
//! All path points of all baselines go to the model in one batched gradient call.

use ndarray::{Array1, Array2, ArrayView1, ArrayView2, Axis};

use super::quadrature::QuadratureRule;
use crate::error::{Error, Result};
use crate::models::{target_gradients, FiniteDifference, GradientMethod, Model};

/// The result of integrated gradients for one input row.
#[derive(Debug, Clone)]
pub struct PathAttribution {
    /// One attribution per feature.
    pub per_feature: Array1<f64>,
    /// Every path point, baseline by baseline (`baselines x steps` rows).
    pub path: Array2<f64>,
    /// The model's score for the target at the input.
    pub at_input: f64,
    /// The model's score for the target at each baseline.
    pub at_baselines: Vec<f64>,
    /// `|Σ IG - (f(x) - mean f(x'))| / max(|f(x) - mean f(x')|, 1e-12)`.
    pub completeness_gap: f64,
    /// Whether the gradients came from the model or from finite differences.
    pub gradients: GradientMethod,
}

/// Integrated gradients of `model`'s output `target` at `input` from each row of
/// `baselines`, with `steps` points of `rule`.
pub fn integrated_gradients(
    model: &dyn Model,
    differences: &FiniteDifference,
    input: ArrayView1<'_, f64>,
    baselines: ArrayView2<'_, f64>,
    target: usize,
    rule: QuadratureRule,
    steps: usize,
) -> Result<PathAttribution> {
    let d = input.len();
    let nb = baselines.nrows();
    if nb == 0 || baselines.ncols() != d {
        return Err(Error::InvalidSetting {
            flag: "--baseline",
            value: format!("{nb} baselines of width {}", baselines.ncols()),
            expected: format!("at least one baseline of width {d}"),
        });
    }
    let (alphas, weights) = rule.nodes(steps)?;
    let mut path = Array2::<f64>::zeros((nb * steps, d));
    for (b, baseline) in baselines.outer_iter().enumerate() {
        let delta = &input - &baseline;
        for (j, &alpha) in alphas.iter().enumerate() {
            path.row_mut(b * steps + j)
                .assign(&(&baseline + &(&delta * alpha)));
        }
    }
    let (grads, method) = target_gradients(model, differences, path.view(), target)?;

    let mut ends = Array2::<f64>::zeros((nb + 1, d));
    ends.row_mut(0).assign(&input);
    ends.slice_mut(ndarray::s![1.., ..]).assign(&baselines);
    let answers = model.predict(ends.view())?;
    crate::models::check_target(&answers, target)?;
    let at_input = answers[[0, target]];
    let at_baselines: Vec<f64> = (1..=nb).map(|r| answers[[r, target]]).collect();

    let mut per_feature = Array1::<f64>::zeros(d);
    for (b, baseline) in baselines.outer_iter().enumerate() {
        let block = grads.slice(ndarray::s![b * steps..(b + 1) * steps, ..]);
        let mut integral = Array1::<f64>::zeros(d);
        for (row, &w) in block.axis_iter(Axis(0)).zip(&weights) {
            integral.scaled_add(w, &row);
        }
        per_feature += &(&(&input - &baseline) * &integral);
    }
    per_feature /= nb as f64;
    let expected = at_input - at_baselines.iter().sum::<f64>() / nb as f64;
    let completeness_gap = (per_feature.sum() - expected).abs() / expected.abs().max(1e-12);
    Ok(PathAttribution {
        per_feature,
        path,
        at_input,
        at_baselines,
        completeness_gap,
        gradients: method,
    })
}
