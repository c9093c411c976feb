//! The mask design of a Shapley-kernel estimate: which coalitions of groups are kept.
//!
//! The Shapley kernel (Charnes, Golany, Keane & Rousseau 1988; Lundberg & Lee 2017) weights
//! a coalition S of s of the M groups by `π(s) = (M - 1) / (C(M, s) s (M - s))`. Weighted
//! least squares over all coalitions with these weights, constrained to sum to
//! `v(full) - v(empty)`, gives the Shapley values exactly. When the budget covers every
//! coalition the design enumerates them with those weights; otherwise it samples sizes in
//! proportion to their total kernel weight `(M - 1) / (s (M - s))`, a uniform coalition of
//! that size, and its complement beside it (paired draws, which cancel the odd-order
//! error terms), each with weight 1. The empty and full coalitions are not sampled: they
//! enter the estimate as the constraint. A sampled design lists each drawn coalition
//! followed by its complement, so coalitions `2j` and `2j + 1` are the j-th of its
//! independent, identically distributed draws ([`CoalitionDesign::sampled_pairs`]): the
//! unit over which the estimator measures its own sampling variance.

use std::ops::Range;

use rand::seq::index::sample;
use rand::Rng;

/// The coalitions to evaluate and their regression weights.
#[derive(Debug, Clone, PartialEq)]
pub struct CoalitionDesign {
    groups: usize,
    /// `kept[k][g]`: group g is kept (not masked) in coalition k.
    kept: Vec<Vec<bool>>,
    weights: Vec<f64>,
    exhaustive: bool,
}

impl CoalitionDesign {
    /// A design for `groups` players with at most `samples` coalitions (besides the empty
    /// and full ones).
    pub fn shapley_kernel(groups: usize, samples: usize, rng: &mut impl Rng) -> CoalitionDesign {
        let proper = if groups >= 63 {
            usize::MAX
        } else {
            (1usize << groups).saturating_sub(2)
        };
        if proper <= samples {
            return CoalitionDesign::enumerate(groups);
        }
        let sizes: Vec<f64> = (1..groups)
            .map(|s| (groups - 1) as f64 / (s * (groups - s)) as f64)
            .collect();
        let total: f64 = sizes.iter().sum();
        let mut kept = Vec::with_capacity(samples);
        while kept.len() + 1 < samples.max(2) {
            let mut u = rng.random::<f64>() * total;
            let mut size = groups - 1;
            for (i, w) in sizes.iter().enumerate() {
                if u < *w {
                    size = i + 1;
                    break;
                }
                u -= w;
            }
            let mut coalition = vec![false; groups];
            for g in sample(rng, groups, size) {
                coalition[g] = true;
            }
            let complement: Vec<bool> = coalition.iter().map(|k| !k).collect();
            kept.push(coalition);
            kept.push(complement);
        }
        let weights = vec![1.0; kept.len()];
        CoalitionDesign {
            groups,
            kept,
            weights,
            exhaustive: false,
        }
    }

    /// Every proper, non-empty coalition with its exact kernel weight.
    pub fn enumerate(groups: usize) -> CoalitionDesign {
        let mut kept = Vec::new();
        let mut weights = Vec::new();
        for bits in 1..(1u64 << groups) - 1 {
            let coalition: Vec<bool> = (0..groups).map(|g| bits >> g & 1 == 1).collect();
            let s = coalition.iter().filter(|&&k| k).count();
            weights.push((groups - 1) as f64 / (binomial(groups, s) * (s * (groups - s)) as f64));
            kept.push(coalition);
        }
        CoalitionDesign {
            groups,
            kept,
            weights,
            exhaustive: true,
        }
    }

    /// Number of groups (players).
    pub fn groups(&self) -> usize {
        self.groups
    }

    /// The coalitions, as kept-group flags.
    pub fn coalitions(&self) -> &[Vec<bool>] {
        &self.kept
    }

    /// Regression weight of each coalition.
    pub fn weights(&self) -> &[f64] {
        &self.weights
    }

    /// Whether every coalition is present (the estimate is then exact, without sampling
    /// error).
    pub fn is_exhaustive(&self) -> bool {
        self.exhaustive
    }

    /// The independent draws of a sampled design, as ranges of coalition indices: a
    /// coalition and its complement, in the order they were drawn. An enumerated design
    /// draws nothing and has none.
    pub fn sampled_pairs(&self) -> impl ExactSizeIterator<Item = Range<usize>> + '_ {
        let pairs = if self.exhaustive {
            0
        } else {
            self.kept.len() / 2
        };
        (0..pairs).map(|j| 2 * j..2 * j + 2)
    }
}

fn binomial(n: usize, k: usize) -> f64 {
    (0..k).fold(1.0, |acc, i| acc * (n - i) as f64 / (i + 1) as f64)
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;
    use rand_chacha::ChaCha8Rng;

    #[test]
    fn small_games_are_enumerated_and_large_ones_paired() {
        let mut rng = ChaCha8Rng::seed_from_u64(1);
        let small = CoalitionDesign::shapley_kernel(4, 100, &mut rng);
        assert!(small.is_exhaustive());
        assert_eq!(small.coalitions().len(), 14);
        let large = CoalitionDesign::shapley_kernel(20, 200, &mut rng);
        assert!(!large.is_exhaustive());
        assert_eq!(large.coalitions().len(), 200);
        assert_eq!(small.sampled_pairs().len(), 0);
        assert_eq!(large.sampled_pairs().len(), 100);
        for pair in large.sampled_pairs().map(|r| &large.coalitions()[r]) {
            assert!(
                pair[0].iter().zip(&pair[1]).all(|(a, b)| a != b),
                "complements"
            );
            let size = pair[0].iter().filter(|&&k| k).count();
            assert!(size > 0 && size < 20);
        }
    }
}
