//! Embeddings: the map from raw inputs into the space where every distance is measured.
//!
//! The same fitted embedding is applied to the reference rows, to the inputs being scored
//! and to every perturbed input, so that "far from the data" always means the same thing.

use std::fmt;
use std::path::{Path, PathBuf};
use std::str::FromStr;
use std::sync::Arc;

use ndarray::{Array1, Array2, ArrayView2, Axis};
use serde::{Deserialize, Serialize};

use crate::error::{Error, Result};
use crate::linalg;

/// A fitted map from input space (`input_dim` features) to embedded space.
pub trait Embedding: Send + Sync {
    /// Number of input features.
    fn input_dim(&self) -> usize;
    /// Dimension of the embedded space.
    fn output_dim(&self) -> usize;
    /// Embeds every row. Only a learned encoder can fail (its runtime reports an error).
    fn embed(&self, rows: ArrayView2<'_, f64>) -> Result<Array2<f64>>;
}

/// The `--embed` setting, before fitting.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "kebab-case")]
pub enum EmbeddingSpec {
    /// The raw features.
    None,
    /// Subtract the mean, divide by the population standard deviation.
    Standardize,
    /// The first `components` principal components of the standardized data.
    Pca { components: usize },
    /// A learned encoder in ONNX: distances are measured in its output space
    /// (feature-space Mahalanobis distance, Lee, Lee, Lee & Shin 2018).
    Onnx {
        path: PathBuf,
        output: Option<String>,
    },
}

impl FromStr for EmbeddingSpec {
    type Err = Error;
    fn from_str(text: &str) -> Result<Self> {
        let invalid = || Error::InvalidSetting {
            flag: "--embed",
            value: text.to_string(),
            expected: "none, standardize, or pca:R with R a positive whole number".into(),
        };
        match text {
            "none" => Ok(EmbeddingSpec::None),
            "standardize" => Ok(EmbeddingSpec::Standardize),
            _ if text.starts_with("onnx:") => {
                let rest = &text["onnx:".len()..];
                // onnx:FILE or onnx:FILE:OUTPUT, FILE ending in .onnx.
                let (path, output) = match rest.find(".onnx:") {
                    Some(at) => (&rest[..at + 5], Some(rest[at + 6..].to_string())),
                    None => (rest, None),
                };
                if path.is_empty() || output.as_deref() == Some("") {
                    return Err(Error::InvalidSetting {
                        flag: "--embed",
                        value: text.to_string(),
                        expected: "onnx:FILE.onnx or onnx:FILE.onnx:OUTPUT".into(),
                    });
                }
                Ok(EmbeddingSpec::Onnx {
                    path: PathBuf::from(path),
                    output,
                })
            }
            _ => {
                let r = text.strip_prefix("pca:").ok_or_else(invalid)?;
                let components: usize = r.parse().map_err(|_| invalid())?;
                if components == 0 {
                    return Err(invalid());
                }
                Ok(EmbeddingSpec::Pca { components })
            }
        }
    }
}

impl fmt::Display for EmbeddingSpec {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            EmbeddingSpec::None => f.write_str("none"),
            EmbeddingSpec::Standardize => f.write_str("standardize"),
            EmbeddingSpec::Pca { components } => write!(f, "pca:{components}"),
            EmbeddingSpec::Onnx { path, output } => match output {
                Some(o) => write!(f, "onnx:{}:{o}", path.display()),
                None => write!(f, "onnx:{}", path.display()),
            },
        }
    }
}

/// A fitted embedding; its parameters travel inside the profile.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "kebab-case")]
pub enum FittedEmbedding {
    /// The identity on `dim` features.
    None { dim: usize },
    /// `(x - mean) / scale`.
    Standardize { mean: Vec<f64>, scale: Vec<f64> },
    /// `((x - mean) / scale) V`, `V` the leading eigenvectors (as rows of `components`).
    Pca {
        mean: Vec<f64>,
        scale: Vec<f64>,
        /// R rows of d loadings each.
        components: Vec<Vec<f64>>,
        /// Variance of the standardized data along each component.
        explained_variance: Vec<f64>,
    },
    /// A learned ONNX encoder, kept whole inside the profile.
    Onnx(OnnxEncoder),
}

/// An ONNX encoder: its file's bytes (so the profile stays self-contained), the output
/// used, and the loaded model.
#[derive(Clone, Serialize, Deserialize)]
pub struct OnnxEncoder {
    /// The ONNX file, base64 in the profile header.
    #[serde(with = "base64_bytes")]
    onnx: Arc<Vec<u8>>,
    output: Option<String>,
    input_dim: usize,
    output_dim: usize,
    /// Where it was read from at fit time (for people reading the profile).
    origin: String,
    /// Population standard deviation of each raw input feature in the fitted rows.
    feature_spread: Vec<f64>,
    #[serde(skip)]
    model: Option<Arc<dyn crate::models::Model>>,
}

impl fmt::Debug for OnnxEncoder {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(
            f,
            "OnnxEncoder({}, {} bytes, {} -> {})",
            self.origin,
            self.onnx.len(),
            self.input_dim,
            self.output_dim
        )
    }
}

impl PartialEq for OnnxEncoder {
    fn eq(&self, other: &Self) -> bool {
        self.onnx == other.onnx && self.output == other.output
    }
}

mod base64_bytes {
    use std::sync::Arc;

    use base64::Engine;
    use serde::{Deserialize, Deserializer, Serializer};

    pub fn serialize<S: Serializer>(bytes: &Arc<Vec<u8>>, s: S) -> Result<S::Ok, S::Error> {
        s.serialize_str(&base64::engine::general_purpose::STANDARD.encode(bytes.as_slice()))
    }

    pub fn deserialize<'de, D: Deserializer<'de>>(d: D) -> Result<Arc<Vec<u8>>, D::Error> {
        let text = String::deserialize(d)?;
        base64::engine::general_purpose::STANDARD
            .decode(text.as_bytes())
            .map(Arc::new)
            .map_err(serde::de::Error::custom)
    }
}

impl OnnxEncoder {
    /// Spread of each raw input feature in the fitted rows.
    pub fn feature_spread(&self) -> &[f64] {
        &self.feature_spread
    }

    /// Reads and loads the encoder; its input width must be the data's.
    fn fit(path: &Path, output: Option<&str>, rows: ArrayView2<'_, f64>) -> Result<OnnxEncoder> {
        let features = rows.ncols();
        let feature_spread = column_mean_and_sd(rows)
            .map(|(_, sd)| sd.to_vec())
            .unwrap_or_default();
        let bytes = std::fs::read(path).map_err(|e| Error::io(path, e))?;
        let model = load_encoder(path, &bytes, output)?;
        let probe = model.predict(Array2::<f64>::zeros((1, features)).view())?;
        let mut encoder = OnnxEncoder {
            onnx: Arc::new(bytes),
            output: output.map(str::to_string),
            input_dim: features,
            output_dim: probe.ncols(),
            origin: path.display().to_string(),
            feature_spread,
            model: Some(model),
        };
        if let Some(expected) = encoder.model.as_ref().and_then(|m| m.input_dim()) {
            if expected != features {
                encoder.model = None;
                return Err(Error::ModelInputWidth {
                    model: path.display().to_string(),
                    expected,
                    found: features,
                });
            }
        }
        Ok(encoder)
    }

    /// Loads the model from the kept bytes (after reading a profile).
    fn prepare(&mut self) -> Result<()> {
        if self.model.is_none() {
            let origin = PathBuf::from(format!("{} (inside the profile)", self.origin));
            self.model = Some(load_encoder(&origin, &self.onnx, self.output.as_deref())?);
        }
        Ok(())
    }
}

#[cfg(feature = "onnx")]
fn load_encoder(
    origin: &Path,
    bytes: &[u8],
    output: Option<&str>,
) -> Result<Arc<dyn crate::models::Model>> {
    Ok(Arc::new(crate::models::onnx::OnnxModel::from_bytes(
        origin, bytes, output,
    )?))
}

#[cfg(not(feature = "onnx"))]
fn load_encoder(
    origin: &Path,
    _bytes: &[u8],
    _output: Option<&str>,
) -> Result<Arc<dyn crate::models::Model>> {
    Err(Error::ModelFile {
        path: origin.to_path_buf(),
        detail: "this kilter was built without ONNX support (cargo feature `onnx`)".into(),
    })
}

impl EmbeddingSpec {
    /// Fits the embedding to the reference rows. `names` label the columns in errors.
    pub fn fit(&self, rows: ArrayView2<'_, f64>, names: &[String]) -> Result<FittedEmbedding> {
        let d = rows.ncols();
        match self {
            EmbeddingSpec::Onnx { path, output } => Ok(FittedEmbedding::Onnx(OnnxEncoder::fit(
                path,
                output.as_deref(),
                rows,
            )?)),
            EmbeddingSpec::None => Ok(FittedEmbedding::None { dim: d }),
            EmbeddingSpec::Standardize => {
                let (mean, scale) = standardization(rows, names)?;
                Ok(FittedEmbedding::Standardize {
                    mean: mean.to_vec(),
                    scale: scale.to_vec(),
                })
            }
            &EmbeddingSpec::Pca { components } => {
                if components > d {
                    return Err(Error::InvalidSetting {
                        flag: "--embed",
                        value: format!("pca:{components}"),
                        expected: format!("at most {d} components (the number of features)"),
                    });
                }
                let (mean, scale) = standardization(rows, names)?;
                let z = (&rows - &mean) / &scale;
                let n = z.nrows() as f64;
                let correlation = z.t().dot(&z) / n;
                let (values, vectors) =
                    linalg::symmetric_eigen(&correlation).ok_or(Error::EigenFailed {
                        what: "the correlation matrix",
                    })?;
                Ok(FittedEmbedding::Pca {
                    mean: mean.to_vec(),
                    scale: scale.to_vec(),
                    components: (0..components)
                        .map(|c| vectors.column(c).to_vec())
                        .collect(),
                    explained_variance: values.iter().take(components).cloned().collect(),
                })
            }
        }
    }
}

/// Column means and population standard deviations; a constant column is an error.
fn standardization(
    rows: ArrayView2<'_, f64>,
    names: &[String],
) -> Result<(Array1<f64>, Array1<f64>)> {
    let (mean, scale) = column_mean_and_sd(rows).ok_or(Error::TooFewRows {
        what: "standardizing".into(),
        needed: 1,
        found: 0,
    })?;
    for (c, (&m, &sd)) in mean.iter().zip(&scale).enumerate() {
        // Relative test: a column whose spread is round-off of its level is constant.
        if sd.is_nan() || sd <= 1e-12 * m.abs().max(f64::MIN_POSITIVE) {
            return Err(Error::ConstantColumn {
                column: names.get(c).cloned().unwrap_or_else(|| (c + 1).to_string()),
                value: rows[[0, c]],
            });
        }
    }
    Ok((mean, scale))
}

/// Column means and population standard deviations (divisor n); `None` without rows.
pub fn column_mean_and_sd(rows: ArrayView2<'_, f64>) -> Option<(Array1<f64>, Array1<f64>)> {
    let mean = rows.mean_axis(Axis(0))?;
    let n = rows.nrows() as f64;
    let sd =
        Array1::from_iter(rows.axis_iter(Axis(1)).zip(&mean).map(|(column, &m)| {
            (column.iter().map(|v| (v - m) * (v - m)).sum::<f64>() / n).sqrt()
        }));
    Some((mean, sd))
}

impl Embedding for FittedEmbedding {
    fn input_dim(&self) -> usize {
        match self {
            FittedEmbedding::None { dim } => *dim,
            FittedEmbedding::Standardize { mean, .. } | FittedEmbedding::Pca { mean, .. } => {
                mean.len()
            }
            FittedEmbedding::Onnx(encoder) => encoder.input_dim,
        }
    }

    fn output_dim(&self) -> usize {
        match self {
            FittedEmbedding::Pca { components, .. } => components.len(),
            FittedEmbedding::Onnx(encoder) => encoder.output_dim,
            _ => self.input_dim(),
        }
    }

    fn embed(&self, rows: ArrayView2<'_, f64>) -> Result<Array2<f64>> {
        Ok(match self {
            FittedEmbedding::None { .. } => rows.to_owned(),
            FittedEmbedding::Standardize { mean, scale } => {
                (&rows - &Array1::from(mean.clone())) / &Array1::from(scale.clone())
            }
            FittedEmbedding::Onnx(encoder) => {
                let model = encoder.model.as_ref().ok_or(Error::ModelFile {
                    path: PathBuf::from(&encoder.origin),
                    detail: "the encoder was not loaded".into(),
                })?;
                let out = model.predict(rows)?;
                if out.ncols() != encoder.output_dim {
                    return Err(Error::ModelAnswer {
                        model: encoder.origin.clone(),
                        detail: format!(
                            "the encoder answered {} values per row, {} when fitted",
                            out.ncols(),
                            encoder.output_dim
                        ),
                    });
                }
                out
            }
            FittedEmbedding::Pca {
                mean,
                scale,
                components,
                ..
            } => {
                let z = (&rows - &Array1::from(mean.clone())) / &Array1::from(scale.clone());
                let d = mean.len();
                let loadings =
                    Array2::from_shape_fn((d, components.len()), |(i, c)| components[c][i]);
                z.dot(&loadings)
            }
        })
    }
}

impl FittedEmbedding {
    /// Loads whatever a profile read from disk keeps unloaded (an ONNX encoder).
    pub fn prepare(&mut self) -> Result<()> {
        match self {
            FittedEmbedding::Onnx(encoder) => encoder.prepare(),
            _ => Ok(()),
        }
    }

    /// Checks that the parameters are shaped consistently (for profiles read from disk).
    pub fn validate(&self) -> std::result::Result<(), String> {
        match self {
            FittedEmbedding::Onnx(encoder) => {
                if encoder.input_dim == 0 || encoder.output_dim == 0 || encoder.onnx.is_empty() {
                    return Err("the ONNX encoder is empty".into());
                }
                Ok(())
            }
            FittedEmbedding::None { dim } if *dim == 0 => Err("embedding of 0 features".into()),
            FittedEmbedding::None { .. } => Ok(()),
            FittedEmbedding::Standardize { mean, scale } => check_scaling(mean, scale),
            FittedEmbedding::Pca {
                mean,
                scale,
                components,
                explained_variance,
            } => {
                check_scaling(mean, scale)?;
                if components.is_empty()
                    || components.iter().any(|c| c.len() != mean.len())
                    || explained_variance.len() != components.len()
                {
                    return Err("PCA components do not match the feature count".into());
                }
                Ok(())
            }
        }
    }
}

fn check_scaling(mean: &[f64], scale: &[f64]) -> std::result::Result<(), String> {
    if mean.is_empty() || mean.len() != scale.len() {
        return Err("standardization vectors have mismatched lengths".into());
    }
    if scale.iter().any(|s| !s.is_finite() || *s <= 0.0) {
        return Err("a standardization scale is not positive".into());
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    #[test]
    fn specs_parse() {
        assert_eq!(
            "none".parse::<EmbeddingSpec>().unwrap(),
            EmbeddingSpec::None
        );
        assert_eq!(
            "pca:3".parse::<EmbeddingSpec>().unwrap(),
            EmbeddingSpec::Pca { components: 3 }
        );
        assert!("pca:0".parse::<EmbeddingSpec>().is_err());
        assert!("pca:x".parse::<EmbeddingSpec>().is_err());
        assert!("whiten".parse::<EmbeddingSpec>().is_err());
    }

    /// Population standard deviation: for (1, 3) the mean is 2 and sd is 1 (divisor n).
    #[test]
    fn standardize_uses_population_sd() {
        let x = array![[1.0, 10.0], [3.0, 30.0]];
        let names = vec!["a".to_string(), "b".to_string()];
        let e = EmbeddingSpec::Standardize.fit(x.view(), &names).unwrap();
        let z = e.embed(x.view()).unwrap();
        assert_eq!(z, array![[-1.0, -1.0], [1.0, 1.0]]);
    }

    #[test]
    fn constant_column_is_named() {
        let x = array![[1.0, 5.0], [3.0, 5.0]];
        let names = vec!["a".to_string(), "pressure".to_string()];
        let err = EmbeddingSpec::Standardize
            .fit(x.view(), &names)
            .unwrap_err();
        assert!(err.to_string().contains("\"pressure\""), "{err}");
    }
}
