//! The reference distribution in the raw feature space, which the replacement samplers
//! draw masked features from.
//!
//! Distances are measured in the embedded space, but a model is fed raw features, so the
//! samplers need the fitted rows as they were and a Gaussian of the raw features. The
//! covariance is the Ledoit-Wolf estimate of the standardized rows scaled back to raw
//! units: every principal submatrix of a shrunk covariance is positive definite, which the
//! conditional Gaussian needs for every pattern of kept features, and with the default
//! `--embed standardize --covariance ledoit-wolf` it is exactly the profile's own
//! covariance seen in raw units. A constant column keeps scale 1 in the standardization,
//! so it receives only the small shrinkage variance.

use ndarray::{Array1, Array2, ArrayView2};

use super::{FeatureKind, FeatureKinds};
use crate::embedding::column_mean_and_sd;
use crate::error::Result;
use crate::stats::CovarianceMethod;

/// Raw fitted rows, their mean, spread and shrunk covariance.
#[derive(Debug, Clone)]
pub struct FeatureDistribution {
    rows: Array2<f64>,
    location: Array1<f64>,
    scale: Array1<f64>,
    covariance: Array2<f64>,
    kinds: FeatureKinds,
}

impl FeatureDistribution {
    /// Fits the distribution to the raw fitting rows.
    pub fn fit(rows: Array2<f64>, names: &[String]) -> Result<FeatureDistribution> {
        let (location, sd) = column_mean_and_sd(rows.view()).ok_or(crate::Error::TooFewRows {
            what: "estimating the reference distribution".into(),
            needed: 1,
            found: 0,
        })?;
        let scale = sd.mapv(|s| if s > 0.0 && s.is_finite() { s } else { 1.0 });
        let standardized = (&rows - &location) / &scale;
        let estimate = CovarianceMethod::LedoitWolf.estimate(standardized.view())?;
        let d = scale.len();
        let covariance = Array2::from_shape_fn((d, d), |(i, j)| {
            estimate.covariance[[i, j]] * scale[i] * scale[j]
        });
        Ok(FeatureDistribution {
            kinds: FeatureKinds::detect(rows.view(), names),
            rows,
            location,
            scale: sd,
            covariance,
        })
    }

    /// Rebuilds a distribution from stored parts (the profile file); `None` if the shapes
    /// disagree.
    pub fn from_parts(
        rows: Array2<f64>,
        location: Array1<f64>,
        covariance: Array2<f64>,
        names: &[String],
    ) -> Option<FeatureDistribution> {
        let d = location.len();
        if rows.ncols() != d || covariance.dim() != (d, d) || rows.nrows() == 0 || names.len() != d
        {
            return None;
        }
        let (_, scale) = column_mean_and_sd(rows.view())?;
        Some(FeatureDistribution {
            kinds: FeatureKinds::detect(rows.view(), names),
            rows,
            location,
            scale,
            covariance,
        })
    }

    /// The raw fitted rows.
    pub fn rows(&self) -> ArrayView2<'_, f64> {
        self.rows.view()
    }

    /// Column means of the fitted rows.
    pub fn location(&self) -> &Array1<f64> {
        &self.location
    }

    /// Column population standard deviations (0 for a constant column).
    pub fn scale(&self) -> &Array1<f64> {
        &self.scale
    }

    /// Shrunk covariance in raw units.
    pub fn covariance(&self) -> &Array2<f64> {
        &self.covariance
    }

    /// What kind of values each feature takes.
    pub fn kinds(&self) -> &FeatureKinds {
        &self.kinds
    }

    /// A valid, typical value of each feature (`--fill typical`): the mean of a
    /// continuous column, the rounded median of an integer one, the more frequent value of
    /// a binary or constant one, and the most frequent level of a one-hot block.
    pub fn typical(&self) -> Array1<f64> {
        let median = self.median();
        let mut values = Array1::zeros(self.location.len());
        for (c, kind) in self.kinds.kinds().iter().enumerate() {
            let column = self.rows.column(c);
            values[c] = match kind {
                FeatureKind::Continuous => self.location[c],
                FeatureKind::Integer => median[c].round(),
                FeatureKind::Binary | FeatureKind::Constant => {
                    let low = column.iter().copied().fold(f64::INFINITY, f64::min);
                    let at_low = column.iter().filter(|&&v| v == low).count();
                    if 2 * at_low >= column.len() {
                        low
                    } else {
                        column.iter().copied().fold(f64::NEG_INFINITY, f64::max)
                    }
                }
                FeatureKind::OneHot(_) => 0.0,
            };
        }
        for block in self.kinds.blocks() {
            let ones: Vec<usize> = block
                .columns
                .iter()
                .map(|&c| self.rows.column(c).iter().filter(|&&v| v == 1.0).count())
                .collect();
            let none = self.rows.nrows() - ones.iter().sum::<usize>();
            let (best, &count) = ones
                .iter()
                .enumerate()
                .max_by(|a, b| a.1.cmp(b.1).then(b.0.cmp(&a.0)))
                .expect("a block has columns");
            if !(block.has_reference_level && none > count) {
                values[block.columns[best]] = 1.0;
            }
        }
        values
    }

    /// Column medians of the fitted rows.
    pub fn median(&self) -> Array1<f64> {
        self.rows
            .columns()
            .into_iter()
            .map(|c| crate::stats::median(&c.to_vec()).expect("fitted rows exist"))
            .collect()
    }
}
