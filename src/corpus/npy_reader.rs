//! NumPy `.npy` input: 2-D little-endian `f4` or `f8` arrays, format versions 1 and 2.

use std::io::Cursor;
use std::path::Path;

use ndarray::Array2;
use ndarray_npy::{ReadNpyError, ReadNpyExt};

use super::FeatureMatrix;
use crate::error::{CellFault, ColumnRef, Error, Result};

pub(super) fn read_npy(path: &Path) -> Result<FeatureMatrix> {
    let bytes = std::fs::read(path).map_err(|e| Error::io(path, e))?;
    check_preamble(path, &bytes)?;
    let values: Array2<f64> = match Array2::<f64>::read_npy(Cursor::new(&bytes)) {
        Ok(values) => values,
        Err(ReadNpyError::WrongDescriptor(_)) => Array2::<f32>::read_npy(Cursor::new(&bytes))
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
/// so that the user hears "not an .npy file" rather than a parser's internal complaint.
fn check_preamble(path: &Path, bytes: &[u8]) -> Result<()> {
    const MAGIC: &[u8] = b"\x93NUMPY";
    if bytes.len() < 8 || &bytes[..6] != MAGIC {
        return Err(Error::Npy {
            path: path.to_path_buf(),
            detail: "not a NumPy .npy file (the signature is missing)".into(),
        });
    }
    let major = bytes[6];
    if major != 1 && major != 2 {
        return Err(Error::Npy {
            path: path.to_path_buf(),
            detail: format!(".npy format version {major} is not supported (use 1 or 2)"),
        });
    }
    Ok(())
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
