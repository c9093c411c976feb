//! Baselines of the interpolation family: where the integrated-gradients path starts, and
//! how candidates are ranked (SPEC: `kilter baseline`).
//!
//! Candidates:
//!
//! - `zero`, `mean`, `median` (of the fitted reference rows), `constant:V`;
//! - `nearest`: among the profile's k nearest fitted reference rows to the input, the one
//!   the model scores lowest for the target (a real input without the target's signal);
//! - `uniform:N`: N points drawn uniformly in the reference's per-feature range, and
//!   `reference:N`: N fitted reference rows drawn at random. Their attributions are
//!   averaged over the N paths, the expected-gradients form (Erion, Janizek, Sturmfels,
//!   Lundberg & Lee 2021);
//! - `blur:S` (images only): the input blurred by a Gaussian of width S pixels, each channel
//!   on its own, the kernel cut at 3S and renormalised at the borders.
//!
//! Features outside every group take the input's value in every baseline, so they stay
//! fixed along the path as they stay kept under masking.

use std::fmt;
use std::str::FromStr;

use ndarray::{Array1, Array2, ArrayView1, Axis};
use rand::Rng;
use rand_chacha::ChaCha8Rng;

use crate::audit::BaselineCandidate;
use crate::error::{Error, Result};
use crate::groups::Groups;
use crate::models::Model;
use crate::neighbours::{Exclusion, NeighbourIndex};
use crate::perturbation::masking::kept_features;
use crate::profile::Profile;

/// Draws of `uniform:N` and `reference:N` in the default candidate list.
pub const DEFAULT_DRAWS: usize = 8;
/// Width of `blur:S` in the default candidate list (images only).
pub const DEFAULT_BLUR: f64 = 1.0;

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
    /// The lowest-scoring of the input's nearest reference rows.
    Nearest,
    /// N uniform draws in the reference's range.
    Uniform(usize),
    /// N reference rows.
    Reference(usize),
    /// The input blurred with a Gaussian of this width (pixels).
    Blur(f64),
}

impl FromStr for BaselineSpec {
    type Err = Error;
    fn from_str(text: &str) -> Result<Self> {
        let bad = || Error::InvalidSetting {
            flag: "--baseline",
            value: text.to_string(),
            expected: "zero, mean, median, constant:V, nearest, uniform:N, reference:N or \
                       blur:S (N a whole number of draws, S a positive width)"
                .into(),
        };
        let count = |v: &str| match v.parse::<usize>() {
            Ok(n) if n >= 1 => Ok(n),
            _ => Err(bad()),
        };
        match text {
            "zero" => Ok(BaselineSpec::Zero),
            "mean" => Ok(BaselineSpec::Mean),
            "median" => Ok(BaselineSpec::Median),
            "nearest" => Ok(BaselineSpec::Nearest),
            _ => match text.split_once(':') {
                Some(("constant", v)) => match v.parse::<f64>() {
                    Ok(v) if v.is_finite() => Ok(BaselineSpec::Constant(v)),
                    _ => Err(bad()),
                },
                Some(("uniform", n)) => Ok(BaselineSpec::Uniform(count(n)?)),
                Some(("reference", n)) => Ok(BaselineSpec::Reference(count(n)?)),
                Some(("blur", s)) => match s.parse::<f64>() {
                    Ok(s) if s.is_finite() && s > 0.0 => Ok(BaselineSpec::Blur(s)),
                    _ => Err(bad()),
                },
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
            BaselineSpec::Nearest => f.write_str("nearest"),
            BaselineSpec::Uniform(n) => write!(f, "uniform:{n}"),
            BaselineSpec::Reference(n) => write!(f, "reference:{n}"),
            BaselineSpec::Blur(s) => write!(f, "blur:{s}"),
        }
    }
}

/// `--baseline` of the audit: a fixed candidate, or the best-ranked of a list.
#[derive(Debug, Clone, PartialEq)]
pub enum BaselineChoice {
    /// Rank these candidates per row and use the best.
    Best(Vec<BaselineSpec>),
    /// Always this candidate.
    Fixed(BaselineSpec),
}

impl BaselineChoice {
    /// Parses `--baseline`: `best` or a candidate name.
    pub fn parse(text: &str, image: bool) -> Result<BaselineChoice> {
        if text == "best" {
            Ok(BaselineChoice::Best(default_candidates(image)))
        } else {
            Ok(BaselineChoice::Fixed(text.parse()?))
        }
    }
}

impl fmt::Display for BaselineChoice {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            BaselineChoice::Best(list) => write!(f, "best-ranked of {} candidates", list.len()),
            BaselineChoice::Fixed(spec) => write!(f, "{spec}"),
        }
    }
}

/// The candidates that apply: all but `constant:V`, with blur only for images.
pub fn default_candidates(image: bool) -> Vec<BaselineSpec> {
    let mut list = vec![
        BaselineSpec::Zero,
        BaselineSpec::Mean,
        BaselineSpec::Median,
        BaselineSpec::Nearest,
        BaselineSpec::Uniform(DEFAULT_DRAWS),
        BaselineSpec::Reference(DEFAULT_DRAWS),
    ];
    if image {
        list.push(BaselineSpec::Blur(DEFAULT_BLUR));
    }
    list
}

/// Parses `--candidates`: a comma list of names, or `all`.
pub fn parse_candidates(text: &str, image: bool) -> Result<Vec<BaselineSpec>> {
    if text == "all" {
        return Ok(default_candidates(image));
    }
    let list: Vec<BaselineSpec> = text
        .split(',')
        .map(|s| s.trim().parse())
        .collect::<Result<_>>()
        .map_err(|e| match e {
            Error::InvalidSetting {
                value, expected, ..
            } => Error::InvalidSetting {
                flag: "--candidates",
                value,
                expected,
            },
            other => other,
        })?;
    if list.is_empty() {
        return Err(Error::InvalidSetting {
            flag: "--candidates",
            value: text.to_string(),
            expected: "at least one candidate".into(),
        });
    }
    Ok(list)
}

/// Shape of a row-major image with channels last.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct ImageShape {
    pub height: usize,
    pub width: usize,
    pub channels: usize,
}

/// Makes baseline rows for inputs, from the profile's reference distribution.
#[derive(Debug, Clone)]
pub struct BaselineMaker {
    mean: Array1<f64>,
    median: Array1<f64>,
    minimum: Array1<f64>,
    maximum: Array1<f64>,
    image: Option<ImageShape>,
}

impl BaselineMaker {
    /// From the profile's fitted rows.
    pub fn new(profile: &Profile, image: Option<ImageShape>) -> Result<BaselineMaker> {
        let reference = profile.feature_distribution()?;
        let rows = reference.rows();
        let fold = |init: f64, pick: fn(f64, f64) -> f64| {
            rows.fold_axis(Axis(0), init, |&acc, &v| pick(acc, v))
        };
        Ok(BaselineMaker {
            mean: reference.location().clone(),
            median: reference.median(),
            minimum: fold(f64::INFINITY, f64::min),
            maximum: fold(f64::NEG_INFINITY, f64::max),
            image,
        })
    }

    /// Checks that a candidate applies (blur needs an image).
    pub fn check(&self, spec: &BaselineSpec) -> Result<()> {
        if matches!(spec, BaselineSpec::Blur(_)) && self.image.is_none() {
            return Err(Error::InvalidSetting {
                flag: "--baseline",
                value: spec.to_string(),
                expected: "blur:S only for images (--image HxW[xC])".into(),
            });
        }
        Ok(())
    }

    /// The baseline rows of `spec` for `input` (one row, or N for the expected-gradients
    /// candidates); features in no group take the input's values.
    #[allow(clippy::too_many_arguments)]
    pub fn rows(
        &self,
        spec: &BaselineSpec,
        input: ArrayView1<'_, f64>,
        groups: &Groups,
        profile: &Profile,
        model: &dyn Model,
        target: usize,
        rng: &mut ChaCha8Rng,
    ) -> Result<Array2<f64>> {
        self.check(spec)?;
        let d = input.len();
        let reference = profile.feature_distribution()?.rows();
        let raw: Array2<f64> = match spec {
            BaselineSpec::Zero => Array2::zeros((1, d)),
            BaselineSpec::Mean => self.mean.clone().insert_axis(Axis(0)),
            BaselineSpec::Median => self.median.clone().insert_axis(Axis(0)),
            BaselineSpec::Constant(v) => Array2::from_elem((1, d), *v),
            BaselineSpec::Nearest => {
                let embedded = profile.embed(input.insert_axis(Axis(0)))?;
                let k = profile.settings().k;
                let nn = profile
                    .index()
                    .k_nearest(embedded.view(), k, Exclusion::None)?;
                let candidates: Vec<usize> = nn.indices.row(0).to_vec();
                let rows = reference.select(Axis(0), &candidates);
                let scores = model.predict(rows.view())?;
                crate::models::check_target(&scores, target)?;
                let lowest = (0..candidates.len())
                    .min_by(|&a, &b| scores[[a, target]].total_cmp(&scores[[b, target]]))
                    .expect("k >= 1");
                rows.row(lowest).to_owned().insert_axis(Axis(0))
            }
            BaselineSpec::Uniform(n) => Array2::from_shape_fn((*n, d), |(_, i)| {
                let (lo, hi) = (self.minimum[i], self.maximum[i]);
                if hi > lo {
                    rng.random_range(lo..=hi)
                } else {
                    lo
                }
            }),
            BaselineSpec::Reference(n) => {
                let picks: Vec<usize> = (0..*n)
                    .map(|_| rng.random_range(0..reference.nrows()))
                    .collect();
                reference.select(Axis(0), &picks)
            }
            BaselineSpec::Blur(sigma) => {
                let shape = self.image.expect("checked above");
                gaussian_blur(input, shape, *sigma).insert_axis(Axis(0))
            }
        };
        let mut out = raw;
        // The features kept when every group is masked are exactly those in no group.
        let ungrouped = kept_features(groups, &vec![false; groups.len()]);
        for mut row in out.outer_iter_mut() {
            for i in (0..d).filter(|&i| ungrouped[i]) {
                row[i] = input[i];
            }
        }
        Ok(out)
    }
}

/// The ranking score of a baseline candidate:
///
/// ```text
/// τ       = max(α, 2 p_floor)
/// gate    = clamp((baseline_p - p_floor) / (τ - p_floor), 0, 1)²
/// quality = 0.35 (1 + ρ_R)/2 + 0.3 (1 - path_off_manifold_rate)
///         + 0.2 (1 - min(1, completeness_gap / 0.25)) + 0.15 contrast
/// score   = gate · quality
/// ```
///
/// ρ_R is the Spearman agreement with the replacement attribution and `contrast` the
/// candidate's `|f(x) - f(x')|` over the largest among the candidates (a baseline that
/// the model scores like the input explains nothing). `p_floor` is the smallest p-value
/// the profile can give (`2 / (1 + calibration rows)`): a baseline there is more extreme
/// than every calibration row, as far off the data as the profile can tell, and its gate
/// is 0; when the floor is above α (a small calibration set) τ moves up with it. The gate
/// makes a baseline that is itself off the data lose to any on-data one.
pub fn baseline_score(
    candidate: &BaselineCandidate,
    contrast: f64,
    alpha: f64,
    p_floor: f64,
) -> f64 {
    let tau = alpha.max(2.0 * p_floor);
    let gate = ((candidate.baseline_p - p_floor) / (tau - p_floor))
        .clamp(0.0, 1.0)
        .powi(2);
    let quality = 0.35 * (1.0 + candidate.agreement_with_replacement) / 2.0
        + 0.3 * (1.0 - candidate.path_off_manifold_rate)
        + 0.2 * (1.0 - (candidate.completeness_gap / 0.25).min(1.0))
        + 0.15 * contrast;
    (gate * quality).clamp(0.0, 1.0)
}

/// Separable Gaussian blur of a row-major image with channels last.
pub fn gaussian_blur(image: ArrayView1<'_, f64>, shape: ImageShape, sigma: f64) -> Array1<f64> {
    let ImageShape {
        height,
        width,
        channels,
    } = shape;
    let radius = (3.0 * sigma).ceil() as isize;
    let kernel: Vec<f64> = (-radius..=radius)
        .map(|t| (-(t * t) as f64 / (2.0 * sigma * sigma)).exp())
        .collect();
    let at = |r: usize, c: usize, ch: usize| (r * width + c) * channels + ch;
    let pass = |source: &Array1<f64>, horizontal: bool| {
        let mut out = Array1::<f64>::zeros(source.len());
        for r in 0..height {
            for c in 0..width {
                for ch in 0..channels {
                    let (mut sum, mut weight) = (0.0, 0.0);
                    for (j, w) in kernel.iter().enumerate() {
                        let offset = j as isize - radius;
                        let (rr, cc) = if horizontal {
                            (r as isize, c as isize + offset)
                        } else {
                            (r as isize + offset, c as isize)
                        };
                        if rr < 0 || cc < 0 || rr >= height as isize || cc >= width as isize {
                            continue;
                        }
                        sum += w * source[at(rr as usize, cc as usize, ch)];
                        weight += w;
                    }
                    out[at(r, c, ch)] = sum / weight;
                }
            }
        }
        out
    };
    let horizontal = pass(&image.to_owned(), true);
    pass(&horizontal, false)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn names_round_trip_and_bad_ones_are_refused() {
        for name in [
            "zero",
            "mean",
            "median",
            "constant:2.5",
            "nearest",
            "uniform:4",
            "reference:16",
            "blur:1.5",
        ] {
            assert_eq!(name.parse::<BaselineSpec>().unwrap().to_string(), name);
        }
        for bad in [
            "blurred",
            "uniform:0",
            "constant:x",
            "blur:-1",
            "reference:",
        ] {
            assert!(bad.parse::<BaselineSpec>().is_err(), "{bad}");
        }
    }

    /// A blur keeps a constant image constant (renormalised borders) and spreads a point
    /// symmetrically with the Gaussian's weights.
    #[test]
    fn blur_keeps_constants_and_spreads_points_symmetrically() {
        let shape = ImageShape {
            height: 5,
            width: 5,
            channels: 1,
        };
        let flat = Array1::from_elem(25, 3.0);
        let blurred = gaussian_blur(flat.view(), shape, 1.0);
        assert!(blurred.iter().all(|v| (v - 3.0).abs() < 1e-12));
        let mut point = Array1::<f64>::zeros(25);
        point[12] = 1.0;
        let b = gaussian_blur(point.view(), shape, 0.8);
        assert!((b[11] - b[13]).abs() < 1e-15 && (b[7] - b[17]).abs() < 1e-15);
        assert!(
            (b[11] - b[7]).abs() < 1e-15,
            "separable kernel is isotropic on the axes"
        );
        assert!(b[12] > b[11] && b[11] > b[6]);
    }
}
