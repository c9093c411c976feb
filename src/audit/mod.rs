//! The audit: each input row's attribution computed three ways on the same masks, how far
//! each family's perturbed inputs fall from the data, how the families agree, and a
//! reliability score with the reasons behind it (SPEC: `kilter audit`).
//!
//! For one row, [`Auditor::audit_row`]:
//!
//! 1. asks the model for the original input's scores and picks the target;
//! 2. draws one seeded Shapley-kernel mask design, and evaluates it under deletion (the
//!    `--fill`) and under replacement (the `--sampler`), each into Shapley values with
//!    standard errors;
//! 3. integrates the gradients along the straight path from the baseline;
//! 4. scores every perturbed input (and the input itself) against the profile, in one
//!    batch, and trains the classifier two-sample test of each family;
//! 5. compares the families ([`agreement`]) and weighs the evidence
//!    ([`reliability`]).
//!
//! Every random choice comes from a ChaCha stream keyed by the seed, the row and the
//! purpose, so a row's record does not depend on the thread that computed it or on the
//! other rows.

pub mod agreement;
pub mod reliability;
mod settings;

use std::sync::Arc;

use ndarray::{concatenate, Array2, ArrayView1, Axis};
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use serde::{Deserialize, Serialize};

use crate::attribution::{integrated_gradients, CoalitionDesign};
use crate::baselines::{BaselineChoice, BaselineMaker, BaselineSpec};
use crate::error::{Error, Result};
use crate::groups::Groups;
use crate::models::{check_target, FiniteDifference, GradientMethod, Model};
use crate::neighbours::NeighbourIndex;
use crate::perturbation::masking::{evaluate_design, MaskedGame};
use crate::perturbation::{
    ConditionalGaussian, Deletion, MarginalRows, NearestRows, PerturbationFamily,
};
use crate::profile::Profile;
use crate::stats::detectability_auc;

pub use agreement::Agreement;
pub use reliability::{Assessment, Verdict};
pub use settings::{AuditSettings, Method, Sampler};

/// One masking family's findings for a row (SPEC: `families.deletion`,
/// `families.replacement`).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct MaskingFamily {
    /// How masked groups were filled.
    pub fill: String,
    /// Shapley-value estimate of each group.
    pub attribution: Vec<f64>,
    /// Standard error of each estimate (0 when every coalition was evaluated).
    pub standard_errors: Vec<f64>,
    /// `v(∅)`: the model's expected score with every group filled.
    pub expected_value: f64,
    /// Masks (coalitions) evaluated, besides the full one.
    pub masks: usize,
    /// Whether every coalition was evaluated (no coalition-sampling error).
    pub exhaustive: bool,
    /// Perturbed inputs behind the estimate.
    pub perturbed_inputs: usize,
    /// Fraction of them off-manifold.
    pub off_manifold_rate: f64,
    /// Their median `p_combined`.
    pub median_p: f64,
    /// Held-out AUC of the classifier two-sample test (null with fewer than 4 inputs).
    pub detectability_auc: Option<f64>,
    /// Counts of the inputs' `p_combined` in the bins of [`P_BINS`].
    pub p_histogram: Vec<usize>,
}

/// Bin edges of `p_histogram`: finer toward 0, where off-manifold inputs fall. Under the
/// calibration distribution (conformal p-values are uniform) a bin holds about its width.
pub const P_BINS: [f64; 8] = [0.0, 0.001, 0.01, 0.05, 0.1, 0.25, 0.5, 1.0];

/// Counts of p-values per bin of [`P_BINS`] (the last bin includes 1).
pub fn p_histogram(p: &[f64]) -> Vec<usize> {
    let mut counts = vec![0; P_BINS.len() - 1];
    for &v in p {
        let bin = (1..P_BINS.len() - 1)
            .find(|&b| v < P_BINS[b])
            .map_or(P_BINS.len() - 2, |b| b - 1);
        counts[bin] += 1;
    }
    counts
}

/// The interpolation family's findings for a row (SPEC: `families.interpolation`).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct PathFamily {
    /// The baseline the path starts from.
    pub baseline: String,
    /// The model's score for the target at the baseline.
    pub prediction_at_baseline: f64,
    /// Integrated gradients summed within each group.
    pub attribution: Vec<f64>,
    /// `|Σ attribution - (f(x) - f(baseline))| / max(|f(x) - f(baseline)|, 1e-12)`.
    pub completeness_gap: f64,
    /// Exact or finite-difference gradients.
    pub gradients: GradientMethod,
    /// Path points.
    pub perturbed_inputs: usize,
    /// Fraction of path points off-manifold.
    pub off_manifold_rate: f64,
    /// Median `p_combined` of the path points.
    pub median_p: f64,
    /// Held-out AUC of the classifier two-sample test (null with fewer than 4 points).
    pub detectability_auc: Option<f64>,
    /// Counts of the path points' `p_combined` in the bins of [`P_BINS`].
    pub p_histogram: Vec<usize>,
    /// Every baseline candidate considered, best first (one with a fixed `--baseline`).
    pub candidates: Vec<BaselineCandidate>,
}

/// The three families.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Families {
    pub deletion: MaskingFamily,
    pub replacement: MaskingFamily,
    pub interpolation: PathFamily,
}

/// Agreement of each pair of families (SPEC: `agreement.A~B`).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct PairAgreement {
    #[serde(rename = "deletion~replacement")]
    pub deletion_replacement: Agreement,
    #[serde(rename = "deletion~interpolation")]
    pub deletion_interpolation: Agreement,
    #[serde(rename = "replacement~interpolation")]
    pub replacement_interpolation: Agreement,
}

/// A supplied explanation's agreement with each family (SPEC: `supplied`).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SuppliedAgreement {
    pub deletion: Agreement,
    pub replacement: Agreement,
    pub interpolation: Agreement,
}

/// One audit record (SPEC: `kilter audit`).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct AuditRecord {
    pub row: usize,
    pub target: usize,
    /// The model's score for `target` on the original input.
    pub prediction: f64,
    /// `p_combined` of the original input itself.
    pub input_p: f64,
    pub families: Families,
    pub agreement: PairAgreement,
    /// With `--explanations` only.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub supplied: Option<SuppliedAgreement>,
    /// The normalised evidence the reliability is computed from.
    pub evidence: reliability::Evidence,
    pub reliability: f64,
    pub verdict: Verdict,
    pub reasons: Vec<String>,
}

/// One ranked baseline candidate (SPEC: `kilter baseline`, `candidates`).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct BaselineCandidate {
    pub name: String,
    /// `p_combined` of the baseline (the median over the draws for `uniform:N`,
    /// `reference:N`).
    pub baseline_p: f64,
    /// Fraction of the path points off-manifold.
    pub path_off_manifold_rate: f64,
    /// The model's score for the target at the baseline (mean over draws).
    pub prediction_at_baseline: f64,
    /// Completeness gap of integrated gradients from this baseline.
    pub completeness_gap: f64,
    /// Spearman correlation of its attribution with the replacement family's.
    pub agreement_with_replacement: f64,
    /// The ranking score (README: baseline ranking).
    pub score: f64,
}

/// One `kilter baseline` record.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct BaselineRecord {
    pub row: usize,
    pub target: usize,
    /// The model's score for `target` on the input.
    pub prediction: f64,
    /// The best candidate's name.
    pub recommended: String,
    /// Every candidate, best first.
    pub candidates: Vec<BaselineCandidate>,
}

/// A candidate with what the audit needs of it beyond the record.
#[derive(Debug, Clone)]
pub struct BaselineEvaluation {
    pub record: BaselineCandidate,
    /// Integrated gradients summed within groups (averaged over the draws).
    pub attribution: Vec<f64>,
    pub gradients: GradientMethod,
    pub path_median_p: f64,
    /// Counts of the path points' p-values in the bins of [`P_BINS`].
    pub path_histogram: Vec<usize>,
    /// The embedded path points.
    pub embedded_path: Array2<f64>,
    contrast: f64,
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

/// Everything needed to audit rows: the profile, the model, the groups and the families.
pub struct Auditor<'a> {
    profile: &'a Profile,
    model: &'a dyn Model,
    groups: Groups,
    settings: AuditSettings,
    deletion: Deletion,
    replacement: Box<dyn PerturbationFamily>,
    baselines: BaselineMaker,
    differences: FiniteDifference,
}

/// Purposes of the per-row random streams.
#[derive(Clone, Copy)]
enum Stream {
    Design = 0,
    Deletion = 1,
    Replacement = 2,
    DetectDeletion = 3,
    DetectReplacement = 4,
    DetectInterpolation = 5,
    Baselines = 6,
}

impl<'a> Auditor<'a> {
    /// Prepares an audit; checks the model's width against the profile's features.
    pub fn new(
        profile: &'a Profile,
        model: &'a dyn Model,
        groups: Groups,
        settings: AuditSettings,
    ) -> Result<Self> {
        settings.validate()?;
        let d = profile.feature_names().len();
        if let Some(width) = model.input_dim() {
            if width != d {
                return Err(Error::ModelInputWidth {
                    model: model.describe(),
                    expected: d,
                    found: width,
                });
            }
        }
        if groups.features() != d {
            return Err(Error::InvalidSetting {
                flag: "--groups",
                value: format!("groups over {} features", groups.features()),
                expected: format!("groups over the profile's {d} features"),
            });
        }
        let m = groups.len();
        let every = if m >= 63 {
            usize::MAX
        } else {
            (1usize << m) - 2
        };
        // A sampled design draws complementary pairs, and a pair separates one direction
        // of the reduced regression only: m groups need m - 1 pairs at the very least;
        // kilter asks for m + 1 so that random pairs rarely fall short.
        let least = 2 * (m + 1);
        if settings.samples < every && settings.samples < least {
            return Err(Error::InvalidSetting {
                flag: "--samples",
                value: settings.samples.to_string(),
                expected: format!(
                    "at least {least} masks for {m} groups (masks come in complementary pairs; \
                     a few hundred give steady estimates)"
                ),
            });
        }
        let reference = profile.feature_distribution()?;
        let deletion = Deletion::new(settings.fill, reference.location(), &reference.median());
        let rows = Arc::new(reference.rows().to_owned());
        let replacement: Box<dyn PerturbationFamily> = match settings.sampler {
            Sampler::Gaussian => Box::new(ConditionalGaussian::new(
                reference.location().clone(),
                reference.covariance().clone(),
                settings.draws,
            )),
            Sampler::Neighbours => {
                Box::new(NearestRows::new(rows, reference.scale(), settings.draws))
            }
            Sampler::Marginal => Box::new(MarginalRows::new(rows, settings.draws)),
        };
        let baselines = BaselineMaker::new(profile, settings.image)?;
        match &settings.baseline {
            BaselineChoice::Fixed(spec) => baselines.check(spec)?,
            BaselineChoice::Best(list) => {
                for spec in list {
                    baselines.check(spec)?;
                }
            }
        }
        let differences = FiniteDifference::new(&profile.feature_spread(), model.precision());
        Ok(Auditor {
            profile,
            model,
            groups,
            settings,
            deletion,
            replacement,
            baselines,
            differences,
        })
    }

    /// The groups (players) of every attribution.
    pub fn groups(&self) -> &Groups {
        &self.groups
    }

    /// The settings.
    pub fn settings(&self) -> &AuditSettings {
        &self.settings
    }

    /// Description of the deletion fill.
    pub fn deletion_fill(&self) -> String {
        self.deletion.inputs_phrase()
    }

    fn detectability(
        &self,
        row: usize,
        purpose: Stream,
        embedded: ndarray::ArrayView2<'_, f64>,
    ) -> Option<f64> {
        detectability_auc(
            embedded,
            self.profile.index().rows(),
            &mut self.stream(row, purpose),
        )
    }

    /// Evaluates each baseline candidate for one row and ranks them, best first
    /// (SPEC: `kilter baseline`; the score is documented in the README and in
    /// [`baseline_score`]). `replacement` is the row's replacement attribution.
    pub fn evaluate_baselines(
        &self,
        row: usize,
        input: ArrayView1<'_, f64>,
        target: usize,
        replacement: &[f64],
        candidates: &[BaselineSpec],
    ) -> Result<Vec<BaselineEvaluation>> {
        let mut rng = self.stream(row, Stream::Baselines);
        let m = self.groups.len();
        let k = self.settings.top_k.min(m.saturating_sub(1).max(1));
        let alpha = self.settings.alpha;
        let mut evaluations = Vec::with_capacity(candidates.len());
        for spec in candidates {
            let rows = self.baselines.rows(
                spec,
                input,
                &self.groups,
                self.profile,
                self.model,
                target,
                &mut rng,
            )?;
            let path = integrated_gradients(
                self.model,
                &self.differences,
                input,
                rows.view(),
                target,
                self.settings.rule,
                self.settings.steps,
            )?;
            let all = concatenate![Axis(0), rows.view(), path.path.view()];
            let embedded = self.profile.embed(all.view())?;
            let p = self.profile.score_embedded(embedded.view())?.p_combined;
            let p = p.as_slice().expect("contiguous");
            let nb = rows.nrows();
            let (_, baseline_p) = off_manifold(&p[..nb], alpha);
            let (path_rate, path_median_p) = off_manifold(&p[nb..], alpha);
            let attribution = self
                .groups
                .sum_within(path.per_feature.as_slice().expect("contiguous"));
            let agreement = Agreement::between(&attribution, replacement, k);
            let prediction_at_baseline =
                path.at_baselines.iter().sum::<f64>() / path.at_baselines.len() as f64;
            evaluations.push(BaselineEvaluation {
                record: BaselineCandidate {
                    name: spec.to_string(),
                    baseline_p,
                    path_off_manifold_rate: path_rate,
                    prediction_at_baseline,
                    completeness_gap: path.completeness_gap,
                    agreement_with_replacement: agreement.spearman,
                    score: 0.0,
                },
                attribution,
                gradients: path.gradients,
                path_median_p,
                path_histogram: p_histogram(&p[nb..]),
                embedded_path: embedded.slice(ndarray::s![nb.., ..]).to_owned(),
                contrast: (path.at_input - prediction_at_baseline).abs(),
            });
        }
        let widest = evaluations
            .iter()
            .map(|e| e.contrast)
            .fold(0.0_f64, f64::max);
        for e in &mut evaluations {
            let contrast = if widest > 0.0 {
                e.contrast / widest
            } else {
                0.0
            };
            e.record.score = baseline_score(
                &e.record,
                contrast,
                alpha,
                self.profile.smallest_p_combined(),
            );
        }
        // Stable: equal scores keep the order the candidates were given in.
        evaluations.sort_by(|a, b| b.record.score.total_cmp(&a.record.score));
        Ok(evaluations)
    }

    /// The `kilter baseline` record of one row: the replacement attribution on this row's
    /// mask design, then every candidate ranked against it.
    pub fn baseline_row(
        &self,
        row: usize,
        input: ArrayView1<'_, f64>,
        candidates: &[BaselineSpec],
    ) -> Result<BaselineRecord> {
        let (target, prediction) = self.target_and_prediction(input)?;
        let design = CoalitionDesign::shapley_kernel(
            self.groups.len(),
            self.settings.samples,
            &mut self.stream(row, Stream::Design),
        );
        let replaced = evaluate_design(
            self.model,
            self.replacement.as_ref(),
            input,
            &self.groups,
            &design,
            target,
            prediction,
            &mut self.stream(row, Stream::Replacement),
        )?;
        let ranked =
            self.evaluate_baselines(row, input, target, &replaced.estimate.values, candidates)?;
        Ok(BaselineRecord {
            row,
            target,
            prediction,
            recommended: ranked[0].record.name.clone(),
            candidates: ranked.into_iter().map(|e| e.record).collect(),
        })
    }

    fn target_and_prediction(&self, input: ArrayView1<'_, f64>) -> Result<(usize, f64)> {
        let original = self.model.predict(input.insert_axis(Axis(0)))?;
        let target = match self.settings.target {
            Some(t) => t,
            None => argmax(original.row(0)),
        };
        check_target(&original, target)?;
        Ok((target, original[[0, target]]))
    }

    fn stream(&self, row: usize, purpose: Stream) -> ChaCha8Rng {
        let mut rng = ChaCha8Rng::seed_from_u64(self.settings.seed);
        rng.set_stream(row as u64 * 8 + purpose as u64);
        rng
    }

    /// Audits one input row; `supplied` is the user's attribution for it, one per group.
    pub fn audit_row(
        &self,
        row: usize,
        input: ArrayView1<'_, f64>,
        supplied: Option<&[f64]>,
    ) -> Result<AuditRecord> {
        let m = self.groups.len();
        let (target, prediction) = self.target_and_prediction(input)?;

        let design = CoalitionDesign::shapley_kernel(
            m,
            self.settings.samples,
            &mut self.stream(row, Stream::Design),
        );
        let deleted = evaluate_design(
            self.model,
            &self.deletion,
            input,
            &self.groups,
            &design,
            target,
            prediction,
            &mut self.stream(row, Stream::Deletion),
        )?;
        let replaced = evaluate_design(
            self.model,
            self.replacement.as_ref(),
            input,
            &self.groups,
            &design,
            target,
            prediction,
            &mut self.stream(row, Stream::Replacement),
        )?;
        // Off-manifold scores of the input and the masked inputs, in one batch.
        let all = concatenate![
            Axis(0),
            input.insert_axis(Axis(0)),
            deleted.inputs.view(),
            replaced.inputs.view()
        ];
        let embedded = self.profile.embed(all.view())?;
        let p = self.profile.score_embedded(embedded.view())?.p_combined;
        let nd = deleted.inputs.nrows();
        let spans = [(1, 1 + nd), (1 + nd, all.nrows())];
        let alpha = self.settings.alpha;
        let masking = |game: &MaskedGame, fill: String, span: (usize, usize), purpose| {
            let (rate, median) =
                off_manifold(&p.as_slice().expect("contiguous")[span.0..span.1], alpha);
            let own = &p.as_slice().expect("contiguous")[span.0..span.1];
            MaskingFamily {
                p_histogram: p_histogram(own),
                fill,
                attribution: game.estimate.values.clone(),
                standard_errors: game.estimate.standard_errors.clone(),
                expected_value: game.empty,
                masks: game.values.len() + 1,
                exhaustive: design.is_exhaustive(),
                perturbed_inputs: game.inputs.nrows(),
                off_manifold_rate: rate,
                median_p: median,
                detectability_auc: self.detectability(
                    row,
                    purpose,
                    embedded.slice(ndarray::s![span.0..span.1, ..]),
                ),
            }
        };
        let deletion = masking(
            &deleted,
            self.deletion.describe(),
            spans[0],
            Stream::DetectDeletion,
        );
        let replacement = masking(
            &replaced,
            self.replacement.describe(),
            spans[1],
            Stream::DetectReplacement,
        );

        let candidates = match &self.settings.baseline {
            BaselineChoice::Best(list) => list.clone(),
            BaselineChoice::Fixed(spec) => vec![spec.clone()],
        };
        let mut ranked =
            self.evaluate_baselines(row, input, target, &replacement.attribution, &candidates)?;
        let best = ranked.remove(0);
        let mut candidates: Vec<BaselineCandidate> = vec![best.record.clone()];
        candidates.extend(ranked.iter().map(|e| e.record.clone()));
        let interpolation = PathFamily {
            p_histogram: best.path_histogram.clone(),
            candidates,
            baseline: best.record.name.clone(),
            prediction_at_baseline: best.record.prediction_at_baseline,
            attribution: best.attribution,
            completeness_gap: best.record.completeness_gap,
            gradients: best.gradients,
            perturbed_inputs: best.embedded_path.nrows(),
            off_manifold_rate: best.record.path_off_manifold_rate,
            median_p: best.path_median_p,
            detectability_auc: self.detectability(
                row,
                Stream::DetectInterpolation,
                best.embedded_path.view(),
            ),
        };

        let k = self.settings.top_k.min(m.saturating_sub(1).max(1));
        let agree = |a: &[f64], b: &[f64]| Agreement::between(a, b, k);
        let agreement = PairAgreement {
            deletion_replacement: agree(&deletion.attribution, &replacement.attribution),
            deletion_interpolation: agree(&deletion.attribution, &interpolation.attribution),
            replacement_interpolation: agree(&replacement.attribution, &interpolation.attribution),
        };
        let supplied_agreement = match supplied {
            None => None,
            Some(s) => {
                if s.len() != m {
                    return Err(Error::InvalidSetting {
                        flag: "--explanations",
                        value: format!("{} values for row {}", s.len(), row + 1),
                        expected: format!("one value per group ({m})"),
                    });
                }
                Some(SuppliedAgreement {
                    deletion: agree(s, &deletion.attribution),
                    replacement: agree(s, &replacement.attribution),
                    interpolation: agree(s, &interpolation.attribution),
                })
            }
        };
        let answer_gap = answer_gap(&deleted, &replaced);
        let families = Families {
            deletion,
            replacement,
            interpolation,
        };
        let assessment = reliability::assess(&reliability::Findings {
            families: &families,
            agreement: &agreement,
            supplied: supplied_agreement.as_ref(),
            supplied_values: supplied,
            answer_gap,
            input_p: p[0],
            alpha,
            top_k: k,
            group_names: self.groups.names(),
            deletion_inputs: self.deletion.inputs_phrase(),
            p_floor: self.profile.smallest_p_combined(),
            steps: self.settings.steps,
        });
        Ok(AuditRecord {
            row,
            target,
            prediction,
            input_p: p[0],
            families,
            agreement,
            supplied: supplied_agreement,
            evidence: assessment.evidence,
            reliability: assessment.reliability,
            verdict: assessment.verdict,
            reasons: assessment.reasons,
        })
    }
}

/// Index of the largest value (the first of equals).
fn argmax(values: ArrayView1<'_, f64>) -> usize {
    values
        .iter()
        .enumerate()
        .fold((0, f64::NEG_INFINITY), |best, (i, &v)| {
            if v > best.1 {
                (i, v)
            } else {
                best
            }
        })
        .0
}

/// Fraction below `alpha` and median of p-values.
fn off_manifold(p: &[f64], alpha: f64) -> (f64, f64) {
    if p.is_empty() {
        return (0.0, 1.0);
    }
    let rate = p.iter().filter(|&&v| v < alpha).count() as f64 / p.len() as f64;
    (rate, crate::stats::median(p).expect("not empty"))
}

/// How differently the model answers the same masks under deletion and replacement: the
/// mean absolute difference of `v(S)` over the design (the empty coalition included),
/// relative to the span of the replacement game (the largest of `|f(x) - v(∅)|` under
/// either fill and the range of the replacement values); capped at 1.
fn answer_gap(deleted: &MaskedGame, replaced: &MaskedGame) -> f64 {
    let diffs: Vec<f64> = deleted
        .values
        .iter()
        .zip(&replaced.values)
        .map(|(a, b)| (a - b).abs())
        .chain(std::iter::once((deleted.empty - replaced.empty).abs()))
        .collect();
    let (low, high) = replaced
        .values
        .iter()
        .chain([replaced.empty, replaced.full].iter())
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(l, h), &v| {
            (l.min(v), h.max(v))
        });
    let span = (deleted.full - deleted.empty)
        .abs()
        .max((replaced.full - replaced.empty).abs())
        .max(high - low)
        .max(1e-12);
    let mean = diffs.iter().sum::<f64>() / diffs.len() as f64;
    (mean / span).min(1.0)
}

/// Reads supplied explanations: one row per input row, one column per group.
pub fn check_supplied(
    found_rows: usize,
    found_columns: usize,
    rows: usize,
    groups: usize,
    path: &std::path::Path,
) -> Result<()> {
    if found_rows != rows || found_columns != groups {
        return Err(Error::InputMismatch {
            path: path.to_path_buf(),
            detail: format!(
                "holds {found_rows} rows of {found_columns} values; the audit needs one row per input row ({rows}) and one column per group ({groups})"
            ),
        });
    }
    Ok(())
}
