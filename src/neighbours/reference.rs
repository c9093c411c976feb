//! The index a profile keeps over its embedded fitted rows, chosen by `kilter fit --index`.
//!
//! Three kinds answer the same [`NeighbourIndex`] calls: the exact brute force (the
//! default above [`tree_auto_max_dim`] dimensions), the exact k-d tree (the default at or
//! below it, where a tree visits a small fraction of the rows), and the approximate graph
//! for corpora too large for an exact search (chosen explicitly; its recall is measured at
//! fit). Calibration scores are computed through the same index as every later score, so
//! conformal p-values stay valid whichever kind answers: the calibration rows and new
//! inputs are searched by one and the same procedure.

use ndarray::{Array2, ArrayView2};
use serde::{Deserialize, Serialize};

use super::{
    ApproximateIndex, ApproximateSettings, BruteForceIndex, Exclusion, NeighbourIndex, Neighbours,
    TreeIndex, MAX_TREE_DIM,
};
use crate::error::{Error, Result};

/// Embedded dimensions up to which `--index auto` picks the k-d tree where the brute force
/// runs its AVX-512 kernel. Measured with 100,000 Gaussian fitted rows and 20,000 queries on
/// a 2-core AVX-512 machine (README, `--index`): the tree scored in 0.108 s against 0.215 s
/// at dimension 4 and 0.162 s against 0.225 s at 5, but 0.266 s against 0.238 s at 6 and
/// 0.767 s against 0.256 s at 8.
pub const TREE_AUTO_MAX_DIM_WIDE_KERNEL: usize = 5;
/// The same elsewhere, where the brute force is slower: on a 2-core AVX2 machine the tree
/// scored in 0.38 s against 1.0 s at dimension 8 and 1.6 s against 1.0 s at 12.
pub const TREE_AUTO_MAX_DIM: usize = 8;

/// Embedded dimensions up to which `--index auto` picks the k-d tree on this machine. Either
/// index gives the same answers, distances included, so the choice changes speed alone.
pub fn tree_auto_max_dim() -> usize {
    if BruteForceIndex::has_wide_kernel() {
        TREE_AUTO_MAX_DIM_WIDE_KERNEL
    } else {
        TREE_AUTO_MAX_DIM
    }
}

/// The `--index` setting.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum IndexChoice {
    /// The tree at low dimension, the brute force otherwise.
    Auto,
    /// Exact brute force.
    Exact,
    /// Exact k-d tree (at most [`MAX_TREE_DIM`] dimensions).
    Tree,
    /// Approximate graph search.
    Approximate(ApproximateSettings),
}

impl IndexChoice {
    /// Parses `auto`, `exact`, `tree` or `approximate`; the graph is seeded with `seed`.
    pub fn parse(text: &str, seed: u64) -> Result<IndexChoice> {
        match text {
            "auto" => Ok(IndexChoice::Auto),
            "exact" => Ok(IndexChoice::Exact),
            "tree" => Ok(IndexChoice::Tree),
            "approximate" => Ok(IndexChoice::Approximate(ApproximateSettings::new(
                ApproximateSettings::DEFAULT_EF_CONSTRUCTION,
                ApproximateSettings::DEFAULT_EF_SEARCH,
                seed,
            )?)),
            other => Err(Error::InvalidSetting {
                flag: "--index",
                value: other.to_string(),
                expected: "auto, exact, tree or approximate".into(),
            }),
        }
    }

    /// The kind `auto` resolves to for rows of `dim` dimensions.
    pub fn resolve(self, dim: usize) -> IndexChoice {
        match self {
            IndexChoice::Auto if dim <= tree_auto_max_dim().min(MAX_TREE_DIM) => IndexChoice::Tree,
            IndexChoice::Auto => IndexChoice::Exact,
            other => other,
        }
    }

    /// Whether answers are exact.
    pub fn is_exact(self) -> bool {
        !matches!(self, IndexChoice::Approximate(_))
    }
}

impl std::fmt::Display for IndexChoice {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            IndexChoice::Auto => write!(f, "auto"),
            IndexChoice::Exact => write!(f, "exact brute force"),
            IndexChoice::Tree => write!(f, "exact k-d tree"),
            IndexChoice::Approximate(s) => write!(
                f,
                "approximate graph (ef_construction {}, ef_search {}, seed {})",
                s.ef_construction(),
                s.ef_search(),
                s.seed()
            ),
        }
    }
}

/// One of the three indexes.
#[derive(Debug)]
pub enum ReferenceIndex {
    Exact(BruteForceIndex),
    Tree(TreeIndex),
    Approximate(ApproximateIndex),
}

impl ReferenceIndex {
    /// Builds the chosen kind over the rows (`auto` resolved by their dimension).
    pub fn build(choice: IndexChoice, rows: Array2<f64>) -> Result<ReferenceIndex> {
        Ok(match choice.resolve(rows.ncols()) {
            IndexChoice::Auto | IndexChoice::Exact => {
                ReferenceIndex::Exact(BruteForceIndex::new(rows))
            }
            IndexChoice::Tree => ReferenceIndex::Tree(TreeIndex::new(rows)?),
            IndexChoice::Approximate(settings) => {
                ReferenceIndex::Approximate(ApproximateIndex::new(rows, settings)?)
            }
        })
    }

    /// The kind this is.
    pub fn choice(&self) -> IndexChoice {
        match self {
            ReferenceIndex::Exact(_) => IndexChoice::Exact,
            ReferenceIndex::Tree(_) => IndexChoice::Tree,
            ReferenceIndex::Approximate(a) => IndexChoice::Approximate(a.settings()),
        }
    }

    fn inner(&self) -> &dyn NeighbourIndex {
        match self {
            ReferenceIndex::Exact(i) => i,
            ReferenceIndex::Tree(i) => i,
            ReferenceIndex::Approximate(i) => i,
        }
    }
}

impl NeighbourIndex for ReferenceIndex {
    fn rows(&self) -> ArrayView2<'_, f64> {
        self.inner().rows()
    }

    fn k_nearest(
        &self,
        queries: ArrayView2<'_, f64>,
        k: usize,
        exclusion: Exclusion,
    ) -> Result<Neighbours> {
        self.inner().k_nearest(queries, k, exclusion)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn auto_picks_the_tree_at_low_dimension_only() {
        assert_eq!(IndexChoice::Auto.resolve(2), IndexChoice::Tree);
        assert_eq!(
            IndexChoice::Auto.resolve(tree_auto_max_dim()),
            IndexChoice::Tree
        );
        assert_eq!(
            IndexChoice::Auto.resolve(tree_auto_max_dim() + 1),
            IndexChoice::Exact
        );
        assert!([TREE_AUTO_MAX_DIM, TREE_AUTO_MAX_DIM_WIDE_KERNEL].contains(&tree_auto_max_dim()));
        assert_eq!(IndexChoice::Exact.resolve(2), IndexChoice::Exact);
        assert!(IndexChoice::parse("fast", 0).is_err());
        assert!(!IndexChoice::parse("approximate", 3).unwrap().is_exact());
    }
}
