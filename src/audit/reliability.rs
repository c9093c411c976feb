//! The reliability score: how much of a row's explanation survives the on-manifold
//! evidence, with one plain sentence per finding that lowered it.
//!
//! The replacement family is the on-manifold evidence: its masked groups are drawn from
//! the data given the kept ones, so its inputs look like data. A family whose inputs leave
//! the manifold is penalised in proportion to how far they leave it (its *severity*) times
//! how much its attribution disagrees with replacement: leaving the manifold while
//! agreeing costs nothing. With `α` the significance level, `r` an off-manifold rate,
//! `m` a median p-value, `A` a detectability AUC (F a family, R replacement):
//!
//! ```text
//! excess(r)     = clamp((r - α) / (1 - α), 0, 1)
//! severity_F    = max( excess(r_F),
//!                      clamp(2 (A_F - max(A_R, ½)), 0, 1),
//!                      clamp(1 - m_F / max(m_R, α), 0, 1) )
//! â = a / ‖a‖₁, ŝe_a = se_a / ‖a‖₁ (likewise for b)
//! disagreement(a, b) = ½ Σᵢ max(0, |âᵢ - b̂ᵢ| - 2 √(ŝe_aᵢ² + ŝe_bᵢ²))
//!
//! P_deletion      = severity_D · √disagreement(D, R)
//! P_answers       = ½ · severity_D · answer_gap
//! P_interpolation = severity_I · √disagreement(I, R)
//! P_completeness  = ½ · clamp((gap - 0.01) / 0.24, 0, 1)
//! P_replacement   = ½ · excess(r_R)
//! P_uncertainty   = ½ · clamp((u - 0.25) / 0.75, 0, 1)
//! P_supplied      = disagreement(supplied, R)                (with --explanations)
//!
//! reliability = Π (1 - P)        reliable ≥ 0.7 > doubtful ≥ 0.4 > unreliable
//! ```
//!
//! The disagreement is the share of normalised attribution mass that moves between the
//! two (0: the same explanation up to scale; 1: opposite signs or disjoint supports),
//! counting only differences beyond twice their joint standard error, so sampling noise
//! alone is not disagreement; normalising makes it scale-free, so supplied explanations
//! in other units (gradients, surrogate coefficients) compare fairly. The square root
//! makes a moderate disagreement weigh nearly as much as a complete one when the inputs
//! behind it are far off the manifold: a changed top feature is already a different
//! explanation. The rank statistics of `agreement` are reported, not scored: they swing
//! on near-ties that sampling noise decides. `answer_gap` is the mean |v_D(S) - v_R(S)| over the masks relative to the replacement
//! game's span; `u` the larger relative standard error ‖se‖/‖φ‖ of the two masking
//! estimates; `gap` the interpolation completeness gap. Every term is monotone in its
//! evidence and each P lies in [0, 1], so the score lies in [0, 1].

use serde::{Deserialize, Serialize};

use super::{Agreement, Families, PairAgreement, SuppliedAgreement};

/// Scores at or above this are `reliable`.
pub const RELIABLE_FROM: f64 = 0.7;
/// Scores at or above this (and below [`RELIABLE_FROM`]) are `doubtful`.
pub const DOUBTFUL_FROM: f64 = 0.4;
/// Penalties below this do not get a reason of their own.
const REASON_FROM: f64 = 0.02;

/// The verdict on a row's explanation.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Verdict {
    Reliable,
    Doubtful,
    Unreliable,
}

impl Verdict {
    /// The verdict for a score.
    pub fn for_score(score: f64) -> Verdict {
        if score >= RELIABLE_FROM {
            Verdict::Reliable
        } else if score >= DOUBTFUL_FROM {
            Verdict::Doubtful
        } else {
            Verdict::Unreliable
        }
    }

    /// Lower-case name.
    pub fn as_str(self) -> &'static str {
        match self {
            Verdict::Reliable => "reliable",
            Verdict::Doubtful => "doubtful",
            Verdict::Unreliable => "unreliable",
        }
    }
}

/// The normalised evidence and each penalty (record field `evidence`).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Evidence {
    pub deletion_severity: f64,
    pub interpolation_severity: f64,
    pub deletion_disagreement: f64,
    pub interpolation_disagreement: f64,
    pub answer_gap: f64,
    pub uncertainty: f64,
    pub deletion_penalty: f64,
    pub answer_penalty: f64,
    pub interpolation_penalty: f64,
    pub completeness_penalty: f64,
    pub replacement_penalty: f64,
    pub uncertainty_penalty: f64,
    /// With `--explanations` only; null otherwise.
    pub supplied_penalty: Option<f64>,
}

impl Evidence {
    /// A short title for the largest penalty, for tables ("the masking fill misleads");
    /// `None` when nothing lowered the score.
    pub fn main_finding(&self) -> Option<&'static str> {
        let penalties = [
            (
                self.deletion_penalty,
                "deletion leaves the data and disagrees",
            ),
            (self.answer_penalty, "the model reacts to the fill itself"),
            (
                self.interpolation_penalty,
                "the path leaves the data and disagrees",
            ),
            (self.completeness_penalty, "the path integral is incomplete"),
            (
                self.replacement_penalty,
                "even in-distribution fills leave the data",
            ),
            (self.uncertainty_penalty, "estimates too noisy to judge"),
            (
                self.supplied_penalty.unwrap_or(0.0),
                "the supplied explanation disagrees",
            ),
        ];
        penalties
            .iter()
            .filter(|(p, _)| *p >= REASON_FROM)
            .max_by(|a, b| a.0.total_cmp(&b.0))
            .map(|(_, title)| *title)
    }
}

/// What the assessment reads.
pub struct Findings<'a> {
    pub families: &'a Families,
    pub agreement: &'a PairAgreement,
    pub supplied: Option<&'a SuppliedAgreement>,
    /// The supplied attribution itself, with `supplied`.
    pub supplied_values: Option<&'a [f64]>,
    pub answer_gap: f64,
    pub input_p: f64,
    pub alpha: f64,
    pub top_k: usize,
    pub group_names: &'a [String],
    pub steps: usize,
    /// "zero-filled inputs" and the like.
    pub deletion_inputs: String,
    /// The smallest `p_combined` the profile can give.
    pub p_floor: f64,
}

/// The score, its verdict, the reasons and the evidence behind them.
#[derive(Debug, Clone, PartialEq)]
pub struct Assessment {
    pub reliability: f64,
    pub verdict: Verdict,
    pub reasons: Vec<String>,
    pub evidence: Evidence,
}

fn excess(rate: f64, alpha: f64) -> f64 {
    ((rate - alpha) / (1.0 - alpha)).clamp(0.0, 1.0)
}

/// The three terms of a family's severity: the excess off-manifold share, the excess
/// detectability over replacement's, and how much less typical than replacement's its
/// inputs are (module docs).
fn severity_terms(rate: f64, median_p: f64, auc: Option<f64>, findings: &Findings<'_>) -> [f64; 3] {
    let r = &findings.families.replacement;
    let detect = match auc {
        Some(a) => (2.0 * (a - r.detectability_auc.unwrap_or(0.5).max(0.5))).clamp(0.0, 1.0),
        None => 0.0,
    };
    let typical = (1.0 - median_p / r.median_p.max(findings.alpha)).clamp(0.0, 1.0);
    [excess(rate, findings.alpha), detect, typical]
}

fn severity(rate: f64, median_p: f64, auc: Option<f64>, findings: &Findings<'_>) -> f64 {
    let [a, b, c] = severity_terms(rate, median_p, auc, findings);
    a.max(b).max(c)
}

fn relative_error(values: &[f64], errors: &[f64]) -> f64 {
    let size = values.iter().map(|v| v * v).sum::<f64>().sqrt();
    let noise = errors.iter().map(|e| e * e).sum::<f64>().sqrt();
    if size > 0.0 {
        noise / size
    } else if noise > 0.0 {
        1.0
    } else {
        0.0
    }
}

/// Disagreement of attribution `a` with the in-distribution attribution `b`, in [0, 1]:
/// the share of normalised attribution mass that moves between them beyond their joint
/// sampling noise (module docs).
pub fn disagreement(a: &[f64], se_a: &[f64], b: &[f64], se_b: &[f64]) -> f64 {
    let norm_a: f64 = a.iter().map(|v| v.abs()).sum();
    let norm_b: f64 = b.iter().map(|v| v.abs()).sum();
    match (norm_a > 0.0, norm_b > 0.0) {
        (false, false) => return 0.0,
        (true, false) | (false, true) => return 1.0,
        (true, true) => {}
    }
    let moved: f64 = (0..a.len())
        .map(|g| {
            let noise = 2.0 * ((se_a[g] / norm_a).powi(2) + (se_b[g] / norm_b).powi(2)).sqrt();
            ((a[g] / norm_a - b[g] / norm_b).abs() - noise).max(0.0)
        })
        .sum();
    (moved / 2.0).clamp(0.0, 1.0)
}

fn percent(v: f64) -> String {
    format!("{:.0}%", 100.0 * v)
}

fn top_names(values: &[f64], k: usize, names: &[String]) -> String {
    super::agreement::top_k(values, k)
        .iter()
        .map(|&g| names[g].as_str())
        .collect::<Vec<_>>()
        .join(", ")
}

/// Weighs the evidence of one row.
pub fn assess(findings: &Findings<'_>) -> Assessment {
    let f = findings.families;
    let (d, r, i) = (&f.deletion, &f.replacement, &f.interpolation);
    let alpha = findings.alpha;
    let k = findings.top_k;
    let names = findings.group_names;

    let deletion_severity = severity(
        d.off_manifold_rate,
        d.median_p,
        d.detectability_auc,
        findings,
    );
    let interpolation_severity = severity(
        i.off_manifold_rate,
        i.median_p,
        i.detectability_auc,
        findings,
    );
    let dr: &Agreement = &findings.agreement.deletion_replacement;
    let ir: &Agreement = &findings.agreement.replacement_interpolation;
    let deletion_disagreement = disagreement(
        &d.attribution,
        &d.standard_errors,
        &r.attribution,
        &r.standard_errors,
    );
    let no_errors = vec![0.0; i.attribution.len()];
    let interpolation_disagreement = disagreement(
        &i.attribution,
        &no_errors,
        &r.attribution,
        &r.standard_errors,
    );
    let uncertainty = relative_error(&d.attribution, &d.standard_errors)
        .max(relative_error(&r.attribution, &r.standard_errors));

    let deletion_penalty = deletion_severity * deletion_disagreement.sqrt();
    let answer_penalty = 0.5 * deletion_severity * findings.answer_gap;
    let interpolation_penalty = interpolation_severity * interpolation_disagreement.sqrt();
    let completeness_penalty = 0.5 * ((i.completeness_gap - 0.01) / 0.24).clamp(0.0, 1.0);
    let replacement_penalty = 0.5 * excess(r.off_manifold_rate, alpha);
    let uncertainty_penalty = 0.5 * ((uncertainty - 0.25) / 0.75).clamp(0.0, 1.0);
    let supplied_penalty = findings
        .supplied_values
        .map(|values| disagreement(values, &no_errors, &r.attribution, &r.standard_errors));

    // Lead with the evidence that counted most, then give the other two measures.
    let unlike = |noun: &str, rate: f64, median_p: f64, auc: Option<f64>| {
        let [share, detect, typical] = severity_terms(rate, median_p, auc, findings);
        let auc_text = auc.map_or(String::new(), |a| {
            format!(
                "a classifier tells them from reference rows with AUC {a:.2} (inputs drawn from \
                 the data: {:.2})",
                r.detectability_auc.unwrap_or(0.5)
            )
        });
        let share_text = format!("{} of them fall outside it at p < {alpha}", percent(rate));
        let median_text = format!(
            "their median p is {median_p:.3} against {:.3} for inputs drawn from the data",
            r.median_p
        );
        let mut text = if share >= detect && share >= typical {
            let mut t = format!(
                "{} of the {noun} fall outside the reference data (p < {alpha}); {median_text}",
                percent(rate)
            );
            if !auc_text.is_empty() {
                t.push_str(&format!("; {auc_text}"));
            }
            t
        } else if detect >= typical {
            format!("the {noun} are easy to tell from the reference data: {auc_text}; {share_text}")
        } else {
            let mut t = format!(
                "the {noun} are less typical of the reference data than inputs drawn from it: \
                 {median_text}; {share_text}"
            );
            if !auc_text.is_empty() {
                t.push_str(&format!("; {auc_text}"));
            }
            t
        };
        if rate == 0.0 && findings.p_floor >= alpha {
            text.push_str(&format!(
                " (no input can reach p < {alpha} against this profile: its smallest p is \
                 {:.3}; fit with more calibration rows)",
                findings.p_floor
            ));
        }
        text
    };
    let mut reasons: Vec<(f64, String)> = Vec::new();
    reasons.push((
        deletion_penalty,
        format!(
            "{}; their attribution disagrees with the one from inputs drawn from the data \
             (Spearman {:.2}; top {k}: {} under deletion, {} under replacement)",
            unlike(
                &findings.deletion_inputs,
                d.off_manifold_rate,
                d.median_p,
                d.detectability_auc
            ),
            dr.spearman,
            top_names(&d.attribution, k, names),
            top_names(&r.attribution, k, names),
        ),
    ));
    reasons.push((
        answer_penalty,
        format!(
            "the model answers the same masks differently on {} than on inputs drawn from \
             the data (mean gap {} of its span): it reacts to the fill itself",
            findings.deletion_inputs,
            percent(findings.answer_gap)
        ),
    ));
    reasons.push((
        interpolation_penalty,
        format!(
            "{}; the path's attribution disagrees with the in-distribution one (Spearman \
             {:.2}; top {k}: {} on the path, {} under replacement)",
            unlike(
                &format!(
                    "integrated-gradients path points from the {} baseline",
                    i.baseline
                ),
                i.off_manifold_rate,
                i.median_p,
                i.detectability_auc
            ),
            ir.spearman,
            top_names(&i.attribution, k, names),
            top_names(&r.attribution, k, names),
        ),
    ));
    reasons.push((
        completeness_penalty,
        format!(
            "integrated gradients miss completeness by {:.1}% with {} steps; raise --steps \
             or use --rule gauss-legendre",
            100.0 * i.completeness_gap,
            findings.steps
        ),
    ));
    reasons.push((
        replacement_penalty,
        format!(
            "{} of the inputs drawn from the data still fall outside it (the input's own p is \
             {:.3}): the in-distribution evidence is weak for this row",
            percent(r.off_manifold_rate),
            findings.input_p
        ),
    ));
    reasons.push((
        uncertainty_penalty,
        format!(
            "the masking attributions are uncertain (standard errors {} of their size); \
             raise {}",
            percent(uncertainty),
            if d.exhaustive && r.exhaustive {
                "--draws (every mask is already evaluated)"
            } else {
                "--samples and --draws"
            }
        ),
    ));
    if let (Some(p), Some(s)) = (supplied_penalty, findings.supplied) {
        reasons.push((
            p,
            format!(
                "the supplied explanation disagrees with the in-distribution attribution \
                 (Spearman {:.2}, top-{k} overlap {:.2}, signs agree on {})",
                s.replacement.spearman,
                s.replacement.top_k_overlap,
                percent(s.replacement.sign_agreement)
            ),
        ));
    }
    let reliability = reasons
        .iter()
        .map(|(p, _)| 1.0 - p.clamp(0.0, 1.0))
        .product::<f64>()
        .clamp(0.0, 1.0);
    reasons.retain(|(p, _)| *p >= REASON_FROM);
    reasons.sort_by(|a, b| b.0.total_cmp(&a.0));
    Assessment {
        reliability,
        verdict: Verdict::for_score(reliability),
        reasons: reasons.into_iter().map(|(_, s)| s).collect(),
        evidence: Evidence {
            deletion_severity,
            interpolation_severity,
            deletion_disagreement,
            interpolation_disagreement,
            answer_gap: findings.answer_gap,
            uncertainty,
            deletion_penalty,
            answer_penalty,
            interpolation_penalty,
            completeness_penalty,
            replacement_penalty,
            uncertainty_penalty,
            supplied_penalty,
        },
    }
}
