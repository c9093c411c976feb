//! CSV input: a header row, numeric feature columns, optional id and label columns that
//! are dropped. Quoted fields, a UTF-8 byte-order mark and CRLF line ends are accepted.
//!
//! Records are read sequentially (CSV quoting makes the file impossible to split blindly)
//! and parsed to numbers in parallel batches, which keeps a million-row file in seconds.

use std::path::Path;

use csv::ByteRecord;
use ndarray::Array2;
use rayon::prelude::*;

use super::FeatureMatrix;
use crate::error::{CellFault, ColumnRef, Error, HeaderFault, Result};

/// Columns to drop from a CSV file before it becomes a matrix.
#[derive(Debug, Clone, Default)]
pub struct CsvOptions {
    /// `--id-column` names.
    pub id_columns: Vec<String>,
    /// `--label-column` names.
    pub label_columns: Vec<String>,
}

/// Rows parsed per parallel batch: large enough to amortise the hand-off, small enough
/// that the raw records of one batch stay in cache-sized memory.
const BATCH_ROWS: usize = 16_384;

pub(super) fn read_csv(path: &Path, options: &CsvOptions) -> Result<FeatureMatrix> {
    let file = std::fs::File::open(path).map_err(|e| Error::io(path, e))?;
    let mut reader = csv::ReaderBuilder::new()
        .has_headers(false)
        .flexible(true)
        .buffer_capacity(1 << 20)
        .from_reader(std::io::BufReader::with_capacity(1 << 20, file));

    let mut header = ByteRecord::new();
    let has_header = reader
        .read_byte_record(&mut header)
        .map_err(|e| csv_error(path, e))?;
    if !has_header {
        return Err(header_error(path, HeaderFault::Missing));
    }
    let names = header_names(path, &header)?;
    let features = select_features(path, &names, options)?;
    let feature_names: Vec<String> = features.iter().map(|&c| names[c].clone()).collect();
    let width = names.len();

    let mut values: Vec<f64> = Vec::new();
    let mut batch: Vec<ByteRecord> = Vec::with_capacity(BATCH_ROWS);
    let mut rows_done = 0usize;
    loop {
        batch.clear();
        let mut record = ByteRecord::new();
        while batch.len() < BATCH_ROWS
            && reader
                .read_byte_record(&mut record)
                .map_err(|e| csv_error(path, e))?
        {
            batch.push(std::mem::take(&mut record));
        }
        if batch.is_empty() {
            break;
        }
        let parsed: Vec<Vec<f64>> = batch
            .par_iter()
            .enumerate()
            .map(|(i, record)| {
                parse_record(path, record, rows_done + i + 1, width, &features, &names)
            })
            .collect::<Result<_>>()?;
        values.reserve(parsed.len() * features.len());
        for row in parsed {
            values.extend_from_slice(&row);
        }
        rows_done += batch.len();
        if batch.len() < BATCH_ROWS {
            break;
        }
    }
    if rows_done == 0 {
        return Err(Error::NoRows {
            path: path.to_path_buf(),
        });
    }
    let values = Array2::from_shape_vec((rows_done, features.len()), values)
        .expect("row-major buffer has rows x features values");
    Ok(FeatureMatrix {
        names: feature_names,
        named: true,
        values,
        source: path.to_path_buf(),
    })
}

fn header_names(path: &Path, header: &ByteRecord) -> Result<Vec<String>> {
    let mut names = Vec::with_capacity(header.len());
    for (i, raw) in header.iter().enumerate() {
        let text = String::from_utf8_lossy(raw);
        let text = if i == 0 {
            text.trim_start_matches('\u{feff}')
        } else {
            &text
        };
        let name = text.trim().to_string();
        if name.is_empty() {
            return Err(header_error(path, HeaderFault::EmptyName(i + 1)));
        }
        if names.contains(&name) {
            return Err(header_error(path, HeaderFault::Duplicate(name)));
        }
        names.push(name);
    }
    Ok(names)
}

/// Indices of the feature columns: every column except the id and label columns.
fn select_features(path: &Path, names: &[String], options: &CsvOptions) -> Result<Vec<usize>> {
    let dropped: Vec<&String> = options
        .id_columns
        .iter()
        .chain(options.label_columns.iter())
        .collect();
    for name in &dropped {
        if !names.iter().any(|n| n == *name) {
            return Err(header_error(
                path,
                HeaderFault::UnknownColumn((*name).clone()),
            ));
        }
    }
    let features: Vec<usize> = (0..names.len())
        .filter(|&c| !dropped.iter().any(|d| **d == names[c]))
        .collect();
    if features.is_empty() {
        return Err(header_error(path, HeaderFault::NoFeatures));
    }
    Ok(features)
}

fn parse_record(
    path: &Path,
    record: &ByteRecord,
    row: usize,
    width: usize,
    features: &[usize],
    names: &[String],
) -> Result<Vec<f64>> {
    if record.len() != width {
        return Err(Error::RaggedRow {
            path: path.to_path_buf(),
            row,
            expected: width,
            found: record.len(),
        });
    }
    let mut out = Vec::with_capacity(features.len());
    for &c in features {
        let raw = &record[c];
        match parse_cell(raw) {
            Ok(value) => out.push(value),
            Err(fault) => {
                return Err(Error::BadCell {
                    path: path.to_path_buf(),
                    row,
                    column: ColumnRef::Named(names[c].clone()),
                    fault,
                })
            }
        }
    }
    Ok(out)
}

/// Parses one numeric cell; surrounding spaces are allowed.
pub(crate) fn parse_cell(raw: &[u8]) -> std::result::Result<f64, CellFault> {
    let text = std::str::from_utf8(raw)
        .map_err(|_| CellFault::NotNumeric(String::from_utf8_lossy(raw).into_owned()))?
        .trim();
    if text.is_empty() {
        return Err(CellFault::Empty);
    }
    match text.parse::<f64>() {
        Ok(value) if value.is_finite() => Ok(value),
        Ok(_) => Err(CellFault::NotFinite(text.to_string())),
        Err(_) => Err(CellFault::NotNumeric(text.to_string())),
    }
}

fn header_error(path: &Path, fault: HeaderFault) -> Error {
    Error::Header {
        path: path.to_path_buf(),
        fault,
    }
}

fn csv_error(path: &Path, error: csv::Error) -> Error {
    let detail = match error.position() {
        Some(pos) => format!("line {}: {}", pos.line(), error),
        None => error.to_string(),
    };
    Error::CsvSyntax {
        path: path.to_path_buf(),
        detail,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn cells_parse_or_say_why_not() {
        assert_eq!(parse_cell(b" 1.5 "), Ok(1.5));
        assert_eq!(parse_cell(b"-2e3"), Ok(-2000.0));
        assert_eq!(parse_cell(b""), Err(CellFault::Empty));
        assert_eq!(parse_cell(b"NaN"), Err(CellFault::NotFinite("NaN".into())));
        assert_eq!(parse_cell(b"inf"), Err(CellFault::NotFinite("inf".into())));
        assert_eq!(parse_cell(b"abc"), Err(CellFault::NotNumeric("abc".into())));
    }
}
