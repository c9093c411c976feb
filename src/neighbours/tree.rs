//! Exact k-nearest-neighbour search with a k-d tree, for low embedded dimensions.
//!
//! The tree (kiddo's immutable k-d tree, double precision) holds each distinct row once;
//! duplicated rows are kept as a group of row indices in ascending order, so that a block
//! of identical rows costs one tree point and a tie among them is resolved by index
//! without visiting them all. A query asks the tree for enough nearest groups to cover
//! `k` rows (one more under self-exclusion), then for every group within that distance,
//! widened by a bound on the rounding of two differently ordered sums. The rows of those
//! groups are re-ranked with the exact distance the brute-force index uses, ties by the
//! lower index: the answer is the brute-force answer, bit for bit.
//!
//! kiddo takes the dimension as a const generic, so the tree is an enum over the supported
//! dimensions, built by a macro and chosen at run time; larger dimensions are refused.

use std::cmp::Ordering;
use std::num::NonZeroUsize;

use kiddo::immutable::float::kdtree::ImmutableKdTree;
use kiddo::SquaredEuclidean;
use ndarray::{Array2, ArrayView1, ArrayView2, Axis};

use super::{
    check_request, exact_squared_distance, nearest_first, refuse_non_finite, search_in_blocks,
    Exclusion, NeighbourIndex, Neighbours,
};
use crate::error::{Error, IndexFault, Result};

/// The largest embedded dimension the tree supports. Beyond about 16 dimensions a k-d tree
/// visits most leaves for a k-nearest query and the brute-force product is faster.
pub const MAX_TREE_DIM: usize = 16;
/// Points per leaf (kiddo's customary bucket size).
const BUCKET: usize = 32;
/// The name errors give this index.
const NAME: &str = "k-d tree";

type Tree<const K: usize> = ImmutableKdTree<f64, u32, K, BUCKET>;

fn build_tree<const K: usize>(points: ArrayView2<'_, f64>) -> Tree<K> {
    let coordinates: Vec<[f64; K]> = points
        .outer_iter()
        .map(|row| std::array::from_fn(|j| row[j]))
        .collect();
    Tree::<K>::new_from_slice(&coordinates)
}

/// The `count` nearest groups as `(tree distance², group)`, nearest first.
fn nearest_groups<const K: usize>(
    tree: &Tree<K>,
    query: ArrayView1<'_, f64>,
    count: NonZeroUsize,
) -> Vec<(f64, usize)> {
    let query: [f64; K] = std::array::from_fn(|j| query[j]);
    tree.nearest_n::<SquaredEuclidean>(&query, count)
        .into_iter()
        .map(|found| (found.distance, found.item as usize))
        .collect()
}

/// Every group whose tree distance² is below `radius`, in no order.
fn groups_within<const K: usize>(
    tree: &Tree<K>,
    query: ArrayView1<'_, f64>,
    radius: f64,
) -> Vec<usize> {
    let query: [f64; K] = std::array::from_fn(|j| query[j]);
    tree.within_unsorted::<SquaredEuclidean>(&query, radius)
        .into_iter()
        .map(|found| found.item as usize)
        .collect()
}

/// One enum variant per supported dimension, and the run-time dispatch into them.
macro_rules! trees {
    ($($variant:ident => $k:literal),+ $(,)?) => {
        #[derive(Clone)]
        enum Trees {
            $($variant(Box<Tree<$k>>),)+
        }

        /// Every dimension the enum covers, to check it against `MAX_TREE_DIM`.
        #[cfg(test)]
        const COVERED_DIMS: &[usize] = &[$($k),+];

        impl Trees {
            fn build(points: ArrayView2<'_, f64>) -> Option<Self> {
                match points.ncols() {
                    $($k => Some(Trees::$variant(Box::new(build_tree::<$k>(points)))),)+
                    _ => None,
                }
            }

            fn nearest(&self, query: ArrayView1<'_, f64>, count: NonZeroUsize) -> Vec<(f64, usize)> {
                match self {
                    $(Trees::$variant(tree) => nearest_groups::<$k>(tree, query, count),)+
                }
            }

            fn within(&self, query: ArrayView1<'_, f64>, radius: f64) -> Vec<usize> {
                match self {
                    $(Trees::$variant(tree) => groups_within::<$k>(tree, query, radius),)+
                }
            }
        }
    };
}

trees!(
    D1 => 1, D2 => 2, D3 => 3, D4 => 4, D5 => 5, D6 => 6, D7 => 7, D8 => 8,
    D9 => 9, D10 => 10, D11 => 11, D12 => 12, D13 => 13, D14 => 14, D15 => 15, D16 => 16,
);

/// Exact search through a k-d tree over the distinct rows.
#[derive(Clone)]
pub struct TreeIndex {
    rows: Array2<f64>,
    /// The tree over one representative row per group; `None` when there are no rows.
    tree: Option<Trees>,
    /// Row indices grouped by identical rows, ascending within a group.
    members: Vec<usize>,
    /// Group `g` is `members[starts[g]..starts[g + 1]]`.
    starts: Vec<usize>,
}

impl std::fmt::Debug for TreeIndex {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("TreeIndex")
            .field("rows", &self.rows.nrows())
            .field("dim", &self.rows.ncols())
            .field("distinct", &(self.starts.len().saturating_sub(1)))
            .finish()
    }
}

/// Orders rows by their values, `-0.0` equal to `0.0` (they give the same distances).
fn compare_rows(a: ArrayView1<'_, f64>, b: ArrayView1<'_, f64>) -> Ordering {
    a.iter()
        .zip(b.iter())
        .map(|(x, y)| (x + 0.0).total_cmp(&(y + 0.0)))
        .find(|o| o.is_ne())
        .unwrap_or(Ordering::Equal)
}

impl TreeIndex {
    /// Indexes the rows (copied into standard layout). Refuses a dimension above
    /// [`MAX_TREE_DIM`], values that are not finite, and more distinct rows than 32 bits
    /// can number.
    pub fn new(rows: Array2<f64>) -> Result<Self> {
        let rows = rows.as_standard_layout().into_owned();
        let refuse = |fault| Error::NeighbourIndex { index: NAME, fault };
        let dim = rows.ncols();
        if dim == 0 || dim > MAX_TREE_DIM {
            return Err(refuse(IndexFault::DimensionUnsupported {
                dim,
                max: MAX_TREE_DIM,
            }));
        }
        refuse_non_finite(NAME, "indexed rows", rows.view())?;
        let mut order: Vec<usize> = (0..rows.nrows()).collect();
        order.sort_by(|&a, &b| compare_rows(rows.row(a), rows.row(b)).then(a.cmp(&b)));
        let mut starts = Vec::new();
        for (position, &row) in order.iter().enumerate() {
            let new_group =
                position == 0 || compare_rows(rows.row(order[position - 1]), rows.row(row)).is_ne();
            if new_group {
                starts.push(position);
            }
        }
        let distinct = starts.len();
        if distinct > u32::MAX as usize {
            return Err(refuse(IndexFault::TooManyRows {
                rows: rows.nrows(),
                max: u32::MAX as usize,
            }));
        }
        starts.push(order.len());
        let representatives = rows.select(Axis(0), &order_heads(&order, &starts));
        let tree = if distinct == 0 {
            None
        } else {
            Trees::build(representatives.view())
        };
        Ok(TreeIndex {
            rows,
            tree,
            members: order,
            starts,
        })
    }

    fn group(&self, g: usize) -> &[usize] {
        &self.members[self.starts[g]..self.starts[g + 1]]
    }

    /// The `k` nearest rows of one query as `(squared distance, index)`, nearest first.
    fn search_one(
        &self,
        tree: &Trees,
        query: ArrayView1<'_, f64>,
        own: usize,
        k: usize,
        exclusion: Exclusion,
    ) -> Vec<(f64, usize)> {
        let need = k + usize::from(exclusion == Exclusion::SameIndex);
        let distinct = self.starts.len() - 1;
        // Each group holds at least one row, so `need` groups always cover `need` rows.
        let ask = NonZeroUsize::new(need.min(distinct)).expect("k >= 1 and rows present");
        let nearest = tree.nearest(query, ask);
        let mut covered = 0;
        let mut boundary = 0.0_f64;
        for &(d2, g) in &nearest {
            covered += self.group(g).len();
            boundary = d2;
            if covered >= need {
                break;
            }
        }
        // Every row the exact ranking could put in the top `need` lies within the boundary
        // up to the rounding of two sums of d squares, each within (d + 3) units of 2⁻⁵³
        // of the true value (Higham, "Accuracy and Stability of Numerical Algorithms",
        // 2nd ed., §3.1); the slack covers three such roundings with room to spare, and the
        // smallest normal number makes a boundary of zero still take in exact duplicates.
        let slack = 4.0 * (self.rows.ncols() as f64 + 4.0) * f64::EPSILON;
        let radius = boundary * (1.0 + slack) + f64::MIN_POSITIVE;
        let mut groups = tree.within(query, radius);
        groups.extend(nearest.iter().map(|&(_, g)| g));
        groups.sort_unstable();
        groups.dedup();

        let mut candidates: Vec<(f64, usize)> = Vec::with_capacity(groups.len() + need);
        for g in groups {
            let members = self.group(g);
            let d2 = exact_squared_distance(query, self.rows.row(members[0]));
            // Within a group the lower indices win a tie, so no more than `need` can count.
            for &row in members.iter().take(need) {
                if exclusion == Exclusion::SameIndex && row == own {
                    continue;
                }
                candidates.push((d2, row));
            }
        }
        candidates.sort_by(nearest_first);
        candidates.truncate(k);
        candidates
    }
}

/// The first row index of every group.
fn order_heads(order: &[usize], starts: &[usize]) -> Vec<usize> {
    starts[..starts.len() - 1]
        .iter()
        .map(|&s| order[s])
        .collect()
}

impl NeighbourIndex for TreeIndex {
    fn rows(&self) -> ArrayView2<'_, f64> {
        self.rows.view()
    }

    fn k_nearest(
        &self,
        queries: ArrayView2<'_, f64>,
        k: usize,
        exclusion: Exclusion,
    ) -> Result<Neighbours> {
        check_request(self.len(), self.dim(), queries, k, exclusion)?;
        refuse_non_finite(NAME, "queries", queries)?;
        let tree = self
            .tree
            .as_ref()
            .expect("check_request refuses every k when there are no rows");
        Ok(search_in_blocks(queries, k, |block, first| {
            block
                .outer_iter()
                .enumerate()
                .map(|(qi, q)| self.search_one(tree, q, first + qi, k, exclusion))
                .collect()
        }))
    }
}

#[cfg(test)]
mod tests {
    use super::super::conformance;
    use super::*;

    fn build(rows: Array2<f64>) -> TreeIndex {
        TreeIndex::new(rows).expect("a supported dimension")
    }

    conformance::shared_tests!(build);

    #[test]
    fn the_macro_covers_every_supported_dimension() {
        assert_eq!(COVERED_DIMS, (1..=MAX_TREE_DIM).collect::<Vec<_>>());
    }

    #[test]
    fn dimensions_beyond_the_tree_are_refused() {
        let err = TreeIndex::new(Array2::zeros((4, MAX_TREE_DIM + 1))).unwrap_err();
        assert!(matches!(
            err,
            Error::NeighbourIndex {
                fault: IndexFault::DimensionUnsupported { dim: 17, max: 16 },
                ..
            }
        ));
        assert!(TreeIndex::new(Array2::zeros((4, 0))).is_err());
    }

    #[test]
    fn values_that_are_not_finite_are_refused() {
        let mut rows = Array2::zeros((3, 2));
        rows[[2, 1]] = f64::NAN;
        let err = TreeIndex::new(rows).unwrap_err();
        assert!(matches!(
            err,
            Error::NeighbourIndex {
                fault: IndexFault::NotFinite { row: 3, .. },
                ..
            }
        ));
        let index = build(Array2::zeros((3, 2)));
        let queries = ndarray::array![[0.0, f64::INFINITY]];
        assert!(index.k_nearest(queries.view(), 1, Exclusion::None).is_err());
    }

    /// Grid rows, grid queries and half-way queries: distinct rows tie exactly at the k-th
    /// place, which the nearest-n answer of the tree alone would settle arbitrarily.
    #[test]
    fn ties_between_distinct_rows_equal_brute_force() {
        for (side, dim) in [(60, 1), (12, 2), (6, 3), (4, 4), (3, 6)] {
            let rows = conformance::lattice_rows(side, dim, dim as u64);
            let halves = conformance::lattice_rows(side, dim, 99).mapv(|v| v + 0.5);
            let mut queries = rows.slice(ndarray::s![..50, ..]).to_owned();
            queries
                .append(Axis(0), halves.slice(ndarray::s![..50, ..]))
                .unwrap();
            for k in [1, 2, 5, 9] {
                conformance::equals_brute_force(&build(rows.clone()), &queries, k);
            }
        }
    }

    /// Every supported dimension against the brute-force index, on seeded Gaussian rows
    /// with duplicated blocks and a shared coordinate (one-hot style), both exclusions.
    #[test]
    fn equals_brute_force_in_every_supported_dimension() {
        for dim in 1..=MAX_TREE_DIM {
            let rows = conformance::awkward_rows(600, dim, dim as u64);
            let queries = conformance::awkward_rows(80, dim, 1000 + dim as u64);
            conformance::equals_brute_force(&build(rows.clone()), &queries, 7);
        }
    }
}
