//! NumPy `.npy` input: 2-D little-endian `f4` or `f8` arrays, format versions 1 and 2.

use std::io::Cursor;
use std::path::Path;

use ndarray::Array2;
use ndarray_npy::npy::header::Header;
use ndarray_npy::{ReadNpyError, ReadNpyExt};

use super::FeatureMatrix;
use crate::error::{CellFault, ColumnRef, Error, Result};

pub(super) fn read_npy(path: &Path) -> Result<FeatureMatrix> {
    let bytes = std::fs::read(path).map_err(|e| Error::io(path, e))?;
    parse_npy(path, &bytes)
}

/// Parses `.npy` bytes; `path` names the source in errors and in the matrix.
pub(super) fn parse_npy(path: &Path, bytes: &[u8]) -> Result<FeatureMatrix> {
    check_preamble(path, bytes)?;
    let values: Array2<f64> = match Array2::<f64>::read_npy(Cursor::new(bytes)) {
        Ok(values) => values,
        Err(ReadNpyError::WrongDescriptor(_)) => Array2::<f32>::read_npy(Cursor::new(bytes))
            .map_err(|e| npy_error(path, e))?
            .mapv(f64::from),
        Err(e) => return Err(npy_error(path, e)),
    };
    if values.nrows() == 0 {
        return Err(Error::NoRows {
            path: path.to_path_buf(),
        });
    }
    if values.ncols() == 0 {
        return Err(Error::Npy {
            path: path.to_path_buf(),
            detail: "the array has no columns".into(),
        });
    }
    // Row-major scan so that the first bad cell reported is the first a person would meet.
    for (r, row) in values.outer_iter().enumerate() {
        for (c, value) in row.iter().enumerate() {
            if !value.is_finite() {
                return Err(Error::BadCell {
                    path: path.to_path_buf(),
                    row: r + 1,
                    column: ColumnRef::Position(c + 1),
                    fault: CellFault::NotFinite(value.to_string()),
                });
            }
        }
    }
    let values = values.as_standard_layout().into_owned();
    Ok(FeatureMatrix {
        names: (1..=values.ncols()).map(|c| c.to_string()).collect(),
        named: false,
        values,
        source: path.to_path_buf(),
    })
}

/// Checks the magic string and the format version before handing the bytes to the parser,
/// so that the user hears "not an .npy file" rather than a parser's internal complaint,
/// and checks that the header and the data it declares fit in the file: the parser
/// allocates both before reading them, so a few bytes declaring a 4 GB header or a
/// 100000 x 100000 array would otherwise make it ask for that much memory.
fn check_preamble(path: &Path, bytes: &[u8]) -> Result<()> {
    const MAGIC: &[u8] = b"\x93NUMPY";
    let refuse = |detail: String| Error::Npy {
        path: path.to_path_buf(),
        detail,
    };
    if bytes.len() < 8 || &bytes[..6] != MAGIC {
        return Err(refuse(
            "not a NumPy .npy file (the signature is missing)".into(),
        ));
    }
    let major = bytes[6];
    // Version 1 stores the header length in 2 bytes, version 2 in 4 (NumPy's format).
    let length_bytes = match major {
        1 => 2,
        2 => 4,
        _ => {
            return Err(refuse(format!(
                ".npy format version {major} is not supported (use 1 or 2)"
            )))
        }
    };
    let truncated = || refuse("the file is shorter than its header says (truncated?)".into());
    let mut length = [0u8; 4];
    length[..length_bytes].copy_from_slice(bytes.get(8..8 + length_bytes).ok_or_else(truncated)?);
    let data_start = usize::try_from(u32::from_le_bytes(length))
        .ok()
        .and_then(|h| h.checked_add(8 + length_bytes))
        .filter(|&start| start <= bytes.len())
        .ok_or_else(truncated)?;
    // A header that does not parse is left to the parser to describe; it allocates
    // nothing beyond the header, which fits.
    let Ok(header) = Header::from_reader(&mut Cursor::new(bytes)) else {
        return Ok(());
    };
    // The smallest accepted element is 4 bytes (<f4): fewer data bytes than 4 per declared
    // element cannot hold the array, whatever its dtype.
    let needed = header
        .shape
        .iter()
        .try_fold(4usize, |acc, &n| acc.checked_mul(n));
    match needed {
        Some(needed) if needed <= bytes.len() - data_start => Ok(()),
        _ => Err(truncated()),
    }
}

fn npy_error(path: &Path, error: ReadNpyError) -> Error {
    let detail = match error {
        ReadNpyError::WrongNdim(_, found) => {
            format!("the array has {found} dimensions; a matrix file needs exactly 2 (rows x features)")
        }
        ReadNpyError::WrongDescriptor(descr) => format!(
            "the array's dtype {descr} is not supported; use little-endian float32 ('<f4') or float64 ('<f8')"
        ),
        ReadNpyError::LengthOverflow | ReadNpyError::MissingData => {
            "the file is shorter than its header says (truncated?)".to_string()
        }
        ReadNpyError::ExtraBytes(n) => format!("the file has {n} bytes after the array data"),
        other => format!("cannot read the array: {other}"),
    };
    Error::Npy {
        path: path.to_path_buf(),
        detail,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A version-1 `.npy` file in NumPy's documented layout: magic, version, u16 header
    /// length, the header dictionary padded with spaces and a newline, then the data.
    fn npy_v1(header: &str, data: &[u8]) -> Vec<u8> {
        let mut text = header.to_string();
        while (10 + text.len() + 1) % 64 != 0 {
            text.push(' ');
        }
        text.push('\n');
        let mut out = b"\x93NUMPY\x01\x00".to_vec();
        out.extend_from_slice(&(text.len() as u16).to_le_bytes());
        out.extend_from_slice(text.as_bytes());
        out.extend_from_slice(data);
        out
    }

    fn refusal(bytes: &[u8]) -> String {
        match parse_npy(Path::new("x.npy"), bytes) {
            Err(Error::Npy { detail, .. }) => detail,
            other => panic!("expected an .npy refusal, got {other:?}"),
        }
    }

    /// Found by the `npy_matrix` fuzz target (fuzz/regressions/npy_matrix/): a version-2
    /// preamble whose 4-byte header length says 2.7 GB made the parser allocate that
    /// much before it found the file was 78 bytes long.
    #[test]
    fn a_header_longer_than_the_file_is_refused_before_reading() {
        let input = include_bytes!("../../fuzz/regressions/npy_matrix/header_length_4gb");
        assert!(refusal(input).contains("shorter than its header says"));
    }

    /// A header declaring 2^20 x 2^20 doubles (8 TiB) over 16 bytes of data: the data
    /// buffer was allocated from the declared shape, which aborts the process.
    #[test]
    fn a_shape_larger_than_the_data_is_refused_before_allocating() {
        let bytes = npy_v1(
            "{'descr': '<f8', 'fortran_order': False, 'shape': (1048576, 1048576), }",
            &[0u8; 16],
        );
        assert!(refusal(&bytes).contains("shorter than its header says"));
    }

    /// The same layout with data for its shape reads (2 x 1 doubles 1.5 and -2).
    #[test]
    fn a_well_formed_file_still_reads() {
        let mut data = 1.5f64.to_le_bytes().to_vec();
        data.extend_from_slice(&(-2.0f64).to_le_bytes());
        let bytes = npy_v1(
            "{'descr': '<f8', 'fortran_order': False, 'shape': (2, 1), }",
            &data,
        );
        let matrix = parse_npy(Path::new("x.npy"), &bytes).unwrap();
        assert_eq!(matrix.values.as_slice().unwrap(), &[1.5, -2.0]);
    }
}
