//! The verdict benchmark: audited explanations whose truth is known by construction.
//!
//! A case is one input row of one configuration: a data shape (`shapes.json`), a model
//! (a linear, logistic or small tanh network in kilter's JSON form, or a tree ensemble in
//! ONNX trained by `make_tree_models.py`), either honest or wrapped in an artefact
//! (Slack, Hilgard, Jia, Singh & Lakkaraju, AIES 2020: the wrapper answers exactly as the
//! honest model on data-like inputs and from other features off them), and one
//! explanation: kilter's own deletion recomputation or a supplied occlusion, surrogate or
//! integrated-gradients explanation computed here with plain code.
//!
//! The truth of a case compares the explanation computed on the audited model with the
//! same explanation computed the same way on the honest twin; kilter's verdict is then
//! scored against it. Everything is seeded: a configuration is a pure function of its
//! seed. This file is shared by `examples/verdicts/main.rs` and `tests/verdicts.rs`.

// Each of the two including crates uses a different part of this file.
#![allow(dead_code)]

use std::collections::BTreeMap;
use std::fmt::Write as _;
use std::path::Path;
use std::sync::{Arc, OnceLock};

use kilter::audit::{AuditSettings, Auditor, Method, Sampler};
use kilter::baselines::{BaselineChoice, BaselineSpec};
use kilter::corpus::FeatureMatrix;
use kilter::groups::Groups;
use kilter::models::network::{Activation, Kind, LayerFile, ModelFile, NetworkModel};
use kilter::models::onnx::OnnxModel;
use kilter::models::Model;
use kilter::perturbation::FillValue;
use kilter::profile::{Profile, ProfileSettings};
use ndarray::{Array2, ArrayView1, ArrayView2, Axis};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::{ChiSquared, Distribution, Poisson, StandardNormal};
use rayon::prelude::*;
use serde::{Deserialize, Serialize};
use statrs::distribution::{ChiSquared as ChiSquareLaw, ContinuousCDF, FisherSnedecor};

// ---------------------------------------------------------------------------------------
// Constants of the construction (README.md in this directory explains each).

/// Reference corpus rows per configuration.
pub const CORPUS_ROWS: usize = 1500;
/// Audited rows per configuration (each is a case).
pub const ROWS_PER_CONFIGURATION: usize = 2;
/// Configurations of the tune and held-out sets.
pub const CONFIGURATIONS: usize = 150;
/// Configurations of the CI subset: the first ones of the held-out set.
pub const CI_CONFIGURATIONS: usize = 25;
/// First seed of the held-out set (tune seeds are 0, 1, ...).
pub const HELD_OUT_BASE: u64 = 1000;
/// Probability that a configuration's model is honest (an artefact whose switch does not
/// fire under the explanation also yields honest cases, so fewer than half are drawn).
pub const HONEST_SHARE: f64 = 0.15;
/// Path points of integrated gradients (midpoint rule).
pub const IG_STEPS: usize = 64;
/// Random masks of the surrogate explanation.
pub const SURROGATE_MASKS: usize = 200;
/// Hidden units of the tanh network.
pub const HIDDEN: usize = 12;
/// Truth: artefact above this normalised distance, honest below [`HONEST_BELOW`].
pub const ARTEFACT_ABOVE: f64 = 0.3;
pub const HONEST_BELOW: f64 = 0.05;
/// The distance's floor, as a share of the honest output's spread on the data.
pub const DISTANCE_FLOOR: f64 = 0.05;

/// The five targets.
pub const HONEST_RELIABLE_AT_LEAST: f64 = 0.85;
pub const HONEST_UNRELIABLE_AT_MOST: f64 = 0.05;
pub const ARTEFACT_FLAGGED_AT_LEAST: f64 = 0.95;
pub const ARTEFACT_UNRELIABLE_AT_LEAST: f64 = 0.85;
pub const AUROC_AT_LEAST: f64 = 0.97;

// ---------------------------------------------------------------------------------------
// Data shapes.

#[derive(Debug, Clone, Deserialize)]
struct ShapeFile {
    #[allow(dead_code)]
    about: String,
    detector_quantile: f64,
    shapes: Vec<Shape>,
}

/// One data shape of `shapes.json`.
#[derive(Debug, Clone, Deserialize)]
pub struct Shape {
    pub name: String,
    pub features: Vec<String>,
    #[serde(flatten)]
    pub generator: Generator,
    /// Feature groups (indices); `None`: one group per feature.
    pub groups: Option<Vec<Vec<usize>>>,
    /// Features the honest functions use.
    pub used: Vec<usize>,
    /// An unused feature independent of the used ones.
    pub unused_independent: usize,
    /// An unused feature correlated with a used one, where the shape has correlation.
    pub unused_correlated: Option<usize>,
    /// A used and an unused feature whose roles the swapping artefact exchanges.
    pub swap: [usize; 2],
    /// The tree models' target function (read by `make_tree_models.py` only).
    pub tree_target: serde_json::Value,
}

/// How a shape's rows are drawn (`make_tree_models.py` has the same definitions).
#[derive(Debug, Clone, Deserialize)]
#[serde(tag = "kind", rename_all = "kebab-case")]
pub enum Generator {
    /// `x = mean + sd * (l z0 + sqrt(1 - l^2) e)`: one common factor, correlation
    /// `l_i l_j`.
    Gaussian {
        mean: Vec<f64>,
        sd: Vec<f64>,
        loadings: Vec<f64>,
    },
    /// Component `c` with probability `weights[c]`, then `means[c] + sds[c] * e`.
    Mixture {
        weights: Vec<f64>,
        means: Vec<Vec<f64>>,
        sds: Vec<Vec<f64>>,
    },
    /// `location + scale * g * sqrt(df / w)`, `g` the one-factor Gaussian with unit
    /// variances, `w ~ chi-square(df)`.
    StudentT {
        df: f64,
        location: Vec<f64>,
        scale: Vec<f64>,
        loadings: Vec<f64>,
    },
    /// Poisson counts, a one-hot block of one categorical draw, Gaussian columns.
    CountsCategorical {
        rates: Vec<f64>,
        levels: Vec<f64>,
        continuous_mean: Vec<f64>,
        continuous_sd: Vec<f64>,
    },
}

fn shape_file() -> &'static ShapeFile {
    static FILE: OnceLock<ShapeFile> = OnceLock::new();
    FILE.get_or_init(|| {
        serde_json::from_str(include_str!("shapes.json")).expect("shapes.json parses")
    })
}

/// Every shape, in the order of `shapes.json`.
pub fn shapes() -> &'static [Shape] {
    &shape_file().shapes
}

/// The one-factor correlation's draw: `l z0 + sqrt(1 - l^2) e`.
fn one_factor(rng: &mut ChaCha8Rng, loadings: &[f64]) -> Vec<f64> {
    let z0: f64 = rng.sample(StandardNormal);
    loadings
        .iter()
        .map(|&l| {
            let e: f64 = rng.sample(StandardNormal);
            l * z0 + (1.0 - l * l).sqrt() * e
        })
        .collect()
}

/// `s_i s_j l_i l_j` off the diagonal, `s_i^2` on it.
fn one_factor_covariance(sd: &[f64], loadings: &[f64]) -> Vec<Vec<f64>> {
    let d = sd.len();
    (0..d)
        .map(|i| {
            (0..d)
                .map(|j| {
                    if i == j {
                        sd[i] * sd[i]
                    } else {
                        sd[i] * sd[j] * loadings[i] * loadings[j]
                    }
                })
                .collect()
        })
        .collect()
}

impl Shape {
    pub fn d(&self) -> usize {
        self.features.len()
    }

    /// Analytic mean and standard deviation of every feature.
    pub fn moments(&self) -> (Vec<f64>, Vec<f64>) {
        match &self.generator {
            Generator::Gaussian { mean, sd, .. } => (mean.clone(), sd.clone()),
            Generator::Mixture {
                weights,
                means,
                sds,
            } => {
                let d = self.d();
                let mut mean = vec![0.0; d];
                let mut second = vec![0.0; d];
                for (c, &w) in weights.iter().enumerate() {
                    for j in 0..d {
                        mean[j] += w * means[c][j];
                        second[j] += w * (sds[c][j].powi(2) + means[c][j].powi(2));
                    }
                }
                let sd = (0..d)
                    .map(|j| (second[j] - mean[j] * mean[j]).sqrt())
                    .collect();
                (mean, sd)
            }
            Generator::StudentT {
                df,
                location,
                scale,
                ..
            } => (
                location.clone(),
                scale.iter().map(|s| s * (df / (df - 2.0)).sqrt()).collect(),
            ),
            Generator::CountsCategorical {
                rates,
                levels,
                continuous_mean,
                continuous_sd,
            } => {
                let mut mean = rates.clone();
                let mut sd: Vec<f64> = rates.iter().map(|r| r.sqrt()).collect();
                mean.extend(levels);
                sd.extend(levels.iter().map(|p| (p * (1.0 - p)).sqrt()));
                mean.extend(continuous_mean);
                sd.extend(continuous_sd);
                (mean, sd)
            }
        }
    }

    /// One row drawn from the shape.
    pub fn draw(&self, rng: &mut ChaCha8Rng) -> Vec<f64> {
        match &self.generator {
            Generator::Gaussian { mean, sd, loadings } => one_factor(rng, loadings)
                .iter()
                .enumerate()
                .map(|(j, g)| mean[j] + sd[j] * g)
                .collect(),
            Generator::Mixture {
                weights,
                means,
                sds,
            } => {
                let u: f64 = rng.random();
                let mut c = weights.len() - 1;
                let mut acc = 0.0;
                for (k, w) in weights.iter().enumerate() {
                    acc += w;
                    if u < acc {
                        c = k;
                        break;
                    }
                }
                (0..self.d())
                    .map(|j| {
                        let e: f64 = rng.sample(StandardNormal);
                        means[c][j] + sds[c][j] * e
                    })
                    .collect()
            }
            Generator::StudentT {
                df,
                location,
                scale,
                loadings,
            } => {
                let g = one_factor(rng, loadings);
                let w: f64 = ChiSquared::new(*df).expect("df > 0").sample(rng);
                let stretch = (df / w).sqrt();
                (0..self.d())
                    .map(|j| location[j] + scale[j] * g[j] * stretch)
                    .collect()
            }
            Generator::CountsCategorical {
                rates,
                levels,
                continuous_mean,
                continuous_sd,
            } => {
                let mut row: Vec<f64> = rates
                    .iter()
                    .map(|&r| Poisson::new(r).expect("rate > 0").sample(rng))
                    .collect();
                let u: f64 = rng.random();
                let mut level = levels.len() - 1;
                let mut acc = 0.0;
                for (k, p) in levels.iter().enumerate() {
                    acc += p;
                    if u < acc {
                        level = k;
                        break;
                    }
                }
                row.extend((0..levels.len()).map(|k| if k == level { 1.0 } else { 0.0 }));
                for (m, s) in continuous_mean.iter().zip(continuous_sd) {
                    let e: f64 = rng.sample(StandardNormal);
                    row.push(m + s * e);
                }
                row
            }
        }
    }

    /// `n` rows drawn from the shape.
    pub fn sample(&self, rng: &mut ChaCha8Rng, n: usize) -> Array2<f64> {
        let d = self.d();
        let mut out = Array2::zeros((n, d));
        for mut row in out.outer_iter_mut() {
            let draw = self.draw(rng);
            row.assign(&ArrayView1::from(&draw));
        }
        out
    }

    /// The groups as index lists.
    pub fn group_members(&self) -> Vec<Vec<usize>> {
        match &self.groups {
            Some(g) => g.clone(),
            None => (0..self.d()).map(|j| vec![j]).collect(),
        }
    }

    /// The artefact's own detector of data-like inputs, built from the generating
    /// distribution (never from kilter's profile).
    pub fn detector(&self) -> Detector {
        let q = shape_file().detector_quantile;
        let d = self.d();
        let chi2 = |df: f64| ChiSquareLaw::new(df).expect("df > 0").inverse_cdf(q);
        match &self.generator {
            Generator::Gaussian { mean, sd, loadings } => Detector::Ellipse {
                centres: vec![mean.clone()],
                factors: vec![cholesky(&one_factor_covariance(sd, loadings))],
                limit: chi2(d as f64),
            },
            Generator::Mixture { means, sds, .. } => Detector::Ellipse {
                centres: means.clone(),
                factors: sds
                    .iter()
                    .map(|s| {
                        let zero = vec![0.0; d];
                        cholesky(&one_factor_covariance(s, &zero))
                    })
                    .collect(),
                limit: chi2(d as f64),
            },
            Generator::StudentT {
                df,
                location,
                scale,
                loadings,
            } => {
                // Squared Mahalanobis distance under the scale matrix, divided by d, is
                // F(d, df) distributed for a multivariate t.
                let f = FisherSnedecor::new(d as f64, *df)
                    .expect("degrees of freedom > 0")
                    .inverse_cdf(q);
                Detector::Ellipse {
                    centres: vec![location.clone()],
                    factors: vec![cholesky(&one_factor_covariance(scale, loadings))],
                    limit: f * d as f64,
                }
            }
            Generator::CountsCategorical {
                rates,
                levels,
                continuous_mean,
                continuous_sd,
            } => Detector::Support {
                counts: rates.len(),
                levels: levels.len(),
                mean: continuous_mean.clone(),
                sd: continuous_sd.clone(),
                limit: chi2(continuous_mean.len() as f64),
            },
        }
    }
}

/// Lower Cholesky factor of a small positive-definite matrix.
fn cholesky(a: &[Vec<f64>]) -> Vec<Vec<f64>> {
    let d = a.len();
    let mut l = vec![vec![0.0; d]; d];
    for i in 0..d {
        for j in 0..=i {
            let s: f64 = (0..j).map(|k| l[i][k] * l[j][k]).sum();
            if i == j {
                let v = a[i][i] - s;
                assert!(v > 0.0, "covariance not positive definite");
                l[i][i] = v.sqrt();
            } else {
                l[i][j] = (a[i][j] - s) / l[j][j];
            }
        }
    }
    l
}

/// `|L^-1 (x - c)|^2` by forward substitution.
fn squared_distance(l: &[Vec<f64>], centre: &[f64], x: &[f64]) -> f64 {
    let d = centre.len();
    let mut y = vec![0.0; d];
    let mut total = 0.0;
    for i in 0..d {
        let s: f64 = (0..i).map(|k| l[i][k] * y[k]).sum();
        y[i] = (x[i] - centre[i] - s) / l[i][i];
        total += y[i] * y[i];
    }
    total
}

/// Decides whether an input looks like the generating distribution's data.
#[derive(Debug, Clone)]
pub enum Detector {
    /// Squared Mahalanobis distance to the nearest centre (under its own covariance)
    /// below `limit`.
    Ellipse {
        centres: Vec<Vec<f64>>,
        factors: Vec<Vec<Vec<f64>>>,
        limit: f64,
    },
    /// Counts are non-negative integers, the one-hot block holds exactly one 1 and
    /// zeros, the continuous columns' squared standardized distance is below `limit`.
    Support {
        counts: usize,
        levels: usize,
        mean: Vec<f64>,
        sd: Vec<f64>,
        limit: f64,
    },
}

impl Detector {
    pub fn on_data(&self, x: &[f64]) -> bool {
        match self {
            Detector::Ellipse {
                centres,
                factors,
                limit,
            } => centres
                .iter()
                .zip(factors)
                .any(|(c, l)| squared_distance(l, c, x) < *limit),
            Detector::Support {
                counts,
                levels,
                mean,
                sd,
                limit,
            } => {
                let integer = |v: f64| (v - v.round()).abs() < 1e-9;
                let counts_ok = x[..*counts].iter().all(|&v| v > -0.5 && integer(v));
                let block = &x[*counts..counts + levels];
                let block_ok = block.iter().all(|&v| v == 0.0 || v == 1.0)
                    && block.iter().filter(|&&v| v == 1.0).count() == 1;
                let rest = &x[counts + levels..];
                let d2: f64 = rest
                    .iter()
                    .zip(mean.iter().zip(sd))
                    .map(|(v, (m, s))| ((v - m) / s).powi(2))
                    .sum();
                counts_ok && block_ok && d2 < *limit
            }
        }
    }

    /// Share of the rows judged off the data.
    pub fn off_share(&self, rows: ArrayView2<'_, f64>) -> f64 {
        if rows.nrows() == 0 {
            return 0.0;
        }
        let off = rows
            .outer_iter()
            .filter(|r| !self.on_data(&r.to_vec()))
            .count();
        off as f64 / rows.nrows() as f64
    }
}

// ---------------------------------------------------------------------------------------
// Models.

/// The honest model's kind.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum ModelKind {
    Linear,
    Logistic,
    Mlp,
    /// Gradient-boosted regression trees (ONNX).
    GbTrees,
    /// Random-forest classifier (ONNX).
    RfTrees,
}

pub const MODEL_KINDS: [ModelKind; 5] = [
    ModelKind::Linear,
    ModelKind::Logistic,
    ModelKind::Mlp,
    ModelKind::GbTrees,
    ModelKind::RfTrees,
];

impl ModelKind {
    pub fn name(self) -> &'static str {
        match self {
            ModelKind::Linear => "linear",
            ModelKind::Logistic => "logistic",
            ModelKind::Mlp => "mlp",
            ModelKind::GbTrees => "gb-trees",
            ModelKind::RfTrees => "rf-trees",
        }
    }

    /// Whether the model answers class probabilities `[1 - p, p]` (target 1) rather than
    /// one score (target 0).
    pub fn probability(self) -> bool {
        matches!(self, ModelKind::Logistic | ModelKind::RfTrees)
    }

    pub fn target(self) -> usize {
        usize::from(self.probability())
    }

    pub fn is_tree(self) -> bool {
        matches!(self, ModelKind::GbTrees | ModelKind::RfTrees)
    }
}

/// A dense layer over raw features from weights over standardized ones:
/// `W' = W / s` column by column, `b' = b - W (m / s)`.
fn folded_layer(
    weights: &[Vec<f64>],
    bias: &[f64],
    mean: &[f64],
    sd: &[f64],
    activation: Activation,
) -> LayerFile {
    let w: Vec<Vec<f64>> = weights
        .iter()
        .map(|row| row.iter().zip(sd).map(|(w, s)| w / s).collect())
        .collect();
    let b = weights
        .iter()
        .zip(bias)
        .map(|(row, b)| {
            b - row
                .iter()
                .zip(mean.iter().zip(sd))
                .map(|(w, (m, s))| w * m / s)
                .sum::<f64>()
        })
        .collect();
    LayerFile {
        weights: w,
        bias: b,
        activation,
    }
}

fn uniform_sign(rng: &mut ChaCha8Rng, low: f64, high: f64) -> f64 {
    let v = rng.random_range(low..high);
    if rng.random_bool(0.5) {
        v
    } else {
        -v
    }
}

/// A seeded honest network over the shape's used features (standardized by the shape's
/// analytic moments, folded into the first layer).
pub fn honest_network(kind: ModelKind, shape: &Shape, rng: &mut ChaCha8Rng) -> NetworkModel {
    let d = shape.d();
    let (mean, sd) = shape.moments();
    let used = &shape.used;
    let (file_kind, layers) = match kind {
        ModelKind::Linear | ModelKind::Logistic => {
            let mut w = vec![0.0; d];
            for &j in used {
                w[j] = uniform_sign(rng, 0.5, 1.5);
            }
            let norm = w.iter().map(|v| v * v).sum::<f64>().sqrt();
            let (scale, activation, file_kind) = if kind == ModelKind::Linear {
                (1.0, Activation::Identity, Kind::Linear)
            } else {
                // A logit of spread about 1.5 on independent features: probabilities
                // across most of (0, 1).
                (1.5 / norm, Activation::Sigmoid, Kind::Logistic)
            };
            let w: Vec<f64> = w.iter().map(|v| v * scale).collect();
            let intercept: f64 = rng.sample::<f64, _>(StandardNormal) * 0.3;
            (
                file_kind,
                vec![folded_layer(&[w], &[intercept], &mean, &sd, activation)],
            )
        }
        ModelKind::Mlp => {
            let gain = 1.2 / (used.len() as f64).sqrt();
            let mut hidden = vec![vec![0.0; d]; HIDDEN];
            let mut bias = vec![0.0; HIDDEN];
            for h in 0..HIDDEN {
                for &j in used {
                    hidden[h][j] = rng.sample::<f64, _>(StandardNormal) * gain;
                }
                bias[h] = rng.sample::<f64, _>(StandardNormal) * 0.5;
            }
            let out: Vec<f64> = (0..HIDDEN)
                .map(|_| rng.sample::<f64, _>(StandardNormal) * 2.0 / (HIDDEN as f64).sqrt())
                .collect();
            let first = folded_layer(&hidden, &bias, &mean, &sd, Activation::Tanh);
            let second = LayerFile {
                weights: vec![out],
                bias: vec![0.0],
                activation: Activation::Identity,
            };
            (Kind::Mlp, vec![first, second])
        }
        ModelKind::GbTrees | ModelKind::RfTrees => unreachable!("trees come from ONNX files"),
    };
    let file = ModelFile {
        format: "kilter-model".into(),
        version: 1,
        kind: file_kind,
        inputs: d,
        layers,
        description: Some(format!(
            "verdict benchmark: honest {} on {}",
            kind.name(),
            shape.name
        )),
    };
    NetworkModel::from_file(file, &format!("{}-{}", shape.name, kind.name()))
        .expect("a well-formed network")
}

/// The committed tree models, by `<shape>-gb` / `<shape>-rf`.
const TREE_FILES: [(&str, &[u8]); 10] = [
    (
        "independent-far-gb",
        include_bytes!("trees/independent-far-gb.onnx"),
    ),
    (
        "independent-far-rf",
        include_bytes!("trees/independent-far-rf.onnx"),
    ),
    ("correlated-gb", include_bytes!("trees/correlated-gb.onnx")),
    ("correlated-rf", include_bytes!("trees/correlated-rf.onnx")),
    ("multimodal-gb", include_bytes!("trees/multimodal-gb.onnx")),
    ("multimodal-rf", include_bytes!("trees/multimodal-rf.onnx")),
    (
        "heavy-tailed-gb",
        include_bytes!("trees/heavy-tailed-gb.onnx"),
    ),
    (
        "heavy-tailed-rf",
        include_bytes!("trees/heavy-tailed-rf.onnx"),
    ),
    (
        "counts-categorical-gb",
        include_bytes!("trees/counts-categorical-gb.onnx"),
    ),
    (
        "counts-categorical-rf",
        include_bytes!("trees/counts-categorical-rf.onnx"),
    ),
];

/// `scikit-learn`'s answers on a few rows of each shape (`trees/check.json`).
pub const TREE_CHECK: &str = include_str!("trees/check.json");

/// A committed tree model, loaded once.
pub fn tree_model(name: &str) -> Arc<OnnxModel> {
    static MODELS: OnceLock<BTreeMap<&'static str, Arc<OnnxModel>>> = OnceLock::new();
    let models = MODELS.get_or_init(|| {
        TREE_FILES
            .iter()
            .map(|(name, bytes)| {
                let model = OnnxModel::from_bytes(Path::new(name), bytes, None)
                    .unwrap_or_else(|e| panic!("tree model {name}: {e}"));
                (*name, Arc::new(model))
            })
            .collect()
    });
    models
        .get(name)
        .unwrap_or_else(|| panic!("no tree model {name}"))
        .clone()
}

/// What the artefact answers from off the data.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum Switch {
    /// A feature the honest function does not use, independent of the used ones, scaled
    /// to the honest output's range.
    UnusedIndependent,
    /// An unused feature correlated with a used one, scaled likewise.
    UnusedCorrelated,
    /// The honest effect with its sign flipped (score: reflected about its mean on the
    /// data; probability: `1 - p`).
    Flip,
    /// The honest function with a used and an unused feature's roles exchanged (in
    /// standardized units).
    Swap,
}

impl Switch {
    pub fn name(self) -> &'static str {
        match self {
            Switch::UnusedIndependent => "unused-independent",
            Switch::UnusedCorrelated => "unused-correlated",
            Switch::Flip => "flip",
            Switch::Swap => "swap",
        }
    }
}

/// The honest output's location and spread on the data: of the score, or of the logit
/// for probabilities (clamped to [0.001, 0.999]).
#[derive(Debug, Clone, Copy)]
pub struct OutputScale {
    pub centre: f64,
    pub spread: f64,
    /// Standard deviation of the explained output itself (score or probability).
    pub output_sd: f64,
}

fn logit(p: f64) -> f64 {
    let p = p.clamp(0.001, 0.999);
    (p / (1.0 - p)).ln()
}

fn sigmoid(z: f64) -> f64 {
    1.0 / (1.0 + (-z).exp())
}

fn mean_sd(values: &[f64]) -> (f64, f64) {
    let n = values.len() as f64;
    let mean = values.iter().sum::<f64>() / n;
    let var = values.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / n;
    (mean, var.sqrt())
}

impl OutputScale {
    pub fn of(model: &dyn Model, kind: ModelKind, corpus: ArrayView2<'_, f64>) -> OutputScale {
        let out = model.predict(corpus).expect("the honest model answers");
        let y: Vec<f64> = out.column(kind.target()).to_vec();
        let (_, output_sd) = mean_sd(&y);
        let (centre, spread) = if kind.probability() {
            mean_sd(&y.iter().map(|&p| logit(p)).collect::<Vec<_>>())
        } else {
            mean_sd(&y)
        };
        OutputScale {
            centre,
            spread,
            output_sd,
        }
    }
}

/// An artefact model (Slack et al., AIES 2020): the honest model's exact answer on
/// inputs its detector takes for data, the switch's answer elsewhere.
pub struct Artefact {
    pub honest: Arc<dyn Model>,
    pub detector: Detector,
    pub switch: Switch,
    /// The feature the switch reads (unused variants) or the two swapped features.
    pub features: (usize, usize),
    pub probability: bool,
    pub mean: Vec<f64>,
    pub sd: Vec<f64>,
    pub scale: OutputScale,
}

impl Artefact {
    fn swapped(&self, x: &[f64]) -> Vec<f64> {
        let (a, b) = self.features;
        let mut y = x.to_vec();
        y[a] = self.mean[a] + self.sd[a] * (x[b] - self.mean[b]) / self.sd[b];
        y[b] = self.mean[b] + self.sd[b] * (x[a] - self.mean[a]) / self.sd[a];
        y
    }

    /// The off-data rows, their swapped copies' answers when the switch needs them.
    fn off_rows(&self, inputs: ArrayView2<'_, f64>) -> (Vec<usize>, Option<Array2<f64>>) {
        let off: Vec<usize> = (0..inputs.nrows())
            .filter(|&r| !self.detector.on_data(&inputs.row(r).to_vec()))
            .collect();
        let swapped = if self.switch == Switch::Swap && !off.is_empty() {
            let mut rows = Array2::zeros((off.len(), inputs.ncols()));
            for (i, &r) in off.iter().enumerate() {
                let s = self.swapped(&inputs.row(r).to_vec());
                rows.row_mut(i).assign(&ArrayView1::from(&s));
            }
            Some(rows)
        } else {
            None
        };
        (off, swapped)
    }

    /// Exact gradients where the honest model has them: the honest gradient on the data,
    /// the switch's own gradient off it (the switch's boundary is ignored, as automatic
    /// differentiation of such a wrapper would). For explanations computed here only.
    pub fn piecewise_gradients(
        &self,
        inputs: ArrayView2<'_, f64>,
        target: usize,
    ) -> kilter::Result<Array2<f64>> {
        let mut grads = self
            .honest
            .gradients(inputs, target)?
            .expect("piecewise gradients need an honest model with gradients");
        let (off, swapped) = self.off_rows(inputs);
        if off.is_empty() {
            return Ok(grads);
        }
        let at_swapped = match &swapped {
            Some(rows) => Some((
                self.honest
                    .gradients(rows.view(), target)?
                    .expect("honest gradients"),
                self.honest.predict(rows.view())?,
            )),
            None => None,
        };
        let outputs = self.predict(inputs)?;
        for (i, &r) in off.iter().enumerate() {
            let mut g = grads.row_mut(r);
            match self.switch {
                Switch::UnusedIndependent | Switch::UnusedCorrelated => {
                    let j = self.features.0;
                    let slope = self.scale.spread / self.sd[j];
                    let factor = if self.probability {
                        let p = outputs[[r, 1]];
                        p * (1.0 - p) * if target == 1 { 1.0 } else { -1.0 }
                    } else {
                        1.0
                    };
                    g.fill(0.0);
                    g[j] = slope * factor;
                }
                Switch::Flip => g.mapv_inplace(|v| -v),
                Switch::Swap => {
                    let (a, b) = self.features;
                    let (gs, _) = at_swapped.as_ref().expect("swapped rows");
                    let gs = gs.row(i);
                    let mut new = gs.to_owned();
                    new[a] = gs[b] * self.sd[b] / self.sd[a];
                    new[b] = gs[a] * self.sd[a] / self.sd[b];
                    g.assign(&new);
                }
            }
        }
        Ok(grads)
    }
}

impl Model for Artefact {
    fn input_dim(&self) -> Option<usize> {
        self.honest.input_dim()
    }

    fn predict(&self, inputs: ArrayView2<'_, f64>) -> kilter::Result<Array2<f64>> {
        let mut out = self.honest.predict(inputs)?;
        let (off, swapped) = self.off_rows(inputs);
        let swapped_answers = match &swapped {
            Some(rows) => Some(self.honest.predict(rows.view())?),
            None => None,
        };
        for (i, &r) in off.iter().enumerate() {
            let score = match self.switch {
                Switch::UnusedIndependent | Switch::UnusedCorrelated => {
                    let j = self.features.0;
                    let z = (inputs[[r, j]] - self.mean[j]) / self.sd[j];
                    let s = self.scale.centre + self.scale.spread * z;
                    if self.probability {
                        sigmoid(s)
                    } else {
                        s
                    }
                }
                Switch::Flip => {
                    if self.probability {
                        1.0 - out[[r, 1]]
                    } else {
                        2.0 * self.scale.centre - out[[r, 0]]
                    }
                }
                Switch::Swap => {
                    let answers = swapped_answers.as_ref().expect("swapped answers");
                    answers[[i, usize::from(self.probability)]]
                }
            };
            if self.probability {
                out[[r, 0]] = 1.0 - score;
                out[[r, 1]] = score;
            } else {
                out[[r, 0]] = score;
            }
        }
        Ok(out)
    }

    /// None: kilter takes finite differences, across the switch's boundary too.
    fn gradients(
        &self,
        _inputs: ArrayView2<'_, f64>,
        _target: usize,
    ) -> kilter::Result<Option<Array2<f64>>> {
        Ok(None)
    }

    fn preferred_batch(&self) -> usize {
        self.honest.preferred_batch()
    }

    fn precision(&self) -> f64 {
        self.honest.precision()
    }

    fn describe(&self) -> String {
        format!(
            "artefact ({}) over {}",
            self.switch.name(),
            self.honest.describe()
        )
    }
}

/// A model as the benchmark's own explanation code sees it: answers, and exact gradients
/// when they exist (networks and artefacts over networks); central differences otherwise.
#[derive(Clone)]
pub struct Subject {
    pub model: Arc<dyn Model>,
    pub artefact: Option<Arc<Artefact>>,
    pub exact_gradients: bool,
}

impl Subject {
    fn gradients(
        &self,
        rows: ArrayView2<'_, f64>,
        target: usize,
    ) -> kilter::Result<Option<Array2<f64>>> {
        if !self.exact_gradients {
            return Ok(None);
        }
        match &self.artefact {
            Some(a) => Ok(Some(a.piecewise_gradients(rows, target)?)),
            None => self.model.gradients(rows, target),
        }
    }
}

// ---------------------------------------------------------------------------------------
// Explanations, computed here with plain code.

/// What masked groups are set to (or where the path starts).
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum Fill {
    Zero,
    Mean,
    Median,
}

impl Fill {
    pub fn name(self) -> &'static str {
        match self {
            Fill::Zero => "zero",
            Fill::Mean => "mean",
            Fill::Median => "median",
        }
    }

    fn kilter(self) -> FillValue {
        match self {
            Fill::Zero => FillValue::Zero,
            Fill::Mean => FillValue::Mean,
            Fill::Median => FillValue::Median,
        }
    }

    fn baseline(self) -> BaselineSpec {
        match self {
            Fill::Zero => BaselineSpec::Zero,
            Fill::Mean => BaselineSpec::Mean,
            Fill::Median => BaselineSpec::Median,
        }
    }
}

/// The explanation a case audits.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
pub enum Explanation {
    /// kilter's own deletion recomputation (nothing supplied).
    Deletion(Fill),
    /// `φ_g = f(x) - f(x with group g filled)`.
    Occlusion(Fill),
    /// Least squares with intercept on random masks (each group kept with probability
    /// 1/2, masked groups filled); the coefficients.
    Surrogate(Fill),
    /// Integrated gradients from the zero or the mean baseline.
    IntegratedGradients(Fill),
}

pub const EXPLANATIONS: [Explanation; 11] = [
    Explanation::Deletion(Fill::Zero),
    Explanation::Deletion(Fill::Mean),
    Explanation::Deletion(Fill::Median),
    Explanation::Occlusion(Fill::Zero),
    Explanation::Occlusion(Fill::Mean),
    Explanation::Occlusion(Fill::Median),
    Explanation::Surrogate(Fill::Zero),
    Explanation::Surrogate(Fill::Mean),
    Explanation::Surrogate(Fill::Median),
    Explanation::IntegratedGradients(Fill::Zero),
    Explanation::IntegratedGradients(Fill::Mean),
];

impl Explanation {
    pub fn method(self) -> &'static str {
        match self {
            Explanation::Deletion(_) => "deletion",
            Explanation::Occlusion(_) => "occlusion",
            Explanation::Surrogate(_) => "surrogate",
            Explanation::IntegratedGradients(_) => "integrated-gradients",
        }
    }

    pub fn fill(self) -> Fill {
        match self {
            Explanation::Deletion(f)
            | Explanation::Occlusion(f)
            | Explanation::Surrogate(f)
            | Explanation::IntegratedGradients(f) => f,
        }
    }

    pub fn name(self) -> String {
        format!("{}:{}", self.method(), self.fill().name())
    }

    /// The audit settings' `method`, for a supplied explanation.
    fn kilter_method(self) -> Option<Method> {
        match self {
            Explanation::Deletion(_) => None,
            Explanation::Occlusion(f) => Some(Method::Occlusion(f.kilter())),
            Explanation::Surrogate(f) => Some(Method::Surrogate(f.kilter())),
            Explanation::IntegratedGradients(f) => Some(Method::IntegratedGradients(f.baseline())),
        }
    }
}

/// `x` with the groups whose `kept` flag is false set to `fill`.
fn masked(x: &[f64], fill: &[f64], groups: &[Vec<usize>], kept: &[bool]) -> Vec<f64> {
    let mut y = x.to_vec();
    for (g, members) in groups.iter().enumerate() {
        if !kept[g] {
            for &j in members {
                y[j] = fill[j];
            }
        }
    }
    y
}

fn rows_matrix(rows: &[Vec<f64>]) -> Array2<f64> {
    let d = rows[0].len();
    let flat: Vec<f64> = rows.iter().flatten().copied().collect();
    Array2::from_shape_vec((rows.len(), d), flat).expect("rectangular")
}

fn answers(model: &dyn Model, rows: &Array2<f64>, target: usize) -> kilter::Result<Vec<f64>> {
    Ok(model.predict(rows.view())?.column(target).to_vec())
}

/// An attribution and the model inputs behind it.
pub struct Computed {
    pub attribution: Vec<f64>,
    pub inputs: Array2<f64>,
}

/// Exact Shapley values of the groups under `v(S) = f(x with the groups outside S
/// filled)`, by the permutation-weight formula over every coalition (Shapley 1953).
pub fn shapley_filled(
    model: &dyn Model,
    target: usize,
    x: &[f64],
    fill: &[f64],
    groups: &[Vec<usize>],
) -> kilter::Result<Computed> {
    let m = groups.len();
    let rows: Vec<Vec<f64>> = (0..1usize << m)
        .map(|s| {
            let kept: Vec<bool> = (0..m).map(|g| s >> g & 1 == 1).collect();
            masked(x, fill, groups, &kept)
        })
        .collect();
    let inputs = rows_matrix(&rows);
    let v = answers(model, &inputs, target)?;
    let factorial = |n: usize| (1..=n).map(|k| k as f64).product::<f64>();
    let weight: Vec<f64> = (0..m)
        .map(|s| factorial(s) * factorial(m - s - 1) / factorial(m))
        .collect();
    let mut phi = vec![0.0; m];
    for (g, value) in phi.iter_mut().enumerate() {
        for s in 0..1usize << m {
            if s >> g & 1 == 0 {
                *value += weight[s.count_ones() as usize] * (v[s | 1 << g] - v[s]);
            }
        }
    }
    Ok(Computed {
        attribution: phi,
        inputs,
    })
}

/// Occlusion: `φ_g = f(x) - f(x with group g filled)`.
pub fn occlusion(
    model: &dyn Model,
    target: usize,
    x: &[f64],
    fill: &[f64],
    groups: &[Vec<usize>],
) -> kilter::Result<Computed> {
    let m = groups.len();
    let mut rows = vec![x.to_vec()];
    for g in 0..m {
        let kept: Vec<bool> = (0..m).map(|h| h != g).collect();
        rows.push(masked(x, fill, groups, &kept));
    }
    let inputs = rows_matrix(&rows);
    let v = answers(model, &inputs, target)?;
    Ok(Computed {
        attribution: (0..m).map(|g| v[0] - v[g + 1]).collect(),
        inputs: inputs.slice(ndarray::s![1.., ..]).to_owned(),
    })
}

/// Solves `a b = y` for a small square system (Gaussian elimination, partial pivoting).
fn solve(mut a: Vec<Vec<f64>>, mut y: Vec<f64>) -> Vec<f64> {
    let n = y.len();
    for c in 0..n {
        let p = (c..n)
            .max_by(|&i, &j| a[i][c].abs().total_cmp(&a[j][c].abs()))
            .expect("rows");
        a.swap(c, p);
        y.swap(c, p);
        assert!(a[c][c].abs() > 1e-12, "singular surrogate design");
        let pivot = a[c].clone();
        for r in c + 1..n {
            let f = a[r][c] / pivot[c];
            for (v, p) in a[r].iter_mut().zip(&pivot).skip(c) {
                *v -= f * p;
            }
            y[r] -= f * y[c];
        }
    }
    let mut b = vec![0.0; n];
    for c in (0..n).rev() {
        let s: f64 = (c + 1..n).map(|k| a[c][k] * b[k]).sum();
        b[c] = (y[c] - s) / a[c][c];
    }
    b
}

/// A linear surrogate on random masks: each group kept with probability 1/2, masked
/// groups filled, ordinary least squares of the answers on the kept indicators with an
/// intercept; the coefficients. The masks come from `seed` alone, so the same seed gives
/// the same masks on the audited model and on its honest twin.
pub fn surrogate(
    model: &dyn Model,
    target: usize,
    x: &[f64],
    fill: &[f64],
    groups: &[Vec<usize>],
    seed: u64,
) -> kilter::Result<Computed> {
    let m = groups.len();
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let masks: Vec<Vec<bool>> = (0..SURROGATE_MASKS)
        .map(|_| (0..m).map(|_| rng.random_bool(0.5)).collect())
        .collect();
    let rows: Vec<Vec<f64>> = masks.iter().map(|k| masked(x, fill, groups, k)).collect();
    let inputs = rows_matrix(&rows);
    let v = answers(model, &inputs, target)?;
    let design: Vec<Vec<f64>> = masks
        .iter()
        .map(|k| {
            std::iter::once(1.0)
                .chain(k.iter().map(|&b| f64::from(u8::from(b))))
                .collect()
        })
        .collect();
    let p = m + 1;
    let mut xtx = vec![vec![0.0; p]; p];
    let mut xty = vec![0.0; p];
    for (row, &y) in design.iter().zip(&v) {
        for i in 0..p {
            xty[i] += row[i] * y;
            for j in 0..p {
                xtx[i][j] += row[i] * row[j];
            }
        }
    }
    let beta = solve(xtx, xty);
    Ok(Computed {
        attribution: beta[1..].to_vec(),
        inputs,
    })
}

/// Integrated gradients (Sundararajan, Taly & Yan 2017) from `baseline`, midpoint rule
/// with [`IG_STEPS`] points, summed within groups. Gradients: the subject's exact ones,
/// or central differences whose step is half the path's increment in each feature (so
/// the differences of one feature tile its stretch of the path).
pub fn integrated_gradients(
    subject: &Subject,
    target: usize,
    x: &[f64],
    baseline: &[f64],
    groups: &[Vec<usize>],
) -> kilter::Result<Computed> {
    let d = x.len();
    let steps = IG_STEPS;
    let delta: Vec<f64> = x.iter().zip(baseline).map(|(a, b)| a - b).collect();
    let mut path = Array2::zeros((steps, d));
    for k in 0..steps {
        let t = (k as f64 + 0.5) / steps as f64;
        for j in 0..d {
            path[[k, j]] = baseline[j] + t * delta[j];
        }
    }
    let grads = match subject.gradients(path.view(), target)? {
        Some(g) => g,
        None => {
            let mut probes = Array2::zeros((steps * 2 * d, d));
            for k in 0..steps {
                for j in 0..d {
                    let h = (delta[j].abs() / (2.0 * steps as f64)).max(1e-9);
                    for (side, sign) in [(0, 1.0), (1, -1.0)] {
                        let mut row = probes.row_mut((k * d + j) * 2 + side);
                        row.assign(&path.row(k));
                        row[j] += sign * h;
                    }
                }
            }
            let v = answers(subject.model.as_ref(), &probes, target)?;
            let mut g = Array2::zeros((steps, d));
            for k in 0..steps {
                for j in 0..d {
                    let h = (delta[j].abs() / (2.0 * steps as f64)).max(1e-9);
                    let i = (k * d + j) * 2;
                    g[[k, j]] = (v[i] - v[i + 1]) / (2.0 * h);
                }
            }
            g
        }
    };
    let mean_grad = grads.mean_axis(Axis(0)).expect("steps > 0");
    let per_feature: Vec<f64> = (0..d).map(|j| delta[j] * mean_grad[j]).collect();
    Ok(Computed {
        attribution: groups
            .iter()
            .map(|g| g.iter().map(|&j| per_feature[j]).sum())
            .collect(),
        inputs: path,
    })
}

/// Fill values of one kind.
#[derive(Debug, Clone)]
pub struct FillValues {
    pub mean: Vec<f64>,
    pub median: Vec<f64>,
}

impl FillValues {
    /// Column means and medians (mean of the two middle values for an even count).
    pub fn of(rows: ArrayView2<'_, f64>) -> FillValues {
        let mean = rows.mean_axis(Axis(0)).expect("rows").to_vec();
        let median = rows
            .columns()
            .into_iter()
            .map(|c| {
                let mut v = c.to_vec();
                v.sort_by(f64::total_cmp);
                let n = v.len();
                if n % 2 == 1 {
                    v[n / 2]
                } else {
                    (v[n / 2 - 1] + v[n / 2]) / 2.0
                }
            })
            .collect();
        FillValues { mean, median }
    }

    pub fn get(&self, fill: Fill, d: usize) -> Vec<f64> {
        match fill {
            Fill::Zero => vec![0.0; d],
            Fill::Mean => self.mean.clone(),
            Fill::Median => self.median.clone(),
        }
    }
}

/// Computes one explanation of one row.
pub fn explain(
    explanation: Explanation,
    subject: &Subject,
    target: usize,
    x: &[f64],
    fill: &[f64],
    groups: &[Vec<usize>],
    seed: u64,
) -> kilter::Result<Computed> {
    let model = subject.model.as_ref();
    match explanation {
        Explanation::Deletion(_) => shapley_filled(model, target, x, fill, groups),
        Explanation::Occlusion(_) => occlusion(model, target, x, fill, groups),
        Explanation::Surrogate(_) => surrogate(model, target, x, fill, groups, seed),
        Explanation::IntegratedGradients(_) => {
            integrated_gradients(subject, target, x, fill, groups)
        }
    }
}

// ---------------------------------------------------------------------------------------
// Truth.

/// The truth label of a case.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum Truth {
    Honest,
    Artefact,
    Ambiguous,
}

/// `Σ|a - h| / (Σ|h| + floor)`: the explanation's departure from the honest twin's,
/// relative to the honest attribution's mass, with a floor of [`DISTANCE_FLOOR`] times
/// the honest output's spread on the data so that differences immaterial next to the
/// model's range do not count when the honest attribution is itself near zero. Both
/// terms scale with the output, so the distance does not depend on the output's units.
pub fn distance(a: &[f64], h: &[f64], output_sd: f64) -> f64 {
    let diff: f64 = a.iter().zip(h).map(|(x, y)| (x - y).abs()).sum();
    let mass: f64 = h.iter().map(|v| v.abs()).sum();
    diff / (mass + DISTANCE_FLOOR * output_sd).max(1e-300)
}

pub fn truth_of(distance: f64) -> Truth {
    if distance > ARTEFACT_ABOVE {
        Truth::Artefact
    } else if distance < HONEST_BELOW {
        Truth::Honest
    } else {
        Truth::Ambiguous
    }
}

// ---------------------------------------------------------------------------------------
// Configurations and cases.

/// Which seeds to run.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum SeedSet {
    Tune,
    HeldOut,
    Ci,
}

impl SeedSet {
    pub fn name(self) -> &'static str {
        match self {
            SeedSet::Tune => "tune",
            SeedSet::HeldOut => "held-out",
            SeedSet::Ci => "ci",
        }
    }

    pub fn parse(text: &str) -> Option<SeedSet> {
        match text {
            "tune" => Some(SeedSet::Tune),
            "held-out" => Some(SeedSet::HeldOut),
            "ci" => Some(SeedSet::Ci),
            _ => None,
        }
    }

    /// The configuration seeds, in order.
    pub fn seeds(self) -> Vec<u64> {
        match self {
            SeedSet::Tune => (0..CONFIGURATIONS as u64).collect(),
            SeedSet::HeldOut => (HELD_OUT_BASE..HELD_OUT_BASE + CONFIGURATIONS as u64).collect(),
            SeedSet::Ci => (HELD_OUT_BASE..HELD_OUT_BASE + CI_CONFIGURATIONS as u64).collect(),
        }
    }
}

/// One configuration: everything but the rows, a pure function of its seed.
#[derive(Debug, Clone)]
pub struct Configuration {
    pub seed: u64,
    pub shape: usize,
    pub model: ModelKind,
    /// `None`: the honest model itself.
    pub switch: Option<Switch>,
    pub explanation: Explanation,
}

/// Random streams of a configuration.
const STREAM_CHOICES: u64 = 0;
const STREAM_DATA: u64 = 1;
const STREAM_NETWORK: u64 = 2;
const STREAM_SURROGATE: u64 = 3;

fn stream(seed: u64, purpose: u64) -> ChaCha8Rng {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    rng.set_stream(purpose);
    rng
}

impl Configuration {
    /// Shape and model kind cycle with the seed (every pair of them once in 25 seeds);
    /// honesty, the artefact's switch and the explanation are drawn from the seed.
    pub fn of_seed(seed: u64) -> Configuration {
        let i = (seed % HELD_OUT_BASE) as usize;
        let shape = i % shapes().len();
        let model = MODEL_KINDS[(i / shapes().len()) % MODEL_KINDS.len()];
        let mut rng = stream(seed, STREAM_CHOICES);
        let explanation = EXPLANATIONS[rng.random_range(0..EXPLANATIONS.len())];
        let switch = if rng.random_bool(HONEST_SHARE) {
            None
        } else {
            let mut options = vec![Switch::UnusedIndependent, Switch::Flip, Switch::Swap];
            if shapes()[shape].unused_correlated.is_some() {
                options.push(Switch::UnusedCorrelated);
            }
            Some(options[rng.random_range(0..options.len())])
        };
        Configuration {
            seed,
            shape,
            model,
            switch,
            explanation,
        }
    }

    pub fn construction(&self) -> String {
        match self.switch {
            None => "honest".into(),
            Some(s) => format!("artefact:{}", s.name()),
        }
    }
}

/// One audited case.
#[derive(Debug, Clone, Serialize)]
pub struct CaseResult {
    pub set: String,
    pub case: String,
    pub seed: u64,
    pub row: usize,
    pub shape: String,
    pub model: String,
    pub construction: String,
    pub explanation: String,
    pub method: String,
    pub fill: String,
    /// Normalised L1 distance between the explanation on the audited model and on its
    /// honest twin.
    pub distance: f64,
    /// Share of the explanation's model inputs that the artefact's detector takes for off
    /// the data (whether or not the model is an artefact).
    pub off_data_share: f64,
    pub truth: Truth,
    pub attribution: Vec<f64>,
    pub honest_attribution: Vec<f64>,
    /// Null for ambiguous cases, which are not audited.
    pub reliability: Option<f64>,
    pub verdict: Option<String>,
    pub reasons: Vec<String>,
    /// The record's evidence and on-data effects, for tuning.
    pub evidence: Option<serde_json::Value>,
}

/// The profile, models and groups of one configuration.
struct Built {
    profile: Profile,
    queries: Array2<f64>,
    honest: Subject,
    audited: Subject,
    groups: Groups,
    members: Vec<Vec<usize>>,
    scale: OutputScale,
    corpus_fills: FillValues,
    profile_fills: FillValues,
    detector: Detector,
}

fn groups_of(shape: &Shape) -> kilter::Result<Groups> {
    match &shape.groups {
        None => Ok(Groups::singletons(&shape.features)),
        Some(lists) => {
            // Groups are read from a `--groups` file; the library takes no lists directly.
            let mut file = tempfile::NamedTempFile::new()
                .map_err(|e| kilter::Error::io(Path::new("groups.json"), e))?;
            std::io::Write::write_all(
                &mut file,
                serde_json::to_string(lists).expect("lists").as_bytes(),
            )
            .map_err(|e| kilter::Error::io(file.path(), e))?;
            Groups::from_json_file(file.path(), &shape.features)
        }
    }
}

fn build(config: &Configuration, rows: usize) -> kilter::Result<Built> {
    let shape = &shapes()[config.shape];
    let detector = shape.detector();
    let mut data = stream(config.seed, STREAM_DATA);
    let corpus = shape.sample(&mut data, CORPUS_ROWS);
    // Query rows from the same distribution, redrawn in the rare case (0.1%) that the
    // artefact's detector would not take one for data: an audited input is a real one.
    let mut queries = Array2::zeros((rows, shape.d()));
    for mut q in queries.outer_iter_mut() {
        let row = loop {
            let draw = shape.draw(&mut data);
            if detector.on_data(&draw) {
                break draw;
            }
        };
        q.assign(&ArrayView1::from(&row));
    }
    let matrix = FeatureMatrix {
        names: shape.features.clone(),
        named: true,
        values: corpus.clone(),
        source: format!("<verdict benchmark {} seed {}>", shape.name, config.seed).into(),
    };
    let profile = ProfileSettings::default().fit(&matrix)?;
    let honest_model: Arc<dyn Model> = if config.model.is_tree() {
        let suffix = if config.model == ModelKind::GbTrees {
            "gb"
        } else {
            "rf"
        };
        tree_model(&format!("{}-{suffix}", shape.name))
    } else {
        let mut rng = stream(config.seed, STREAM_NETWORK);
        Arc::new(honest_network(config.model, shape, &mut rng))
    };
    let exact = !config.model.is_tree();
    let scale = OutputScale::of(honest_model.as_ref(), config.model, corpus.view());
    let honest = Subject {
        model: honest_model.clone(),
        artefact: None,
        exact_gradients: exact,
    };
    let audited = match config.switch {
        None => honest.clone(),
        Some(switch) => {
            let (mean, sd) = shape.moments();
            let features = match switch {
                Switch::UnusedIndependent => (shape.unused_independent, shape.unused_independent),
                Switch::UnusedCorrelated => {
                    let j = shape
                        .unused_correlated
                        .expect("a correlated unused feature");
                    (j, j)
                }
                Switch::Flip => (0, 0),
                Switch::Swap => (shape.swap[0], shape.swap[1]),
            };
            let artefact = Arc::new(Artefact {
                honest: honest_model.clone(),
                detector: detector.clone(),
                switch,
                features,
                probability: config.model.probability(),
                mean,
                sd,
                scale,
            });
            Subject {
                model: artefact.clone(),
                artefact: Some(artefact),
                exact_gradients: exact,
            }
        }
    };
    let distribution = profile.feature_distribution()?;
    let profile_fills = FillValues {
        mean: distribution.location().to_vec(),
        median: distribution.median().to_vec(),
    };
    Ok(Built {
        groups: groups_of(shape)?,
        members: shape.group_members(),
        corpus_fills: FillValues::of(corpus.view()),
        profile,
        queries,
        honest,
        audited,
        scale,
        profile_fills,
        detector,
    })
}

/// Runs one configuration's cases.
pub fn run_configuration(
    set: SeedSet,
    config: &Configuration,
    rows: usize,
) -> kilter::Result<Vec<CaseResult>> {
    let shape = &shapes()[config.shape];
    let built = build(config, rows)?;
    let target = config.model.target();
    let explanation = config.explanation;
    let fill = explanation.fill();
    let d = shape.d();
    let settings = AuditSettings {
        fill: fill.kilter(),
        sampler: Sampler::Auto,
        baseline: BaselineChoice::Fixed(fill.baseline()),
        method: explanation.kilter_method(),
        target: Some(target),
        seed: config.seed,
        ..AuditSettings::default()
    };
    let auditor = Auditor::new(
        &built.profile,
        built.audited.model.as_ref(),
        built.groups.clone(),
        settings,
    )?;
    let mut results = Vec::with_capacity(rows);
    for r in 0..rows {
        let x = built.queries.row(r).to_vec();
        // kilter's deletion uses the profile's fill values; a supplied explanation was
        // made with the corpus's own.
        let fill_vector = match explanation {
            Explanation::Deletion(_) => built.profile_fills.get(fill, d),
            _ => built.corpus_fills.get(fill, d),
        };
        let seed = stream(config.seed, STREAM_SURROGATE + 8 * r as u64).random::<u64>();
        let on_model = explain(
            explanation,
            &built.audited,
            target,
            &x,
            &fill_vector,
            &built.members,
            seed,
        )?;
        let on_honest = explain(
            explanation,
            &built.honest,
            target,
            &x,
            &fill_vector,
            &built.members,
            seed,
        )?;
        let dist = distance(
            &on_model.attribution,
            &on_honest.attribution,
            built.scale.output_sd,
        );
        let truth = truth_of(dist);
        let (reliability, verdict, reasons, evidence) = if truth == Truth::Ambiguous {
            (None, None, Vec::new(), None)
        } else {
            let supplied = match explanation {
                Explanation::Deletion(_) => None,
                _ => Some(on_model.attribution.as_slice()),
            };
            let record = auditor.audit_row(r, built.queries.row(r), supplied)?;
            let verdict = serde_json::to_value(record.verdict)
                .ok()
                .and_then(|v| v.as_str().map(str::to_string))
                .unwrap_or_else(|| format!("{:?}", record.verdict).to_lowercase());
            let evidence = serde_json::json!({
                "evidence": record.evidence,
                "effect": record.on_data.effect,
                "usage": record.on_data.usage,
            });
            (
                Some(record.reliability),
                Some(verdict),
                record.reasons,
                Some(evidence),
            )
        };
        results.push(CaseResult {
            set: set.name().into(),
            case: format!("{}-{}-{}", set.name(), config.seed, r),
            seed: config.seed,
            row: r,
            shape: shape.name.clone(),
            model: config.model.name().into(),
            construction: config.construction(),
            explanation: explanation.name(),
            method: explanation.method().into(),
            fill: fill.name().into(),
            distance: dist,
            off_data_share: built.detector.off_share(on_model.inputs.view()),
            truth,
            attribution: on_model.attribution,
            honest_attribution: on_honest.attribution,
            reliability,
            verdict,
            reasons,
            evidence,
        });
    }
    Ok(results)
}

/// Runs a seed set (the first `cases` cases of it when given), configurations in
/// parallel; results in seed order. `progress` is called after each configuration with
/// the number done and the total.
pub fn run(
    set: SeedSet,
    cases: Option<usize>,
    progress: &(dyn Fn(usize, usize) + Sync),
) -> Result<Vec<CaseResult>, String> {
    let mut plan: Vec<(Configuration, usize)> = Vec::new();
    let mut left = cases.unwrap_or(usize::MAX);
    for seed in set.seeds() {
        if left == 0 {
            break;
        }
        let rows = ROWS_PER_CONFIGURATION.min(left);
        left -= rows;
        plan.push((Configuration::of_seed(seed), rows));
    }
    let done = std::sync::atomic::AtomicUsize::new(0);
    let total = plan.len();
    let results: Vec<Result<Vec<CaseResult>, String>> = plan
        .par_iter()
        .map(|(config, rows)| {
            let out = run_configuration(set, config, *rows).map_err(|e| {
                format!(
                    "configuration seed {} ({} / {} / {} / {}): {e}",
                    config.seed,
                    shapes()[config.shape].name,
                    config.model.name(),
                    config.construction(),
                    config.explanation.name()
                )
            });
            let n = done.fetch_add(1, std::sync::atomic::Ordering::Relaxed) + 1;
            progress(n, total);
            out
        })
        .collect();
    let mut all = Vec::new();
    for r in results {
        all.extend(r?);
    }
    Ok(all)
}

// ---------------------------------------------------------------------------------------
// Figures.

/// The confusion table, the target rates and the AUROC of one run.
#[derive(Debug, Clone, Serialize)]
pub struct Summary {
    pub cases: usize,
    pub ambiguous: usize,
    pub honest: usize,
    pub artefact: usize,
    /// `[truth honest, truth artefact] x [reliable, doubtful, unreliable]`.
    pub table: [[usize; 3]; 2],
    pub honest_reliable: f64,
    pub honest_unreliable: f64,
    pub artefact_flagged: f64,
    pub artefact_unreliable: f64,
    pub auroc: f64,
}

fn verdict_index(v: &str) -> usize {
    match v {
        "reliable" => 0,
        "doubtful" => 1,
        _ => 2,
    }
}

/// AUROC of `reliability` for telling honest (high) from artefact (low) cases, in the
/// Mann-Whitney form: the share of (honest, artefact) pairs in which the honest case
/// scores higher, ties counting one half.
pub fn auroc(honest: &[f64], artefact: &[f64]) -> f64 {
    if honest.is_empty() || artefact.is_empty() {
        return f64::NAN;
    }
    let mut wins = 0.0;
    for &h in honest {
        for &a in artefact {
            if h > a {
                wins += 1.0;
            } else if h == a {
                wins += 0.5;
            }
        }
    }
    wins / (honest.len() * artefact.len()) as f64
}

fn share(part: usize, whole: usize) -> f64 {
    if whole == 0 {
        f64::NAN
    } else {
        part as f64 / whole as f64
    }
}

pub fn summarize(results: &[CaseResult]) -> Summary {
    let mut table = [[0usize; 3]; 2];
    let mut scores: [Vec<f64>; 2] = [Vec::new(), Vec::new()];
    let mut ambiguous = 0;
    for c in results {
        let t = match c.truth {
            Truth::Honest => 0,
            Truth::Artefact => 1,
            Truth::Ambiguous => {
                ambiguous += 1;
                continue;
            }
        };
        let v = verdict_index(c.verdict.as_deref().unwrap_or("unreliable"));
        table[t][v] += 1;
        scores[t].push(c.reliability.unwrap_or(0.0));
    }
    let honest: usize = table[0].iter().sum();
    let artefact: usize = table[1].iter().sum();
    Summary {
        cases: results.len(),
        ambiguous,
        honest,
        artefact,
        table,
        honest_reliable: share(table[0][0], honest),
        honest_unreliable: share(table[0][2], honest),
        artefact_flagged: share(table[1][1] + table[1][2], artefact),
        artefact_unreliable: share(table[1][2], artefact),
        auroc: auroc(&scores[0], &scores[1]),
    }
}

/// One target: its name, the measured value, the bound, whether it is met.
pub struct Target {
    pub name: &'static str,
    pub value: f64,
    pub bound: String,
    pub met: bool,
}

impl Summary {
    pub fn targets(&self) -> Vec<Target> {
        let at_least = |name, value: f64, bound: f64| Target {
            name,
            value,
            bound: format!(">= {bound:.2}"),
            met: value >= bound,
        };
        vec![
            at_least(
                "honest: share reliable",
                self.honest_reliable,
                HONEST_RELIABLE_AT_LEAST,
            ),
            Target {
                name: "honest: share unreliable",
                value: self.honest_unreliable,
                bound: format!("<= {HONEST_UNRELIABLE_AT_MOST:.2}"),
                met: self.honest_unreliable <= HONEST_UNRELIABLE_AT_MOST,
            },
            at_least(
                "artefact: share flagged (doubtful or unreliable)",
                self.artefact_flagged,
                ARTEFACT_FLAGGED_AT_LEAST,
            ),
            at_least(
                "artefact: share unreliable",
                self.artefact_unreliable,
                ARTEFACT_UNRELIABLE_AT_LEAST,
            ),
            at_least(
                "AUROC of reliability (honest above artefact)",
                self.auroc,
                AUROC_AT_LEAST,
            ),
        ]
    }

    pub fn all_met(&self) -> bool {
        self.targets().iter().all(|t| t.met)
    }
}

/// The printed report: the confusion table, the target rates, and the misclassified
/// cases broken down by shape, model, explanation method and fill.
pub fn report(set: SeedSet, results: &[CaseResult]) -> String {
    let s = summarize(results);
    let mut out = String::new();
    let _ = writeln!(
        out,
        "verdict benchmark, {} seeds: {} cases, {} ambiguous dropped ({} honest, {} artefact kept)",
        set.name(),
        s.cases,
        s.ambiguous,
        s.honest,
        s.artefact
    );
    let _ = writeln!(out);
    let _ = writeln!(
        out,
        "  {:<10} {:>9} {:>9} {:>11} {:>7}",
        "truth", "reliable", "doubtful", "unreliable", "total"
    );
    for (t, name) in ["honest", "artefact"].iter().enumerate() {
        let row = s.table[t];
        let _ = writeln!(
            out,
            "  {:<10} {:>9} {:>9} {:>11} {:>7}",
            name,
            row[0],
            row[1],
            row[2],
            row.iter().sum::<usize>()
        );
    }
    let _ = writeln!(out);
    for t in s.targets() {
        let _ = writeln!(
            out,
            "  {:<48} {:>7.3}   target {}  {}",
            t.name,
            t.value,
            t.bound,
            if t.met { "met" } else { "NOT MET" }
        );
    }
    let _ = writeln!(out);
    let _ = writeln!(
        out,
        "  misclassified: honest not reliable (of honest) | artefact not unreliable (of artefact), by"
    );
    type Key = fn(&CaseResult) -> String;
    let keys: [(&str, Key); 5] = [
        ("shape", |c| c.shape.clone()),
        ("model", |c| c.model.clone()),
        ("construction", |c| c.construction.clone()),
        ("method", |c| c.method.clone()),
        ("fill", |c| c.fill.clone()),
    ];
    for (label, key) in keys {
        let mut by: BTreeMap<String, [usize; 4]> = BTreeMap::new();
        for c in results {
            let entry = by.entry(key(c)).or_default();
            match (c.truth, c.verdict.as_deref()) {
                (Truth::Honest, v) => {
                    entry[1] += 1;
                    if v != Some("reliable") {
                        entry[0] += 1;
                    }
                }
                (Truth::Artefact, v) => {
                    entry[3] += 1;
                    if v != Some("unreliable") {
                        entry[2] += 1;
                    }
                }
                (Truth::Ambiguous, _) => {}
            }
        }
        let _ = writeln!(out, "    {label}:");
        for (k, v) in by {
            let _ = writeln!(
                out,
                "      {:<28} {:>3} / {:<3} | {:>3} / {:<3}",
                k, v[0], v[1], v[2], v[3]
            );
        }
    }
    out
}
