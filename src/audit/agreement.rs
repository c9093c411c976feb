//! Agreement between two attributions of the same groups.
//!
//! - Spearman's ρ: Pearson correlation of the ranks, ties given their average rank (as
//!   `scipy.stats.spearmanr` does).
//! - Kendall's τ-b: `(C - D) / √((n₀ - n₁)(n₀ - n₂))` over all pairs, with n₁ and n₂ the
//!   pairs tied in each ranking (Kendall 1945; `scipy.stats.kendalltau`'s default).
//! - Top-k overlap: Jaccard index of the k groups with the largest absolute attribution.
//! - Sign agreement: the fraction of groups whose attributions have the same sign, a value
//!   within 1e-9 of the larger attribution's magnitude counting as zero.
//!
//! Both correlations are undefined when one attribution is constant. kilter reports 1
//! when both are constant and equal (nothing to disagree about) and 0 when only one is
//! (no shared ordering), so every record holds numbers.

use serde::{Deserialize, Serialize};

/// Agreement statistics of a pair of attributions (SPEC: `agreement.A~B`).
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Agreement {
    pub spearman: f64,
    pub kendall_tau: f64,
    pub top_k_overlap: f64,
    pub sign_agreement: f64,
}

impl Agreement {
    /// Compares `a` and `b` (same length), with the top `k` groups for the overlap.
    pub fn between(a: &[f64], b: &[f64], k: usize) -> Agreement {
        assert_eq!(a.len(), b.len(), "attributions of the same groups");
        let (spearman, kendall_tau) = match (is_constant(a), is_constant(b)) {
            (true, true) => {
                let equal = a.first() == b.first();
                let v = f64::from(u8::from(equal));
                (v, v)
            }
            (true, false) | (false, true) => (0.0, 0.0),
            (false, false) => (spearman(a, b), kendall_tau_b(a, b)),
        };
        Agreement {
            spearman,
            kendall_tau,
            top_k_overlap: top_k_overlap(a, b, k),
            sign_agreement: sign_agreement(a, b),
        }
    }
}

fn is_constant(a: &[f64]) -> bool {
    a.iter().all(|v| *v == a[0])
}

/// Ranks from 1, ties given their average rank.
pub fn average_ranks(a: &[f64]) -> Vec<f64> {
    let mut order: Vec<usize> = (0..a.len()).collect();
    order.sort_by(|&i, &j| a[i].total_cmp(&a[j]));
    let mut ranks = vec![0.0; a.len()];
    let mut i = 0;
    while i < order.len() {
        let mut j = i;
        while j + 1 < order.len() && a[order[j + 1]] == a[order[i]] {
            j += 1;
        }
        let rank = (i + j) as f64 / 2.0 + 1.0;
        for &o in &order[i..=j] {
            ranks[o] = rank;
        }
        i = j + 1;
    }
    ranks
}

fn pearson(a: &[f64], b: &[f64]) -> f64 {
    let n = a.len() as f64;
    let ma = a.iter().sum::<f64>() / n;
    let mb = b.iter().sum::<f64>() / n;
    let (mut sab, mut saa, mut sbb) = (0.0, 0.0, 0.0);
    for (x, y) in a.iter().zip(b) {
        sab += (x - ma) * (y - mb);
        saa += (x - ma) * (x - ma);
        sbb += (y - mb) * (y - mb);
    }
    (sab / (saa * sbb).sqrt()).clamp(-1.0, 1.0)
}

/// Spearman's rank correlation with average ranks for ties.
pub fn spearman(a: &[f64], b: &[f64]) -> f64 {
    pearson(&average_ranks(a), &average_ranks(b))
}

/// Kendall's τ-b.
pub fn kendall_tau_b(a: &[f64], b: &[f64]) -> f64 {
    let n = a.len();
    let (mut concordant, mut discordant, mut ties_a, mut ties_b) = (0i64, 0i64, 0i64, 0i64);
    for i in 0..n {
        for j in i + 1..n {
            let da = a[i].total_cmp(&a[j]) as i64;
            let db = b[i].total_cmp(&b[j]) as i64;
            if da == 0 && db == 0 {
                ties_a += 1;
                ties_b += 1;
            } else if da == 0 {
                ties_a += 1;
            } else if db == 0 {
                ties_b += 1;
            } else if da == db {
                concordant += 1;
            } else {
                discordant += 1;
            }
        }
    }
    let pairs = (n * (n - 1) / 2) as f64;
    let denominator = ((pairs - ties_a as f64) * (pairs - ties_b as f64)).sqrt();
    ((concordant - discordant) as f64 / denominator).clamp(-1.0, 1.0)
}

/// Indices of the `k` largest absolute values, ties broken by index.
pub fn top_k(a: &[f64], k: usize) -> Vec<usize> {
    let mut order: Vec<usize> = (0..a.len()).collect();
    order.sort_by(|&i, &j| a[j].abs().total_cmp(&a[i].abs()).then(i.cmp(&j)));
    order.truncate(k.min(a.len()));
    order
}

/// Jaccard index of the top-k sets.
pub fn top_k_overlap(a: &[f64], b: &[f64], k: usize) -> f64 {
    let ta = top_k(a, k);
    let tb = top_k(b, k);
    let shared = ta.iter().filter(|i| tb.contains(i)).count();
    let union = ta.len() + tb.len() - shared;
    if union == 0 {
        1.0
    } else {
        shared as f64 / union as f64
    }
}

/// Fraction of positions with the same sign (values near zero count as zero).
pub fn sign_agreement(a: &[f64], b: &[f64]) -> f64 {
    if a.is_empty() {
        return 1.0;
    }
    let scale = a.iter().chain(b).fold(0.0_f64, |m, v| m.max(v.abs()));
    let sign = |v: f64| {
        if v.abs() <= 1e-9 * scale {
            0
        } else if v > 0.0 {
            1
        } else {
            -1
        }
    };
    let same = a
        .iter()
        .zip(b)
        .filter(|(x, y)| sign(**x) == sign(**y))
        .count();
    same as f64 / a.len() as f64
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Hand-worked: identical orderings agree perfectly, reversed ones perfectly disagree.
    #[test]
    fn extremes() {
        let a = [1.0, 2.0, 3.0, 4.0];
        let r = [4.0, 3.0, 2.0, 1.0];
        let same = Agreement::between(&a, &a, 2);
        assert_eq!((same.spearman, same.kendall_tau), (1.0, 1.0));
        let rev = Agreement::between(&a, &r, 2);
        assert_eq!((rev.spearman, rev.kendall_tau), (-1.0, -1.0));
        // Top 2 by |value|: {3, 2} and {0, 1}.
        assert_eq!(rev.top_k_overlap, 0.0);
        assert_eq!(Agreement::between(&[0.0; 3], &[0.0; 3], 1).spearman, 1.0);
        assert_eq!(Agreement::between(&[0.0; 3], &a[..3], 1).spearman, 0.0);
    }
}
