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
pub mod findings;
pub mod probes;
mod record;
pub mod reliability;
mod settings;

use std::sync::Arc;

use ndarray::{concatenate, Array2, ArrayView1, Axis};
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

use crate::attribution::{integrated_gradients, CoalitionDesign};
use crate::baselines::{baseline_score, BaselineChoice, BaselineMaker, BaselineSpec};
use crate::error::{Error, Result};
use crate::groups::Groups;
use crate::models::{check_target, FiniteDifference, GradientMethod, Model};
use crate::neighbours::NeighbourIndex;
use crate::perturbation::masking::{evaluate_design, kept_features, MaskedGame};
use crate::perturbation::{
    ConditionalGaussian, Deletion, MarginalRows, NearestRows, PerturbationFamily,
};
use crate::profile::{FeatureKind, FeatureKinds, Profile};
use crate::stats::detectability_auc;
use ndarray::Array1;

pub use agreement::Agreement;
pub use findings::{Assessment, Evidence, Finding, Severity};
pub use probes::OnDataEvidence;
pub use reliability::Verdict;

use findings::Subject;
pub use record::*;
use reliability::Departure;
pub use settings::{AuditSettings, Method, Sampler};

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
    /// The baseline (the mean of its draws, for the expected-gradients candidates).
    pub baseline_point: Array1<f64>,
    contrast: f64,
}

/// Everything needed to audit rows: the profile, the model, the groups and the families.
pub struct Auditor<'a> {
    profile: &'a Profile,
    model: &'a dyn Model,
    groups: Groups,
    settings: AuditSettings,
    deletion: Deletion,
    replacement: Box<dyn PerturbationFamily>,
    /// The reference mean: the frame of a replacement explanation's story.
    replacement_point: Array1<f64>,
    baselines: BaselineMaker,
    differences: FiniteDifference,
    /// Why `--sampler auto` chose `neighbours`.
    sampler_choice: Option<String>,
    /// Masked features the deletion fill sets to a value their kind never takes.
    invalid_fill: Vec<usize>,
    /// The feature kinds perturbed inputs are held to; none for images or when every
    /// feature is continuous.
    kinds: Option<FeatureKinds>,
}

/// Refuses settings whose rows in flight would not fit in memory. Per row: the deletion
/// and replacement inputs (`masks x (1 + draws)` rows of `d` values, the empty coalition's
/// extra draws included), the path points of every baseline candidate (`steps + 1` per
/// draw of `uniform:N` / `reference:N`), each held about three times over (the inputs,
/// their embedding, the scoring's work); one row per thread at a time.
fn check_working_memory(settings: &AuditSettings, d: usize, masks: usize) -> Result<()> {
    let rows_of = |spec: &BaselineSpec| -> u128 {
        match spec {
            BaselineSpec::Uniform(n) | BaselineSpec::Reference(n) => *n as u128,
            _ => 1,
        }
    };
    let path_rows: u128 = match &settings.baseline {
        BaselineChoice::Fixed(spec) => rows_of(spec),
        BaselineChoice::Best(list) => list.iter().map(rows_of).fold(0, u128::saturating_add),
    };
    let masked = (masks as u128).saturating_mul((settings.draws as u128).saturating_add(2));
    let path = (settings.steps as u128)
        .saturating_add(1)
        .saturating_mul(path_rows);
    let per_row = masked
        .saturating_add(path)
        .saturating_mul(d as u128)
        .saturating_mul(8 * 3);
    let threads = rayon::current_num_threads() as u128;
    crate::memory::check_need(per_row.saturating_mul(threads), || {
        format!(
            "--samples {} with --draws {}, --steps {} over {path_rows} baseline path(s), {d} \
             features, {threads} rows at a time",
            settings.samples, settings.draws, settings.steps
        )
    })
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
    Probes = 7,
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
        // A declared method sets the family kilter recomputes it with.
        let mut settings = settings;
        match settings.method.clone() {
            Some(
                Method::Occlusion(fill) | Method::Surrogate(fill) | Method::ShapleyFilled(fill),
            ) => settings.fill = fill,
            Some(Method::ShapleySampled(sampler)) => settings.sampler = sampler,
            Some(Method::IntegratedGradients(baseline)) => {
                settings.baseline = BaselineChoice::Fixed(baseline)
            }
            None => {}
        }
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
        check_working_memory(&settings, d, settings.samples.min(every))?;
        let reference = profile.feature_distribution()?;
        let deletion = Deletion::from_distribution(settings.fill, reference);
        // Image pixels keep no kinds: a pixel seen only at 0 and 1 is sparse data, not a
        // yes/no column, and a blurred or drawn intensity between is a valid image.
        let kinds = match settings.image {
            Some(_) => FeatureKinds::continuous(d),
            None => reference.kinds().clone(),
        };
        let kinds = &kinds;
        let names = profile.feature_names();
        // `auto`: a Gaussian draws 0.4 of a yes/no column; drawing from the nearest
        // reference rows keeps every value one the data has. Images keep the Gaussian
        // (their pixel grids are many-valued; draws are rounded to valid values).
        let sampler_choice = match settings.sampler {
            Sampler::Auto => match kinds.poorly_gaussian(names) {
                Some(why) if settings.image.is_none() => {
                    settings.sampler = Sampler::Neighbours;
                    Some(format!("neighbours, chosen for {why}"))
                }
                _ => {
                    settings.sampler = Sampler::Gaussian;
                    None
                }
            },
            _ => None,
        };
        let invalid_fill: Vec<usize> = (0..groups.len())
            .flat_map(|g| groups.members(g).iter().copied())
            .filter(|&c| !kinds.admits(c, deletion.values()[c]))
            .collect();
        let rows = Arc::new(reference.rows().to_owned());
        let replacement: Box<dyn PerturbationFamily> = match settings.sampler {
            Sampler::Gaussian | Sampler::Auto => Box::new(
                ConditionalGaussian::new(
                    reference.location().clone(),
                    reference.covariance().clone(),
                    settings.draws,
                )
                .with_kinds(kinds),
            ),
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
            replacement_point: reference.location().clone(),
            baselines,
            differences,
            sampler_choice,
            invalid_fill,
            kinds: (!kinds.all_continuous()).then(|| kinds.clone()),
        })
    }

    /// Why `--sampler auto` chose `neighbours`, when it did.
    pub fn sampler_choice(&self) -> Option<&str> {
        self.sampler_choice.as_deref()
    }

    /// The groups (players) of every attribution.
    pub fn groups(&self) -> &Groups {
        &self.groups
    }

    /// The settings.
    pub fn settings(&self) -> &AuditSettings {
        &self.settings
    }

    /// Masks each row's design evaluates: every proper coalition when the budget covers
    /// them, else `--samples`.
    pub fn masks_per_row(&self) -> usize {
        let m = self.groups.len();
        if m < 63 && (1usize << m) - 2 <= self.settings.samples {
            (1usize << m) - 2
        } else {
            self.settings.samples
        }
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
            let p = self
                .profile
                .perturbed_p(all.view(), embedded.view(), self.kinds.as_ref())?;
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
                baseline_point: rows.mean_axis(Axis(0)).expect("at least one baseline row"),
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
            // A baseline the model scores like the input explains nothing: every path
            // attribution sums to zero. It is never recommended over one that differs.
            let scale = e.record.prediction_at_baseline.abs().max(e.contrast);
            e.record.score = if e.contrast <= 1e-9 * scale.max(f64::MIN_POSITIVE) {
                0.0
            } else {
                baseline_score(
                    &e.record,
                    contrast,
                    alpha,
                    self.profile.smallest_p_combined(),
                )
            };
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
            schema: record::BASELINE_SCHEMA.to_string(),
            row,
            id: None,
            seed: self.settings.seed,
            alpha: self.settings.alpha,
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
        if let Some(s) = supplied {
            if s.len() != m {
                return Err(Error::InvalidSetting {
                    flag: "--explanations",
                    value: format!("{} values for row {}", s.len(), row + 1),
                    expected: format!("one value per group ({m})"),
                });
            }
        }
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
        // One group at a time set to the fill: the occlusion twin of a supplied
        // `occlusion:FILL` explanation.
        let occluded = match &self.settings.method {
            Some(Method::Occlusion(_)) => Some(self.occlusion(input, target, prediction)?),
            _ => None,
        };
        // Off-manifold scores of the input, the masked inputs and the occluded ones, in
        // one batch.
        let mut parts = vec![
            input.insert_axis(Axis(0)),
            deleted.inputs.view(),
            replaced.inputs.view(),
        ];
        if let Some((rows, _)) = &occluded {
            parts.push(rows.view());
        }
        let all = ndarray::concatenate(Axis(0), &parts).expect("same width");
        let embedded = self.profile.embed(all.view())?;
        let p = self
            .profile
            .perturbed_p(all.view(), embedded.view(), self.kinds.as_ref())?;
        let p = p.as_slice().expect("contiguous");
        let nd = deleted.inputs.nrows();
        let nr = replaced.inputs.nrows();
        let spans = [
            (1, 1 + nd),
            (1 + nd, 1 + nd + nr),
            (1 + nd + nr, all.nrows()),
        ];
        let alpha = self.settings.alpha;
        let masking = |game: &MaskedGame, fill: String, span: (usize, usize), purpose| {
            let own = &p[span.0..span.1];
            let (rate, median) = off_manifold(own, alpha);
            let mut attribution = game.estimate.values.clone();
            let scale = game
                .values
                .iter()
                .chain([game.empty, game.full].iter())
                .fold(0.0_f64, |m, v| m.max(v.abs()));
            reliability::snap_zeros(&mut attribution, scale);
            MaskingFamily {
                p_histogram: p_histogram(own),
                fill,
                attribution,
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
        let mut path_attribution = best.attribution.clone();
        reliability::snap_zeros(
            &mut path_attribution,
            prediction
                .abs()
                .max(best.record.prediction_at_baseline.abs()),
        );
        let interpolation = PathFamily {
            p_histogram: best.path_histogram.clone(),
            candidates,
            baseline: best.record.name.clone(),
            prediction_at_baseline: best.record.prediction_at_baseline,
            attribution: path_attribution,
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
            applicable: true,
            not_applicable: None,
        };

        let k = self.settings.top_k.min(m.saturating_sub(1).max(1));
        let agree = |a: &[f64], b: &[f64]| Agreement::between(a, b, k);
        let agreement = PairAgreement {
            deletion_replacement: agree(&deletion.attribution, &replacement.attribution),
            deletion_interpolation: agree(&deletion.attribution, &interpolation.attribution),
            replacement_interpolation: agree(&replacement.attribution, &interpolation.attribution),
        };
        let supplied_values = supplied.map(|s| {
            let mut values = s.to_vec();
            reliability::snap_zeros(&mut values, 0.0);
            values
        });
        let supplied_agreement = supplied_values.as_ref().map(|s| SuppliedAgreement {
            deletion: agree(s, &deletion.attribution),
            replacement: agree(s, &replacement.attribution),
            interpolation: agree(s, &interpolation.attribution),
        });

        let families = Families {
            deletion,
            replacement,
            interpolation,
        };
        let (deletion, replacement, interpolation) = (
            &families.deletion,
            &families.replacement,
            &families.interpolation,
        );
        // The subject, its frame of reference and its perturbed inputs.
        let departure = |rate: f64, median_p: f64, auc: Option<f64>| Departure {
            off_manifold_rate: rate,
            median_p,
            detectability_auc: auc,
        };
        let from_masking =
            |f: &MaskingFamily| departure(f.off_manifold_rate, f.median_p, f.detectability_auc);
        let surrogate;
        let (reference_point, subject_departure, declared, inputs_phrase, reference_phrase) =
            match &self.settings.method {
                Some(Method::IntegratedGradients(_)) => (
                    best.baseline_point.clone(),
                    departure(
                        interpolation.off_manifold_rate,
                        interpolation.median_p,
                        interpolation.detectability_auc,
                    ),
                    Some(interpolation.attribution.as_slice()),
                    "path points".to_string(),
                    format!("{} baseline", interpolation.baseline),
                ),
                Some(Method::ShapleySampled(_)) => (
                    self.replacement_point.clone(),
                    from_masking(replacement),
                    Some(replacement.attribution.as_slice()),
                    format!("inputs drawn by the {} sampler", self.settings.sampler),
                    "reference mean".to_string(),
                ),
                Some(Method::Occlusion(_)) => {
                    let (_, values) = occluded.as_ref().expect("computed for occlusion");
                    let own = &p[spans[2].0..spans[2].1];
                    let (rate, median) = off_manifold(own, alpha);
                    (
                        self.deletion.values().clone(),
                        departure(rate, median, None),
                        Some(values.as_slice()),
                        format!(
                            "occluded inputs (one group at a time set to the {} fill)",
                            self.deletion.describe()
                        ),
                        format!("{} fill", self.deletion.describe()),
                    )
                }
                Some(Method::Surrogate(_)) => {
                    surrogate = linear_surrogate(&design, &deleted)?;
                    (
                        self.deletion.values().clone(),
                        from_masking(deletion),
                        Some(surrogate.as_slice()),
                        self.deletion.inputs_phrase(),
                        format!("{} fill", self.deletion.describe()),
                    )
                }
                Some(Method::ShapleyFilled(_)) | None => (
                    self.deletion.values().clone(),
                    from_masking(deletion),
                    Some(deletion.attribution.as_slice()),
                    self.deletion.inputs_phrase(),
                    format!("{} fill", self.deletion.describe()),
                ),
            };
        let on_data = probes::probe(
            self.model,
            self.replacement.as_ref(),
            self.profile,
            &self.groups,
            input,
            reference_point.view(),
            target,
            alpha,
            self.kinds.as_ref(),
            &mut self.stream(row, Stream::Probes),
        )?;
        let no_errors = vec![0.0; m];
        let method_name = self.settings.method.as_ref().map(|m| m.to_string());
        let target_mismatch = match &supplied_values {
            Some(values) => self.target_check(input, target, values)?,
            None => None,
        };
        let subject = match &supplied_values {
            Some(values) => Subject {
                name: "supplied",
                phrase: match &method_name {
                    Some(method) => format!("the supplied {method} explanation"),
                    None => "the supplied explanation".to_string(),
                },
                inputs_phrase: match &method_name {
                    Some(_) => inputs_phrase,
                    None => format!("{} (method not declared)", self.deletion.inputs_phrase()),
                },
                reference_phrase,
                attribution: values,
                errors: &no_errors,
                departure: subject_departure,
                declared: method_name
                    .as_ref()
                    .and_then(|name| declared.map(|twin| (twin, name.clone()))),
            },
            None => Subject {
                name: "deletion",
                phrase: format!("deletion to {}", self.deletion.describe()),
                inputs_phrase: self.deletion.inputs_phrase(),
                reference_phrase: format!("{} fill", self.deletion.describe()),
                attribution: &deletion.attribution,
                errors: &deletion.standard_errors,
                departure: from_masking(deletion),
                declared: None,
            },
        };
        let uses_fill = match (&supplied_values, &self.settings.method) {
            (None, _) | (Some(_), None) => true,
            (Some(_), Some(method)) => matches!(
                method,
                Method::Occlusion(_) | Method::Surrogate(_) | Method::ShapleyFilled(_)
            ),
        };
        let invalid_fill = (uses_fill && !self.invalid_fill.is_empty()).then(|| {
            let kinds = self.kinds.as_ref().map(|k| k.kinds().to_vec()).ok_or(());
            let names = self.profile.feature_names();
            let shown: Vec<String> = self
                .invalid_fill
                .iter()
                .take(4)
                .map(|&c| {
                    let kind = match kinds.as_ref().map(|k| k[c]) {
                        Ok(FeatureKind::Integer) => "integer",
                        Ok(FeatureKind::OneHot(_)) => "one-hot",
                        Ok(FeatureKind::Constant) => "constant",
                        _ => "binary",
                    };
                    let v = self.deletion.values()[c];
                    let shown = if v.fract() == 0.0 {
                        format!("{v}")
                    } else {
                        format!("{v:.3}")
                    };
                    format!("{} to {shown} ({kind})", names[c])
                })
                .collect();
            let more = self.invalid_fill.len().saturating_sub(4);
            if more > 0 {
                format!("{} and {more} more", shown.join(", "))
            } else {
                shown.join(", ")
            }
        });
        let subject_name = subject.name.to_string();
        let declared_record =
            subject
                .declared
                .as_ref()
                .map(|(twin, method)| DeclaredRecomputation {
                    method: method.clone(),
                    attribution: twin.to_vec(),
                });
        let assessment = findings::assess(&findings::Context {
            subject,
            families: &families,
            agreement: &agreement,
            on_data: &on_data,
            alpha,
            top_k: k,
            group_names: self.groups.names(),
            input_p: p[0],
            p_floor: self.profile.smallest_p_combined(),
            target_mismatch,
            invalid_fill,
        });
        let reasons = assessment.reasons();
        let mut families = families;
        if on_data.piecewise_constant {
            families.interpolation.applicable = false;
            families.interpolation.not_applicable = Some(
                "the model is piecewise-constant (most steps of the on-data moves change \
                 nothing): its gradients vanish almost everywhere, so integrated gradients \
                 and their completeness gap say nothing of it"
                    .to_string(),
            );
        }
        Ok(AuditRecord {
            schema: record::AUDIT_SCHEMA.to_string(),
            row,
            id: None,
            seed: self.settings.seed,
            alpha: self.settings.alpha,
            groups: self.groups.names().to_vec(),
            target,
            prediction,
            input_p: p[0],
            families,
            agreement,
            supplied: supplied_agreement,
            subject: subject_name,
            method: method_name,
            declared: declared_record,
            on_data,
            evidence: assessment.evidence,
            reliability: assessment.reliability,
            verdict: assessment.verdict,
            findings: assessment.findings,
            reasons,
        })
    }

    /// Whether a supplied attribution follows another output far better than `target`
    /// (or, for a single output, the target negated), read on the occlusion of every
    /// output at once: one model call of one row per group.
    fn target_check(
        &self,
        input: ArrayView1<'_, f64>,
        target: usize,
        supplied: &[f64],
    ) -> Result<Option<findings::TargetMismatch>> {
        let m = self.groups.len();
        if m < 3 || supplied.iter().all(|v| *v == supplied[0]) {
            return Ok(None);
        }
        let (rows, _) = self.occlusion(input, target, 0.0)?;
        let all = ndarray::concatenate![Axis(0), input.insert_axis(Axis(0)), rows.view()];
        let answers = self.model.predict(all.view())?;
        let outputs = answers.ncols();
        let rho = |o: usize| {
            let occluded: Vec<f64> = (0..m)
                .map(|g| answers[[0, o]] - answers[[1 + g, o]])
                .collect();
            agreement::spearman(supplied, &occluded)
        };
        let own = rho(target);
        let mismatch = if outputs == 1 {
            (own <= -0.8).then_some(findings::TargetMismatch {
                likely: None,
                likely_spearman: -own,
                own_spearman: own,
            })
        } else {
            (0..outputs)
                .filter(|&o| o != target)
                .map(|o| (o, rho(o)))
                .filter(|&(_, r)| r.is_finite())
                .max_by(|a, b| a.1.total_cmp(&b.1))
                .filter(|&(_, r)| r >= 0.8 && r - own >= 0.5)
                .map(|(o, r)| findings::TargetMismatch {
                    likely: Some(o),
                    likely_spearman: r,
                    own_spearman: own,
                })
        };
        Ok(mismatch)
    }

    /// Occlusion: each group alone set to the fill. Returns the occluded inputs and
    /// `f(x) - f(x with group g filled)` for each group.
    fn occlusion(
        &self,
        input: ArrayView1<'_, f64>,
        target: usize,
        prediction: f64,
    ) -> Result<(Array2<f64>, Vec<f64>)> {
        let m = self.groups.len();
        let mut rows = Array2::<f64>::zeros((m, input.len()));
        let mut rng = ChaCha8Rng::seed_from_u64(0);
        for g in 0..m {
            let mut coalition = vec![true; m];
            coalition[g] = false;
            let kept = kept_features(&self.groups, &coalition);
            self.deletion.fill(
                input,
                &kept,
                &mut rng,
                rows.slice_mut(ndarray::s![g..g + 1, ..]),
            )?;
        }
        let answers = self.model.predict(rows.view())?;
        check_target(&answers, target)?;
        let mut values: Vec<f64> = answers
            .column(target)
            .iter()
            .map(|v| prediction - v)
            .collect();
        reliability::snap_zeros(&mut values, prediction);
        Ok((rows, values))
    }
}

/// The linear surrogate of a supplied `surrogate:FILL` explanation, recomputed on the
/// deletion game: ordinary least squares of `v(S)` on the kept-group indicators with an
/// intercept, over every mask of the design and the empty and full coalitions, unweighted.
fn linear_surrogate(design: &CoalitionDesign, game: &MaskedGame) -> Result<Vec<f64>> {
    let m = design.groups();
    let masks = design.coalitions();
    let n = masks.len() + 2;
    let mut x = nalgebra::DMatrix::<f64>::zeros(n, m + 1);
    let mut y = nalgebra::DVector::<f64>::zeros(n);
    for (k, mask) in masks.iter().enumerate() {
        x[(k, 0)] = 1.0;
        for (g, &kept) in mask.iter().enumerate() {
            x[(k, g + 1)] = f64::from(u8::from(kept));
        }
        y[k] = game.values[k];
    }
    x[(n - 2, 0)] = 1.0;
    y[n - 2] = game.empty;
    for g in 0..=m {
        x[(n - 1, g)] = 1.0;
    }
    y[n - 1] = game.full;
    let normal = x.transpose() * &x;
    let rhs = x.transpose() * y;
    let solution = normal
        .cholesky()
        .map(|c| c.solve(&rhs))
        .ok_or(Error::InvalidSetting {
            flag: "--samples",
            value: masks.len().to_string(),
            expected: format!("enough masks to fit a surrogate of {m} groups"),
        })?;
    let mut values: Vec<f64> = solution.iter().skip(1).copied().collect();
    reliability::snap_zeros(&mut values, game.full.abs().max(game.empty.abs()));
    Ok(values)
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
