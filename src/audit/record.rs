//! The record of each command that judges explanations (`audit`, `baseline`): one serde
//! data model, rendered to JSON Lines, CSV and HTML by the writers (SPEC: `kilter audit`,
//! `kilter baseline`).

use serde::{Deserialize, Serialize};

use super::findings::{Evidence, Finding};
use super::probes::OnDataEvidence;
use super::reliability::Verdict;
use super::Agreement;
use crate::models::GradientMethod;

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
    /// False where integrated gradients do not apply to the model: a piecewise-constant
    /// model (a tree ensemble) has zero gradient almost everywhere, so the path's numbers
    /// are kept for completeness but say nothing of the model.
    #[serde(default = "applies")]
    pub applicable: bool,
    /// Why the family does not apply, when it does not.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub not_applicable: Option<String>,
}

fn applies() -> bool {
    true
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

/// The `schema` of audit records: the record kind and the version of its layout.
pub const AUDIT_SCHEMA: &str = "kilter.audit/2";
/// The `schema` of baseline records.
pub const BASELINE_SCHEMA: &str = "kilter.baseline/2";

/// One audit record (SPEC: `kilter audit`).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct AuditRecord {
    /// [`AUDIT_SCHEMA`].
    pub schema: String,
    pub row: usize,
    /// The row's identifier (`--id-column`), when the input has one.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub id: Option<String>,
    /// The seed of the masks, draws and detectability splits (`--seed`).
    pub seed: u64,
    /// The significance level of off-manifold inputs (`--alpha`).
    pub alpha: f64,
    /// The group names, in the order of every attribution of the record.
    pub groups: Vec<String>,
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
    /// What `reliability` and `verdict` judge: `"supplied"` with `--explanations`, else
    /// `"deletion"` (kilter's deletion recomputation with its fill).
    pub subject: String,
    /// The declared `--method` of a supplied explanation.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub method: Option<String>,
    /// kilter's recomputation of the declared method on the same settings, with
    /// `--method` only: what the supplied explanation should equal if made as declared.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub declared: Option<DeclaredRecomputation>,
    /// The on-data probes the subject's story is checked against.
    pub on_data: OnDataEvidence,
    /// The numbers the reliability is computed from.
    pub evidence: Evidence,
    pub reliability: f64,
    pub verdict: Verdict,
    /// Every finding, those that lowered the score first.
    pub findings: Vec<Finding>,
    /// The sentences of the findings that lowered the score, largest first.
    pub reasons: Vec<String>,
}

/// kilter's own run of the method a supplied explanation declares (`--method`).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct DeclaredRecomputation {
    /// The declared method, as given (`occlusion:mean`).
    pub method: String,
    /// One number per group, in the order of `attribution` elsewhere.
    pub attribution: Vec<f64>,
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
    /// [`BASELINE_SCHEMA`].
    pub schema: String,
    pub row: usize,
    /// The row's identifier (`--id-column`), when the input has one.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub id: Option<String>,
    /// The seed of the draws (`--seed`).
    pub seed: u64,
    /// The significance level of off-manifold inputs (`--alpha`).
    pub alpha: f64,
    pub target: usize,
    /// The model's score for `target` on the input.
    pub prediction: f64,
    /// The best candidate's name.
    pub recommended: String,
    /// Every candidate, best first.
    pub candidates: Vec<BaselineCandidate>,
}
