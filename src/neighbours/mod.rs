//! Neighbour search in the embedded space, and the local outlier factor built on it.

mod brute_force;
mod lof;

use ndarray::{Array2, ArrayView2};

use crate::error::Result;

pub use brute_force::BruteForceIndex;
pub use lof::LocalOutlierFactor;

/// Whether a query may find itself among the indexed rows.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Exclusion {
    /// Queries are new points: every indexed row is a candidate.
    None,
    /// Query `i` is indexed row `i` (in-sample calibration): row `i` is not its own
    /// neighbour. Exclusion is by index, not by distance, so duplicates still count.
    SameIndex,
}

/// The k nearest indexed rows of each query, nearest first.
#[derive(Debug, Clone, PartialEq)]
pub struct Neighbours {
    /// `queries x k` indices into the indexed rows.
    pub indices: Array2<usize>,
    /// `queries x k` Euclidean distances, ascending along each row.
    pub distances: Array2<f64>,
}

impl Neighbours {
    /// Number of neighbours per query.
    pub fn k(&self) -> usize {
        self.indices.ncols()
    }
}

/// An index answering exact k-nearest-neighbour queries in Euclidean distance.
pub trait NeighbourIndex: Send + Sync {
    /// Number of indexed rows.
    fn len(&self) -> usize;
    /// Whether nothing is indexed.
    fn is_empty(&self) -> bool {
        self.len() == 0
    }
    /// Dimension of the indexed rows.
    fn dim(&self) -> usize;
    /// The rows the index holds.
    fn rows(&self) -> ArrayView2<'_, f64>;
    /// The `k` nearest indexed rows of every query row. `k` must not exceed the number of
    /// candidates (`len`, or `len - 1` under [`Exclusion::SameIndex`]).
    fn k_nearest(
        &self,
        queries: ArrayView2<'_, f64>,
        k: usize,
        exclusion: Exclusion,
    ) -> Result<Neighbours>;
}
