//! Replacement by the conditional Gaussian of the reference distribution.
//!
//! With the features split into kept K and masked U, and `x ~ N(μ, Σ)`,
//!
//! ```text
//! x_U | x_K ~ N( μ_U + Σ_UK Σ_KK⁻¹ (x_K - μ_K),  Σ_UU - Σ_UK Σ_KK⁻¹ Σ_KU )
//! ```
//!
//! (any multivariate statistics text, e.g. Anderson 2003, Theorem 2.5.1). With the
//! Cholesky factor `Σ_KK = L Lᵀ` and `Y = Σ_UK L⁻ᵀ` (rows solved as `L yᵤ = Σ_Kᵤ`), the
//! mean is `μ_U + Y (L⁻¹ (x_K - μ_K))` and the covariance `Σ_UU - Y Yᵀ`, whose Cholesky
//! factor `C` turns standard normal draws `z` into samples `mean + C z`, drawn in
//! antithetic pairs (`z`, `-z`). The factors
//! depend only on the pattern of kept features, so they are cached per pattern and shared
//! by every row and thread (exhaustive designs repeat the same patterns on every row).

use std::collections::HashMap;
use std::sync::{Arc, RwLock};

use ndarray::{Array1, Array2, ArrayView1, ArrayViewMut2, Axis};
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};

use super::PerturbationFamily;
use crate::error::{Error, Result};
use crate::linalg;
use crate::profile::FeatureKinds;

/// Stored factor entries at most (8 bytes each): bounds the cache near 128 MB.
const CACHE_BUDGET: usize = 16 << 20;

/// Masked features drawn from the conditional Gaussian given the kept ones.
#[derive(Debug)]
pub struct ConditionalGaussian {
    location: Array1<f64>,
    covariance: Array2<f64>,
    draws: usize,
    cache: RwLock<Cache>,
    /// Kinds of the features, when some are not continuous: draws are made valid values.
    kinds: Option<FeatureKinds>,
}

#[derive(Debug, Default)]
struct Cache {
    factors: HashMap<Vec<bool>, Arc<Factors>>,
    stored: usize,
}

/// What one pattern of kept features needs.
#[derive(Debug)]
struct Factors {
    kept: Vec<usize>,
    masked: Vec<usize>,
    /// Cholesky factor of Σ_KK.
    kept_factor: Array2<f64>,
    /// `Y = Σ_UK L⁻ᵀ`, `|U| x |K|`.
    gain: Array2<f64>,
    /// Cholesky factor of the conditional covariance, `|U| x |U|`.
    spread: Array2<f64>,
}

impl ConditionalGaussian {
    /// A sampler of `N(location, covariance)` conditionals, `draws` per mask.
    pub fn new(location: Array1<f64>, covariance: Array2<f64>, draws: usize) -> Self {
        ConditionalGaussian {
            location,
            covariance,
            draws,
            cache: RwLock::new(Cache::default()),
            kinds: None,
        }
    }

    /// Draws made valid values of each feature's kind (integers rounded, binary columns
    /// and one-hot blocks given one of their levels); a no-op for continuous features.
    pub fn with_kinds(mut self, kinds: &FeatureKinds) -> Self {
        self.kinds = (!kinds.all_continuous()).then(|| kinds.clone());
        self
    }

    /// Mean and covariance of the masked features given the kept ones, in the order of
    /// the masked features (for checks and reports).
    pub fn conditional_moments(
        &self,
        input: ArrayView1<'_, f64>,
        kept: &[bool],
    ) -> Result<(Array1<f64>, Array2<f64>)> {
        let f = self.factors(kept)?;
        let mean = self.conditional_mean(&f, input);
        let cov = f.spread.dot(&f.spread.t());
        Ok((mean, cov))
    }

    fn conditional_mean(&self, f: &Factors, input: ArrayView1<'_, f64>) -> Array1<f64> {
        let mut mean: Array1<f64> = f.masked.iter().map(|&u| self.location[u]).collect();
        if !f.kept.is_empty() {
            let deviation: Array2<f64> = Array2::from_shape_fn((1, f.kept.len()), |(_, j)| {
                input[f.kept[j]] - self.location[f.kept[j]]
            });
            let whitened = linalg::solve_lower_rows(&f.kept_factor, deviation.view());
            mean += &f.gain.dot(&whitened.row(0));
        }
        mean
    }

    fn factors(&self, kept: &[bool]) -> Result<Arc<Factors>> {
        if let Some(f) = self
            .cache
            .read()
            .ok()
            .and_then(|c| c.factors.get(kept).cloned())
        {
            return Ok(f);
        }
        let f = Arc::new(self.factorise(kept)?);
        if let Ok(mut cache) = self.cache.write() {
            let size = f.kept_factor.len() + f.gain.len() + f.spread.len();
            if cache.stored + size <= CACHE_BUDGET {
                cache.stored += size;
                cache.factors.insert(kept.to_vec(), f.clone());
            }
        }
        Ok(f)
    }

    fn factorise(&self, kept: &[bool]) -> Result<Factors> {
        let kept_idx: Vec<usize> = (0..kept.len()).filter(|&i| kept[i]).collect();
        let masked: Vec<usize> = (0..kept.len()).filter(|&i| !kept[i]).collect();
        let sub = |rows: &[usize], cols: &[usize]| {
            Array2::from_shape_fn((rows.len(), cols.len()), |(a, b)| {
                self.covariance[[rows[a], cols[b]]]
            })
        };
        let not_positive = || Error::NotPositiveDefinite {
            what: "the reference covariance of the kept features (replacement sampler)",
        };
        let (kept_factor, gain) = if kept_idx.is_empty() {
            (Array2::zeros((0, 0)), Array2::zeros((masked.len(), 0)))
        } else {
            let factor =
                linalg::cholesky_lower(&sub(&kept_idx, &kept_idx)).ok_or_else(not_positive)?;
            let gain = linalg::solve_lower_rows(&factor, sub(&masked, &kept_idx).view());
            (factor, gain)
        };
        let conditional = sub(&masked, &masked) - gain.dot(&gain.t());
        let spread = jittered_cholesky(conditional);
        Ok(Factors {
            kept: kept_idx,
            masked,
            kept_factor,
            gain,
            spread,
        })
    }
}

/// Cholesky factor of a conditional covariance. When the kept features nearly determine
/// the masked ones the matrix is positive semi-definite up to round-off; a growing
/// diagonal jitter (relative to its mean variance) restores a factor, and in the last
/// resort the draws keep only the diagonal spread.
fn jittered_cholesky(mut a: Array2<f64>) -> Array2<f64> {
    let n = a.nrows();
    if n == 0 {
        return a;
    }
    let scale = (a.diag().sum() / n as f64).abs().max(f64::MIN_POSITIVE);
    let mut added = 0.0;
    for jitter in [0.0, 1e-12, 1e-10, 1e-8, 1e-6] {
        let step = jitter * scale - added;
        a.diag_mut().mapv_inplace(|v| v + step);
        added += step;
        if let Some(l) = linalg::cholesky_lower(&a) {
            return l;
        }
    }
    Array2::from_diag(&a.diag().mapv(|v| v.max(0.0).sqrt()))
}

impl PerturbationFamily for ConditionalGaussian {
    fn describe(&self) -> String {
        "gaussian".into()
    }

    fn draws(&self) -> usize {
        self.draws
    }

    fn paired_draws(&self) -> bool {
        true
    }

    fn fill(
        &self,
        input: ArrayView1<'_, f64>,
        kept: &[bool],
        rng: &mut ChaCha8Rng,
        mut out: ArrayViewMut2<'_, f64>,
    ) -> Result<()> {
        let f = self.factors(kept)?;
        let mean = self.conditional_mean(&f, input);
        let u = f.masked.len();
        let draws = out.nrows();
        // Antithetic pairs z, -z: their mean is exact for a model linear in the masked
        // features, and much less noisy than two independent draws for a smooth one.
        let mut z = Array2::<f64>::zeros((draws, u));
        for j in (0..draws).step_by(2) {
            for a in 0..u {
                let v: f64 = StandardNormal.sample(rng);
                z[[j, a]] = v;
                if j + 1 < draws {
                    z[[j + 1, a]] = -v;
                }
            }
        }
        let samples = z.dot(&f.spread.t()) + &mean;
        for (mut row, sample) in out.axis_iter_mut(Axis(0)).zip(samples.outer_iter()) {
            row.assign(&input);
            for (j, &m) in f.masked.iter().enumerate() {
                row[m] = sample[j];
            }
            if let Some(kinds) = &self.kinds {
                let mut values = row.to_vec();
                kinds.make_valid(&mut values, kept);
                row.assign(&ArrayView1::from(&values));
            }
        }
        Ok(())
    }
}
