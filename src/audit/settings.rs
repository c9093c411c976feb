//! The settings of an audit, validated, and the explanation method a user declares for a
//! supplied explanation (SPEC: `audit --method`).

use std::fmt;
use std::str::FromStr;

use serde::{Deserialize, Serialize};

use crate::attribution::QuadratureRule;
use crate::baselines::{BaselineChoice, BaselineSpec, ImageShape};
use crate::error::{Error, Result};
use crate::perturbation::FillValue;

/// `--sampler`: how replacement fills masked groups.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Sampler {
    /// Chosen from the feature kinds: `neighbours` where a Gaussian models some columns
    /// poorly (binary, coarse integer, one-hot), else `gaussian`.
    Auto,
    /// The conditional Gaussian of the profile's raw-feature distribution.
    Gaussian,
    /// Masked values from the reference rows nearest in the kept features.
    Neighbours,
    /// Masked values from reference rows drawn independently of the input.
    Marginal,
}

impl FromStr for Sampler {
    type Err = Error;
    fn from_str(text: &str) -> Result<Self> {
        match text {
            "auto" => Ok(Sampler::Auto),
            "gaussian" => Ok(Sampler::Gaussian),
            "neighbours" | "neighbors" => Ok(Sampler::Neighbours),
            "marginal" => Ok(Sampler::Marginal),
            _ => Err(Error::InvalidSetting {
                flag: "--sampler",
                value: text.to_string(),
                expected: "one of auto, gaussian, neighbours, marginal".into(),
            }),
        }
    }
}

impl fmt::Display for Sampler {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(match self {
            Sampler::Auto => "auto",
            Sampler::Gaussian => "gaussian",
            Sampler::Neighbours => "neighbours",
            Sampler::Marginal => "marginal",
        })
    }
}

/// The settings of an audit, validated.
#[derive(Debug, Clone, PartialEq)]
pub struct AuditSettings {
    /// Masks (coalitions) per row, shared by deletion and replacement.
    pub samples: usize,
    /// Replacement draws per mask.
    pub draws: usize,
    /// Path points of the interpolation family.
    pub steps: usize,
    /// Quadrature rule of the path integral.
    pub rule: QuadratureRule,
    /// What deletion sets masked groups to.
    pub fill: FillValue,
    /// How replacement draws masked groups.
    pub sampler: Sampler,
    /// Where the path starts: a fixed candidate or the best-ranked of a list.
    pub baseline: BaselineChoice,
    /// The input's image shape, for image inputs (blur baselines).
    pub image: Option<ImageShape>,
    /// The output explained; `None` picks the top-scoring one per row.
    pub target: Option<usize>,
    /// Seed of every random choice.
    pub seed: u64,
    /// Significance level for off-manifold.
    pub alpha: f64,
    /// Groups in the top-k overlap.
    pub top_k: usize,
    /// How the supplied explanation was made (`--method`), when declared.
    pub method: Option<Method>,
}

impl Default for AuditSettings {
    fn default() -> Self {
        AuditSettings {
            samples: 1024,
            draws: 4,
            steps: 64,
            rule: QuadratureRule::Midpoint,
            fill: FillValue::Zero,
            sampler: Sampler::Auto,
            baseline: BaselineChoice::Best(crate::baselines::default_candidates(false)),
            image: None,
            target: None,
            seed: 0,
            alpha: 0.01,
            top_k: 3,
            method: None,
        }
    }
}

impl AuditSettings {
    /// Checks ranges that do not depend on the data.
    pub fn validate(&self) -> Result<()> {
        let positive = |flag: &'static str, v: usize, what: &str| {
            if v == 0 {
                Err(Error::InvalidSetting {
                    flag,
                    value: "0".into(),
                    expected: format!("at least 1 {what}"),
                })
            } else {
                Ok(())
            }
        };
        positive("--samples", self.samples, "mask per row")?;
        positive("--draws", self.draws, "draw per mask")?;
        positive("--steps", self.steps, "path point")?;
        positive("--top-k", self.top_k, "group")?;
        // The quadrature's nodes and weights come first: refuse a path too long to hold.
        crate::memory::check_need((self.steps as u128).saturating_mul(16), || {
            format!("--steps {} path points", self.steps)
        })?;
        self.rule.nodes(self.steps)?;
        crate::profile::validate_alpha(self.alpha)
    }
}

/// How a supplied explanation was made (`--method`), so that kilter recomputes the same
/// method as the subject's twin and judges the supplied values against the data in the
/// same frame of reference (the fill or baseline the method moved groups toward).
#[derive(Debug, Clone, PartialEq)]
pub enum Method {
    /// `occlusion:FILL`: one group masked at a time, set to the fill;
    /// attribution `f(x) - f(x with the group filled)`.
    Occlusion(FillValue),
    /// `surrogate:FILL`: a linear fit of the model's answers on random masks, masked
    /// groups set to the fill; attribution the fitted coefficient of each group.
    Surrogate(FillValue),
    /// `shapley:SAMPLER`: Shapley values with masked groups drawn from the data by the
    /// sampler.
    ShapleySampled(Sampler),
    /// `shapley:FILL`: Shapley values with masked groups set to the fill.
    ShapleyFilled(FillValue),
    /// `integrated-gradients:BASELINE`: integrated gradients from the baseline.
    IntegratedGradients(BaselineSpec),
}

impl Method {
    /// The fill the method sets masked groups to, for the methods that have one.
    pub fn fill(&self) -> Option<FillValue> {
        match self {
            Method::Occlusion(f) | Method::Surrogate(f) | Method::ShapleyFilled(f) => Some(*f),
            Method::ShapleySampled(_) | Method::IntegratedGradients(_) => None,
        }
    }
}

impl FromStr for Method {
    type Err = Error;
    fn from_str(text: &str) -> Result<Self> {
        let bad = || Error::InvalidSetting {
            flag: "--method",
            value: text.to_string(),
            expected: "occlusion:FILL, surrogate:FILL, shapley:SAMPLER, shapley:FILL or \
                       integrated-gradients:BASELINE (FILL zero, mean, median or a number; \
                       SAMPLER gaussian, neighbours or marginal; BASELINE as --baseline)"
                .into(),
        };
        let (name, detail) = text.split_once(':').ok_or_else(bad)?;
        let fill = |v: &str| v.parse::<FillValue>().map_err(|_| bad());
        match name {
            "occlusion" => Ok(Method::Occlusion(fill(detail)?)),
            "surrogate" => Ok(Method::Surrogate(fill(detail)?)),
            "shapley" => match detail.parse::<Sampler>() {
                Ok(sampler) => Ok(Method::ShapleySampled(sampler)),
                Err(_) => Ok(Method::ShapleyFilled(fill(detail)?)),
            },
            "integrated-gradients" => Ok(Method::IntegratedGradients(
                detail.parse::<BaselineSpec>().map_err(|_| bad())?,
            )),
            _ => Err(bad()),
        }
    }
}

impl fmt::Display for Method {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Method::Occlusion(fill) => write!(f, "occlusion:{fill}"),
            Method::Surrogate(fill) => write!(f, "surrogate:{fill}"),
            Method::ShapleySampled(sampler) => write!(f, "shapley:{sampler}"),
            Method::ShapleyFilled(fill) => write!(f, "shapley:{fill}"),
            Method::IntegratedGradients(baseline) => {
                write!(f, "integrated-gradients:{baseline}")
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn methods_read_back_as_written() {
        for text in [
            "occlusion:zero",
            "occlusion:median",
            "surrogate:mean",
            "shapley:gaussian",
            "shapley:neighbours",
            "shapley:zero",
            "shapley:2.5",
            "integrated-gradients:zero",
            "integrated-gradients:reference:8",
        ] {
            let method: Method = text.parse().unwrap();
            assert_eq!(method.to_string(), text);
        }
        for bad in [
            "occlusion",
            "occlusion:blue",
            "lime:zero",
            "integrated-gradients:x",
        ] {
            assert!(bad.parse::<Method>().is_err(), "{bad}");
        }
    }
}
