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
/// Bytes per parallel task of the unquoted fast path.
const FAST_CHUNK_BYTES: usize = 4 << 20;

pub(super) fn read_csv(path: &Path, options: &CsvOptions) -> Result<FeatureMatrix> {
    let bytes = std::fs::read(path).map_err(|e| Error::io(path, e))?;
    parse_csv(path, &bytes, options)
}

/// Parses CSV bytes; `path` names the source in errors and in the matrix.
pub(super) fn parse_csv(path: &Path, bytes: &[u8], options: &CsvOptions) -> Result<FeatureMatrix> {
    let bytes = bytes.strip_prefix(b"\xEF\xBB\xBF").unwrap_or(bytes);
    // Without a quote character anywhere, every line is a record and every comma a
    // separator, so the file can be cut at line ends and parsed in parallel throughout.
    // Quoted files go through the full CSV reader.
    let (names, features, rows, values) = if memchr::memchr(b'"', bytes).is_none() {
        read_unquoted(path, bytes, options)?
    } else {
        read_quoted(path, bytes, options)?
    };
    if rows == 0 {
        return Err(Error::NoRows {
            path: path.to_path_buf(),
        });
    }
    let feature_names: Vec<String> = features.iter().map(|&c| names[c].clone()).collect();
    let values = Array2::from_shape_vec((rows, features.len()), values)
        .expect("row-major buffer has rows x features values");
    Ok(FeatureMatrix {
        names: feature_names,
        named: true,
        values,
        source: path.to_path_buf(),
    })
}

/// Header names, feature column indices, row count and row-major values.
type Parsed = (Vec<String>, Vec<usize>, usize, Vec<f64>);

fn read_quoted(path: &Path, bytes: &[u8], options: &CsvOptions) -> Result<Parsed> {
    let mut reader = csv::ReaderBuilder::new()
        .has_headers(false)
        .flexible(true)
        .from_reader(bytes);
    let mut header = ByteRecord::new();
    let has_header = reader
        .read_byte_record(&mut header)
        .map_err(|e| csv_error(path, e))?;
    if !has_header {
        return Err(header_error(path, HeaderFault::Missing));
    }
    let names = header_names(path, header.iter())?;
    let features = select_features(path, &names, options)?;
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
        // Parsed in parallel, errors reported in file order.
        let parsed: Vec<Result<Vec<f64>>> = batch
            .par_iter()
            .enumerate()
            .map(|(i, record)| {
                parse_cells(
                    path,
                    record.iter(),
                    rows_done + i + 1,
                    width,
                    &features,
                    &names,
                )
            })
            .collect();
        values.reserve(parsed.len() * features.len());
        for row in parsed {
            values.extend_from_slice(&row?);
        }
        rows_done += batch.len();
        if batch.len() < BATCH_ROWS {
            break;
        }
    }
    Ok((names, features, rows_done, values))
}

fn read_unquoted(path: &Path, bytes: &[u8], options: &CsvOptions) -> Result<Parsed> {
    let header_end = memchr::memchr(b'\n', bytes).unwrap_or(bytes.len());
    let header_line = trim_cr(&bytes[..header_end]);
    if header_line.is_empty() && header_end >= bytes.len() {
        return Err(header_error(path, HeaderFault::Missing));
    }
    let names = header_names(path, header_line.split(|&b| b == b','))?;
    let features = select_features(path, &names, options)?;
    let width = names.len();
    let body = &bytes[(header_end + 1).min(bytes.len())..];

    // Cut the body into chunks that end at line ends.
    let mut chunks = Vec::new();
    let mut start = 0;
    while start < body.len() {
        let mut end = (start + FAST_CHUNK_BYTES).min(body.len());
        if end < body.len() {
            end = match memchr::memchr(b'\n', &body[end..]) {
                Some(offset) => end + offset + 1,
                None => body.len(),
            };
        }
        chunks.push(&body[start..end]);
        start = end;
    }
    // Each chunk: its rows' values, its row count, and its first bad row (local number).
    struct Chunk {
        values: Vec<f64>,
        rows: usize,
        failure: Option<(usize, Error)>,
    }
    let parsed: Vec<Chunk> = chunks
        .par_iter()
        .map(|chunk| {
            let mut values = Vec::with_capacity(chunk.len() / 8);
            let mut rows = 0usize;
            for line in chunk.split(|&b| b == b'\n') {
                let line = trim_cr(line);
                if line.is_empty() {
                    continue;
                }
                rows += 1;
                // Parse with a placeholder row number; the true one needs earlier chunks.
                match parse_cells(
                    path,
                    line.split(|&b| b == b','),
                    0,
                    width,
                    &features,
                    &names,
                ) {
                    Ok(row) => values.extend_from_slice(&row),
                    Err(error) => {
                        return Chunk {
                            values,
                            rows,
                            failure: Some((rows, error)),
                        };
                    }
                }
            }
            Chunk {
                values,
                rows,
                failure: None,
            }
        })
        .collect();
    let total: usize = parsed.iter().map(|c| c.values.len()).sum();
    let mut values = Vec::with_capacity(total);
    let mut rows_before = 0;
    for chunk in parsed {
        if let Some((local, error)) = chunk.failure {
            return Err(renumber_row(error, rows_before + local));
        }
        values.extend_from_slice(&chunk.values);
        rows_before += chunk.rows;
    }
    Ok((names, features, rows_before, values))
}

/// Puts the true 1-based data row into an error made with a placeholder.
fn renumber_row(error: Error, global: usize) -> Error {
    match error {
        Error::RaggedRow {
            path,
            expected,
            found,
            ..
        } => Error::RaggedRow {
            path,
            row: global,
            expected,
            found,
        },
        Error::BadCell {
            path,
            column,
            fault,
            ..
        } => Error::BadCell {
            path,
            row: global,
            column,
            fault,
        },
        other => other,
    }
}

fn trim_cr(line: &[u8]) -> &[u8] {
    line.strip_suffix(b"\r").unwrap_or(line)
}

fn header_names<'a>(path: &Path, header: impl Iterator<Item = &'a [u8]>) -> Result<Vec<String>> {
    let mut names = Vec::new();
    for (i, raw) in header.enumerate() {
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

fn parse_cells<'a>(
    path: &Path,
    cells: impl Iterator<Item = &'a [u8]>,
    row: usize,
    width: usize,
    features: &[usize],
    names: &[String],
) -> Result<Vec<f64>> {
    let cells: Vec<&[u8]> = cells.collect();
    if cells.len() != width {
        return Err(Error::RaggedRow {
            path: path.to_path_buf(),
            row,
            expected: width,
            found: cells.len(),
        });
    }
    let mut out = Vec::with_capacity(features.len());
    for &c in features {
        match parse_cell(cells[c]) {
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
