//! Findings: each number of [`super::reliability`] that lowered a row's score, or that a
//! reader should know, as a stable code, a short title, a severity that matches its
//! penalty and one plain sentence whose figures are the record's own.

use serde::{Deserialize, Serialize};

use super::probes::OnDataEvidence;
use super::reliability::{self as score, Departure, Story, Verdict};
use super::{Families, PairAgreement};

/// Penalties below this are notes: reported, but they do not count as lowering the score.
pub const REASON_FROM: f64 = 0.02;

/// How much a finding weighs, read from its penalty alone.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Severity {
    /// No penalty: context for the reader.
    Note,
    /// Penalty below 0.1.
    Minor,
    /// Penalty from 0.1 to 0.3.
    Moderate,
    /// Penalty of 0.3 or more.
    Major,
}

impl Severity {
    /// Lower-case name.
    pub fn as_str(self) -> &'static str {
        match self {
            Severity::Note => "note",
            Severity::Minor => "minor",
            Severity::Moderate => "moderate",
            Severity::Major => "major",
        }
    }

    /// The severity of a penalty.
    pub fn for_penalty(penalty: f64) -> Severity {
        if penalty < REASON_FROM {
            Severity::Note
        } else if penalty < 0.1 {
            Severity::Minor
        } else if penalty < 0.3 {
            Severity::Moderate
        } else {
            Severity::Major
        }
    }
}

/// One finding of a row (record field `findings`).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Finding {
    /// Stable code, for tickets and filters.
    pub code: String,
    /// A short title.
    pub title: String,
    pub severity: Severity,
    /// The penalty it applied (0 for a note).
    pub penalty: f64,
    /// The groups it names.
    pub groups: Vec<String>,
    /// Its sentence.
    pub reason: String,
}

/// The numbers the reliability is computed from (record field `evidence`).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Evidence {
    /// `sev` of the subject's perturbed inputs.
    pub subject_severity: f64,
    /// `U`, `F`, `K`, the credit without on-data probes, and `D`.
    pub unused_credit: f64,
    pub sign_flips: f64,
    pub top_k_miss: f64,
    pub unchecked_credit: f64,
    /// `M`: how far the credit shares move from the on-data shares.
    pub magnitude_shift: f64,
    /// `S`: how far the total credit is from the on-data effects' total (log ratio).
    pub scale_shift: f64,
    pub story_disagreement: f64,
    /// `u` of the subject (0 for a supplied one).
    pub uncertainty: f64,
    /// `L`, with `--method` only.
    pub declared_distance: Option<f64>,
    pub story_penalty: f64,
    pub evidence_penalty: f64,
    pub uncertainty_penalty: f64,
    pub declared_penalty: Option<f64>,
    /// [`TARGET_PENALTY`] when the supplied values follow another output, else 0.
    pub target_penalty: f64,
}

/// The explanation being judged and what it is checked against.
pub struct Subject<'a> {
    /// `"deletion"` or `"supplied"` (record field `subject`).
    pub name: &'a str,
    /// How sentences name it: "deletion to zero", "the supplied occlusion:zero explanation".
    pub phrase: String,
    /// How sentences name its perturbed inputs: "zero-filled inputs".
    pub inputs_phrase: String,
    /// Where it moves groups to: "zero fill", "mean baseline".
    pub reference_phrase: String,
    pub attribution: &'a [f64],
    pub errors: &'a [f64],
    pub departure: Departure,
    /// The recomputation of the declared method, for a supplied explanation.
    pub declared: Option<(&'a [f64], String)>,
}

/// Everything the assessment reads.
pub struct Context<'a> {
    pub subject: Subject<'a>,
    pub families: &'a Families,
    pub agreement: &'a PairAgreement,
    pub on_data: &'a OnDataEvidence,
    pub alpha: f64,
    pub top_k: usize,
    pub group_names: &'a [String],
    pub input_p: f64,
    /// The smallest `p_combined` the profile can give.
    pub p_floor: f64,
    /// A supplied explanation that follows another output far better than the target.
    pub target_mismatch: Option<TargetMismatch>,
    /// The subject's fill where it sets columns to values their kind never takes
    /// ("idp to 0.31 (binary)"), when the subject uses a fill.
    pub invalid_fill: Option<String>,
}

/// A supplied attribution that follows another output (`likely`) far better than the
/// audited target, or for a single output (`likely` none) the target negated; Spearman
/// correlations with each output's occlusion.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TargetMismatch {
    pub likely: Option<usize>,
    pub likely_spearman: f64,
    pub own_spearman: f64,
}

/// The penalty of a likely wrong target: the explanation is of something else.
pub const TARGET_PENALTY: f64 = 0.9;

/// The score, its verdict, the findings and the evidence behind them.
#[derive(Debug, Clone, PartialEq)]
pub struct Assessment {
    pub reliability: f64,
    pub verdict: Verdict,
    /// Findings, penalties first (largest first), then notes.
    pub findings: Vec<Finding>,
    pub evidence: Evidence,
}

impl Assessment {
    /// The sentences of the findings that lowered the score (record field `reasons`).
    pub fn reasons(&self) -> Vec<String> {
        self.findings
            .iter()
            .filter(|f| f.severity != Severity::Note)
            .map(|f| f.reason.clone())
            .collect()
    }
}

fn percent(v: f64) -> String {
    format!("{:.0}%", 100.0 * v)
}

fn names(groups: &[usize], all: &[String]) -> Vec<String> {
    groups.iter().map(|&g| all[g].clone()).collect()
}

fn listed(groups: &[usize], all: &[String]) -> String {
    if groups.is_empty() {
        "none".into()
    } else {
        names(groups, all).join(", ")
    }
}

fn finding(code: &str, title: &str, penalty: f64, groups: Vec<String>, reason: String) -> Finding {
    Finding {
        code: code.into(),
        title: title.into(),
        severity: Severity::for_penalty(penalty),
        penalty,
        groups,
        reason,
    }
}

/// One sentence on how far a family's inputs leave the data, leading with the measure that
/// counted most.
fn departure_sentence(noun: &str, d: &Departure, r: &Departure, ctx: &Context<'_>) -> String {
    let alpha = ctx.alpha;
    let [share, detect, typical] = score::severity_terms(d, r, alpha);
    let mut text = if share.max(detect).max(typical) < 0.2 {
        format!(
            "its {noun} stay close to the data ({} outside it at p < {alpha}; median p {:.3}, \
             inputs drawn from the data: {:.3})",
            percent(d.off_manifold_rate),
            d.median_p,
            r.median_p
        )
    } else if detect > share && detect > typical {
        format!(
            "a classifier tells its {noun} from reference rows with AUC {:.2} (inputs drawn \
             from the data: {:.2})",
            d.detectability_auc.unwrap_or(0.5),
            r.detectability_auc.unwrap_or(0.5)
        )
    } else {
        format!(
            "{} of its {noun} fall outside the reference data at p < {alpha} (median p {:.3}; \
             inputs drawn from the data: {:.3})",
            percent(d.off_manifold_rate),
            d.median_p,
            r.median_p
        )
    };
    if d.off_manifold_rate == 0.0 && ctx.p_floor >= alpha {
        text.push_str(&format!(
            " (no input can reach p < {alpha} against this profile: its smallest p is {:.3}; \
             fit with more calibration rows)",
            ctx.p_floor
        ));
    }
    text
}

/// Weighs the evidence of one row into its score, verdict and findings.
pub fn assess(ctx: &Context<'_>) -> Assessment {
    let s = &ctx.subject;
    let all = ctx.group_names;
    let k = ctx.top_k;
    let r = Departure {
        off_manifold_rate: ctx.families.replacement.off_manifold_rate,
        median_p: ctx.families.replacement.median_p,
        detectability_auc: ctx.families.replacement.detectability_auc,
    };
    let severity = score::severity(&s.departure, &r, ctx.alpha);
    let story: Story = score::story(s.attribution, s.errors, ctx.on_data, k);
    let story_penalty = score::story_penalty(&story, severity);
    let evidence_penalty = score::evidence_penalty(&story);
    let uncertainty = score::relative_error(s.attribution, s.errors);
    let uncertainty_penalty = score::uncertainty_penalty(uncertainty);
    let declared_distance = s
        .declared
        .as_ref()
        .map(|(twin, _)| score::declared_distance(s.attribution, twin));
    let declared_penalty = declared_distance.map(score::declared_penalty);

    let mut findings = Vec::new();
    let departure = departure_sentence(&s.inputs_phrase, &s.departure, &r, ctx);
    let effect = |g: usize| ctx.on_data.effect[g].unwrap_or(0.0);
    let claimed_against_data = |g: usize| {
        format!(
            "{} ({:+.3} claimed, {:+.3} on data)",
            all[g],
            s.attribution[g],
            effect(g)
        )
    };
    // The story finding is named after its largest part.
    let parts = story.parts();
    let largest = (0..parts.len())
        .max_by(|&a, &b| parts[a].total_cmp(&parts[b]))
        .unwrap_or(0);
    let shares = |values: &[f64]| {
        let total: f64 = values.iter().map(|v| v.abs()).sum();
        values
            .iter()
            .map(|v| if total > 0.0 { v / total } else { 0.0 })
            .collect::<Vec<f64>>()
    };
    if story_penalty >= REASON_FROM {
        let f = match largest {
            0 => {
                let total: f64 = s.attribution.iter().map(|v| v.abs()).sum();
                let shown: Vec<String> = story
                    .unused_groups
                    .iter()
                    .filter(|&&g| s.attribution[g].abs() >= 0.005 * total)
                    .take(3)
                    .map(|&g| claimed_against_data(g))
                    .collect();
                finding(
                    "unused-credit",
                    "credits groups the model ignores on the data",
                    story_penalty,
                    names(&story.unused_groups, all),
                    format!(
                        "{} gives {} of its credit to groups that barely move the model on \
                         data-like inputs: {}; {departure}",
                        s.phrase,
                        percent(story.unused_credit),
                        if shown.is_empty() {
                            "several, each under 0.5% of the credit".to_string()
                        } else {
                            shown.join(", ")
                        }
                    ),
                )
            }
            1 => {
                let shown: Vec<String> = story
                    .flipped_groups
                    .iter()
                    .map(|&g| claimed_against_data(g))
                    .collect();
                finding(
                    "sign-flip",
                    "top groups' signs contradicted on the data",
                    story_penalty,
                    names(&story.flipped_groups, all),
                    format!(
                        "{} gives top groups the opposite sign to their effect toward the {} \
                         on data-like inputs: {}; {departure}",
                        s.phrase,
                        s.reference_phrase,
                        shown.join(", ")
                    ),
                )
            }
            3 => {
                let claimed = shares(s.attribution);
                let effects: Vec<f64> = (0..all.len()).map(effect).collect();
                let on_data = shares(&effects);
                let mut moved: Vec<usize> = (0..all.len()).collect();
                moved.sort_by(|&a, &b| {
                    (claimed[b] - on_data[b])
                        .abs()
                        .total_cmp(&(claimed[a] - on_data[a]).abs())
                });
                moved.truncate(3);
                let shown: Vec<String> = moved
                    .iter()
                    .map(|&g| {
                        format!(
                            "{} {} of the credit against {} of the on-data effect",
                            all[g],
                            percent(claimed[g]),
                            percent(on_data[g])
                        )
                    })
                    .collect();
                finding(
                    "credit-shares-differ",
                    "credit shared unlike the on-data effects",
                    story_penalty,
                    names(&moved, all),
                    format!(
                        "{} shares its credit unlike the model's effects toward the {} on \
                         data-like inputs ({} of the credit moved): {}; {departure}",
                        s.phrase,
                        s.reference_phrase,
                        percent(story.magnitude_shift),
                        shown.join(", ")
                    ),
                )
            }
            4 => {
                let claimed: f64 = s.attribution.iter().map(|v| v.abs()).sum();
                let on_data: f64 = (0..all.len()).map(|g| effect(g).abs()).sum();
                finding(
                    "scale-differs",
                    "total credit unlike the on-data effects",
                    story_penalty,
                    Vec::new(),
                    format!(
                        "{}'s credit totals {claimed:.3} in absolute value, {:.1} times the \
                         model's effects toward the {} on data-like inputs ({on_data:.3}); \
                         {departure}",
                        s.phrase,
                        claimed / on_data.max(f64::MIN_POSITIVE),
                        s.reference_phrase
                    ),
                )
            }
            _ => finding(
                "top-groups-differ",
                "top groups differ on the data",
                story_penalty,
                names(&story.subject_top, all),
                format!(
                    "{}'s top groups are {}, but on data-like inputs the largest effects \
                     toward the {} are {} ({} of that effect missed); {departure}",
                    s.phrase,
                    listed(&story.subject_top, all),
                    s.reference_phrase,
                    listed(&story.on_data_top, all),
                    percent(story.top_k_miss)
                ),
            ),
        };
        findings.push(f);
    } else if severity >= 0.3 {
        findings.push(finding(
            "off-data-story-holds",
            "leaves the data, story holds",
            0.0,
            Vec::new(),
            format!(
                "{departure}; yet its story holds on data-like inputs: the groups it credits \
                 move the model there in the same direction (top groups {})",
                listed(&story.subject_top, all)
            ),
        ));
    }
    if evidence_penalty >= REASON_FROM || story.unknown_credit > 0.0 {
        let unchecked: Vec<usize> = (0..all.len())
            .filter(|&g| ctx.on_data.effect[g].is_none())
            .collect();
        findings.push(finding(
            "unchecked-groups",
            "groups the data could not check",
            evidence_penalty,
            names(&unchecked, all),
            format!(
                "no on-data probe could check {} ({} of the credit): redrawn from the data \
                 given the rest, they left the data, or did not move toward the {}",
                listed(&unchecked, all),
                percent(story.unknown_credit),
                s.reference_phrase
            ),
        ));
    }
    if uncertainty_penalty > 0.0 {
        findings.push(finding(
            "uncertain",
            "estimates too noisy to judge",
            uncertainty_penalty,
            Vec::new(),
            format!(
                "{}'s attributions are uncertain (standard errors {} of their size); raise \
                 --samples and --draws",
                s.phrase,
                percent(uncertainty)
            ),
        ));
    }
    if let (Some(distance), Some(penalty), Some((_, method))) =
        (declared_distance, declared_penalty, s.declared.as_ref())
    {
        if distance > 0.1 {
            findings.push(finding(
                "not-as-declared",
                "differs from the declared method",
                penalty,
                Vec::new(),
                format!(
                    "the supplied values differ from kilter's recomputation of {method} by {} \
                     of its size: check --method, --fill, --baseline and --target",
                    percent(distance)
                ),
            ));
        }
    }
    // Notes on kilter's other families: context, never penalties.
    let dr = &ctx.agreement.deletion_replacement;
    if s.name == "deletion" && story_penalty < REASON_FROM && dr.spearman < 0.8 {
        findings.push(finding(
            "shared-credit",
            "replacement shares credit among correlated groups",
            0.0,
            Vec::new(),
            format!(
                "deletion and replacement rank the groups differently (Spearman {:.2}): \
                 drawing masked groups from the data given the kept ones shares credit among \
                 correlated groups, while the model's effects on data-like inputs follow \
                 deletion's story",
                dr.spearman
            ),
        ));
    }
    let i = &ctx.families.interpolation;
    let path = Departure {
        off_manifold_rate: i.off_manifold_rate,
        median_p: i.median_p,
        detectability_auc: i.detectability_auc,
    };
    if s.name == "deletion"
        && !ctx.on_data.piecewise_constant
        && score::severity(&path, &r, ctx.alpha) >= 0.5
    {
        findings.push(finding(
            "path-off-data",
            "the path family leaves the data",
            0.0,
            Vec::new(),
            format!(
                "integrated gradients from the {} baseline (not judged here): {}",
                i.baseline,
                departure_sentence("path points", &path, &r, ctx)
            ),
        ));
    }
    if ctx.on_data.piecewise_constant {
        findings.push(finding(
            "piecewise-constant",
            "piecewise-constant model",
            0.0,
            Vec::new(),
            "the model answers like a piecewise-constant one (a tree ensemble): most steps \
             of a group's move change nothing, so how much a far fill or baseline moves it \
             cannot be read on the data; only credit to groups it ignores on the data and \
             sign flips are scored, and integrated gradients, whose gradients vanish almost \
             everywhere, do not apply"
                .to_string(),
        ));
    }
    if let Some(columns) = &ctx.invalid_fill {
        findings.push(finding(
            "fill-not-a-value",
            "the fill is not a value of some columns",
            0.0,
            Vec::new(),
            format!(
                "the {} sets {columns}: values these columns never take, so masked inputs \
                 are unlike the data by construction (--fill typical fills each column with \
                 a valid value)",
                s.reference_phrase
            ),
        ));
    }
    if ctx.families.replacement.off_manifold_rate > 0.5 {
        findings.push(finding(
            "replacement-off-data",
            "even inputs drawn from the data leave it",
            0.0,
            Vec::new(),
            format!(
                "{} of the inputs drawn from the data still fall outside it (the input's own \
                 p is {:.3}): the on-data evidence for this row is thin",
                percent(ctx.families.replacement.off_manifold_rate),
                ctx.input_p
            ),
        ));
    }
    let target_penalty = ctx.target_mismatch.map_or(0.0, |_| TARGET_PENALTY);
    if let Some(t) = ctx.target_mismatch {
        let reason = match t.likely {
            Some(o) => format!(
                "the supplied values follow output {o} (Spearman {:.2} with its occlusion) far \
                 better than the audited target (Spearman {:.2}): they were likely computed \
                 for --target {o}",
                t.likely_spearman, t.own_spearman
            ),
            None => format!(
                "the supplied values run opposite to the model's output (Spearman {:.2} with \
                 its occlusion): they were likely computed for the negated score",
                t.own_spearman
            ),
        };
        findings.push(finding(
            "wrong-target",
            "likely computed for another output",
            target_penalty,
            Vec::new(),
            reason,
        ));
    }
    findings.sort_by(|a, b| b.penalty.total_cmp(&a.penalty));

    let penalties = [
        story_penalty,
        evidence_penalty,
        uncertainty_penalty,
        declared_penalty.unwrap_or(0.0),
        target_penalty,
    ];
    let reliability = score::reliability(penalties);
    Assessment {
        reliability,
        verdict: Verdict::for_score(reliability),
        findings,
        evidence: Evidence {
            subject_severity: severity,
            unused_credit: story.unused_credit,
            sign_flips: story.sign_flips,
            top_k_miss: story.top_k_miss,
            unchecked_credit: story.unknown_credit,
            magnitude_shift: story.magnitude_shift,
            scale_shift: story.scale_shift,
            story_disagreement: story.disagreement,
            uncertainty,
            declared_distance,
            story_penalty,
            evidence_penalty,
            uncertainty_penalty,
            declared_penalty,
            target_penalty,
        },
    }
}
