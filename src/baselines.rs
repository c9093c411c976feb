//! Baselines of the interpolation family: where the integrated-gradients path starts.
//!
//! Candidates that need only the profile: `zero`, `mean` and `median` of the fitted
//! reference rows, and `constant:V`. Features outside every group keep the input's value
//! in the baseline, so they stay fixed along the path as they stay kept under masking.

use std::fmt;
use std::str::FromStr;

use ndarray::{Array1, Array2, ArrayView1};

use crate::error::{Error, Result};
use crate::groups::Groups;
use crate::profile::FeatureDistribution;

/// A baseline candidate, as named on the command line.
#[derive(Debug, Clone, PartialEq)]
pub enum BaselineSpec {
    /// All zeros.
    Zero,
    /// The reference mean.
    Mean,
    /// The reference median of each feature.
    Median,
    /// One constant for every feature.
    Constant(f64),
}

impl FromStr for BaselineSpec {
    type Err = Error;
    fn from_str(text: &str) -> Result<Self> {
        let bad = || Error::InvalidSetting {
            flag: "--baseline",
            value: text.to_string(),
            expected: "zero, mean, median or constant:V".into(),
        };
        match text {
            "zero" => Ok(BaselineSpec::Zero),
            "mean" => Ok(BaselineSpec::Mean),
            "median" => Ok(BaselineSpec::Median),
            _ => match text.strip_prefix("constant:").map(str::parse::<f64>) {
                Some(Ok(v)) if v.is_finite() => Ok(BaselineSpec::Constant(v)),
                _ => Err(bad()),
            },
        }
    }
}

impl fmt::Display for BaselineSpec {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            BaselineSpec::Zero => f.write_str("zero"),
            BaselineSpec::Mean => f.write_str("mean"),
            BaselineSpec::Median => f.write_str("median"),
            BaselineSpec::Constant(v) => write!(f, "constant:{v}"),
        }
    }
}

/// A resolved baseline: the same vector for every row, before the ungrouped features
/// are set to the input's.
#[derive(Debug, Clone)]
pub struct Baseline {
    spec: BaselineSpec,
    values: Array1<f64>,
}

impl Baseline {
    /// Resolves `spec` against the reference distribution.
    pub fn new(spec: BaselineSpec, reference: &FeatureDistribution) -> Baseline {
        let d = reference.location().len();
        let values = match &spec {
            BaselineSpec::Zero => Array1::zeros(d),
            BaselineSpec::Mean => reference.location().clone(),
            BaselineSpec::Median => reference.median(),
            BaselineSpec::Constant(v) => Array1::from_elem(d, *v),
        };
        Baseline { spec, values }
    }

    /// The candidate's name.
    pub fn name(&self) -> String {
        self.spec.to_string()
    }

    /// The baseline rows for `input`: ungrouped features take the input's values.
    pub fn rows_for(&self, input: ArrayView1<'_, f64>, groups: &Groups) -> Array2<f64> {
        let mut row = input.to_owned();
        for g in 0..groups.len() {
            for &i in groups.members(g) {
                row[i] = self.values[i];
            }
        }
        row.insert_axis(ndarray::Axis(0))
    }
}
