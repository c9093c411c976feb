//! Models: the seam through which kilter asks a model for its outputs (and gradients).
//!
//! Three adapters implement [`Model`]: kilter's own JSON network file ([`network`]), ONNX
//! run in-process ([`onnx`]), and a long-running child process speaking the line protocol
//! ([`line_protocol`]). Every call is batched: callers hand over a matrix of inputs and
//! adapters split it into the batches that suit them.

pub mod finite_difference;
pub mod line_protocol;
pub mod network;

use std::path::{Path, PathBuf};
use std::time::Duration;

use ndarray::{Array2, ArrayView2};

use crate::error::{Error, Result};

pub use finite_difference::FiniteDifference;
pub use line_protocol::LineProtocolModel;
pub use network::NetworkModel;

/// A model kilter can query.
pub trait Model: Send + Sync {
    /// Number of input features, when the model declares it.
    fn input_dim(&self) -> Option<usize>;

    /// Outputs for every input row: `rows x c` scores or probabilities.
    fn predict(&self, inputs: ArrayView2<'_, f64>) -> Result<Array2<f64>>;

    /// Gradients `∂ output[target] / ∂ input` for every row (`rows x d`), when the model can
    /// compute them itself; `Ok(None)` when it cannot, so callers fall back to finite
    /// differences ([`FiniteDifference`]).
    fn gradients(&self, inputs: ArrayView2<'_, f64>, target: usize) -> Result<Option<Array2<f64>>>;

    /// The number of rows per call that suits this model.
    fn preferred_batch(&self) -> usize;

    /// Relative precision of the model's arithmetic (2⁻²⁴ for single precision), which
    /// sets the finite-difference step.
    fn precision(&self) -> f64 {
        f64::EPSILON
    }

    /// A short description for summaries and errors.
    fn describe(&self) -> String;
}

impl std::fmt::Debug for dyn Model {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "Model({})", self.describe())
    }
}

/// How the user named the model: exactly one of `--model FILE` or `--model-cmd CMD`.
#[derive(Debug, Clone, PartialEq)]
pub enum ModelSource {
    /// `--model FILE.json` or `--model FILE.onnx`.
    File {
        path: PathBuf,
        /// `--model-output NAME` (ONNX only).
        output: Option<String>,
    },
    /// `--model-cmd CMD`.
    Command {
        command: String,
        batch_size: usize,
        timeout: Duration,
    },
}

impl ModelSource {
    /// Checks the combination of model flags.
    pub fn from_flags(
        model: Option<PathBuf>,
        command: Option<String>,
        output: Option<String>,
        batch_size: usize,
        timeout_seconds: f64,
    ) -> Result<ModelSource> {
        if batch_size == 0 {
            return Err(Error::InvalidSetting {
                flag: "--batch-size",
                value: "0".into(),
                expected: "at least 1 row per batch".into(),
            });
        }
        // A value beyond what a Duration holds (about 5.8e11 years) is as wrong as a
        // negative one, and converting it unchecked would panic.
        let timeout = Duration::try_from_secs_f64(timeout_seconds)
            .ok()
            .filter(|t| !t.is_zero())
            .ok_or_else(|| Error::InvalidSetting {
                flag: "--model-timeout",
                value: timeout_seconds.to_string(),
                expected: "a positive number of seconds".into(),
            })?;
        match (model, command) {
            (Some(path), None) => Ok(ModelSource::File { path, output }),
            (None, Some(command)) => {
                if output.is_some() {
                    return Err(Error::InvalidSetting {
                        flag: "--model-output",
                        value: output.unwrap_or_default(),
                        expected: "only with --model FILE.onnx".into(),
                    });
                }
                Ok(ModelSource::Command {
                    command,
                    batch_size,
                    timeout,
                })
            }
            (Some(_), Some(_)) => Err(Error::InvalidSetting {
                flag: "--model",
                value: "both --model and --model-cmd".into(),
                expected: "exactly one of --model FILE or --model-cmd CMD".into(),
            }),
            (None, None) => Err(Error::InvalidSetting {
                flag: "--model",
                value: "neither --model nor --model-cmd".into(),
                expected: "exactly one of --model FILE or --model-cmd CMD".into(),
            }),
        }
    }

    /// Paths this source reads, for output-path checks.
    pub fn input_paths(&self) -> Vec<&Path> {
        match self {
            ModelSource::File { path, .. } => vec![path.as_path()],
            ModelSource::Command { .. } => vec![],
        }
    }

    /// Loads or starts the model.
    pub fn load(&self) -> Result<Box<dyn Model>> {
        match self {
            ModelSource::File { path, output } => {
                let ext = path
                    .extension()
                    .and_then(|e| e.to_str())
                    .map(str::to_ascii_lowercase);
                match ext.as_deref() {
                    Some("json") => {
                        if output.is_some() {
                            return Err(Error::InvalidSetting {
                                flag: "--model-output",
                                value: output.clone().unwrap_or_default(),
                                expected: "only with an ONNX model".into(),
                            });
                        }
                        Ok(Box::new(NetworkModel::load(path)?))
                    }
                    Some("onnx") => load_onnx(path, output.as_deref()),
                    _ => Err(Error::ModelFile {
                        path: path.clone(),
                        detail:
                            "unknown model type; model files end in .json (kilter's own) or .onnx"
                                .into(),
                    }),
                }
            }
            ModelSource::Command {
                command,
                batch_size,
                timeout,
            } => Ok(Box::new(LineProtocolModel::start(
                command,
                *batch_size,
                *timeout,
            )?)),
        }
    }
}

#[cfg(feature = "onnx")]
fn load_onnx(path: &Path, output: Option<&str>) -> Result<Box<dyn Model>> {
    Ok(Box::new(onnx::OnnxModel::load(path, output)?))
}

#[cfg(not(feature = "onnx"))]
fn load_onnx(path: &Path, _output: Option<&str>) -> Result<Box<dyn Model>> {
    Err(Error::ModelFile {
        path: path.to_path_buf(),
        detail: "this kilter was built without ONNX support (cargo feature `onnx`)".into(),
    })
}

#[cfg(feature = "onnx")]
pub mod onnx;

/// Where gradients came from.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum GradientMethod {
    /// The model computed them (back-propagation, or a line-protocol model that answers
    /// `gradients`).
    Exact,
    /// Central finite differences on the model's outputs.
    FiniteDifference,
}

/// Gradients of output `target` at every row: the model's own when it has them, central
/// differences otherwise.
pub fn target_gradients(
    model: &dyn Model,
    differences: &FiniteDifference,
    inputs: ArrayView2<'_, f64>,
    target: usize,
) -> Result<(Array2<f64>, GradientMethod)> {
    match model.gradients(inputs, target)? {
        Some(g) => Ok((g, GradientMethod::Exact)),
        None => Ok((
            differences.gradients(model, inputs, target)?,
            GradientMethod::FiniteDifference,
        )),
    }
}

/// Checks that `target` names one of the model's outputs.
pub fn check_target(outputs: &Array2<f64>, target: usize) -> Result<()> {
    if target >= outputs.ncols() {
        return Err(Error::InvalidSetting {
            flag: "--target",
            value: target.to_string(),
            expected: format!(
                "an output index below {}, the number of outputs the model answers",
                outputs.ncols()
            ),
        });
    }
    Ok(())
}

/// Checks a model's answer: one finite output vector of one common length per input.
pub(crate) fn check_outputs(outputs: &Array2<f64>, rows: usize, source: &str) -> Result<()> {
    if outputs.nrows() != rows {
        return Err(Error::ModelAnswer {
            model: source.to_string(),
            detail: format!("answered {} output rows for {rows} inputs", outputs.nrows()),
        });
    }
    if outputs.ncols() == 0 {
        return Err(Error::ModelAnswer {
            model: source.to_string(),
            detail: "answered empty output vectors".into(),
        });
    }
    if let Some(((r, c), v)) = outputs.indexed_iter().find(|(_, v)| !v.is_finite()) {
        return Err(Error::ModelAnswer {
            model: source.to_string(),
            detail: format!("output {c} of input row {} is {v}", r + 1),
        });
    }
    Ok(())
}
