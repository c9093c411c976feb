//! Runs the `kilter` binary and reads what it wrote.

use std::path::{Path, PathBuf};
use std::process::Command;

use kilter::profile::ScoreRecord;

/// What one run of the binary produced.
pub struct Run {
    pub status: i32,
    pub stdout: String,
    pub stderr: String,
}

impl Run {
    /// Panics with the run's output unless it exited with `expected`.
    pub fn expect_status(&self, expected: i32) -> &Self {
        assert_eq!(
            self.status, expected,
            "expected exit status {expected}\nstdout:\n{}\nstderr:\n{}",
            self.stdout, self.stderr
        );
        self
    }

    /// Panics unless stderr contains every fragment.
    pub fn expect_stderr(&self, fragments: &[&str]) -> &Self {
        for fragment in fragments {
            assert!(
                self.stderr.contains(fragment),
                "stderr lacks {fragment:?}:\n{}",
                self.stderr
            );
        }
        self
    }
}

/// Runs `kilter ARGS` with `dir` as the working directory.
pub fn kilter(dir: &Path, args: &[&str]) -> Run {
    let output = Command::new(env!("CARGO_BIN_EXE_kilter"))
        .args(args)
        .current_dir(dir)
        .output()
        .expect("the kilter binary runs");
    Run {
        status: output.status.code().unwrap_or(-1),
        stdout: String::from_utf8_lossy(&output.stdout).into_owned(),
        stderr: String::from_utf8_lossy(&output.stderr).into_owned(),
    }
}

/// A path inside the repository.
pub fn repo(relative: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join(relative)
}

/// A fresh temporary directory.
pub fn temp_dir() -> tempfile::TempDir {
    tempfile::tempdir().expect("a temporary directory")
}

/// Reads score records from a JSON Lines file, rejecting unknown fields.
pub fn read_scores(path: &Path) -> Vec<ScoreRecord> {
    let text = std::fs::read_to_string(path).expect("records file");
    text.lines()
        .map(|line| serde_json::from_str(line).expect("a score record"))
        .collect()
}

/// Names of the files in a directory, sorted.
pub fn listing(dir: &Path) -> Vec<String> {
    let mut names: Vec<String> = std::fs::read_dir(dir)
        .expect("readable directory")
        .map(|e| e.expect("entry").file_name().to_string_lossy().into_owned())
        .collect();
    names.sort();
    names
}

/// Writes a NumPy .npy file by hand: `descr` like `<f8`, `data` the raw little-endian
/// bytes (NumPy format specification, numpy.lib.format, versions 1.0 and 2.0).
pub fn write_npy(path: &Path, major: u8, descr: &str, shape: &[usize], data: &[u8]) {
    let shape_text = match shape {
        [n] => format!("({n},)"),
        _ => format!(
            "({})",
            shape
                .iter()
                .map(|s| s.to_string())
                .collect::<Vec<_>>()
                .join(", ")
        ),
    };
    let mut header =
        format!("{{'descr': '{descr}', 'fortran_order': False, 'shape': {shape_text}, }}");
    let prefix = if major == 1 { 10 } else { 12 };
    while (prefix + header.len() + 1) % 64 != 0 {
        header.push(' ');
    }
    header.push('\n');
    let mut bytes = b"\x93NUMPY".to_vec();
    bytes.push(major);
    bytes.push(0);
    if major == 1 {
        bytes.extend_from_slice(&(header.len() as u16).to_le_bytes());
    } else {
        bytes.extend_from_slice(&(header.len() as u32).to_le_bytes());
    }
    bytes.extend_from_slice(header.as_bytes());
    bytes.extend_from_slice(data);
    std::fs::write(path, bytes).expect("write npy");
}

/// Fits the wine corpus into `DIR/w.kprofile` with `extra` flags; panics unless it works.
pub fn fit_wine(dir: &Path, extra: &[&str]) {
    let wine = repo("reference-corpora/wine.csv");
    let mut args = vec![
        "fit",
        "--reference",
        wine.to_str().expect("UTF-8 path"),
        "--label-column",
        "cultivar",
        "--out",
        "w.kprofile",
    ];
    args.extend_from_slice(extra);
    kilter(dir, &args).expect_status(0);
}

/// Writes a CSV with a header of `names`, numbers in full precision.
pub fn write_csv(path: &Path, names: &[String], values: &ndarray::Array2<f64>) {
    let mut text = names.join(",");
    text.push('\n');
    for row in values.outer_iter() {
        let cells: Vec<String> = row.iter().map(|v| format!("{v:?}")).collect();
        text.push_str(&cells.join(","));
        text.push('\n');
    }
    std::fs::write(path, text).expect("write CSV");
}

/// Reads JSON Lines records into typed structs (unknown fields are refused by the types).
pub fn read_records<T: serde::de::DeserializeOwned>(path: &Path) -> Vec<T> {
    std::fs::read_to_string(path)
        .expect("records file")
        .lines()
        .map(|l| serde_json::from_str(l).expect("a record with only known fields"))
        .collect()
}

/// A kilter network file of one layer: `kind` linear (identity) or logistic (sigmoid).
pub fn one_layer_model(kind: &str, weights: &[f64], bias: f64) -> serde_json::Value {
    let activation = if kind == "logistic" {
        "sigmoid"
    } else {
        "identity"
    };
    serde_json::json!({
        "format": "kilter-model", "version": 1, "kind": kind, "inputs": weights.len(),
        "layers": [{"weights": [weights], "bias": [bias], "activation": activation}]
    })
}

/// Writes a model file.
pub fn write_model(path: &Path, model: &serde_json::Value) {
    std::fs::write(path, model.to_string()).expect("write model");
}
