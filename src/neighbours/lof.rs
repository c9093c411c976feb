//! Local outlier factor (Breunig, Kriegel, Ng & Sander 2000, "LOF: identifying
//! density-based local outliers", SIGMOD).
//!
//! With `N_k(a)` the k nearest fitted rows of `a` (ties by the lower row index) and
//! `k-dist(o)` the k-distance of a fitted row `o` (below):
//!
//! ```text
//! reach(a, o) = max(k-dist(o), d(a, o))
//! lrd(a)      = 1 / mean_{o ∈ N_k(a)} reach(a, o)
//! LOF(a)      = mean_{o ∈ N_k(a)} lrd(o) / lrd(a)
//! ```
//!
//! Around 1 inside a cluster, well above 1 for points in sparser surroundings than their
//! neighbours. A tiny constant is added to the mean reachability before inverting; it is
//! the same 1e-10 that scikit-learn adds, which keeps results comparable to that reference
//! implementation.
//!
//! # Duplicated rows
//!
//! Fitted rows with equal embedded coordinates are copies of one location. The k-distance
//! of a fitted row is the distance from its location to the k-th nearest *other location*
//! (each location counted once, however many rows hold it), or to the farthest other
//! location when there are fewer than k. This is the k-distinct-distance Breunig et al.
//! propose for data with duplicates (section 4, the remark after the definition of the
//! local reachability density; cited from memory of the paper). Neighbourhoods `N_k` stay
//! the k nearest rows with copies counted, so a location weighs in the means by the number
//! of its copies among a point's k nearest rows.
//!
//! Without it, a row with k or more copies has a k-distance of 0 and a density of 1e10
//! (the floor alone), and every point whose neighbours are such copies gets a LOF of about
//! 1e10 times its distance to them: on a corpus of 16,152 rows holding 2,724 distinct
//! ones, ordinary rows scored near 7e8. With it, the k-distance is positive whenever the
//! fitted rows hold two locations (fitting refuses fewer), so densities and LOF stay of the
//! size of the corpus's geometry.
//!
//! When no two fitted rows are equal, every location is one row and the k-distance is the
//! distance to the k-th nearest other row: the computation is then the one scikit-learn's
//! `LocalOutlierFactor` makes (brute-force neighbours, novelty mode), and kilter agrees
//! with it to rounding (`tests/cli/golden.rs`). With duplicated rows the two differ in
//! the k-distance alone: scikit-learn counts copies there too. On the distinct rows of a
//! corpus both give the same values (`tests/cli/duplicates.rs`).

use ndarray::{Array1, ArrayView1, ArrayView2, Axis};
use rayon::prelude::*;
use serde::{Deserialize, Serialize};

use super::{Exclusion, NeighbourIndex, Neighbours, ReferenceIndex};
use crate::error::Result;

/// Guard against division by zero (a mean reachability of 0 needs a point at zero distance
/// from neighbours whose k-distance is 0, which the distinct k-distance rules out).
const REACHABILITY_FLOOR: f64 = 1e-10;

/// The fitted rows' k-distances and local reachability densities.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct LocalOutlierFactor {
    k_distance: Vec<f64>,
    density: Vec<f64>,
}

impl LocalOutlierFactor {
    /// Fits from the index over the fitted rows and their in-sample neighbours (each row
    /// excluding itself, copies counted). When rows repeat, the k-distances come from a
    /// search of the same kind over one row per location.
    pub fn fit(index: &ReferenceIndex, in_sample: &Neighbours) -> Result<Self> {
        let k = in_sample.k();
        let k_distance = match Locations::of(index.rows()) {
            None => in_sample.distances.column(k - 1).to_vec(),
            Some(locations) => locations.k_distance(index, k)?,
        };
        let density = (0..in_sample.indices.nrows())
            .map(|a| local_density(in_sample, a, &k_distance))
            .collect();
        Ok(LocalOutlierFactor {
            k_distance,
            density,
        })
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

/// The locations the fitted rows hold: rows with equal coordinates share one.
struct Locations {
    /// The location of each fitted row, locations numbered in the order of their first rows.
    of_row: Vec<usize>,
    /// The first fitted row of each location, ascending.
    first_rows: Vec<usize>,
}

impl Locations {
    /// The locations of `rows`, or `None` when no two rows are equal. (`-0` and `0` are
    /// equal coordinates; the rows are finite, which every index checks.)
    fn of(rows: ArrayView2<'_, f64>) -> Option<Locations> {
        let n = rows.nrows();
        // Equal rows end up adjacent, the lowest index first.
        let mut order: Vec<usize> = (0..n).collect();
        order.par_sort_unstable_by(|&a, &b| compare_rows(rows.row(a), rows.row(b)).then(a.cmp(&b)));
        let mut first_of = vec![0; n];
        let mut repeated = false;
        for (at, &row) in order.iter().enumerate() {
            first_of[row] = match at.checked_sub(1).map(|before| order[before]) {
                Some(previous) if compare_rows(rows.row(previous), rows.row(row)).is_eq() => {
                    repeated = true;
                    first_of[previous]
                }
                _ => row,
            };
        }
        if !repeated {
            return None;
        }
        let mut number = vec![0; n];
        let mut first_rows = Vec::new();
        for row in 0..n {
            if first_of[row] == row {
                number[row] = first_rows.len();
                first_rows.push(row);
            }
        }
        let of_row = first_of.iter().map(|&first| number[first]).collect();
        Some(Locations { of_row, first_rows })
    }

    /// Each fitted row's distance from its location to the k-th nearest other location
    /// (the farthest when there are fewer), searched by an index of the same kind as
    /// `index` over one row per location.
    fn k_distance(&self, index: &ReferenceIndex, k: usize) -> Result<Vec<f64>> {
        let distinct = ReferenceIndex::build(
            index.choice(),
            index.rows().select(Axis(0), &self.first_rows),
        )?;
        let k = k.min(self.first_rows.len().saturating_sub(1));
        let found = distinct.k_nearest(distinct.rows(), k, Exclusion::SameIndex)?;
        let by_location = found.distances.column(k - 1);
        Ok(self.of_row.iter().map(|&at| by_location[at]).collect())
    }
}

/// Orders rows coordinate by coordinate, `-0` as `0`.
fn compare_rows(a: ArrayView1<'_, f64>, b: ArrayView1<'_, f64>) -> std::cmp::Ordering {
    a.iter()
        .zip(b.iter())
        .map(|(x, y)| (x + 0.0).total_cmp(&(y + 0.0)))
        .find(|order| order.is_ne())
        .unwrap_or(std::cmp::Ordering::Equal)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::neighbours::BruteForceIndex;
    use ndarray::{array, Array2};

    /// The LOF fitted on `rows` with `k` neighbours, and the LOF of `queries` against it.
    fn fit_and_score(
        rows: Array2<f64>,
        k: usize,
        queries: Array2<f64>,
    ) -> (LocalOutlierFactor, Array1<f64>) {
        let index = ReferenceIndex::Exact(BruteForceIndex::new(rows));
        let own = index
            .k_nearest(index.rows(), k, Exclusion::SameIndex)
            .unwrap();
        let lof = LocalOutlierFactor::fit(&index, &own).unwrap();
        let found = index.k_nearest(queries.view(), k, Exclusion::None).unwrap();
        let scores = lof.score(&found);
        (lof, scores)
    }

    /// Hand-worked on the line 0, 1, 2, 10 with k = 1:
    /// k-dist = (1, 1, 1, 8); lrd = (1, 1, 1, 1/8) (up to the 1e-10 floor);
    /// a query at 2.5 has neighbour 2 at 0.5, reach = max(1, 0.5) = 1, lrd = 1, LOF = 1;
    /// a query at 30 has neighbour 10 at 20, reach 20, lrd = 1/20, LOF = (1/8)/(1/20) = 2.5.
    #[test]
    fn lof_by_hand() {
        let (lof, scores) = fit_and_score(
            array![[0.0], [1.0], [2.0], [10.0]],
            1,
            array![[2.5], [30.0]],
        );
        assert_eq!(lof.k_distance(), &[1.0, 1.0, 1.0, 8.0]);
        assert!((scores[0] - 1.0).abs() < 1e-8, "{scores}");
        assert!((scores[1] - 2.5).abs() < 1e-8, "{scores}");
    }

    /// Hand-worked on the rows 0, 0, 0, 1, 3 with k = 2. The locations are 0, 1 and 3;
    /// the second nearest other location is 3 from 0, 2 from 1 and 3 from 3, so
    /// k-dist = (3, 3, 3, 2, 3). The rows at 0 have two copies as neighbours:
    /// reach 3 and 3, lrd 1/3; the row at 1 has the rows at 0 at distance 1: reach 3,
    /// lrd 1/3; the row at 3 has 1 at 2 (k-dist 2) and 0 at 3 (k-dist 3): reach 2 and 3,
    /// lrd 0.4. A query at 0.5 has two rows at 0 as neighbours: reach 3, lrd 1/3, LOF 1.
    /// A query at 10 has 3 at 7 and 1 at 9: reach 7 and 9, lrd 1/8; LOF = 8 (0.4 + 1/3) / 2
    /// = 88/30. Counting copies in the k-distance instead (as scikit-learn does) gives the
    /// rows at 0 a k-distance of 0 and a density of 1e10, and the query at 0.5 a LOF of 5e9.
    #[test]
    fn duplicated_rows_take_the_k_distance_over_other_locations() {
        let (lof, scores) = fit_and_score(
            array![[0.0], [0.0], [-0.0], [1.0], [3.0]],
            2,
            array![[0.5], [10.0]],
        );
        assert_eq!(lof.k_distance(), &[3.0, 3.0, 3.0, 2.0, 3.0]);
        for (got, want) in
            lof.density()
                .iter()
                .zip([1.0 / 3.0, 1.0 / 3.0, 1.0 / 3.0, 1.0 / 3.0, 0.4])
        {
            assert!((got - want).abs() < 1e-9, "{:?}", lof.density());
        }
        assert!((scores[0] - 1.0).abs() < 1e-8, "{scores}");
        assert!((scores[1] - 88.0 / 30.0).abs() < 1e-8, "{scores}");
    }

    /// Fewer other locations than k: the k-distance is the distance to the farthest one.
    #[test]
    fn fewer_locations_than_k_take_the_farthest() {
        let (lof, _) = fit_and_score(array![[0.0], [0.0], [0.0], [2.0]], 2, array![[1.0]]);
        assert_eq!(lof.k_distance(), &[2.0, 2.0, 2.0, 2.0]);
    }

    /// Locations are numbered by their first rows; rows all distinct have none.
    #[test]
    fn locations_group_equal_rows() {
        let rows = array![[1.0, 2.0], [0.0, 5.0], [1.0, 2.0], [0.0, -0.0], [0.0, 0.0]];
        let locations = Locations::of(rows.view()).unwrap();
        assert_eq!(locations.of_row, vec![0, 1, 0, 2, 2]);
        assert_eq!(locations.first_rows, vec![0, 1, 3]);
        assert!(Locations::of(array![[1.0, 2.0], [2.0, 1.0]].view()).is_none());
    }
}
