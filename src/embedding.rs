//! Embeddings: the map from raw inputs into the space where every distance is measured.
//!
//! The same fitted embedding is applied to the reference rows, to the inputs being scored
//! and to every perturbed input, so that "far from the data" always means the same thing.

use std::fmt;
use std::str::FromStr;

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
    /// Embeds every row.
    fn embed(&self, rows: ArrayView2<'_, f64>) -> Array2<f64>;
}

/// The `--embed` setting, before fitting.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "kebab-case")]
pub enum EmbeddingSpec {
    /// The raw features.
    None,
    /// Subtract the mean, divide by the population standard deviation.
    Standardize,
    /// The first `components` principal components of the standardized data.
    Pca { components: usize },
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
}

impl EmbeddingSpec {
    /// Fits the embedding to the reference rows. `names` label the columns in errors.
    pub fn fit(self, rows: ArrayView2<'_, f64>, names: &[String]) -> Result<FittedEmbedding> {
        let d = rows.ncols();
        match self {
            EmbeddingSpec::None => Ok(FittedEmbedding::None { dim: d }),
            EmbeddingSpec::Standardize => {
                let (mean, scale) = standardization(rows, names)?;
                Ok(FittedEmbedding::Standardize {
                    mean: mean.to_vec(),
                    scale: scale.to_vec(),
                })
            }
            EmbeddingSpec::Pca { components } => {
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
    let mean = rows.mean_axis(Axis(0)).ok_or(Error::TooFewRows {
        what: "standardizing".into(),
        needed: 1,
        found: 0,
    })?;
    let n = rows.nrows() as f64;
    let mut scale = Array1::<f64>::zeros(rows.ncols());
    for (c, column) in rows.axis_iter(Axis(1)).enumerate() {
        let m = mean[c];
        let var = column.iter().map(|v| (v - m) * (v - m)).sum::<f64>() / n;
        let sd = var.sqrt();
        // Relative test: a column whose spread is round-off of its level is constant.
        if sd.is_nan() || sd <= 1e-12 * m.abs().max(f64::MIN_POSITIVE) {
            return Err(Error::ConstantColumn {
                column: names.get(c).cloned().unwrap_or_else(|| (c + 1).to_string()),
                value: column[0],
            });
        }
        scale[c] = sd;
    }
    Ok((mean, scale))
}

impl Embedding for FittedEmbedding {
    fn input_dim(&self) -> usize {
        match self {
            FittedEmbedding::None { dim } => *dim,
            FittedEmbedding::Standardize { mean, .. } | FittedEmbedding::Pca { mean, .. } => {
                mean.len()
            }
        }
    }

    fn output_dim(&self) -> usize {
        match self {
            FittedEmbedding::Pca { components, .. } => components.len(),
            _ => self.input_dim(),
        }
    }

    fn embed(&self, rows: ArrayView2<'_, f64>) -> Array2<f64> {
        match self {
            FittedEmbedding::None { .. } => rows.to_owned(),
            FittedEmbedding::Standardize { mean, scale } => {
                (&rows - &Array1::from(mean.clone())) / &Array1::from(scale.clone())
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
        }
    }
}

impl FittedEmbedding {
    /// Checks that the parameters are shaped consistently (for profiles read from disk).
    pub fn validate(&self) -> std::result::Result<(), String> {
        match self {
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
        let z = e.embed(x.view());
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
