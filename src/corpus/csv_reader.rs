//! CSV input: a header row, numeric feature columns, optional id and label columns that
//! are dropped from the features (the first id column's cells can be kept as row ids). Quoted fields, a UTF-8 byte-order mark and CRLF line ends are accepted.
//!
//! The file is read in blocks of a few megabytes, so memory stays bounded whatever its
//! length. While no quote character has been seen, every line is a record and every comma
//! a separator, so a block can be cut at line ends and its lines parsed in parallel. The
//! first block holding a quote hands the rest of the file, from that record boundary on,
//! to the full CSV reader.

use std::io::{self, Cursor, Read};
use std::path::{Path, PathBuf};

use csv::ByteRecord;
use rayon::prelude::*;

use crate::error::{CellFault, ColumnRef, Error, HeaderFault, Result};

/// Columns to drop from a CSV file before it becomes a matrix.
#[derive(Debug, Clone, Default)]
pub struct CsvOptions {
    /// `--id-column` names.
    pub id_columns: Vec<String>,
    /// `--label-column` names.
    pub label_columns: Vec<String>,
}

/// Bytes read per block: the unit of memory the reader holds besides the rows it returns.
const BLOCK_BYTES: usize = 16 << 20;
/// Bytes per parallel task within a block.
const TASK_BYTES: usize = 1 << 20;
/// Records per chunk once the full CSV reader has taken over.
const QUOTED_CHUNK_ROWS: usize = 16_384;

type Source = Box<dyn Read + Send>;

/// What a parallel task makes of its lines: values, ids, rows, and its first bad row.
type TaskRows = (Vec<f64>, Vec<String>, usize, Option<Error>);

/// A CSV matrix read a block at a time.
pub(super) struct CsvChunks {
    columns: Columns,
    /// Bytes per block ([`BLOCK_BYTES`]; small in tests, to cross block edges).
    block_bytes: usize,
    rows_done: usize,
    mode: Mode,
}

/// What parsing a row needs, shared by the parallel tasks.
struct Columns {
    path: PathBuf,
    /// Every header name, dropped columns included.
    names: Vec<String>,
    /// Positions of the feature columns among `names`.
    features: Vec<usize>,
    /// Missing cells read as NaN rather than refused.
    keep_missing: bool,
    /// Position among `names` of the first `--id-column`.
    id_column: Option<usize>,
    /// Whether rows' ids are kept ([`CsvChunks::keep_ids`]).
    keep_ids: bool,
}

enum Mode {
    /// No quote seen yet: `pending` holds bytes read but not parsed, starting at a line.
    Lines {
        source: Source,
        pending: Vec<u8>,
        at_end: bool,
    },
    /// The full CSV reader, over what was pending followed by the rest of the source.
    Quoted(Box<csv::Reader<io::Chain<Cursor<Vec<u8>>, Source>>>),
    /// Switching modes.
    Done,
}

impl CsvChunks {
    /// See [`super::MatrixChunks::keeping_missing`].
    pub(super) fn keep_missing(&mut self) {
        self.columns.keep_missing = true;
    }

    /// See [`super::MatrixChunks::keeping_ids`]. False when there is no id column.
    pub(super) fn keep_ids(&mut self) -> bool {
        self.columns.keep_ids = self.columns.id_column.is_some();
        self.columns.keep_ids
    }

    /// See [`super::MatrixChunks::with_block_bytes`].
    pub(super) fn set_block_bytes(&mut self, bytes: usize) {
        self.block_bytes = bytes;
    }

    /// Reads the header; the rows come with [`CsvChunks::next_chunk`].
    pub(super) fn new(path: &Path, mut source: Source, options: &CsvOptions) -> Result<Self> {
        let mut pending = Vec::new();
        let mut at_end = false;
        // Enough bytes to hold the header line (and the BOM before it).
        loop {
            if memchr::memchr(b'\n', &pending).is_some() || at_end {
                break;
            }
            at_end = fill(path, &mut source, &mut pending, TASK_BYTES)?;
        }
        if pending.starts_with(b"\xEF\xBB\xBF") {
            pending.drain(..3);
        }
        let header_end = memchr::memchr(b'\n', &pending).unwrap_or(pending.len());
        let mut chunks = CsvChunks {
            columns: Columns {
                path: path.to_path_buf(),
                names: Vec::new(),
                features: Vec::new(),
                keep_missing: false,
                id_column: None,
                keep_ids: false,
            },
            block_bytes: BLOCK_BYTES,
            rows_done: 0,
            mode: Mode::Done,
        };
        if memchr::memchr(b'"', &pending[..header_end]).is_some() {
            let mut reader = quoted_reader(pending, source);
            let mut header = ByteRecord::new();
            let has_header = reader
                .read_byte_record(&mut header)
                .map_err(|e| csv_error(path, e))?;
            if !has_header {
                return Err(header_error(path, HeaderFault::Missing));
            }
            chunks.columns.names = header_names(path, header.iter())?;
            chunks.mode = Mode::Quoted(Box::new(reader));
        } else {
            let header_line = trim_cr(&pending[..header_end]);
            if header_line.is_empty() && header_end >= pending.len() {
                return Err(header_error(path, HeaderFault::Missing));
            }
            chunks.columns.names = header_names(path, header_line.split(|&b| b == b','))?;
            pending.drain(..(header_end + 1).min(pending.len()));
            chunks.mode = Mode::Lines {
                source,
                pending,
                at_end,
            };
        }
        chunks.columns.features = select_features(path, &chunks.columns.names, options)?;
        chunks.columns.id_column = options
            .id_columns
            .first()
            .and_then(|id| chunks.columns.names.iter().position(|n| n == id));
        Ok(chunks)
    }

    /// The feature columns' names.
    pub(super) fn feature_names(&self) -> Vec<String> {
        let columns = &self.columns;
        columns
            .features
            .iter()
            .map(|&c| columns.names[c].clone())
            .collect()
    }

    /// Rows returned so far.
    pub(super) fn rows_done(&self) -> usize {
        self.rows_done
    }

    /// The next block's rows as row-major values (a multiple of the feature count) with
    /// their ids (empty unless ids are kept), or `None` at the end of the file.
    pub(super) fn next_chunk(&mut self) -> Result<Option<(Vec<f64>, Vec<String>)>> {
        loop {
            match &mut self.mode {
                Mode::Lines {
                    source,
                    pending,
                    at_end,
                } => {
                    while !*at_end && pending.len() < self.block_bytes {
                        *at_end = fill(&self.columns.path, source, pending, self.block_bytes)?;
                    }
                    if pending.is_empty() {
                        return Ok(None);
                    }
                    if memchr::memchr(b'"', pending).is_some() {
                        self.switch_to_quoted();
                        continue;
                    }
                    // Parse up to the last complete line; keep the rest for the next block.
                    let cut = if *at_end {
                        pending.len()
                    } else {
                        match memchr::memrchr(b'\n', pending) {
                            Some(at) => at + 1,
                            None => {
                                // One line longer than a block: read on until it ends.
                                *at_end =
                                    fill(&self.columns.path, source, pending, self.block_bytes)?;
                                continue;
                            }
                        }
                    };
                    let block: Vec<u8> = pending.drain(..cut).collect();
                    let (values, ids, rows) = self.columns.parse_lines(&block, self.rows_done)?;
                    self.rows_done += rows;
                    if rows > 0 {
                        return Ok(Some((values, ids)));
                    }
                }
                Mode::Quoted(reader) => {
                    let mut batch: Vec<ByteRecord> = Vec::with_capacity(QUOTED_CHUNK_ROWS);
                    let mut record = ByteRecord::new();
                    while batch.len() < QUOTED_CHUNK_ROWS
                        && reader
                            .read_byte_record(&mut record)
                            .map_err(|e| csv_error(&self.columns.path, e))?
                    {
                        batch.push(std::mem::take(&mut record));
                    }
                    if batch.is_empty() {
                        return Ok(None);
                    }
                    let columns = &self.columns;
                    let first = self.rows_done;
                    let parsed: Vec<Result<(Vec<f64>, Option<String>)>> = batch
                        .par_iter()
                        .enumerate()
                        .map(|(i, record)| columns.parse_cells(record.iter(), first + i + 1))
                        .collect();
                    let mut values = Vec::with_capacity(batch.len() * columns.features.len());
                    let mut ids = Vec::new();
                    for row in parsed {
                        let (row, id) = row?;
                        values.extend_from_slice(&row);
                        ids.extend(id);
                    }
                    self.rows_done += batch.len();
                    return Ok(Some((values, ids)));
                }
                Mode::Done => return Ok(None),
            }
        }
    }

    fn switch_to_quoted(&mut self) {
        if let Mode::Lines {
            source, pending, ..
        } = std::mem::replace(&mut self.mode, Mode::Done)
        {
            self.mode = Mode::Quoted(Box::new(quoted_reader(pending, source)));
        }
    }
}

impl Columns {
    /// Parses a block of whole lines in parallel; blank lines are skipped. The first bad
    /// row is reported with its number in the file.
    fn parse_lines(
        &self,
        block: &[u8],
        rows_done: usize,
    ) -> Result<(Vec<f64>, Vec<String>, usize)> {
        let mut tasks = Vec::new();
        let mut start = 0;
        while start < block.len() {
            let mut end = (start + TASK_BYTES).min(block.len());
            if end < block.len() {
                end = match memchr::memchr(b'\n', &block[end..]) {
                    Some(offset) => end + offset + 1,
                    None => block.len(),
                };
            }
            tasks.push(&block[start..end]);
            start = end;
        }
        // Each task: its rows' values and ids, its row count, and its first bad row (local
        // number, counted from 1, with the error made for that local number).
        let parsed: Vec<TaskRows> = tasks
            .par_iter()
            .map(|task| {
                let mut values = Vec::with_capacity(task.len() / 8);
                let mut ids = Vec::new();
                let mut rows = 0usize;
                for line in task.split(|&b| b == b'\n') {
                    let line = trim_cr(line);
                    if line.is_empty() {
                        continue;
                    }
                    rows += 1;
                    match self.parse_cells(line.split(|&b| b == b','), rows) {
                        Ok((row, id)) => {
                            values.extend_from_slice(&row);
                            ids.extend(id);
                        }
                        Err(error) => return (values, ids, rows, Some(error)),
                    }
                }
                (values, ids, rows, None)
            })
            .collect();
        let total: usize = parsed.iter().map(|p| p.0.len()).sum();
        let mut values = Vec::with_capacity(total);
        let mut ids = Vec::new();
        let mut rows_before = rows_done;
        for (task_values, task_ids, rows, failure) in parsed {
            if let Some(error) = failure {
                return Err(shift_row(error, rows_before));
            }
            values.extend_from_slice(&task_values);
            ids.extend(task_ids);
            rows_before += rows;
        }
        Ok((values, ids, rows_before - rows_done))
    }

    /// A row's feature values, and its id when ids are kept.
    fn parse_cells<'a>(
        &self,
        cells: impl Iterator<Item = &'a [u8]>,
        row: usize,
    ) -> Result<(Vec<f64>, Option<String>)> {
        let cells: Vec<&[u8]> = cells.collect();
        let width = self.names.len();
        if cells.len() != width {
            return Err(Error::RaggedRow {
                path: self.path.clone(),
                row,
                expected: width,
                found: cells.len(),
            });
        }
        let mut out = Vec::with_capacity(self.features.len());
        for &c in &self.features {
            match parse_cell(cells[c]) {
                Ok(value) => out.push(value),
                Err(_) if self.keep_missing && is_missing(cells[c]) => out.push(f64::NAN),
                Err(fault) => {
                    let fault = match fault {
                        CellFault::Empty => CellFault::Empty,
                        _ if is_missing(cells[c]) => {
                            CellFault::Missing(String::from_utf8_lossy(cells[c]).trim().to_string())
                        }
                        other => other,
                    };
                    return Err(Error::BadCell {
                        path: self.path.clone(),
                        row,
                        column: ColumnRef::Named(self.names[c].clone()),
                        fault,
                    });
                }
            }
        }
        let id = match self.id_column {
            Some(c) if self.keep_ids => Some(String::from_utf8_lossy(cells[c]).trim().to_string()),
            _ => None,
        };
        Ok((out, id))
    }
}

fn quoted_reader(
    pending: Vec<u8>,
    source: Source,
) -> csv::Reader<io::Chain<Cursor<Vec<u8>>, Source>> {
    csv::ReaderBuilder::new()
        .has_headers(false)
        .flexible(true)
        .from_reader(Cursor::new(pending).chain(source))
}

/// Reads up to `want` more bytes onto `buffer`; true at the end of the source.
fn fill(path: &Path, source: &mut Source, buffer: &mut Vec<u8>, want: usize) -> Result<bool> {
    let read = source
        .by_ref()
        .take(want as u64)
        .read_to_end(buffer)
        .map_err(|e| Error::io(path, e))?;
    Ok(read == 0)
}

/// Adds the rows before a task to the row number of an error made within it.
fn shift_row(error: Error, rows_before: usize) -> Error {
    match error {
        Error::RaggedRow {
            path,
            row,
            expected,
            found,
        } => Error::RaggedRow {
            path,
            row: rows_before + row,
            expected,
            found,
        },
        Error::BadCell {
            path,
            row,
            column,
            fault,
        } => Error::BadCell {
            path,
            row: rows_before + row,
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

/// Whether a cell marks a missing value: empty, or `NA`, `N/A`, `NaN`, `null`, `?` in any
/// case, spaces around allowed (the markers common spreadsheet and data-frame exports
/// write).
fn is_missing(raw: &[u8]) -> bool {
    let text = String::from_utf8_lossy(raw);
    let text = text.trim().to_ascii_lowercase();
    matches!(text.as_str(), "" | "na" | "n/a" | "nan" | "null" | "?")
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

    /// Every row of `text` read with blocks of `block` bytes, or the first error.
    fn read_in_blocks(text: &[u8], block: usize) -> Result<(Vec<String>, Vec<f64>)> {
        let mut chunks = CsvChunks::new(
            Path::new("t.csv"),
            Box::new(Cursor::new(text.to_vec())),
            &CsvOptions {
                id_columns: vec!["id".into()],
                label_columns: vec![],
            },
        )?;
        chunks.block_bytes = block;
        let mut values = Vec::new();
        while let Some((chunk, ids)) = chunks.next_chunk()? {
            assert!(ids.is_empty(), "ids are kept only when asked");
            values.extend(chunk);
        }
        Ok((chunks.feature_names(), values))
    }

    /// Every row's id, read with blocks of `block` bytes.
    fn ids_in_blocks(text: &[u8], block: usize) -> Vec<String> {
        let mut chunks = CsvChunks::new(
            Path::new("t.csv"),
            Box::new(Cursor::new(text.to_vec())),
            &CsvOptions {
                id_columns: vec!["id".into(), "b".into()],
                label_columns: vec![],
            },
        )
        .unwrap();
        assert!(chunks.keep_ids());
        chunks.block_bytes = block;
        let mut all = Vec::new();
        while let Some((values, ids)) = chunks.next_chunk().unwrap() {
            assert_eq!(ids.len(), values.len(), "one id per row (one feature left)");
            all.extend(ids);
        }
        all
    }

    fn table(rows: usize, quoted_from: Option<usize>, line_end: &str) -> String {
        let mut text = format!("\u{feff}id,a,b{line_end}");
        for r in 0..rows {
            let id = match quoted_from {
                Some(q) if r >= q => format!("\"r,{r}\""),
                _ => format!("r{r}"),
            };
            text += &format!("{id},{r}.5,{}{line_end}", r as f64 * -2.0);
        }
        text
    }

    /// The rows, whatever the block size: blocks far smaller than a line, blocks cutting
    /// lines anywhere, a quote first met in a later block, CRLF, and a BOM.
    #[test]
    fn blocks_do_not_change_the_rows() {
        let expected: Vec<f64> = (0..200)
            .flat_map(|r| [r as f64 + 0.5, r as f64 * -2.0])
            .collect();
        for line_end in ["\n", "\r\n"] {
            for quoted_from in [None, Some(0), Some(150)] {
                let text = table(200, quoted_from, line_end);
                for block in [1, 7, 64, 1000, 1 << 20] {
                    let (names, values) = read_in_blocks(text.as_bytes(), block).unwrap();
                    assert_eq!(names, vec!["a", "b"]);
                    assert_eq!(
                        values, expected,
                        "block {block}, quoted from {quoted_from:?}"
                    );
                }
            }
        }
    }

    /// The first id column's cells, unquoted, stay with their rows across blocks.
    #[test]
    fn ids_follow_their_rows_across_blocks() {
        for line_end in ["\n", "\r\n"] {
            for quoted_from in [None, Some(0), Some(150)] {
                let text = table(200, quoted_from, line_end);
                let expected: Vec<String> = (0..200)
                    .map(|r| match quoted_from {
                        Some(q) if r >= q => format!("r,{r}"),
                        _ => format!("r{r}"),
                    })
                    .collect();
                for block in [1, 7, 64, 1 << 20] {
                    assert_eq!(ids_in_blocks(text.as_bytes(), block), expected);
                }
            }
        }
    }

    /// A bad cell is reported with its row in the file, counted across blocks.
    #[test]
    fn bad_cells_are_numbered_across_blocks() {
        let mut text = table(300, None, "\n");
        text = text.replace("r250,250.5,", "r250,oops,");
        for block in [16, 100, 1 << 20] {
            match read_in_blocks(text.as_bytes(), block) {
                Err(Error::BadCell { row, column, .. }) => {
                    assert_eq!(row, 251, "block {block}");
                    assert_eq!(column, ColumnRef::Named("a".into()));
                }
                other => panic!("block {block}: {other:?}"),
            }
        }
        let ragged = table(300, None, "\n").replace("r120,120.5,-240\n", "r120,120.5\n");
        match read_in_blocks(ragged.as_bytes(), 50) {
            Err(Error::RaggedRow { row, found, .. }) => assert_eq!((row, found), (121, 2)),
            other => panic!("{other:?}"),
        }
    }

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
