//! Deletion: masked features set to a constant, as occlusion does.

use std::str::FromStr;

use ndarray::{Array1, ArrayView1, ArrayViewMut2};
use rand_chacha::ChaCha8Rng;

use super::PerturbationFamily;
use crate::error::{Error, Result};
use crate::profile::FeatureDistribution;

/// `--fill`: what a deleted feature becomes.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum FillValue {
    /// 0 for every feature.
    Zero,
    /// Each feature's mean over the fitted reference rows.
    Mean,
    /// Each feature's median over the fitted reference rows.
    Median,
    /// A valid, typical value of each feature's kind (the mean of a continuous column,
    /// the rounded median of an integer one, the most frequent value of a binary column or
    /// level of a one-hot block).
    Typical,
    /// One constant for every feature.
    Constant(f64),
}

impl FromStr for FillValue {
    type Err = Error;
    fn from_str(text: &str) -> Result<Self> {
        match text {
            "zero" => Ok(FillValue::Zero),
            "mean" => Ok(FillValue::Mean),
            "median" => Ok(FillValue::Median),
            "typical" => Ok(FillValue::Typical),
            _ => match text.parse::<f64>() {
                Ok(v) if v.is_finite() => Ok(FillValue::Constant(v)),
                _ => Err(Error::InvalidSetting {
                    flag: "--fill",
                    value: text.to_string(),
                    expected: "zero, mean, median, typical, or a finite number".into(),
                }),
            },
        }
    }
}

impl std::fmt::Display for FillValue {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            FillValue::Zero => f.write_str("zero"),
            FillValue::Mean => f.write_str("mean"),
            FillValue::Median => f.write_str("median"),
            FillValue::Typical => f.write_str("typical"),
            FillValue::Constant(v) => write!(f, "{v}"),
        }
    }
}

/// Masked features set to fixed values.
#[derive(Debug, Clone)]
pub struct Deletion {
    values: Array1<f64>,
    label: String,
}

impl Deletion {
    /// Deletion to `fill`, given the reference mean and median of each feature
    /// (`typical` without feature kinds is the median).
    pub fn new(
        fill: FillValue,
        reference_mean: &Array1<f64>,
        reference_median: &Array1<f64>,
    ) -> Deletion {
        Deletion::with_typical(fill, reference_mean, reference_median, reference_median)
    }

    /// Deletion to `fill` over a fitted distribution, feature kinds included.
    pub fn from_distribution(fill: FillValue, reference: &FeatureDistribution) -> Deletion {
        let typical = match fill {
            FillValue::Typical => reference.typical(),
            _ => reference.location().clone(),
        };
        Deletion::with_typical(fill, reference.location(), &reference.median(), &typical)
    }

    fn with_typical(
        fill: FillValue,
        reference_mean: &Array1<f64>,
        reference_median: &Array1<f64>,
        typical: &Array1<f64>,
    ) -> Deletion {
        let d = reference_mean.len();
        let (values, label) = match fill {
            FillValue::Zero => (Array1::zeros(d), "zero".to_string()),
            FillValue::Mean => (reference_mean.clone(), "mean".to_string()),
            FillValue::Median => (reference_median.clone(), "median".to_string()),
            FillValue::Typical => (typical.clone(), "typical".to_string()),
            FillValue::Constant(v) => (Array1::from_elem(d, v), format!("constant:{v}")),
        };
        Deletion { values, label }
    }

    /// How its inputs are called in sentences: "zero-filled inputs".
    pub fn inputs_phrase(&self) -> String {
        match self.label.strip_prefix("constant:") {
            Some(v) => format!("inputs with masked groups set to {v}"),
            None => format!("{}-filled inputs", self.label),
        }
    }

    /// The value each feature is set to.
    pub fn values(&self) -> &Array1<f64> {
        &self.values
    }
}

impl PerturbationFamily for Deletion {
    fn describe(&self) -> String {
        self.label.clone()
    }

    fn draws(&self) -> usize {
        1
    }

    fn fill(
        &self,
        input: ArrayView1<'_, f64>,
        kept: &[bool],
        _rng: &mut ChaCha8Rng,
        mut out: ArrayViewMut2<'_, f64>,
    ) -> Result<()> {
        for mut row in out.rows_mut() {
            for (i, v) in row.iter_mut().enumerate() {
                *v = if kept[i] { input[i] } else { self.values[i] };
            }
        }
        Ok(())
    }
}
