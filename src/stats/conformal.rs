//! Conformal p-values against a calibration set of nonconformity scores.
//!
//! For a score `s` and calibration scores `c₁..cₙ` drawn exchangeably with it,
//! `p(s) = (1 + #{i : cᵢ ≥ s}) / (1 + n)` satisfies `P(p ≤ α) ≤ α` for every α
//! (Vovk, Gammerman & Shafer 2005, "Algorithmic Learning in a Random World").

use serde::{Deserialize, Serialize};

/// Calibration scores, sorted ascending so that a p-value is one binary search.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct CalibrationScores {
    sorted: Vec<f64>,
}

impl CalibrationScores {
    /// Sorts the scores; non-finite scores are not expected (they come from finite data).
    pub fn new(mut scores: Vec<f64>) -> Self {
        scores.sort_by(f64::total_cmp);
        CalibrationScores { sorted: scores }
    }

    /// The scores, ascending.
    pub fn sorted(&self) -> &[f64] {
        &self.sorted
    }

    /// Number of calibration scores.
    pub fn len(&self) -> usize {
        self.sorted.len()
    }

    /// Whether there are none.
    pub fn is_empty(&self) -> bool {
        self.sorted.is_empty()
    }

    /// `(1 + #{cᵢ ≥ s}) / (1 + n)`.
    pub fn p_value(&self, score: f64) -> f64 {
        let below = self.sorted.partition_point(|&c| c < score);
        let at_or_above = self.sorted.len() - below;
        (1 + at_or_above) as f64 / (1 + self.sorted.len()) as f64
    }

    /// The score whose p-value is the largest one not above `p`: scores at or beyond it
    /// are flagged at level `p`. `None` when no score can reach that level
    /// (the calibration set is too small: the smallest p-value is 1/(1+n)).
    pub fn threshold(&self, p: f64) -> Option<f64> {
        let n = self.sorted.len();
        // p(s) ≤ p  ⇔  #{cᵢ ≥ s} ≤ p(1+n) - 1 =: m; the threshold is the (m+1)-th largest.
        // The small allowance keeps p(1+n) = 2.0000000000000004 or 1.9999999999999998 at 2.
        let m = (p * (1 + n) as f64 - 1.0 + 1e-9).floor();
        if m < 0.0 {
            return None;
        }
        let m = m as usize;
        if m >= n {
            return self.sorted.first().copied();
        }
        Some(next_up(self.sorted[n - 1 - m]))
    }
}

/// The smallest double strictly greater than `v` (for finite `v`).
fn next_up(v: f64) -> f64 {
    if v.is_nan() || v == f64::INFINITY {
        return v;
    }
    if v == 0.0 {
        return f64::from_bits(1);
    }
    let bits = v.to_bits();
    if v > 0.0 {
        f64::from_bits(bits + 1)
    } else {
        f64::from_bits(bits - 1)
    }
}

/// `min(1, 2 min(p₁, p₂))`: the Bonferroni combination of two p-values, valid whatever
/// their dependence.
pub fn combine_p_values(p_mahalanobis: f64, p_knn: f64) -> f64 {
    (2.0 * p_mahalanobis.min(p_knn)).min(1.0)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn p_values_count_scores_at_or_above() {
        let cal = CalibrationScores::new(vec![3.0, 1.0, 2.0, 4.0]);
        assert_eq!(cal.p_value(0.5), 1.0); // all four at or above: 5/5
        assert_eq!(cal.p_value(2.0), 4.0 / 5.0); // 2, 3, 4
        assert_eq!(cal.p_value(4.5), 1.0 / 5.0);
    }

    #[test]
    fn threshold_is_where_the_p_value_drops_to_the_level() {
        let cal = CalibrationScores::new((1..=199).map(f64::from).collect());
        // n = 199: p ≤ 0.01 needs #{c ≥ s} ≤ 1, so s must exceed 198.
        let t = cal.threshold(0.01).unwrap();
        assert!(cal.p_value(t) <= 0.01);
        assert!(cal.p_value(198.0) > 0.01);
        assert!(t > 198.0 && t <= 199.0 + 1e-9);
        let small = CalibrationScores::new(vec![1.0, 2.0]);
        assert_eq!(small.threshold(0.01), None);
    }

    #[test]
    fn combination_is_capped_at_one() {
        assert_eq!(combine_p_values(0.8, 0.9), 1.0);
        assert_eq!(combine_p_values(0.01, 0.5), 0.02);
    }
}
