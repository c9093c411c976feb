//! Matrix input: the reference corpus, the inputs to score and any supplied explanations.
//!
//! A [`FeatureMatrix`] is one input per row, features in a fixed column order, every cell
//! finite. Readers validate as they go and report the first bad cell with its file, 1-based
//! data row and column, so that a user can find it in a spreadsheet.
//!
//! [`MatrixChunks`] reads a file a block of rows at a time, so that commands which handle
//! rows independently (`score`, `audit`, `baseline`, `predict`) hold a bounded amount of
//! it in memory whatever its length; [`read_matrix`] collects every block.

mod csv_reader;
mod npy_reader;

use std::fs::File;
use std::io::{BufReader, Read};
use std::path::{Path, PathBuf};

use ndarray::Array2;

use crate::error::{Error, Result};

use csv_reader::CsvChunks;
pub use csv_reader::CsvOptions;
use npy_reader::NpyChunks;

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

/// What [`FeatureMatrix::complete_rows`] left out.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct MissingCells {
    /// Rows left out.
    pub rows: usize,
    /// Missing cells per column, in column order.
    pub per_column: Vec<usize>,
}

impl FeatureMatrix {
    /// Leaves out the rows with a missing (NaN) cell; `None` when every row is complete.
    pub fn complete_rows(self) -> (FeatureMatrix, Option<MissingCells>) {
        let per_column: Vec<usize> = self
            .values
            .columns()
            .into_iter()
            .map(|c| c.iter().filter(|v| v.is_nan()).count())
            .collect();
        if per_column.iter().all(|&n| n == 0) {
            return (self, None);
        }
        let keep: Vec<usize> = (0..self.values.nrows())
            .filter(|&r| self.values.row(r).iter().all(|v| !v.is_nan()))
            .collect();
        let dropped = self.values.nrows() - keep.len();
        let values = self.values.select(ndarray::Axis(0), &keep);
        (
            FeatureMatrix { values, ..self },
            Some(MissingCells {
                rows: dropped,
                per_column,
            }),
        )
    }

    /// Number of rows.
    pub fn rows(&self) -> usize {
        self.values.nrows()
    }

    /// Number of feature columns.
    pub fn columns(&self) -> usize {
        self.values.ncols()
    }

    /// The names and origin of the columns.
    pub fn header(&self) -> MatrixHeader<'_> {
        MatrixHeader {
            names: &self.names,
            named: self.named,
            source: &self.source,
        }
    }
}

/// What a matrix file says about its columns, before or without its rows.
#[derive(Debug, Clone, Copy)]
pub struct MatrixHeader<'a> {
    /// Column names (see [`FeatureMatrix::names`]).
    pub names: &'a [String],
    /// Whether the names came from a header.
    pub named: bool,
    /// The file.
    pub source: &'a Path,
}

/// The file formats a matrix can come in.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum MatrixFormat {
    /// Comma-separated values with a header row.
    Csv,
    /// NumPy's `.npy`.
    Npy,
}

impl MatrixFormat {
    /// The format a path's extension names.
    pub fn of(path: &Path) -> Result<MatrixFormat> {
        let extension = path
            .extension()
            .and_then(|e| e.to_str())
            .map(|e| e.to_ascii_lowercase());
        match extension.as_deref() {
            Some("csv") => Ok(MatrixFormat::Csv),
            Some("npy") => Ok(MatrixFormat::Npy),
            _ => Err(Error::UnknownFileType {
                path: path.to_path_buf(),
            }),
        }
    }
}

/// A block of rows, one input per row, with the rows' ids when the file has them.
pub type Block = (Array2<f64>, Option<Vec<String>>);

/// Values `read_all` reserves before any row has been read (16 MB).
const PREALLOCATED_VALUES: usize = 1 << 21;

enum Reader {
    Csv(CsvChunks),
    Npy(NpyChunks),
}

/// A matrix file read a block of rows at a time.
pub struct MatrixChunks {
    names: Vec<String>,
    named: bool,
    source: PathBuf,
    reader: Reader,
    /// Whether blocks come with their rows' ids.
    ids: bool,
}

impl MatrixChunks {
    /// Opens a `.csv` or `.npy` file (chosen by extension) and reads its header.
    pub fn open(path: &Path, options: &CsvOptions) -> Result<MatrixChunks> {
        let format = MatrixFormat::of(path)?;
        let file = File::open(path).map_err(|e| Error::io(path, e))?;
        MatrixChunks::from_reader(format, Box::new(BufReader::new(file)), path, options)
    }

    /// Reads a matrix from any byte source; `path` names it in messages.
    pub fn from_reader(
        format: MatrixFormat,
        source: Box<dyn Read + Send>,
        path: &Path,
        options: &CsvOptions,
    ) -> Result<MatrixChunks> {
        let (names, named, reader) = match format {
            MatrixFormat::Csv => {
                let csv = CsvChunks::new(path, source, options)?;
                (csv.feature_names(), true, Reader::Csv(csv))
            }
            MatrixFormat::Npy => {
                let npy = NpyChunks::new(path, source)?;
                let names = (1..=npy.columns()).map(|c| c.to_string()).collect();
                (names, false, Reader::Npy(npy))
            }
        };
        Ok(MatrixChunks {
            names,
            named,
            source: path.to_path_buf(),
            reader,
            ids: false,
        })
    }

    /// Reads the remaining rows in blocks of about `bytes` bytes instead of the default
    /// 16 MB. The block size changes only where the input is cut, never what is read;
    /// tiny blocks put every row and cell on a block edge, which is how the fuzz targets
    /// check the edges (`fuzz/`). Not for everyday use: small blocks are slow.
    #[doc(hidden)]
    pub fn with_block_bytes(mut self, bytes: usize) -> Self {
        let bytes = bytes.max(1);
        match &mut self.reader {
            Reader::Csv(csv) => csv.set_block_bytes(bytes),
            Reader::Npy(npy) => npy.set_block_bytes(bytes),
        }
        self
    }

    /// Reads missing cells (empty, `NA`, `N/A`, `NaN`, `null`, `?` in CSV; NaN in `.npy`)
    /// as NaN instead of refusing them; infinities are still refused. For a reference
    /// corpus, whose incomplete rows `fit` leaves out ([`FeatureMatrix::complete_rows`]).
    pub fn keeping_missing(mut self) -> Self {
        match &mut self.reader {
            Reader::Csv(csv) => csv.keep_missing(),
            Reader::Npy(npy) => npy.keep_missing(),
        }
        self
    }

    /// Keeps the cells of the first `--id-column` as row ids, which [`next_block`] hands
    /// out with their rows. Ignored when the file has no id column (`.npy`, or a CSV read
    /// without `--id-column`).
    ///
    /// [`next_block`]: MatrixChunks::next_block
    pub fn keeping_ids(mut self) -> Self {
        if let Reader::Csv(csv) = &mut self.reader {
            self.ids = csv.keep_ids();
        }
        self
    }

    /// Whether rows come with ids ([`MatrixChunks::keeping_ids`] on a file that has them).
    pub fn has_ids(&self) -> bool {
        self.ids
    }

    /// The names and origin of the columns.
    pub fn header(&self) -> MatrixHeader<'_> {
        MatrixHeader {
            names: &self.names,
            named: self.named,
            source: &self.source,
        }
    }

    /// Number of feature columns.
    pub fn columns(&self) -> usize {
        self.names.len()
    }

    /// The number of rows, when the header says it (`.npy`).
    pub fn rows_hint(&self) -> Option<usize> {
        match &self.reader {
            Reader::Csv(_) => None,
            Reader::Npy(npy) => Some(npy.rows()),
        }
    }

    /// Rows returned so far: the 0-based index of the next chunk's first row.
    pub fn rows_done(&self) -> usize {
        match &self.reader {
            Reader::Csv(csv) => csv.rows_done(),
            Reader::Npy(npy) => npy.rows_done(),
        }
    }

    /// The next block of rows, or `None` after the last. A file without any data row is
    /// an error here, at its end.
    pub fn next_chunk(&mut self) -> Result<Option<Array2<f64>>> {
        Ok(self.next_block()?.map(|(values, _)| values))
    }

    /// The next block of rows with their ids (`Some` when [`MatrixChunks::has_ids`]), or
    /// `None` after the last.
    pub fn next_block(&mut self) -> Result<Option<Block>> {
        let values = match &mut self.reader {
            Reader::Csv(csv) => csv.next_chunk()?,
            Reader::Npy(npy) => npy.next_chunk()?.map(|v| (v, Vec::new())),
        };
        match values {
            Some((values, ids)) => {
                let rows = values.len() / self.names.len();
                let values = Array2::from_shape_vec((rows, self.names.len()), values)
                    .expect("readers return whole rows");
                Ok(Some((values, self.ids.then_some(ids))))
            }
            None if self.rows_done() == 0 => Err(Error::NoRows {
                path: self.source.clone(),
            }),
            None => Ok(None),
        }
    }

    /// Reads every remaining row into one matrix.
    pub fn read_all(mut self) -> Result<FeatureMatrix> {
        let columns = self.names.len();
        // A header's row count is only a claim until the rows arrive: reserve for at most
        // one block's worth up front and let the buffer grow with what is read.
        let claimed = self.rows_hint().unwrap_or(0).saturating_mul(columns);
        let mut values = Vec::with_capacity(claimed.min(PREALLOCATED_VALUES));
        while let Some(chunk) = self.next_chunk()? {
            values.extend(chunk.iter());
        }
        let rows = values.len() / columns;
        Ok(FeatureMatrix {
            values: Array2::from_shape_vec((rows, columns), values).expect("whole rows were read"),
            names: self.names,
            named: self.named,
            source: self.source,
        })
    }
}

/// Parses the bytes of a CSV matrix file; `source` names it in errors.
pub fn parse_csv(source: &Path, bytes: &[u8], options: &CsvOptions) -> Result<FeatureMatrix> {
    let reader = Box::new(std::io::Cursor::new(bytes.to_vec()));
    MatrixChunks::from_reader(MatrixFormat::Csv, reader, source, options)?.read_all()
}

/// Parses the bytes of a `.npy` matrix file; `source` names it in errors.
pub fn parse_npy(source: &Path, bytes: &[u8]) -> Result<FeatureMatrix> {
    let reader = Box::new(std::io::Cursor::new(bytes.to_vec()));
    MatrixChunks::from_reader(MatrixFormat::Npy, reader, source, &CsvOptions::default())?.read_all()
}

/// [`parse_csv`] or [`parse_npy`] with the data read in blocks of `block_bytes` bytes (see
/// [`MatrixChunks::with_block_bytes`]); for the fuzz targets, which check that the block
/// size never changes the result.
#[doc(hidden)]
pub fn parse_in_blocks(
    format: MatrixFormat,
    source: &Path,
    bytes: &[u8],
    options: &CsvOptions,
    block_bytes: usize,
) -> Result<FeatureMatrix> {
    let reader = Box::new(std::io::Cursor::new(bytes.to_vec()));
    MatrixChunks::from_reader(format, reader, source, options)?
        .with_block_bytes(block_bytes)
        .read_all()
}

/// Reads a whole `.csv` or `.npy` matrix file, chosen by extension.
pub fn read_matrix(path: &Path, options: &CsvOptions) -> Result<FeatureMatrix> {
    MatrixChunks::open(path, options)?.read_all()
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Found by the `npy_matrix` fuzz target (fuzz/regressions/npy_matrix/): a header
    /// claiming 4,294,967,296 x 429,496,762 float32 values over a few bytes of data made
    /// the reader reserve room for all of them and run out of memory. It is refused.
    #[test]
    fn a_claimed_shape_reserves_nothing_before_the_rows_arrive() {
        let input = include_bytes!("../../fuzz/regressions/npy_matrix/declared_shape_4g_rows");
        match parse_npy(Path::new("x.npy"), input) {
            Err(Error::Npy { detail, .. }) => assert!(detail.contains("columns"), "{detail}"),
            other => panic!("expected truncation, got {other:?}"),
        }
    }
}
