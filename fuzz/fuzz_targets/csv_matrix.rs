//! Fuzz target: the CSV matrix reader on arbitrary bytes.
//!
//! The first byte picks the options (bit 0: no dropped columns, or an `id` and a `label`
//! column dropped) and a tiny block size (bits 1-7: 1 to 128 bytes); the rest is the file.
//! The file is read twice, with the everyday block size and with the tiny one, which puts
//! rows, cells and quotes on block edges: both reads must give the same matrix, bit for
//! bit, or the same error message. The reader must never panic, and a matrix it accepts
//! must be well formed: at least one row and one column, unique non-empty names none of
//! which was dropped, every value finite. An accepted matrix is also written back as a
//! fully quoted CSV and read again, which must give the same names and the same values
//! bit for bit: this sends every unquoted input through the quoted reader as well, so the
//! two code paths are checked against each other. The written file starts with an extra
//! id column, dropped on reading, so that the first-column byte-order-mark handling
//! (U+FEFF is stripped from the start of the first name only) does not apply to the
//! matrix's own first name, which may begin with U+FEFF after a space.

#![no_main]

use std::path::Path;

use kilter::corpus::{parse_csv, parse_in_blocks, CsvOptions, FeatureMatrix, MatrixFormat};
use libfuzzer_sys::fuzz_target;

#[path = "../shared/same_outcome.rs"]
mod same_outcome;
use same_outcome::assert_same_outcome;

fuzz_target!(|data: &[u8]| {
    let Some((&mode, bytes)) = data.split_first() else {
        return;
    };
    let options = if mode & 1 == 1 {
        CsvOptions {
            id_columns: vec!["id".into()],
            label_columns: vec!["label".into()],
        }
    } else {
        CsvOptions::default()
    };
    let source = Path::new("fuzz.csv");
    let block = 1 + usize::from(mode >> 1);
    let everyday = parse_csv(source, bytes, &options);
    let tiny = parse_in_blocks(MatrixFormat::Csv, source, bytes, &options, block);
    assert_same_outcome(&everyday, &tiny, block);
    let Ok(matrix) = everyday else {
        return;
    };
    check_well_formed(&matrix, &options);

    // An id column name that is none of the matrix's names.
    let mut id = String::from("_");
    while matrix.names.contains(&id) {
        id.push('_');
    }
    let drop_id = CsvOptions {
        id_columns: vec![id.clone()],
        label_columns: vec![],
    };
    let again = parse_csv(source, &quoted_csv(&id, &matrix), &drop_id)
        .expect("a matrix written back as CSV reads again");
    assert_eq!(again.names, matrix.names, "names survive the round trip");
    assert_eq!(again.values.dim(), matrix.values.dim());
    for (a, b) in again.values.iter().zip(matrix.values.iter()) {
        assert_eq!(a.to_bits(), b.to_bits(), "values survive the round trip");
    }
});

fn check_well_formed(matrix: &FeatureMatrix, options: &CsvOptions) {
    assert!(matrix.named);
    assert!(matrix.rows() >= 1 && matrix.columns() >= 1);
    assert_eq!(matrix.names.len(), matrix.columns());
    assert!(matrix.values.iter().all(|v| v.is_finite()));
    for (i, name) in matrix.names.iter().enumerate() {
        assert!(!name.is_empty() && name.trim() == name);
        assert!(!matrix.names[..i].contains(name), "duplicate name {name:?}");
        assert!(!options.id_columns.contains(name) && !options.label_columns.contains(name));
    }
}

/// An `id` column, then the matrix: every name quoted (quotes doubled), values in Rust's
/// shortest round-trip form.
fn quoted_csv(id: &str, matrix: &FeatureMatrix) -> Vec<u8> {
    let header: Vec<String> = std::iter::once(id)
        .chain(matrix.names.iter().map(String::as_str))
        .map(|n| format!("\"{}\"", n.replace('"', "\"\"")))
        .collect();
    let mut text = header.join(",");
    text.push('\n');
    for (r, row) in matrix.values.rows().into_iter().enumerate() {
        let cells: Vec<String> = std::iter::once(r.to_string())
            .chain(row.iter().map(|v| format!("{v:?}")))
            .collect();
        text.push_str(&cells.join(","));
        text.push('\n');
    }
    text.into_bytes()
}
