//! The reliability score as pure numbers: how far the subject explanation's story holds
//! on data-like inputs. The sentences written from these numbers live in
//! [`super::findings`].
//!
//! The subject is the explanation being judged: the supplied one with `--explanations`,
//! else kilter's deletion recomputation. Its *story* is which groups matter, in which
//! direction and which come first. The evidence is the on-data probes
//! ([`super::probes`]): what the model does with each group on inputs that look like
//! data, in the same frame as the subject (toward its fill or baseline). Leaving the data
//! while telling the story the model tells on the data costs nothing; credit to groups
//! the model does not move with on the data, sign flips on the top groups and a changed
//! top-k set do. [`FORMULA`] is the formula as the README prints it; a test holds the two
//! together.

use serde::{Deserialize, Serialize};

use super::probes::OnDataEvidence;

/// The formula, as the README prints it (a test checks that the README holds this text).
pub const FORMULA: &str = "\
a      = the subject's attribution, se its standard errors (0 for a supplied one)
â_g    = max(0, |a_g| - 2 se_g) / Σ|a|           credit share beyond noise
e_g    = on-data effect of group g toward the subject's fill or baseline (probes)
ê_g    = (|e_g| + 2 se(e_g)) / Σ|e|               on-data share, read generously
q_g    = ê_g / â_g                                 support of the credit on the data
U      = Σ_g â_g · clamp((0.25 - q_g) / 0.2, 0, 1)  credit to groups unused on the data
T      = the top-k groups of |a| with â_g ≥ 0.05
F      = Σ_{g∈T, e_g opposite to a_g beyond 2 se} â_g / Σ_{g∈T} â_g   sign flips
C      = the groups with on-data probes; a_C = a with groups outside C set to 0
T_C    = the top-k groups of |a_C| with â_g ≥ 0.05
K      = 1 - Σ_{g∈T_C} |e_g| / Σ_{g∈top-k of |e|} |e_g|              top-k change
M      = ½ Σ_{g∈C} |a_g / Σ|a_C| - e_g / Σ|e||                       shares moved
S      = |ln(Σ|a_C| / Σ|e|)|                                         scale changed
D      = 1 - (1 - min(1, 8 U)) (1 - F) (1 - clamp((K - 0.2) / 0.4, 0, 1))
             (1 - clamp((M - 0.2) / 0.3, 0, 1)) (1 - clamp(S - 1, 0, 1))
         (K, M and S count 0 for a piecewise-constant model: along the groups' moves
         that change its answer, most steps change nothing)
sev    = max(excess(r_S), clamp(2 (A_S - max(A_R, ½)), 0, 1),
             clamp(1 - m_S / max(m_R, α), 0, 1))   how far the subject's inputs leave the data
excess(r) = clamp((r - α) / (1 - α), 0, 1)

P_story       = D · (0.8 + 0.2 sev)
P_evidence    = ½ · Σ_{g without on-data probes} â_g
P_uncertainty = ½ · clamp((u - 0.25) / 0.75, 0, 1),  u = ‖se‖ / ‖a‖
P_declared    = ½ · clamp((L - 0.5) / 0.5, 0, 1),  L = Σ|a - t| / Σ|t| against the
                recomputation t of the declared --method (supplied explanations)
P_target      = 0.9 when the supplied values follow another output's occlusion
                (Spearman ≥ 0.8 and 0.5 above the target's), or for a single output
                run opposite to it (Spearman ≤ -0.8)

reliability = Π (1 - P)     reliable ≥ 0.7 > doubtful ≥ 0.4 > unreliable";

/// Scores at or above this are `reliable`.
pub const RELIABLE_FROM: f64 = 0.7;
/// Scores at or above this (and below [`RELIABLE_FROM`]) are `doubtful`.
pub const DOUBTFUL_FROM: f64 = 0.4;
/// Share of the subject's credit below which a group does not count among its top groups.
const TOP_SHARE: f64 = 0.05;

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

/// How far a family's perturbed inputs leave the data, against the replacement family's.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Departure {
    pub off_manifold_rate: f64,
    pub median_p: f64,
    pub detectability_auc: Option<f64>,
}

/// `excess(r)`: the off-manifold share beyond what α lets through.
pub fn excess(rate: f64, alpha: f64) -> f64 {
    ((rate - alpha) / (1.0 - alpha)).clamp(0.0, 1.0)
}

/// The three terms of `sev`: the excess off-manifold share, the excess detectability over
/// the replacement family's, and how much less typical than its inputs they are.
pub fn severity_terms(family: &Departure, replacement: &Departure, alpha: f64) -> [f64; 3] {
    let detect = match family.detectability_auc {
        Some(a) => {
            (2.0 * (a - replacement.detectability_auc.unwrap_or(0.5).max(0.5))).clamp(0.0, 1.0)
        }
        None => 0.0,
    };
    let typical = (1.0 - family.median_p / replacement.median_p.max(alpha)).clamp(0.0, 1.0);
    [excess(family.off_manifold_rate, alpha), detect, typical]
}

/// `sev`: how far a family's inputs leave the data, in [0, 1].
pub fn severity(family: &Departure, replacement: &Departure, alpha: f64) -> f64 {
    let [a, b, c] = severity_terms(family, replacement, alpha);
    a.max(b).max(c)
}

/// The story comparison of the subject with the on-data evidence.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct Story {
    /// `U`: share of the credit on groups the model does not move with on the data.
    pub unused_credit: f64,
    /// Groups with more than half their credit unsupported, largest credit first.
    pub unused_groups: Vec<usize>,
    /// `F`: share of the top groups' credit whose sign the data contradicts.
    pub sign_flips: f64,
    pub flipped_groups: Vec<usize>,
    /// `K`: share of the on-data top-k effect the subject's top groups miss.
    pub top_k_miss: f64,
    /// The subject's top groups (`T`) and the on-data top-k.
    pub subject_top: Vec<usize>,
    pub on_data_top: Vec<usize>,
    /// Share of the credit on groups without on-data probes.
    pub unknown_credit: f64,
    /// `M`: half the L1 distance between the signed shares `a / Σ|a|` and `e / Σ|e|`.
    pub magnitude_shift: f64,
    /// `S`: the absolute log ratio of the subject's total credit to the on-data effects'.
    pub scale_shift: f64,
    /// `D`.
    pub disagreement: f64,
    /// The model answered like a piecewise-constant one: `K`, `M` and `S` are not scored.
    pub piecewise_constant: bool,
}

/// Compares the subject's attribution with the on-data effects (module docs, [`FORMULA`]).
#[allow(clippy::needless_range_loop)]
pub fn story(subject: &[f64], errors: &[f64], on_data: &OnDataEvidence, top_k: usize) -> Story {
    let m = subject.len();
    let total: f64 = subject.iter().map(|v| v.abs()).sum();
    if total == 0.0 {
        return Story::default();
    }
    let share: Vec<f64> = (0..m)
        .map(|g| (subject[g].abs() - 2.0 * errors[g]).max(0.0) / total)
        .collect();
    let effect_total: f64 = on_data.effect.iter().flatten().map(|v| v.abs()).sum();
    let mut story = Story::default();
    let mut unused: Vec<(usize, f64)> = Vec::new();
    for g in 0..m {
        match (on_data.effect[g], on_data.effect_standard_errors[g]) {
            (Some(e), Some(se)) => {
                let on_data_share = if effect_total > 0.0 {
                    (e.abs() + 2.0 * se) / effect_total
                } else if se > 0.0 {
                    1.0
                } else {
                    0.0
                };
                if share[g] > 0.0 {
                    let support = on_data_share / share[g];
                    let lack = ((0.25 - support) / 0.2).clamp(0.0, 1.0);
                    story.unused_credit += share[g] * lack;
                    if lack > 0.5 {
                        unused.push((g, share[g]));
                    }
                }
            }
            _ => story.unknown_credit += share[g],
        }
    }
    unused.sort_by(|a, b| b.1.total_cmp(&a.1));
    story.unused_groups = unused.into_iter().map(|(g, _)| g).collect();

    story.subject_top = super::agreement::top_k(subject, top_k)
        .into_iter()
        .filter(|&g| share[g] >= TOP_SHARE)
        .collect();
    let top_credit: f64 = story.subject_top.iter().map(|&g| share[g]).sum();
    let mut flipped = 0.0;
    for &g in &story.subject_top {
        if let (Some(e), Some(se)) = (on_data.effect[g], on_data.effect_standard_errors[g]) {
            if e.abs() > 2.0 * se && e.signum() != subject[g].signum() {
                flipped += share[g];
                story.flipped_groups.push(g);
            }
        }
    }
    if top_credit > 0.0 {
        story.sign_flips = flipped / top_credit;
    }
    // K, M and S compare the story with the effects on the groups that were checked on
    // the data only: credit without probes is `unknown_credit`'s business, not a shift.
    let effects: Vec<f64> = on_data.effect.iter().map(|e| e.unwrap_or(0.0)).collect();
    let checked: Vec<f64> = (0..m)
        .map(|g| {
            if on_data.effect[g].is_some() {
                subject[g]
            } else {
                0.0
            }
        })
        .collect();
    let checked_total: f64 = checked.iter().map(|v| v.abs()).sum();
    story.on_data_top = super::agreement::top_k(&effects, top_k);
    let best: f64 = story.on_data_top.iter().map(|&g| effects[g].abs()).sum();
    let checked_top: Vec<usize> = super::agreement::top_k(&checked, top_k)
        .into_iter()
        .filter(|&g| share[g] >= TOP_SHARE && on_data.effect[g].is_some())
        .collect();
    if best > 0.0 && !checked_top.is_empty() {
        let caught: f64 = checked_top.iter().map(|&g| effects[g].abs()).sum();
        story.top_k_miss = (1.0 - caught / best).clamp(0.0, 1.0);
    }
    if best > 0.0 && checked_total > 0.0 {
        let effect_norm: f64 = effects.iter().map(|v| v.abs()).sum();
        story.magnitude_shift = 0.5
            * (0..m)
                .map(|g| (checked[g] / checked_total - effects[g] / effect_norm).abs())
                .sum::<f64>();
        story.scale_shift = (checked_total / effect_norm).ln().abs();
    }
    story.piecewise_constant = on_data.piecewise_constant;
    let [u, f, k, m, s] = story.parts();
    story.disagreement =
        (1.0 - (1.0 - u) * (1.0 - f) * (1.0 - k) * (1.0 - m) * (1.0 - s)).clamp(0.0, 1.0);
    story
}

impl Story {
    /// The five terms of `D`, each in [0, 1]: unused credit, sign flips, top-k change,
    /// shares moved, scale changed.
    pub fn parts(&self) -> [f64; 5] {
        // A piecewise-constant model's local moves say nothing of the size of a far one.
        let scored = if self.piecewise_constant { 0.0 } else { 1.0 };
        [
            (8.0 * self.unused_credit).clamp(0.0, 1.0),
            self.sign_flips.clamp(0.0, 1.0),
            scored * ((self.top_k_miss - 0.2) / 0.4).clamp(0.0, 1.0),
            scored * ((self.magnitude_shift - 0.2) / 0.3).clamp(0.0, 1.0),
            scored * (self.scale_shift - 1.0).clamp(0.0, 1.0),
        ]
    }
}

/// `P_story`.
pub fn story_penalty(story: &Story, severity: f64) -> f64 {
    (story.disagreement * (0.8 + 0.2 * severity)).clamp(0.0, 1.0)
}

/// `P_evidence`.
pub fn evidence_penalty(story: &Story) -> f64 {
    (0.5 * story.unknown_credit).clamp(0.0, 1.0)
}

/// `u`: the relative standard error `‖se‖ / ‖a‖` (1 when the attribution is zero and
/// the errors are not).
pub fn relative_error(values: &[f64], errors: &[f64]) -> f64 {
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

/// `P_uncertainty`.
pub fn uncertainty_penalty(u: f64) -> f64 {
    0.5 * ((u - 0.25) / 0.75).clamp(0.0, 1.0)
}

/// `L`: the supplied attribution's distance from the recomputation of its declared
/// method, relative to the recomputation's size.
pub fn declared_distance(supplied: &[f64], twin: &[f64]) -> f64 {
    let size: f64 = twin.iter().map(|v| v.abs()).sum();
    let gap: f64 = supplied.iter().zip(twin).map(|(a, b)| (a - b).abs()).sum();
    if size > 0.0 {
        gap / size
    } else if gap > 0.0 {
        1.0
    } else {
        0.0
    }
}

/// `P_declared`.
pub fn declared_penalty(distance: f64) -> f64 {
    0.5 * ((distance - 0.5) / 0.5).clamp(0.0, 1.0)
}

/// The product of `1 - P` over the penalties, in [0, 1].
pub fn reliability(penalties: impl IntoIterator<Item = f64>) -> f64 {
    penalties
        .into_iter()
        .map(|p| 1.0 - p.clamp(0.0, 1.0))
        .product::<f64>()
        .clamp(0.0, 1.0)
}

/// A score as printed: two decimals, rounded down, so that a printed score never reaches
/// a verdict threshold the score itself is below (0.6999 prints 0.69, not 0.70).
pub fn score_text(score: f64) -> String {
    format!(
        "{:.2}",
        ((score * 100.0 + 1e-9).floor() / 100.0).clamp(0.0, 1.0)
    )
}

/// Sets to exactly zero the attributions within round-off of zero, so that exact zeros
/// stay ties: `|a_g| ≤ ZERO_SNAP · scale`, with `scale` the largest model score or
/// attribution magnitude involved.
pub fn snap_zeros(values: &mut [f64], scale: f64) {
    let scale = values.iter().fold(scale.abs(), |m, v| m.max(v.abs()));
    for v in values.iter_mut() {
        if v.abs() <= ZERO_SNAP * scale {
            *v = 0.0;
        }
    }
}

/// Relative round-off bound below which an attribution is zero (about 2¹⁰ units in the
/// last place: the least-squares solve and the sums behind an attribution lose a few
/// hundred at most).
pub const ZERO_SNAP: f64 = 1024.0 * f64::EPSILON;

#[cfg(test)]
mod tests {
    use super::*;

    fn evidence(effect: &[f64]) -> OnDataEvidence {
        OnDataEvidence {
            usage: effect.iter().map(|e| Some(e.abs())).collect(),
            effect: effect.iter().map(|&e| Some(e)).collect(),
            effect_standard_errors: vec![Some(0.0); effect.len()],
            probes_on_data: vec![32; effect.len()],
            probes_per_group: 32,
            piecewise_constant: false,
        }
    }

    /// By construction: a subject equal to the on-data effects tells the same story; one
    /// that credits a group without on-data effect, or flips the top sign, does not.
    #[test]
    fn the_story_measures_follow_their_definitions() {
        let zero = [0.0; 4];
        let same = story(
            &[3.0, -2.0, 1.0, 0.0],
            &zero,
            &evidence(&[3.0, -2.0, 1.0, 0.0]),
            2,
        );
        assert_eq!(same.disagreement, 0.0);
        // Half the credit on group 3, which the model does not use on the data.
        let unused = story(
            &[3.0, -2.0, 0.0, 5.0],
            &zero,
            &evidence(&[3.0, -2.0, 1.0, 0.0]),
            2,
        );
        assert!((unused.unused_credit - 0.5).abs() < 1e-12);
        assert_eq!(unused.unused_groups, vec![3]);
        // The top group's sign is opposite on the data: 3 / (3 + 2) of the top credit.
        let flipped = story(
            &[-3.0, -2.0, 1.0, 0.0],
            &zero,
            &evidence(&[3.0, -2.0, 1.0, 0.0]),
            2,
        );
        assert!((flipped.sign_flips - 0.6).abs() < 1e-12);
        assert_eq!(flipped.flipped_groups, vec![0]);
        // Ten times the on-data effects: the shares agree, the scale does not
        // (S = ln 10, past the unit width of its term).
        let effects = evidence(&[3.0, -2.0, 1.0, 0.0]);
        let scaled = story(&[30.0, -20.0, 10.0, 0.0], &zero, &effects, 2);
        assert!((scaled.scale_shift - 10f64.ln()).abs() < 1e-12);
        assert_eq!(scaled.parts(), [0.0, 0.0, 0.0, 0.0, 1.0]);
        // Twice: within the tolerance, no disagreement.
        let doubled = story(&[6.0, -4.0, 2.0, 0.0], &zero, &effects, 2);
        assert_eq!(doubled.disagreement, 0.0);
    }

    #[test]
    fn printed_scores_never_cross_a_threshold() {
        assert_eq!(score_text(0.69995), "0.69");
        assert_eq!(score_text(0.7), "0.70");
        assert_eq!(score_text(0.57), "0.57");
        assert_eq!(score_text(1.0), "1.00");
        assert_eq!(score_text(0.0), "0.00");
    }

    #[test]
    fn round_off_snaps_to_zero_and_real_values_stay() {
        let mut a = [1.0, 2e-16, -3e-17, 1e-9];
        snap_zeros(&mut a, 1.0);
        assert_eq!(a, [1.0, 0.0, 0.0, 1e-9]);
    }
}
