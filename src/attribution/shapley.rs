//! Shapley values from a coalition design, by kernel-weighted least squares under the
//! efficiency constraint, with standard errors.
//!
//! With `y_k = v(S_k) - v(∅)`, `z_k` the kept-group indicator of coalition `k`,
//! `Δ = v(full) - v(∅)` and weights `w_k`, the estimate minimises
//! `Σ_k w_k (y_k - z_k·φ)²` subject to `Σ φ = Δ`. Eliminating the last group,
//! `φ_M = Δ - Σ_{i<M} φ_i`, turns it into an ordinary weighted regression of
//! `y_k - z_kM Δ` on `z_ki - z_kM`, solved through a Cholesky factor of its normal
//! matrix. For a sampled design the standard errors are the usual least-squares ones,
//! `σ² (XᵀWX)⁻¹` with `σ²` the residual variance (they capture both the sampling of
//! coalitions and any noise in the values); an exhaustive design has none.

use ndarray::{Array1, Array2};

use super::CoalitionDesign;
use crate::error::{Error, Result};
use crate::linalg;

/// Shapley-value estimates for each group.
#[derive(Debug, Clone, PartialEq)]
pub struct ShapleyEstimate {
    /// One value per group; they sum to `v(full) - v(∅)`.
    pub values: Vec<f64>,
    /// Standard error of each value (0 for an exhaustive design).
    pub standard_errors: Vec<f64>,
}

/// The sampling variance of each coalition's value, when the values are means of random
/// draws (replacement): `values[k]` has variance `coalitions[k]`, the empty coalition's
/// value `empty`. The draws of different coalitions are independent.
#[derive(Debug, Clone, Copy)]
pub struct ValueNoise<'a> {
    pub coalitions: &'a [f64],
    pub empty: f64,
}

/// Estimates Shapley values from the value of every coalition in `design` (`values[k]`
/// for coalition k), the value of the empty coalition and of the full one.
pub fn estimate_shapley(
    design: &CoalitionDesign,
    values: &[f64],
    empty: f64,
    full: f64,
) -> Result<ShapleyEstimate> {
    estimate_shapley_with_noise(design, values, empty, full, None)
}

/// As [`estimate_shapley`], with the values' own sampling variances. The estimate is
/// linear in the values, so independent variances propagate exactly:
/// `Var φ = Σ_k (∂φ/∂v_k)² Var v_k + (∂φ/∂v_∅)² Var v_∅`. An enumerated design then
/// reports that propagated error (it has no coalition-sampling error); a sampled design
/// reports the larger of it and the least-squares error, whose residuals already hold
/// the values' noise.
pub fn estimate_shapley_with_noise(
    design: &CoalitionDesign,
    values: &[f64],
    empty: f64,
    full: f64,
    noise: Option<ValueNoise<'_>>,
) -> Result<ShapleyEstimate> {
    let m = design.groups();
    let delta = full - empty;
    if m == 1 {
        return Ok(ShapleyEstimate {
            values: vec![delta],
            standard_errors: vec![0.0],
        });
    }
    let coalitions = design.coalitions();
    let weights = design.weights();
    let n = coalitions.len();
    assert_eq!(values.len(), n, "one value per coalition");
    let p = m - 1;
    if n < p + 1 {
        return Err(Error::InvalidSetting {
            flag: "--samples",
            value: n.to_string(),
            expected: format!("at least {} coalitions for {m} groups", p + 1),
        });
    }
    // Normal equations of the reduced regression.
    let mut normal = Array2::<f64>::zeros((p, p));
    let mut rhs = Array1::<f64>::zeros(p);
    let last = |k: usize| f64::from(u8::from(coalitions[k][m - 1]));
    for k in 0..n {
        let x: Vec<f64> = (0..p)
            .map(|i| f64::from(u8::from(coalitions[k][i])) - last(k))
            .collect();
        let y = values[k] - empty - last(k) * delta;
        let w = weights[k];
        for i in 0..p {
            if x[i] == 0.0 {
                continue;
            }
            rhs[i] += w * x[i] * y;
            for j in 0..p {
                normal[[i, j]] += w * x[i] * x[j];
            }
        }
    }
    let factor = linalg::cholesky_lower(&normal).ok_or(Error::InvalidSetting {
        flag: "--samples",
        value: n.to_string(),
        expected: format!("enough coalitions to separate all {m} groups; raise --samples"),
    })?;
    // Rows y_j = L⁻¹ e_j, so (XᵀWX)⁻¹ = YYᵀ... in the sense inv_ij = y_i · y_j.
    let inverse_rows = linalg::solve_lower_rows(&factor, Array2::<f64>::eye(p).view());
    let u = inverse_rows.t().dot(&rhs); // L⁻¹ rhs
    let beta = inverse_rows.dot(&u); // L⁻ᵀ L⁻¹ rhs
    let mut phi: Vec<f64> = beta.to_vec();
    phi.push(delta - beta.sum());

    let propagated = noise.map(|noise| {
        // inv = (XᵀWX)⁻¹ = R Rᵀ with R = inverse_rows; β = inv Σ_k x_k w_k y_k.
        let inv = inverse_rows.dot(&inverse_rows.t());
        let mut var = vec![0.0; m];
        // y_k = v_k - v_∅ (1 - z_kM) - z_kM f, so ∂β/∂v_∅ = -Σ_k (1 - z_kM) inv x_k w_k.
        let mut d_empty = Array1::<f64>::zeros(p);
        for k in 0..n {
            let x =
                Array1::from_iter((0..p).map(|i| f64::from(u8::from(coalitions[k][i])) - last(k)));
            let g = inv.dot(&x) * weights[k];
            let total: f64 = g.sum();
            for i in 0..p {
                var[i] += g[i] * g[i] * noise.coalitions[k];
            }
            // φ_M = f - v_∅ - Σβ: its derivative in v_k is -Σ_i ∂β_i/∂v_k.
            var[m - 1] += total * total * noise.coalitions[k];
            d_empty.scaled_add(-(1.0 - last(k)), &g);
        }
        for i in 0..p {
            var[i] += d_empty[i] * d_empty[i] * noise.empty;
        }
        let d_last = -1.0 - d_empty.sum();
        var[m - 1] += d_last * d_last * noise.empty;
        var.into_iter().map(f64::sqrt).collect::<Vec<f64>>()
    });
    let standard_errors = if design.is_exhaustive() {
        propagated.unwrap_or_else(|| vec![0.0; m])
    } else {
        let mut rss = 0.0;
        for k in 0..n {
            let fitted: f64 = (0..m).filter(|&g| coalitions[k][g]).map(|g| phi[g]).sum();
            let r = values[k] - empty - fitted;
            rss += weights[k] * r * r;
        }
        let dof = (n - p) as f64;
        let sigma2 = rss / dof;
        let mut se: Vec<f64> = inverse_rows
            .outer_iter()
            .map(|y| (sigma2 * y.dot(&y)).sqrt())
            .collect();
        // Var(φ_M) = Var(Σβ) = 1ᵀ inv 1 = ‖Σ_j y_j‖².
        let total = inverse_rows.sum_axis(ndarray::Axis(0));
        se.push((sigma2 * total.dot(&total)).sqrt());
        match propagated {
            Some(p) => se.iter().zip(p).map(|(a, b)| a.max(b)).collect(),
            None => se,
        }
    };
    Ok(ShapleyEstimate {
        values: phi,
        standard_errors,
    })
}
