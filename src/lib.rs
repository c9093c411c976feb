//! kilter: tells whether an explanation of a model's prediction can be trusted.
//!
//! Masking explanations (occlusion, surrogate fits on random masks, sampled Shapley values)
//! and path explanations (integrated gradients) query a model on inputs it may never have
//! seen. kilter measures how far those inputs fall from a reference corpus and calibrates
//! that distance to p-values, so that an explanation built on off-manifold inputs can be
//! recognised.
//!
//! The crate is organised by the stages of that job:
//!
//! - [`corpus`]: matrix input (CSV and `.npy`) with cell-level error reporting;
//! - [`embedding`]: the space in which distances are measured;
//! - [`linalg`]: the dense decompositions, pure Rust or LAPACK (`--features lapack`);
//! - [`stats`]: covariance estimation, Mahalanobis distance, chi-square tails, conformal
//!   p-values;
//! - [`neighbours`]: exact k-nearest-neighbour search and the local outlier factor;
//! - [`profile`]: the fitted reference profile, its file format and the off-manifold scores;
//! - [`output`]: JSON Lines and CSV records, written atomically;
//! - [`scenario`]: the invented example data of `kilter demo`.

pub mod attribution;
pub mod audit;
pub mod baselines;
pub mod corpus;
pub mod embedding;
pub mod error;
pub mod groups;
pub mod linalg;
mod memory;
pub mod models;
pub mod neighbours;
pub mod output;
pub mod perturbation;
pub mod profile;
pub mod report;
pub mod scenario;
pub mod stats;

pub use error::{Error, Result};
