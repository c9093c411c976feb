//! Replacement from the reference rows themselves.
//!
//! [`NearestRows`] is the empirical approach of Aas, Jullum & Løland (2021, "Explaining
//! individual predictions when features are dependent", Artificial Intelligence 298): the
//! masked features are taken from reference rows that resemble the input in the kept
//! features. Aas et al. weight rows by a Gaussian kernel of a Mahalanobis distance on the
//! kept features; kilter takes the D nearest rows by the Euclidean distance of the kept
//! features in units of each feature's spread (the diagonal form of that distance), so
//! each draw is a real row. Ties are broken at random. [`MarginalRows`] draws each copy's
//! masked features from one reference row chosen uniformly, independently of the input:
//! the marginal (interventional) fill.

use std::sync::Arc;

use ndarray::{Array1, Array2, ArrayView1, ArrayViewMut1, ArrayViewMut2};
use rand::Rng;
use rand_chacha::ChaCha8Rng;

use super::PerturbationFamily;
use crate::error::Result;

/// Masked features from the reference rows nearest in the kept features.
#[derive(Debug, Clone)]
pub struct NearestRows {
    rows: Arc<Array2<f64>>,
    inverse_scale: Array1<f64>,
    draws: usize,
}

impl NearestRows {
    /// Over the raw reference rows, with each feature's spread (0 counts as 1).
    pub fn new(rows: Arc<Array2<f64>>, scale: &Array1<f64>, draws: usize) -> Self {
        NearestRows {
            rows,
            inverse_scale: scale.mapv(|s| {
                if s > 0.0 && s.is_finite() {
                    1.0 / s
                } else {
                    1.0
                }
            }),
            draws,
        }
    }
}

impl PerturbationFamily for NearestRows {
    fn describe(&self) -> String {
        "neighbours".into()
    }

    fn draws(&self) -> usize {
        self.draws
    }

    fn fill(
        &self,
        input: ArrayView1<'_, f64>,
        kept: &[bool],
        rng: &mut ChaCha8Rng,
        mut out: ArrayViewMut2<'_, f64>,
    ) -> Result<()> {
        let n = self.rows.nrows();
        let want = out.nrows();
        let kept_idx: Vec<usize> = (0..kept.len()).filter(|&i| kept[i]).collect();
        // (distance², random tie-break, row)
        let mut keyed: Vec<(f64, u32, usize)> = self
            .rows
            .outer_iter()
            .enumerate()
            .map(|(r, row)| {
                let d2 = kept_idx
                    .iter()
                    .map(|&i| {
                        let t = (row[i] - input[i]) * self.inverse_scale[i];
                        t * t
                    })
                    .sum::<f64>();
                (d2, rng.random::<u32>(), r)
            })
            .collect();
        let take = want.min(n);
        let order =
            |a: &(f64, u32, usize), b: &(f64, u32, usize)| a.0.total_cmp(&b.0).then(a.1.cmp(&b.1));
        if take < n {
            keyed.select_nth_unstable_by(take - 1, order);
        }
        keyed[..take].sort_by(order);
        for (j, mut target) in out.rows_mut().into_iter().enumerate() {
            // More copies than rows: cycle through the nearest.
            copy_masked(
                target.view_mut(),
                input,
                kept,
                self.rows.row(keyed[j % take].2),
            );
        }
        Ok(())
    }
}

/// Masked features from reference rows drawn uniformly and independently.
#[derive(Debug, Clone)]
pub struct MarginalRows {
    rows: Arc<Array2<f64>>,
    draws: usize,
}

impl MarginalRows {
    /// Over the raw reference rows.
    pub fn new(rows: Arc<Array2<f64>>, draws: usize) -> Self {
        MarginalRows { rows, draws }
    }
}

impl PerturbationFamily for MarginalRows {
    fn describe(&self) -> String {
        "marginal".into()
    }

    fn draws(&self) -> usize {
        self.draws
    }

    fn fill(
        &self,
        input: ArrayView1<'_, f64>,
        kept: &[bool],
        rng: &mut ChaCha8Rng,
        mut out: ArrayViewMut2<'_, f64>,
    ) -> Result<()> {
        let n = self.rows.nrows();
        for mut target in out.rows_mut() {
            copy_masked(
                target.view_mut(),
                input,
                kept,
                self.rows.row(rng.random_range(0..n)),
            );
        }
        Ok(())
    }
}

/// Kept features from the input, masked ones from a reference row.
fn copy_masked(
    mut target: ArrayViewMut1<'_, f64>,
    input: ArrayView1<'_, f64>,
    kept: &[bool],
    source: ArrayView1<'_, f64>,
) {
    for (i, v) in target.iter_mut().enumerate() {
        *v = if kept[i] { input[i] } else { source[i] };
    }
}
