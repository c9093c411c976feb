//! Matrix input: the reference corpus, the inputs to score and any supplied explanations.
//!
//! A [`FeatureMatrix`] is one input per row, features in a fixed column order, every cell
//! finite. Readers validate as they go and report the first bad cell with its file, 1-based
//! data row and column, so that a user can find it in a spreadsheet.

mod csv_reader;
mod npy_reader;

use std::path::{Path, PathBuf};

use ndarray::Array2;

use crate::error::{Error, Result};

pub use csv_reader::CsvOptions;

/// A numeric matrix read from a file, with its column names.
#[derive(Debug, Clone)]
pub struct FeatureMatrix {
    /// Column names: the CSV header (id and label columns dropped), or `"1"`, `"2"`, ...
    /// (1-based positions) for `.npy`.
    pub names: Vec<String>,
    /// Whether the names came from a header (CSV) rather than positions (`.npy`).
    pub named: bool,
    /// The values, one input per row.
    pub values: Array2<f64>,
    /// The file it was read from.
    pub source: PathBuf,
}

impl FeatureMatrix {
    /// Number of rows.
    pub fn rows(&self) -> usize {
        self.values.nrows()
    }

    /// Number of feature columns.
    pub fn columns(&self) -> usize {
        self.values.ncols()
    }
}

/// Reads a `.csv` or `.npy` matrix file, chosen by extension.
pub fn read_matrix(path: &Path, options: &CsvOptions) -> Result<FeatureMatrix> {
    match extension(path).as_deref() {
        Some("csv") => csv_reader::read_csv(path, options),
        Some("npy") => npy_reader::read_npy(path),
        _ => Err(Error::UnknownFileType {
            path: path.to_path_buf(),
        }),
    }
}

/// Parses the bytes of a CSV matrix file; `source` names it in errors (the path-based
/// [`read_matrix`] reads the file and comes here).
pub fn parse_csv(source: &Path, bytes: &[u8], options: &CsvOptions) -> Result<FeatureMatrix> {
    csv_reader::parse_csv(source, bytes, options)
}

/// Parses the bytes of a `.npy` matrix file; `source` names it in errors.
pub fn parse_npy(source: &Path, bytes: &[u8]) -> Result<FeatureMatrix> {
    npy_reader::parse_npy(source, bytes)
}

fn extension(path: &Path) -> Option<String> {
    path.extension()
        .and_then(|e| e.to_str())
        .map(|e| e.to_ascii_lowercase())
}
