//! The reference profile: everything kilter learns from the reference corpus, and the
//! off-manifold scores it gives any input.
//!
//! [`ProfileSettings::fit`] splits the corpus into fitting and calibration rows, fits the
//! embedding, the location and covariance, the neighbour index and the local outlier
//! factor on the fitting rows, and scores the calibration rows to calibrate p-values.
//! A [`Profile`] is self-contained: `score`, `audit` and `baseline` need nothing else.

mod distribution;
mod format;
mod kinds;

pub use distribution::FeatureDistribution;
pub use kinds::{FeatureKind, FeatureKinds, OneHotBlock};

use ndarray::{Array1, Array2, ArrayView2, Axis};
use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use serde::{Deserialize, Serialize};

use crate::corpus::{FeatureMatrix, MatrixHeader};
use crate::embedding::{column_mean_and_sd, Embedding, EmbeddingSpec, FittedEmbedding};
use crate::error::{Error, Result};
use crate::neighbours::{
    recall_of_indices, BruteForceIndex, Exclusion, IndexChoice, LocalOutlierFactor, NeighbourIndex,
    ReferenceIndex,
};
use crate::stats::{
    chi_square_tail, combine_p_values, CalibrationScores, CovarianceEstimate, CovarianceMethod,
    MahalanobisModel,
};

pub use format::{reseal, ProfileScope, FORMAT_NAME, FORMAT_VERSION};

/// The settings of `kilter fit`, validated.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ProfileSettings {
    /// How inputs are embedded.
    pub embed: EmbeddingSpec,
    /// How the covariance is estimated.
    pub covariance: CovarianceMethod,
    /// Neighbours for the k-NN distance and the local outlier factor.
    pub k: usize,
    /// Fraction of rows set aside for calibration; 0 calibrates in-sample.
    pub holdout: f64,
    /// Seed of the holdout split (and of an approximate index's graph).
    pub seed: u64,
    /// The neighbour index; a fitted profile records the kind `auto` resolved to.
    pub index: IndexChoice,
}

impl Default for ProfileSettings {
    fn default() -> Self {
        ProfileSettings {
            embed: EmbeddingSpec::Standardize,
            covariance: CovarianceMethod::LedoitWolf,
            k: 10,
            holdout: 0.2,
            seed: 0,
            index: IndexChoice::Auto,
        }
    }
}

/// Calibration rows on which `fit` measures an approximate index's recall.
pub const RECALL_QUERIES: usize = 1000;

/// Recall at k of an approximate index over the first [`RECALL_QUERIES`] of `queries`
/// (in-sample when `in_sample` holds their answers), against an exact search.
fn measured_recall(
    index: &ReferenceIndex,
    queries: ArrayView2<'_, f64>,
    in_sample: Option<&crate::neighbours::Neighbours>,
    k: usize,
) -> Result<Option<f64>> {
    if index.choice().is_exact() {
        return Ok(None);
    }
    let take = queries.nrows().min(RECALL_QUERIES);
    let sample = queries.slice(ndarray::s![..take, ..]);
    let exact = BruteForceIndex::new(index.rows().to_owned());
    let (truth, answer) = match in_sample {
        // In-sample answers exclude each row itself, by index: ask the exact index for
        // one more and drop the row's own index.
        Some(found) => {
            let wide = exact.k_nearest(sample, (k + 1).min(exact.len()), Exclusion::None)?;
            let mut truth = ndarray::Array2::<usize>::zeros((take, k));
            for (q, row) in wide.indices.outer_iter().enumerate() {
                for (j, &i) in row.iter().filter(|&&i| i != q).take(k).enumerate() {
                    truth[[q, j]] = i;
                }
            }
            (
                truth,
                found.indices.slice(ndarray::s![..take, ..]).to_owned(),
            )
        }
        None => (
            exact.k_nearest(sample, k, Exclusion::None)?.indices,
            index.k_nearest(sample, k, Exclusion::None)?.indices,
        ),
    };
    Ok(Some(recall_of_indices(truth.view(), answer.view())))
}

/// A fitted reference profile.
#[derive(Debug)]
pub struct Profile {
    settings: ProfileSettings,
    feature_names: Vec<String>,
    named_features: bool,
    reference_rows: usize,
    embedding: FittedEmbedding,
    estimate: CovarianceEstimate,
    mahalanobis: MahalanobisModel,
    index: ReferenceIndex,
    /// Recall at k of an approximate index against the exact search, measured at fit.
    index_recall: Option<f64>,
    lof: LocalOutlierFactor,
    calibration_mahalanobis: CalibrationScores,
    calibration_knn: CalibrationScores,
    /// The raw-feature distribution; left out when loaded for scoring alone.
    features: Option<FeatureDistribution>,
}

/// The off-manifold scores of one input row (SPEC: `kilter score`).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ScoreRecord {
    /// 0-based input row.
    pub row: usize,
    /// The row's identifier (`--id-column`), when the input has one.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub id: Option<String>,
    /// Squared Mahalanobis distance from the fitted mean, embedded space.
    pub mahalanobis_d2: f64,
    /// Upper chi-square tail of `mahalanobis_d2`, df = embedded dimension.
    pub chi2_p: f64,
    /// Distance to the k-th nearest fitted row.
    pub knn_kth: f64,
    /// Mean distance to the k nearest fitted rows.
    pub knn_mean: f64,
    /// Local outlier factor against the fitted rows.
    pub lof: f64,
    /// Conformal p-value of `mahalanobis_d2`.
    pub p_mahalanobis: f64,
    /// Conformal p-value of `knn_kth`.
    pub p_knn: f64,
    /// `min(1, 2 min(p_mahalanobis, p_knn))`.
    pub p_combined: f64,
    /// `p_combined < alpha`.
    pub off_manifold: bool,
}

/// Columns of off-manifold scores for a batch of embedded rows, before they become records.
#[derive(Debug, Clone)]
pub struct BatchScores {
    pub mahalanobis_d2: Array1<f64>,
    pub knn_kth: Array1<f64>,
    pub knn_mean: Array1<f64>,
    pub lof: Array1<f64>,
    pub p_mahalanobis: Array1<f64>,
    pub p_knn: Array1<f64>,
    pub p_combined: Array1<f64>,
}

impl ProfileSettings {
    /// Checks ranges that do not depend on the data.
    pub fn validate(&self) -> Result<()> {
        if self.k == 0 {
            return Err(Error::InvalidSetting {
                flag: "--k",
                value: "0".into(),
                expected: "a whole number of at least 1".into(),
            });
        }
        if !(0.0..1.0).contains(&self.holdout) {
            return Err(Error::InvalidSetting {
                flag: "--holdout",
                value: self.holdout.to_string(),
                expected: "a fraction in [0, 1): 0 calibrates on the fitted rows themselves".into(),
            });
        }
        Ok(())
    }

    /// Fits a profile to the reference corpus.
    pub fn fit(&self, reference: &FeatureMatrix) -> Result<Profile> {
        self.validate()?;
        let n = reference.rows();
        let (fit_rows, calibration_rows) = self.split(n)?;
        let fit_values = reference.values.select(Axis(0), &fit_rows);

        let embedding = self.embed.fit(fit_values.view(), &reference.names)?;
        let embedded_fit = embedding.embed(fit_values.view())?;
        // Without any spread every covariance is zero, and the singular-covariance advice
        // (shrink, reduce the dimension) would not help.
        let first = embedded_fit.row(0);
        if embedded_fit.outer_iter().all(|row| row == first) {
            return Err(Error::IdenticalRows {
                path: reference.source.clone(),
                rows: embedded_fit.nrows(),
            });
        }
        let features = FeatureDistribution::fit(fit_values, &reference.names)?;
        let estimate = self.covariance.estimate(embedded_fit.view())?;
        let mahalanobis = MahalanobisModel::new(&estimate, embedded_fit.nrows())?;

        let index = ReferenceIndex::build(self.index, embedded_fit)?;
        let in_sample = index.k_nearest(index.rows(), self.k, Exclusion::SameIndex)?;
        let lof = LocalOutlierFactor::fit(&index, &in_sample)?;

        // Calibrated through the same index as every later score, so that the p-values
        // stay valid when the index is approximate.
        let (calibration_mahalanobis, calibration_knn, index_recall) = match calibration_rows {
            None => (
                mahalanobis.squared_distances(index.rows()),
                in_sample.distances.column(self.k - 1).to_owned(),
                measured_recall(&index, index.rows(), Some(&in_sample), self.k)?,
            ),
            Some(rows) => {
                let held_out = embedding.embed(reference.values.select(Axis(0), &rows).view())?;
                let nn = index.k_nearest(held_out.view(), self.k, Exclusion::None)?;
                (
                    mahalanobis.squared_distances(held_out.view()),
                    nn.distances.column(self.k - 1).to_owned(),
                    measured_recall(&index, held_out.view(), None, self.k)?,
                )
            }
        };
        let mut settings = self.clone();
        settings.index = index.choice();

        Ok(Profile {
            settings,
            feature_names: reference.names.clone(),
            named_features: reference.named,
            reference_rows: n,
            embedding,
            estimate,
            mahalanobis,
            index,
            index_recall,
            lof,
            calibration_mahalanobis: CalibrationScores::new(calibration_mahalanobis.to_vec()),
            calibration_knn: CalibrationScores::new(calibration_knn.to_vec()),
            features: Some(features),
        })
    }

    /// Rows held out for calibration out of `n`.
    fn calibration_rows(&self, n: usize) -> usize {
        (((n as f64) * self.holdout).round() as usize).min(n)
    }

    /// The fewest rows that leave `fitting` rows to fit and at least one to calibrate
    /// under `--holdout` (0 < holdout < 1).
    fn least_rows(&self, fitting: usize) -> usize {
        // n - round(n h) >= fitting needs about n >= (fitting - 1/2) / (1 - h), and
        // round(n h) >= 1 needs n h >= 1/2; start just below both and step up.
        let below = ((fitting as f64 - 0.5) / (1.0 - self.holdout))
            .max(0.5 / self.holdout)
            .floor()
            .min(usize::MAX as f64 / 2.0) as usize;
        let start = below.saturating_sub(2).max(fitting + 1);
        // A few steps suffice; the bound only guards holdouts within 1e-15 of 1, where
        // the product loses its integer precision.
        (start..start.saturating_add(64))
            .find(|&n| {
                let n_cal = self.calibration_rows(n);
                n_cal > 0 && n - n_cal >= fitting
            })
            .unwrap_or(start)
    }

    /// Seeded split into fitting rows and (for `holdout > 0`) calibration rows, each in
    /// ascending order so that the result does not depend on the shuffle beyond membership.
    fn split(&self, n: usize) -> Result<(Vec<usize>, Option<Vec<usize>>)> {
        let needed = self.k + 1;
        if self.holdout == 0.0 {
            if n < needed.max(2) {
                return Err(Error::TooFewRows {
                    what: format!("fitting with --k {} and --holdout 0", self.k),
                    needed: needed.max(2),
                    found: n,
                });
            }
            return Ok(((0..n).collect(), None));
        }
        let n_cal = self.calibration_rows(n);
        if n_cal == 0 || n - n_cal < needed.max(2) {
            return Err(Error::TooFewRows {
                what: format!(
                    "fitting with --k {} and --holdout {} (at least one calibration row and {} fitting rows)",
                    self.k,
                    self.holdout,
                    needed.max(2)
                ),
                needed: self.least_rows(needed.max(2)),
                found: n,
            });
        }
        let mut order: Vec<usize> = (0..n).collect();
        order.shuffle(&mut ChaCha8Rng::seed_from_u64(self.seed));
        let mut calibration = order[..n_cal].to_vec();
        let mut fit = order[n_cal..].to_vec();
        calibration.sort_unstable();
        fit.sort_unstable();
        Ok((fit, Some(calibration)))
    }
}

impl Profile {
    /// The settings it was fitted with.
    pub fn settings(&self) -> &ProfileSettings {
        &self.settings
    }

    /// Feature names of the reference corpus.
    pub fn feature_names(&self) -> &[String] {
        &self.feature_names
    }

    /// Whether the feature names came from a CSV header.
    pub fn named_features(&self) -> bool {
        self.named_features
    }

    /// Rows of the reference corpus (fitting plus calibration).
    pub fn reference_rows(&self) -> usize {
        self.reference_rows
    }

    /// Rows the statistics and the index were fitted on.
    pub fn fitted_rows(&self) -> usize {
        self.index.len()
    }

    /// The fitted embedding.
    pub fn embedding(&self) -> &FittedEmbedding {
        &self.embedding
    }

    /// Embedded dimension (the chi-square degrees of freedom).
    pub fn embedded_dim(&self) -> usize {
        self.embedding.output_dim()
    }

    /// Location and covariance in the embedded space.
    pub fn estimate(&self) -> &CovarianceEstimate {
        &self.estimate
    }

    /// The Ledoit-Wolf shrinkage intensity, if that estimator was used.
    pub fn shrinkage(&self) -> Option<f64> {
        self.estimate.shrinkage
    }

    /// The neighbour index over the embedded fitted rows.
    pub fn index(&self) -> &ReferenceIndex {
        &self.index
    }

    /// Recall at k of an approximate index against the exact search, measured at fit on
    /// up to [`RECALL_QUERIES`] calibration rows; `None` for an exact index.
    pub fn index_recall(&self) -> Option<f64> {
        self.index_recall
    }

    /// The raw-feature distribution of the fitted rows (for the replacement samplers).
    pub fn feature_distribution(&self) -> Result<&FeatureDistribution> {
        self.features.as_ref().ok_or(Error::PartialProfile {
            missing: "the raw fitted rows (it was loaded for scoring alone)",
        })
    }

    /// Calibration scores of the squared Mahalanobis distance.
    pub fn calibration_mahalanobis(&self) -> &CalibrationScores {
        &self.calibration_mahalanobis
    }

    /// Calibration scores of the k-th neighbour distance.
    pub fn calibration_knn(&self) -> &CalibrationScores {
        &self.calibration_knn
    }

    /// The smallest `p_combined` any input can get: 2 / (1 + calibration rows).
    pub fn smallest_p_combined(&self) -> f64 {
        combine_p_values(
            self.calibration_mahalanobis.p_value(f64::INFINITY),
            self.calibration_knn.p_value(f64::INFINITY),
        )
    }

    /// Each raw feature's spread in the fitted rows (population standard deviation): the
    /// scale for finite-difference steps and for anything else measured per feature.
    pub fn feature_spread(&self) -> Vec<f64> {
        match &self.embedding {
            FittedEmbedding::Standardize { scale, .. } | FittedEmbedding::Pca { scale, .. } => {
                scale.clone()
            }
            FittedEmbedding::Onnx(encoder) => encoder.feature_spread().to_vec(),
            FittedEmbedding::None { .. } => {
                // Without an embedding the indexed rows are the raw fitted rows.
                column_mean_and_sd(self.index.rows())
                    .map(|(_, sd)| sd.to_vec())
                    .unwrap_or_default()
            }
        }
    }

    /// Checks that an input has the profile's columns: the same count and, when both
    /// sides have header names, the same names in the same order.
    pub fn check_input(&self, input: MatrixHeader<'_>) -> Result<()> {
        let expected = self.feature_names.len();
        if input.names.len() != expected {
            return Err(Error::InputMismatch {
                path: input.source.to_path_buf(),
                detail: format!(
                    "has {} feature columns, the profile was fitted on {expected}{}",
                    input.names.len(),
                    if self.named_features {
                        format!(" ({})", abbreviate(&self.feature_names))
                    } else {
                        String::new()
                    }
                ),
            });
        }
        if self.named_features && input.named {
            if let Some(c) = (0..expected).find(|&c| input.names[c] != self.feature_names[c]) {
                return Err(Error::InputMismatch {
                    path: input.source.to_path_buf(),
                    detail: format!(
                        "feature column {} is \"{}\", the profile expects \"{}\" there \
                         (columns must come in the profile's order)",
                        c + 1,
                        input.names[c],
                        self.feature_names[c]
                    ),
                });
            }
        }
        Ok(())
    }

    /// Embeds raw input rows.
    pub fn embed(&self, rows: ArrayView2<'_, f64>) -> Result<Array2<f64>> {
        self.embedding.embed(rows)
    }

    /// `p_combined` of perturbed raw rows (masked, drawn, or on a path), with one rule on
    /// top of the distances: a row that holds a value its column never takes (0.31 in a
    /// yes/no column, 2.6 visits, two levels of a one-hot block) is not on the data
    /// whatever its distances say, and gets the smallest p the profile can give.
    /// `embedded` is `rows` embedded ([`Profile::embed`]); `kinds` the feature kinds to
    /// hold the rows to (none for image pixels, whose few observed levels are sparse data
    /// rather than a kind).
    pub fn perturbed_p(
        &self,
        rows: ArrayView2<'_, f64>,
        embedded: ArrayView2<'_, f64>,
        kinds: Option<&FeatureKinds>,
    ) -> Result<Array1<f64>> {
        let mut p = self.score_embedded(embedded)?.p_combined;
        if let Some(kinds) = kinds {
            if !kinds.all_continuous() {
                let floor = self.smallest_p_combined();
                for (row, p) in rows.outer_iter().zip(p.iter_mut()) {
                    if !kinds.row_is_valid(row) {
                        *p = floor;
                    }
                }
            }
        }
        Ok(p)
    }

    /// Off-manifold scores of already embedded rows, as columns.
    pub fn score_embedded(&self, embedded: ArrayView2<'_, f64>) -> Result<BatchScores> {
        // A score that overflows (an input of 1e300, whose distance squared is infinite or
        // NaN) is as atypical as a score can be: the largest finite number, so that it
        // stays a number in every record and its p-value is the smallest there is.
        let atypical = |v: f64| if v.is_finite() { v } else { f64::MAX };
        let d2 = self.mahalanobis.squared_distances(embedded).mapv(atypical);
        let nn = self
            .index
            .k_nearest(embedded, self.settings.k, Exclusion::None)?;
        let k = self.settings.k;
        let knn_kth = nn.distances.column(k - 1).mapv(atypical);
        let knn_mean = nn
            .distances
            .mean_axis(Axis(1))
            .expect("k >= 1")
            .mapv(atypical);
        let lof = self.lof.score(&nn).mapv(atypical);
        let p_mahalanobis = d2.mapv(|s| self.calibration_mahalanobis.p_value(s));
        let p_knn = knn_kth.mapv(|s| self.calibration_knn.p_value(s));
        let p_combined = ndarray::Zip::from(&p_mahalanobis)
            .and(&p_knn)
            .map_collect(|&a, &b| combine_p_values(a, b));
        Ok(BatchScores {
            mahalanobis_d2: d2,
            knn_kth,
            knn_mean,
            lof,
            p_mahalanobis,
            p_knn,
            p_combined,
        })
    }

    /// Scores raw input rows; `first_row` numbers the records.
    pub fn score(
        &self,
        rows: ArrayView2<'_, f64>,
        first_row: usize,
        alpha: f64,
    ) -> Result<Vec<ScoreRecord>> {
        let embedded = self.embed(rows)?;
        let s = self.score_embedded(embedded.view())?;
        let df = self.embedded_dim();
        Ok((0..rows.nrows())
            .map(|i| ScoreRecord {
                row: first_row + i,
                id: None,
                mahalanobis_d2: s.mahalanobis_d2[i],
                chi2_p: chi_square_tail(s.mahalanobis_d2[i], df),
                knn_kth: s.knn_kth[i],
                knn_mean: s.knn_mean[i],
                lof: s.lof[i],
                p_mahalanobis: s.p_mahalanobis[i],
                p_knn: s.p_knn[i],
                p_combined: s.p_combined[i],
                off_manifold: s.p_combined[i] < alpha,
            })
            .collect())
    }
}

fn abbreviate(names: &[String]) -> String {
    const SHOWN: usize = 6;
    let mut text = names
        .iter()
        .take(SHOWN)
        .map(String::as_str)
        .collect::<Vec<_>>()
        .join(", ");
    if names.len() > SHOWN {
        text.push_str(&format!(", ... {} more", names.len() - SHOWN));
    }
    text
}

/// Checks `--alpha`.
pub fn validate_alpha(alpha: f64) -> Result<()> {
    if alpha > 0.0 && alpha < 1.0 {
        Ok(())
    } else {
        Err(Error::InvalidSetting {
            flag: "--alpha",
            value: alpha.to_string(),
            expected: "a significance level strictly between 0 and 1, such as 0.01".into(),
        })
    }
}
