//! On-data probes: what the model does with each group on data-like inputs, the evidence
//! a subject explanation's story is checked against.
//!
//! A masking or path explanation moves groups toward a reference point (a fill or a
//! baseline) that may lie off the data, so its numbers may describe the model off the
//! data. The probes ask the model only about inputs that look like data. For each group g
//! kilter redraws g from the data given every other feature (the replacement sampler with
//! only g masked), in the input itself and in its nearest fitted reference rows (contexts
//! that are data by construction), and keeps the probes that the profile scores on the
//! data (`p_combined ≥ max(α, PROBE_P)`). With `y` a context, `ỹ` its probe, `Δf = f(ỹ) -
//! f(y)`, `δ` the move of g from the input to the reference point and `Δ = ỹ_g - y_g`,
//! both in units of each feature's spread:
//!
//! ```text
//! usage_g  = √(mean Δf²)                       how much the model moves when g moves on data
//! t        = ⟨Δ, δ⟩ / ⟨δ, δ⟩                   the probe's position along the move (0 at y)
//! s_g      = Σ Δf t / Σ t²                     local slope of f along the move
//! effect_g = -s_g,  se_g = √(Σ (Δf - s_g t)² / (n - 1) / Σ t²)
//! ```
//!
//! Where the straight move of g alone from the input toward the reference point stays on
//! the data for its first steps (`PATH_POINTS` equal steps, each scored like a probe), the
//! effect is read on the move itself instead, as the secant to the farthest step reached
//! without leaving the data, `effect_g = -(f(x + t* δ) - f(x)) / t*`: for a smooth model
//! that follows the curve further than the local slope, and for a piecewise-constant one it
//! sees the splits the move crosses. The local slope's standard error stays as its noise.
//!
//! `effect_g` is what removing g toward the reference point would show if the model kept
//! its on-data behaviour (a linear extrapolation of it): for a linear model it equals the
//! occlusion attribution `w_g (x_g - c_g)` exactly. A model that answers off the data from
//! groups it ignores on the data (Slack et al., AIES 2020) has usage 0 for those groups
//! however an explanation credits them. Contexts beyond the input itself keep a group's
//! usage from vanishing where the model is merely flat at the input (a saturated unit, a
//! tree leaf).

use ndarray::{Array2, ArrayView1, Axis};
use rand_chacha::ChaCha8Rng;
use serde::{Deserialize, Serialize};

use crate::error::Result;
use crate::groups::Groups;
use crate::models::{check_target, Model};
use crate::neighbours::{Exclusion, NeighbourIndex};
use crate::perturbation::masking::kept_features;
use crate::perturbation::PerturbationFamily;
use crate::profile::{FeatureKinds, Profile};

/// Probes below this `p_combined` (or below α when larger) are not on the data and do not
/// count as evidence.
pub const PROBE_P: f64 = 0.05;
/// Nearest fitted reference rows probed besides the input.
pub const PROBE_NEIGHBOURS: usize = 7;
/// Probes per group and context.
pub const PROBE_DRAWS: usize = 4;
/// Points on each group's straight move from the input toward the reference point.
pub const PATH_POINTS: usize = 8;

/// The on-data evidence of one row (record field `on_data`), one entry per group.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct OnDataEvidence {
    /// Root-mean-square change of the target score when the group is redrawn from the
    /// data; null when no probe of the group was on the data.
    pub usage: Vec<Option<f64>>,
    /// The on-data effect of moving the group to the subject's reference point, linearly
    /// extrapolated; null when no probe moved along that direction.
    pub effect: Vec<Option<f64>>,
    /// Standard error of each effect.
    pub effect_standard_errors: Vec<Option<f64>>,
    /// Probes of each group kept as on the data.
    pub probes_on_data: Vec<usize>,
    /// Probes drawn per group.
    pub probes_per_group: usize,
    /// Whether the model answered like a piecewise-constant one (a tree ensemble): along
    /// the groups' moves that change its answer at all, most steps change nothing. Its
    /// local moves then cannot tell how much a far move changes it, so only the credit to
    /// unused groups and sign flips are scored.
    pub piecewise_constant: bool,
}

/// Probes every group of `input` with `family` (the replacement sampler) and measures the
/// model's on-data usage and effect of each group toward `reference_point`.
#[allow(clippy::too_many_arguments)]
pub fn probe(
    model: &dyn Model,
    family: &dyn PerturbationFamily,
    profile: &Profile,
    groups: &Groups,
    input: ArrayView1<'_, f64>,
    reference_point: ArrayView1<'_, f64>,
    target: usize,
    alpha: f64,
    kinds: Option<&FeatureKinds>,
    rng: &mut ChaCha8Rng,
) -> Result<OnDataEvidence> {
    let d = input.len();
    let m = groups.len();
    // Contexts: the input and its nearest fitted reference rows.
    let fitted = profile.feature_distribution()?.rows();
    let neighbours = PROBE_NEIGHBOURS.min(fitted.nrows());
    let mut contexts = input.to_owned().insert_axis(Axis(0));
    if neighbours > 0 {
        let embedded = profile.embed(input.insert_axis(Axis(0)))?;
        let nn = profile
            .index()
            .k_nearest(embedded.view(), neighbours, Exclusion::None)?;
        let rows = fitted.select(Axis(0), nn.indices.row(0).as_slice().expect("row"));
        contexts = ndarray::concatenate![Axis(0), contexts.view(), rows.view()];
    }
    let c = contexts.nrows();
    let per_group = c * PROBE_DRAWS;
    let mut probes = Array2::<f64>::zeros((m * per_group, d));
    for g in 0..m {
        let mut coalition = vec![true; m];
        coalition[g] = false;
        let kept = kept_features(groups, &coalition);
        for (j, context) in contexts.outer_iter().enumerate() {
            let start = g * per_group + j * PROBE_DRAWS;
            family.fill(
                context,
                &kept,
                rng,
                probes.slice_mut(ndarray::s![start..start + PROBE_DRAWS, ..]),
            )?;
        }
    }
    // Each group moved alone from the input toward the reference point, in equal steps.
    let mut moves = Array2::<f64>::zeros((m * PATH_POINTS, d));
    for g in 0..m {
        for j in 0..PATH_POINTS {
            let t = (j + 1) as f64 / PATH_POINTS as f64;
            let mut row = moves.row_mut(g * PATH_POINTS + j);
            row.assign(&input);
            for &i in groups.members(g) {
                row[i] = input[i] + t * (reference_point[i] - input[i]);
            }
        }
    }
    let probes = ndarray::concatenate![Axis(0), probes.view(), moves.view()];
    let all = ndarray::concatenate![Axis(0), contexts.view(), probes.view()];
    let answers = model.predict(all.view())?;
    check_target(&answers, target)?;
    let scores = answers.column(target);
    let embedded = profile.embed(probes.view())?;
    let p = profile.perturbed_p(probes.view(), embedded.view(), kinds)?;
    let floor = alpha.max(PROBE_P);
    let spread = profile.feature_spread();

    let mut evidence = OnDataEvidence {
        usage: Vec::with_capacity(m),
        effect: Vec::with_capacity(m),
        effect_standard_errors: Vec::with_capacity(m),
        probes_on_data: Vec::with_capacity(m),
        probes_per_group: per_group,
        piecewise_constant: false,
    };
    // Steps of each move (the input first) that leave the answer exactly unchanged, over
    // the groups whose move changes it somewhere.
    let (mut flat, mut steps) = (0usize, 0usize);
    for g in 0..m {
        let start = c + m * per_group + g * PATH_POINTS;
        let answers: Vec<f64> = std::iter::once(scores[0])
            .chain((0..PATH_POINTS).map(|j| scores[start + j]))
            .collect();
        let same = answers.windows(2).filter(|w| w[0] == w[1]).count();
        if same < PATH_POINTS {
            flat += same;
            steps += PATH_POINTS;
        }
    }
    evidence.piecewise_constant = steps > 0 && 2 * flat >= steps;
    for g in 0..m {
        let members = groups.members(g);
        let delta: Vec<f64> = members
            .iter()
            .map(|&i| (reference_point[i] - input[i]) / spread[i])
            .collect();
        let delta_norm2: f64 = delta.iter().map(|v| v * v).sum();
        let mut changes = Vec::new();
        let mut positions = Vec::new();
        for j in 0..c {
            for k in 0..PROBE_DRAWS {
                let row = g * per_group + j * PROBE_DRAWS + k;
                if p[row] < floor {
                    continue;
                }
                changes.push(scores[c + row] - scores[j]);
                let along: f64 = members
                    .iter()
                    .zip(&delta)
                    .map(|(&i, dv)| (probes[[row, i]] - contexts[[j, i]]) / spread[i] * dv)
                    .sum();
                positions.push(if delta_norm2 > 0.0 {
                    along / delta_norm2
                } else {
                    0.0
                });
            }
        }
        let n = changes.len();
        evidence.probes_on_data.push(n);
        if n == 0 {
            evidence.usage.push(None);
            evidence.effect.push(None);
            evidence.effect_standard_errors.push(None);
            continue;
        }
        let usage = (changes.iter().map(|v| v * v).sum::<f64>() / n as f64).sqrt();
        evidence.usage.push(Some(usage));
        let local = local_slope(&changes, &positions);
        // The farthest point of the move still on the data, reached without leaving it.
        let path_start = m * per_group + g * PATH_POINTS;
        let reach = (0..PATH_POINTS)
            .take_while(|&j| p[path_start + j] >= floor)
            .last();
        let (effect, error) = match (reach, local) {
            // The input already sits at the reference point in this group: removing it
            // moves nothing.
            _ if delta_norm2 == 0.0 => (Some(0.0), Some(0.0)),
            (Some(j), _) => {
                let t = (j + 1) as f64 / PATH_POINTS as f64;
                let secant = (scores[c + path_start + j] - scores[0]) / t;
                (Some(-secant), Some(local.map_or(0.0, |(_, se)| se)))
            }
            (None, Some((slope, se))) => (Some(-slope), Some(se)),
            (None, None) => (None, None),
        };
        evidence.effect.push(effect);
        evidence.effect_standard_errors.push(error);
    }
    Ok(evidence)
}

/// The least-squares slope through the origin of the answers' changes on the probes'
/// positions along the move, `s = Σ Δf t / Σ t²`, and its standard error
/// `√(Σ (Δf - s t)² / (n - 1) / Σ t²)`; none without two probes or any move.
fn local_slope(changes: &[f64], positions: &[f64]) -> Option<(f64, f64)> {
    let n = changes.len();
    let tt: f64 = positions.iter().map(|t| t * t).sum();
    if n < 2 || tt <= 0.0 {
        return None;
    }
    let slope = changes
        .iter()
        .zip(positions)
        .map(|(f, t)| f * t)
        .sum::<f64>()
        / tt;
    let rss: f64 = changes
        .iter()
        .zip(positions)
        .map(|(f, t)| (f - slope * t).powi(2))
        .sum();
    Some((slope, (rss / (n - 1) as f64 / tt).sqrt()))
}
