//! Fuzz target: the `.npy` matrix reader on arbitrary bytes.
//!
//! The reader must never panic nor try to allocate more than the file could hold, and a
//! matrix it accepts must be well formed: at least one row and one column, positional
//! names "1", "2", ..., every value finite. An accepted matrix is written back with
//! ndarray-npy as `<f8` and read again, which must give the same values bit for bit.
//! Every input is also read in tiny blocks (1 to 61 bytes, from the input's length), which
//! puts rows and values on block edges: that read must give the same matrix bit for bit,
//! or the same error message.

#![no_main]

use std::path::Path;

use kilter::corpus::{parse_in_blocks, parse_npy, CsvOptions, MatrixFormat};
use libfuzzer_sys::fuzz_target;

#[path = "../shared/same_outcome.rs"]
mod same_outcome;
use same_outcome::assert_same_outcome;
use ndarray_npy::WriteNpyExt;

fuzz_target!(|bytes: &[u8]| {
    let source = Path::new("fuzz.npy");
    let block = 1 + bytes.len() % 61;
    let everyday = parse_npy(source, bytes);
    let tiny = parse_in_blocks(
        MatrixFormat::Npy,
        source,
        bytes,
        &CsvOptions::default(),
        block,
    );
    assert_same_outcome(&everyday, &tiny, block);
    let Ok(matrix) = everyday else {
        return;
    };
    assert!(!matrix.named);
    assert!(matrix.rows() >= 1 && matrix.columns() >= 1);
    let positions: Vec<String> = (1..=matrix.columns()).map(|c| c.to_string()).collect();
    assert_eq!(matrix.names, positions);
    assert!(matrix.values.iter().all(|v| v.is_finite()));
    assert!(matrix.values.is_standard_layout());

    let mut written = Vec::new();
    matrix
        .values
        .write_npy(&mut written)
        .expect("a matrix writes as .npy");
    let again = parse_npy(source, &written).expect("a written matrix reads again");
    assert_eq!(again.values.dim(), matrix.values.dim());
    for (a, b) in again.values.iter().zip(matrix.values.iter()) {
        assert_eq!(a.to_bits(), b.to_bits(), "values survive the round trip");
    }
});
