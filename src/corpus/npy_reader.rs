//! NumPy `.npy` input: 2-D `f4` or `f8` arrays, format versions 1 and 2. SPEC asks for
//! little-endian; big-endian arrays (`>f8`, as written on such machines) are read too.
//!
//! The header (NumPy's format description, NEP 1: magic, version, a Python dict literal
//! with `descr`, `fortran_order` and `shape`) is parsed here so that C-order data can be
//! read a block of rows at a time, keeping memory bounded whatever the file's length.
//! Fortran-order arrays cannot be cut into rows without reading them whole, so they are.

use std::io::Read;
use std::path::{Path, PathBuf};

use crate::error::{CellFault, ColumnRef, Error, Result};

/// Bytes of data read per chunk.
const BLOCK_BYTES: usize = 16 << 20;
/// Values read per step.
const PIECE_VALUES: usize = 1 << 17;
const MAGIC: &[u8] = b"\x93NUMPY";
/// More features than any model kilter audits takes; a header claiming more is damaged.
const MAX_COLUMNS: usize = 1 << 24;

type Source = Box<dyn Read + Send>;

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Dtype {
    F4,
    F8,
    BigF4,
    BigF8,
}

impl Dtype {
    fn size(self) -> usize {
        match self {
            Dtype::F4 | Dtype::BigF4 => 4,
            Dtype::F8 | Dtype::BigF8 => 8,
        }
    }
}

/// The parts of an `.npy` header kilter uses.
#[derive(Debug, Clone, PartialEq, Eq)]
struct Header {
    dtype: Dtype,
    fortran_order: bool,
    rows: usize,
    columns: usize,
}

/// An `.npy` matrix read a block of rows at a time.
pub(super) struct NpyChunks {
    path: PathBuf,
    source: Source,
    header: Header,
    /// Bytes per block ([`BLOCK_BYTES`]; small in tests).
    block_bytes: usize,
    rows_done: usize,
    /// A Fortran-order array, read whole and transposed to rows, still to hand out.
    whole: Option<Vec<f64>>,
    /// NaN read as a missing value rather than refused.
    keep_missing: bool,
}

impl NpyChunks {
    /// See [`super::MatrixChunks::keeping_missing`].
    pub(super) fn keep_missing(&mut self) {
        self.keep_missing = true;
    }

    /// See [`super::MatrixChunks::with_block_bytes`].
    pub(super) fn set_block_bytes(&mut self, bytes: usize) {
        self.block_bytes = bytes;
    }

    /// Reads and checks the header; the rows come with [`NpyChunks::next_chunk`].
    pub(super) fn new(path: &Path, mut source: Source) -> Result<Self> {
        let header = read_header(path, &mut source)?;
        let mut chunks = NpyChunks {
            path: path.to_path_buf(),
            source,
            header,
            block_bytes: BLOCK_BYTES,
            rows_done: 0,
            whole: None,
            keep_missing: false,
        };
        if chunks.header.fortran_order {
            let (rows, columns) = (chunks.header.rows, chunks.header.columns);
            // Whole-file reading is the same for every block size, so file order is moot.
            let (by_column, complete) = chunks.read_values(rows * columns)?;
            if !complete {
                return Err(truncated(path));
            }
            chunks.check_end()?;
            let mut by_row = vec![0.0; rows * columns];
            for c in 0..columns {
                for r in 0..rows {
                    by_row[r * columns + c] = by_column[c * rows + r];
                }
            }
            chunks.whole = Some(by_row);
        }
        Ok(chunks)
    }

    pub(super) fn rows(&self) -> usize {
        self.header.rows
    }

    pub(super) fn columns(&self) -> usize {
        self.header.columns
    }

    pub(super) fn rows_done(&self) -> usize {
        self.rows_done
    }

    /// The next block of rows as row-major values, or `None` after the last row.
    pub(super) fn next_chunk(&mut self) -> Result<Option<Vec<f64>>> {
        let Header { rows, columns, .. } = self.header;
        if self.rows_done >= rows {
            return Ok(None);
        }
        let values = match self.whole.take() {
            Some(all) => {
                self.rows_done = rows;
                check_finite(&self.path, &all, 0, columns, self.keep_missing)?;
                all
            }
            None => {
                let per_block = (self.block_bytes / (columns * self.header.dtype.size())).max(1);
                let take = per_block.min(rows - self.rows_done);
                let (values, complete) = self.read_values(take * columns)?;
                // Faults are reported in file order, whatever the block size: a bad cell
                // before the point where the file ends early, or before bytes left over
                // after the data, is reported first.
                check_finite(
                    &self.path,
                    &values,
                    self.rows_done,
                    columns,
                    self.keep_missing,
                )?;
                if !complete {
                    return Err(truncated(&self.path));
                }
                self.rows_done += take;
                if self.rows_done == rows {
                    self.check_end()?;
                }
                values
            }
        };
        Ok(Some(values))
    }

    /// Reads up to `count` values; also says whether all of them were there (`false`: the
    /// file ended first, and only the whole values before its end are returned).
    fn read_values(&mut self, count: usize) -> Result<(Vec<f64>, bool)> {
        let size = self.header.dtype.size();
        // Room is made as the data arrives, a piece at a time, never from the header alone
        // (a header may claim far more than the file holds); a block of rows is at most
        // `block_bytes` long, so that much is reserved up front.
        let mut values: Vec<f64> = Vec::with_capacity(count.min(self.block_bytes / size + 1));
        let direct = self.header.dtype == Dtype::F8 && cfg!(target_endian = "little");
        let mut piece = if direct {
            Vec::new()
        } else {
            vec![0u8; PIECE_VALUES * size]
        };
        while values.len() < count {
            let step = (count - values.len()).min(PIECE_VALUES);
            let before = values.len();
            let got =
                if direct {
                    // Little-endian `f64` on a little-endian machine: the file's bytes are the
                    // values, read straight into their storage.
                    values.resize(before + step, 0.0);
                    let read = self.read_up_to(bytemuck::cast_slice_mut(&mut values[before..]))?;
                    values.truncate(before + read / size);
                    read
                } else {
                    let read = self.read_up_to(&mut piece[..step * size])?;
                    let bytes = &piece[..read / size * size];
                    match self.header.dtype {
                        Dtype::F8 => values.extend(
                            bytes
                                .chunks_exact(8)
                                .map(|b| f64::from_le_bytes(b.try_into().expect("8 bytes"))),
                        ),
                        Dtype::F4 => values.extend(bytes.chunks_exact(4).map(|b| {
                            f64::from(f32::from_le_bytes(b.try_into().expect("4 bytes")))
                        })),
                        Dtype::BigF8 => values.extend(
                            bytes
                                .chunks_exact(8)
                                .map(|b| f64::from_be_bytes(b.try_into().expect("8 bytes"))),
                        ),
                        Dtype::BigF4 => values.extend(bytes.chunks_exact(4).map(|b| {
                            f64::from(f32::from_be_bytes(b.try_into().expect("4 bytes")))
                        })),
                    }
                    read
                };
            if got < step * size {
                return Ok((values, false));
            }
        }
        Ok((values, true))
    }

    /// Fills as much of `buffer` as the source holds; fewer bytes only at its end.
    fn read_up_to(&mut self, buffer: &mut [u8]) -> Result<usize> {
        let mut filled = 0;
        while filled < buffer.len() {
            match self.source.read(&mut buffer[filled..]) {
                Ok(0) => break,
                Ok(read) => filled += read,
                Err(e) if e.kind() == std::io::ErrorKind::Interrupted => {}
                Err(e) => return Err(Error::io(&self.path, e)),
            }
        }
        Ok(filled)
    }

    /// After the last value the file must end.
    fn check_end(&mut self) -> Result<()> {
        let mut rest = Vec::new();
        self.source
            .by_ref()
            .take(1 << 20)
            .read_to_end(&mut rest)
            .map_err(|e| Error::io(&self.path, e))?;
        if rest.is_empty() {
            Ok(())
        } else {
            Err(npy_error(
                &self.path,
                format!(
                    "the file has {}{} bytes after the array data",
                    rest.len(),
                    if rest.len() >= 1 << 20 {
                        " or more"
                    } else {
                        ""
                    }
                ),
            ))
        }
    }
}

fn truncated(path: &Path) -> Error {
    npy_error(
        path,
        "the file is shorter than its header says (truncated?)".into(),
    )
}

/// Refuses the first value that is NaN (unless `keep_missing`) or infinite, scanning row
/// by row so that the cell reported is the first a person meets; `first_row` is the
/// 0-based row of `values[0]`.
fn check_finite(
    path: &Path,
    values: &[f64],
    first_row: usize,
    columns: usize,
    keep_missing: bool,
) -> Result<()> {
    match values
        .iter()
        .position(|v| !(v.is_finite() || keep_missing && v.is_nan()))
    {
        Some(at) => Err(Error::BadCell {
            path: path.to_path_buf(),
            row: first_row + at / columns + 1,
            column: ColumnRef::Position(at % columns + 1),
            fault: CellFault::NotFinite(values[at].to_string()),
        }),
        None => Ok(()),
    }
}

fn read_header(path: &Path, source: &mut Source) -> Result<Header> {
    let mut preamble = [0u8; 8];
    if !read_fully(path, source, &mut preamble)? || &preamble[..6] != MAGIC {
        return Err(npy_error(
            path,
            "not a NumPy .npy file (the signature is missing)".into(),
        ));
    }
    let major = preamble[6];
    let length = match major {
        1 => {
            let mut n = [0u8; 2];
            read_header_bytes(path, source, &mut n)?;
            usize::from(u16::from_le_bytes(n))
        }
        2 => {
            let mut n = [0u8; 4];
            read_header_bytes(path, source, &mut n)?;
            u32::from_le_bytes(n) as usize
        }
        _ => {
            return Err(npy_error(
                path,
                format!(".npy format version {major} is not supported (use 1 or 2)"),
            ))
        }
    };
    if length > 1 << 20 {
        return Err(npy_error(
            path,
            format!("the header claims {length} bytes; not a matrix file"),
        ));
    }
    let mut text = vec![0u8; length];
    read_header_bytes(path, source, &mut text)?;
    let text =
        String::from_utf8(text).map_err(|_| npy_error(path, "the header is not text".into()))?;
    parse_header(&text).map_err(|detail| npy_error(path, detail))
}

/// Reads exactly `buffer.len()` bytes; false if the source ends first.
fn read_fully(path: &Path, source: &mut Source, buffer: &mut [u8]) -> Result<bool> {
    match source.read_exact(buffer) {
        Ok(()) => Ok(true),
        Err(e) if e.kind() == std::io::ErrorKind::UnexpectedEof => Ok(false),
        Err(e) => Err(Error::io(path, e)),
    }
}

fn read_header_bytes(path: &Path, source: &mut Source, buffer: &mut [u8]) -> Result<()> {
    if read_fully(path, source, buffer)? {
        Ok(())
    } else {
        Err(npy_error(path, "the file ends inside its header".into()))
    }
}

/// Parses the header dict, e.g. `{'descr': '<f8', 'fortran_order': False, 'shape': (3, 2), }`.
fn parse_header(text: &str) -> std::result::Result<Header, String> {
    let body = text
        .trim()
        .strip_prefix('{')
        .and_then(|t| t.strip_suffix('}'))
        .ok_or("the header is not a dictionary")?;
    let descr = quoted_value(body, "descr").ok_or("the header has no 'descr'")?;
    let dtype = match descr.as_str() {
        "<f8" => Dtype::F8,
        "<f4" => Dtype::F4,
        ">f8" => Dtype::BigF8,
        ">f4" => Dtype::BigF4,
        other => {
            return Err(format!(
                "the array's dtype {other} is not supported; use little-endian float32 ('<f4') or float64 ('<f8')"
            ))
        }
    };
    let fortran = raw_value(body, "fortran_order").ok_or("the header has no 'fortran_order'")?;
    let fortran_order = match fortran.trim() {
        "False" => false,
        "True" => true,
        other => return Err(format!("the header's fortran_order is {other}")),
    };
    let shape = raw_value(body, "shape").ok_or("the header has no 'shape'")?;
    let dims = shape
        .trim()
        .strip_prefix('(')
        .and_then(|s| s.split(')').next())
        .ok_or("the header's shape is not a tuple")?;
    let dims: Vec<usize> = dims
        .split(',')
        .map(str::trim)
        .filter(|d| !d.is_empty())
        .map(|d| d.parse().map_err(|_| format!("the header's shape has {d}")))
        .collect::<std::result::Result<_, String>>()?;
    let [rows, columns] = dims[..] else {
        return Err(format!(
            "the array has {} dimensions; a matrix file needs exactly 2 (rows x features)",
            dims.len()
        ));
    };
    if columns == 0 {
        return Err("the array has no columns".into());
    }
    if columns > MAX_COLUMNS {
        return Err(format!(
            "the header claims {columns} columns; kilter reads at most {MAX_COLUMNS} features"
        ));
    }
    if rows
        .checked_mul(columns)
        .and_then(|n| n.checked_mul(8))
        .is_none()
    {
        return Err("the header's shape is too large".into());
    }
    Ok(Header {
        dtype,
        fortran_order,
        rows,
        columns,
    })
}

/// The text after `'key':` up to the next top-level comma (a tuple counts as one value).
fn raw_value(body: &str, key: &str) -> Option<String> {
    let at = body.find(&format!("'{key}'"))? + key.len() + 2;
    let rest = body[at..].trim_start().strip_prefix(':')?;
    let mut depth = 0i32;
    let mut end = rest.len();
    for (i, ch) in rest.char_indices() {
        match ch {
            '(' => depth += 1,
            ')' => depth -= 1,
            ',' if depth == 0 => {
                end = i;
                break;
            }
            _ => {}
        }
    }
    Some(rest[..end].trim().to_string())
}

fn quoted_value(body: &str, key: &str) -> Option<String> {
    let raw = raw_value(body, key)?;
    let inner = raw
        .strip_prefix('\'')
        .and_then(|r| r.strip_suffix('\''))
        .or_else(|| raw.strip_prefix('"').and_then(|r| r.strip_suffix('"')))?;
    Some(inner.to_string())
}

fn npy_error(path: &Path, detail: String) -> Error {
    Error::Npy {
        path: path.to_path_buf(),
        detail,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// An `.npy` file as NumPy writes it: v1.0 header padded with spaces to a multiple of
    /// 64 bytes, ending in a newline (NEP 1).
    fn npy(descr: &str, fortran: bool, shape: (usize, usize), data: &[u8]) -> Vec<u8> {
        let dict = format!(
            "{{'descr': '{descr}', 'fortran_order': {}, 'shape': ({}, {}), }}",
            if fortran { "True" } else { "False" },
            shape.0,
            shape.1
        );
        let unpadded = 10 + dict.len() + 1;
        let padding = (64 - unpadded % 64) % 64;
        let header = format!("{dict}{}\n", " ".repeat(padding));
        let mut out = b"\x93NUMPY\x01\x00".to_vec();
        out.extend_from_slice(&(header.len() as u16).to_le_bytes());
        out.extend_from_slice(header.as_bytes());
        out.extend_from_slice(data);
        out
    }

    fn read_in_blocks(bytes: Vec<u8>, block: usize) -> Result<Vec<f64>> {
        let mut chunks = NpyChunks::new(Path::new("t.npy"), Box::new(std::io::Cursor::new(bytes)))?;
        chunks.block_bytes = block;
        let mut values = Vec::new();
        while let Some(chunk) = chunks.next_chunk()? {
            values.extend(chunk);
        }
        Ok(values)
    }

    /// C order read in blocks of any size, float32 widened exactly, Fortran order
    /// transposed to rows.
    #[test]
    fn rows_come_back_in_order_whatever_the_block() {
        let values: Vec<f64> = (0..30).map(|v| v as f64 * 0.25 - 3.0).collect();
        let f8: Vec<u8> = values.iter().flat_map(|v| v.to_le_bytes()).collect();
        let f4: Vec<u8> = values
            .iter()
            .flat_map(|v| (*v as f32).to_le_bytes())
            .collect();
        for block in [1, 24, 100, 1 << 20] {
            assert_eq!(
                read_in_blocks(npy("<f8", false, (10, 3), &f8), block).unwrap(),
                values
            );
            assert_eq!(
                read_in_blocks(npy("<f4", false, (10, 3), &f4), block).unwrap(),
                values
            );
        }
        // Stored by column: element (r, c) at c * rows + r.
        let by_column: Vec<u8> = (0..3)
            .flat_map(|c| (0..10).map(move |r| r * 3 + c))
            .flat_map(|i| values[i].to_le_bytes())
            .collect();
        assert_eq!(
            read_in_blocks(npy("<f8", true, (10, 3), &by_column), 24).unwrap(),
            values
        );
    }

    /// A source that hands out at most 1,000 bytes per read, as pipes and some file
    /// systems do.
    struct Trickle(std::io::Cursor<Vec<u8>>);

    impl Read for Trickle {
        fn read(&mut self, buffer: &mut [u8]) -> std::io::Result<usize> {
            let n = buffer.len().min(1000);
            self.0.read(&mut buffer[..n])
        }
    }

    /// Data longer than one read step, in every byte order and width, from a source that
    /// gives short reads: every value comes back; cut short mid-value, the file is refused.
    #[test]
    fn values_across_read_steps_and_short_reads() {
        let rows = 2 * PIECE_VALUES / 3 + 5;
        let values: Vec<f64> = (0..rows * 3)
            .map(|v| (v % 1024) as f64 * 0.5 - 7.0)
            .collect();
        let encodings: [(&str, Vec<u8>); 4] = [
            ("<f8", values.iter().flat_map(|v| v.to_le_bytes()).collect()),
            (">f8", values.iter().flat_map(|v| v.to_be_bytes()).collect()),
            (
                "<f4",
                values
                    .iter()
                    .flat_map(|v| (*v as f32).to_le_bytes())
                    .collect(),
            ),
            (
                ">f4",
                values
                    .iter()
                    .flat_map(|v| (*v as f32).to_be_bytes())
                    .collect(),
            ),
        ];
        let read = |bytes: Vec<u8>| -> Result<Vec<f64>> {
            let source = Box::new(Trickle(std::io::Cursor::new(bytes)));
            let mut chunks = NpyChunks::new(Path::new("t.npy"), source)?;
            let mut out = Vec::new();
            while let Some(chunk) = chunks.next_chunk()? {
                out.extend(chunk);
            }
            Ok(out)
        };
        for (descr, data) in encodings {
            assert_eq!(
                read(npy(descr, false, (rows, 3), &data)).unwrap(),
                values,
                "{descr}"
            );
            let cut = &data[..data.len() - 3];
            assert!(
                matches!(read(npy(descr, false, (rows, 3), cut)), Err(Error::Npy { detail, .. }) if detail.contains("truncated")),
                "{descr}"
            );
        }
    }

    #[test]
    fn damaged_files_are_refused_with_their_place() {
        let mut values = vec![1.0f64; 30];
        values[3 * 7 + 2] = f64::NAN;
        let f8: Vec<u8> = values.iter().flat_map(|v| v.to_le_bytes()).collect();
        match read_in_blocks(npy("<f8", false, (10, 3), &f8), 24) {
            Err(Error::BadCell { row, column, .. }) => {
                assert_eq!((row, column), (8, ColumnRef::Position(3)))
            }
            other => panic!("{other:?}"),
        }
        let short = npy("<f8", false, (10, 3), &[0u8; 200]);
        assert!(
            matches!(read_in_blocks(short, 24), Err(Error::Npy { detail, .. }) if detail.contains("truncated"))
        );
        let mut long = npy("<f8", false, (10, 3), &vec![0u8; 240]);
        long.extend_from_slice(&[0u8; 5]);
        assert!(
            matches!(read_in_blocks(long, 24), Err(Error::Npy { detail, .. }) if detail.contains("5 bytes after"))
        );
        assert!(
            matches!(read_in_blocks(b"\x93NUMPY\x01".to_vec(), 24), Err(Error::Npy { detail, .. }) if detail.contains("signature"))
        );
    }

    /// Headers as NumPy 2.x writes them (`np.lib.format.header_data_from_array_1_0`).
    #[test]
    fn numpy_headers_parse() {
        let h = parse_header("{'descr': '<f8', 'fortran_order': False, 'shape': (3, 2), }   \n")
            .unwrap();
        assert_eq!(
            h,
            Header {
                dtype: Dtype::F8,
                fortran_order: false,
                rows: 3,
                columns: 2
            }
        );
        let h =
            parse_header("{'descr': '<f4', 'fortran_order': True, 'shape': (10, 1), }").unwrap();
        assert_eq!(
            (h.dtype, h.fortran_order, h.rows, h.columns),
            (Dtype::F4, true, 10, 1)
        );
        assert!(
            parse_header("{'descr': '<f8', 'fortran_order': False, 'shape': (3,), }")
                .unwrap_err()
                .contains("1 dimensions")
        );
        assert!(
            parse_header("{'descr': '<i8', 'fortran_order': False, 'shape': (3, 2), }")
                .unwrap_err()
                .contains("<i8")
        );
        assert!(
            parse_header("{'descr': '<f2', 'fortran_order': False, 'shape': (3, 2), }")
                .unwrap_err()
                .contains("<f2")
        );
        let big = parse_header("{'descr': '>f8', 'fortran_order': False, 'shape': (3, 2), }");
        assert_eq!(big.unwrap().dtype, Dtype::BigF8);
        assert!(parse_header("garbage").is_err());
    }

    fn refusal(bytes: Vec<u8>) -> String {
        match read_in_blocks(bytes, BLOCK_BYTES) {
            Err(Error::Npy { detail, .. }) => detail,
            other => panic!("expected an .npy refusal, got {other:?}"),
        }
    }

    /// Found by the `npy_matrix` fuzz target (fuzz/regressions/npy_matrix/): a version-2
    /// preamble whose 4-byte header length says 2.7 GB must be refused without
    /// allocating that much.
    #[test]
    fn a_header_longer_than_any_matrix_header_is_refused() {
        let input = include_bytes!("../../fuzz/regressions/npy_matrix/header_length_4gb");
        let detail = refusal(input.to_vec());
        assert!(detail.contains("header"), "{detail}");
    }

    /// A header declaring 2^20 x 2^20 doubles (8 TiB) over 16 bytes of data, in C and in
    /// Fortran order: refused as truncated, the buffers grown only with the data read.
    #[test]
    fn a_shape_larger_than_the_data_is_refused_before_allocating() {
        for fortran in [false, true] {
            let bytes = npy("<f8", fortran, (1 << 20, 1 << 20), &[0u8; 16]);
            assert!(refusal(bytes).contains("shorter than its header says"));
        }
    }

    /// Found by the `npy_matrix` fuzz target when it began reading every input in tiny
    /// blocks as well (fuzz/regressions/npy_matrix/nan_then_truncated): a (30, 4) array
    /// whose data holds a NaN in row 6 and then ends early was refused as truncated when
    /// read in one block and for its NaN when read in small ones. Faults now come in file
    /// order whatever the block: the NaN, and for a clean truncated file the truncation.
    #[test]
    fn faults_are_reported_in_file_order_whatever_the_block() {
        let input = include_bytes!("../../fuzz/regressions/npy_matrix/nan_then_truncated");
        for block in [1, 7, 32, 60, BLOCK_BYTES] {
            let err = read_in_blocks(input.to_vec(), block)
                .unwrap_err()
                .to_string();
            assert!(
                err.contains("row 6, column 4") && err.contains("NaN"),
                "{block}: {err}"
            );
        }
        let values: Vec<u8> = (0..10).flat_map(|v| f64::from(v).to_le_bytes()).collect();
        let clean_truncated = npy("<f8", false, (4, 3), &values);
        let extra = npy(
            "<f8",
            false,
            (3, 3),
            &[values.as_slice(), &[0u8; 9]].concat(),
        );
        let mut nan_then_extra = values[..72].to_vec();
        nan_then_extra[8..16].copy_from_slice(&f64::NAN.to_le_bytes());
        nan_then_extra.extend_from_slice(&[0u8; 5]);
        let nan_then_extra = npy("<f8", false, (3, 3), &nan_then_extra);
        for block in [1, 8, 24, BLOCK_BYTES] {
            let err = read_in_blocks(clean_truncated.clone(), block)
                .unwrap_err()
                .to_string();
            assert!(
                err.contains("shorter than its header says"),
                "{block}: {err}"
            );
            let err = read_in_blocks(extra.clone(), block)
                .unwrap_err()
                .to_string();
            assert!(err.contains("bytes after the array data"), "{block}: {err}");
            let err = read_in_blocks(nan_then_extra.clone(), block)
                .unwrap_err()
                .to_string();
            assert!(err.contains("row 1, column 2"), "{block}: {err}");
        }
    }
}
