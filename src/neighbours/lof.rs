//! Local outlier factor (Breunig, Kriegel, Ng & Sander 2000, "LOF: identifying
//! density-based local outliers", SIGMOD).
//!
//! With `N_k(a)` the k nearest fitted rows of `a` and `k-dist(o)` the distance from a
//! fitted row `o` to its own k-th nearest fitted row (itself excluded):
//!
//! ```text
//! reach(a, o) = max(k-dist(o), d(a, o))
//! lrd(a)      = 1 / mean_{o ∈ N_k(a)} reach(a, o)
//! LOF(a)      = mean_{o ∈ N_k(a)} lrd(o) / lrd(a)
//! ```
//!
//! Around 1 inside a cluster, well above 1 for points in sparser surroundings than their
//! neighbours. A tiny constant is added to the mean reachability before inverting so that
//! duplicated rows (reachability 0) give a finite density; it is the same 1e-10 that
//! scikit-learn adds, which keeps results comparable to that reference implementation.

use ndarray::Array1;
use serde::{Deserialize, Serialize};

use super::Neighbours;

/// Guard against division by zero for duplicated rows.
const REACHABILITY_FLOOR: f64 = 1e-10;

/// The fitted rows' k-distances and local reachability densities.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct LocalOutlierFactor {
    k_distance: Vec<f64>,
    density: Vec<f64>,
}

impl LocalOutlierFactor {
    /// Fits from the in-sample neighbours of the fitted rows (each row excluding itself).
    pub fn fit(in_sample: &Neighbours) -> Self {
        let k = in_sample.k();
        let k_distance: Vec<f64> = in_sample.distances.column(k - 1).to_vec();
        let density = (0..in_sample.indices.nrows())
            .map(|a| local_density(in_sample, a, &k_distance))
            .collect();
        LocalOutlierFactor {
            k_distance,
            density,
        }
    }

    /// Rebuilds from stored parts (a profile read from disk).
    pub fn from_parts(k_distance: Vec<f64>, density: Vec<f64>) -> Option<Self> {
        (k_distance.len() == density.len()).then_some(LocalOutlierFactor {
            k_distance,
            density,
        })
    }

    /// k-distance of each fitted row.
    pub fn k_distance(&self) -> &[f64] {
        &self.k_distance
    }

    /// Local reachability density of each fitted row.
    pub fn density(&self) -> &[f64] {
        &self.density
    }

    /// LOF of each query, given its neighbours among the fitted rows.
    pub fn score(&self, queries: &Neighbours) -> Array1<f64> {
        Array1::from_iter((0..queries.indices.nrows()).map(|a| {
            let lrd = local_density(queries, a, &self.k_distance);
            let neighbour_density: f64 = queries
                .indices
                .row(a)
                .iter()
                .map(|&o| self.density[o])
                .sum::<f64>()
                / queries.k() as f64;
            neighbour_density / lrd
        }))
    }
}

fn local_density(neighbours: &Neighbours, a: usize, k_distance: &[f64]) -> f64 {
    let k = neighbours.k();
    let reach: f64 = neighbours
        .indices
        .row(a)
        .iter()
        .zip(neighbours.distances.row(a).iter())
        .map(|(&o, &d)| d.max(k_distance[o]))
        .sum::<f64>()
        / k as f64;
    1.0 / (reach + REACHABILITY_FLOOR)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::neighbours::{BruteForceIndex, Exclusion, NeighbourIndex};
    use ndarray::array;

    /// Hand-worked on the line 0, 1, 2, 10 with k = 1:
    /// k-dist = (1, 1, 1, 8); lrd = (1, 1, 1, 1/8) (up to the 1e-10 floor);
    /// a query at 2.5 has neighbour 2 at 0.5, reach = max(1, 0.5) = 1, lrd = 1, LOF = 1;
    /// a query at 30 has neighbour 10 at 20, reach 20, lrd = 1/20, LOF = (1/8)/(1/20) = 2.5.
    #[test]
    fn lof_by_hand() {
        let index = BruteForceIndex::new(array![[0.0], [1.0], [2.0], [10.0]]);
        let own = index
            .k_nearest(index.rows(), 1, Exclusion::SameIndex)
            .unwrap();
        let lof = LocalOutlierFactor::fit(&own);
        assert_eq!(lof.k_distance(), &[1.0, 1.0, 1.0, 8.0]);
        let q = index
            .k_nearest(array![[2.5], [30.0]].view(), 1, Exclusion::None)
            .unwrap();
        let scores = lof.score(&q);
        assert!((scores[0] - 1.0).abs() < 1e-8, "{scores}");
        assert!((scores[1] - 2.5).abs() < 1e-8, "{scores}");
    }
}
