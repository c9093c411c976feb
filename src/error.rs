//! Typed errors of the library.
//!
//! Every error that a user can cause carries enough context to fix it without a debugger:
//! the file, the 1-based data row and the column for a bad cell, the flag and the value for
//! a bad setting, the expected and found shapes for a mismatch. The binary prints the
//! message once and maps [`Error::exit_status`] to the process exit code that SPEC fixes.

use std::fmt;
use std::path::PathBuf;

/// Result alias used across the crate.
pub type Result<T, E = Error> = std::result::Result<T, E>;

/// Where a bad cell sits: a CSV column by its header name, an `.npy` column by its
/// 1-based position.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum ColumnRef {
    /// A CSV column, by header name.
    Named(String),
    /// An `.npy` column, 1-based.
    Position(usize),
}

impl fmt::Display for ColumnRef {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            ColumnRef::Named(name) => write!(f, "column \"{name}\""),
            ColumnRef::Position(position) => write!(f, "column {position}"),
        }
    }
}

/// What is wrong with one cell of a matrix file.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum CellFault {
    /// The cell is empty.
    Empty,
    /// The cell is text that does not parse as a number.
    NotNumeric(String),
    /// The cell is NaN or infinite.
    NotFinite(String),
    /// The cell holds a missing-value marker (`NA`, `n/a`, `NaN`, `null`, `?`).
    Missing(String),
}

impl fmt::Display for CellFault {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            CellFault::Empty => write!(
                f,
                "the cell is empty (a missing value: fit leaves reference rows with missing \
                 cells out, but rows to score, predict or audit must be complete)"
            ),
            CellFault::NotNumeric(text) => write!(f, "\"{text}\" is not a number"),
            CellFault::NotFinite(text) => write!(f, "{text} is not a finite number"),
            CellFault::Missing(text) => write!(
                f,
                "\"{text}\" marks a missing value (fit leaves reference rows with missing \
                 cells out, but rows to score, predict or audit must be complete)"
            ),
        }
    }
}

/// What is wrong with a CSV header.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum HeaderFault {
    /// The file has no header row at all.
    Missing,
    /// Two columns share a name.
    Duplicate(String),
    /// A column has an empty name (1-based position).
    EmptyName(usize),
    /// `--id-column` or `--label-column` names a column the header lacks.
    UnknownColumn(String),
    /// After dropping id and label columns nothing is left.
    NoFeatures,
}

impl fmt::Display for HeaderFault {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            HeaderFault::Missing => write!(f, "the file is empty; a header row is required"),
            HeaderFault::Duplicate(name) => write!(f, "the header names column \"{name}\" twice"),
            HeaderFault::EmptyName(position) => {
                write!(f, "column {position} of the header has an empty name")
            }
            HeaderFault::UnknownColumn(name) => {
                write!(f, "there is no column \"{name}\" in the header")
            }
            HeaderFault::NoFeatures => write!(
                f,
                "no feature columns are left after dropping the id and label columns"
            ),
        }
    }
}

/// What is wrong with a profile file.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum ProfileFault {
    /// The file does not start with the profile signature.
    NotAProfile,
    /// Written by another format version.
    Version { found: u32, supported: u32 },
    /// The file ends before its declared content.
    Truncated,
    /// The checksum does not match: the file was changed or damaged.
    Checksum,
    /// The header is not valid or is inconsistent with the binary sections.
    Inconsistent(String),
}

impl fmt::Display for ProfileFault {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            ProfileFault::NotAProfile => {
                write!(
                    f,
                    "this is not a kilter profile (make one with `kilter fit`)"
                )
            }
            ProfileFault::Version { found, supported } => write!(
                f,
                "the profile has format version {found}, this kilter reads version {supported}; \
                 fit it again with this version of `kilter fit`"
            ),
            ProfileFault::Truncated => write!(f, "the profile is truncated"),
            ProfileFault::Checksum => write!(
                f,
                "the profile's checksum does not match: the file is damaged or was edited"
            ),
            ProfileFault::Inconsistent(what) => write!(f, "the profile is inconsistent: {what}"),
        }
    }
}

/// Why a neighbour index cannot be built, queried or restored.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum IndexFault {
    /// The k-d tree supports embedded dimensions up to `max`.
    DimensionUnsupported { dim: usize, max: usize },
    /// More rows than the index can number.
    TooManyRows { rows: usize, max: usize },
    /// A row (1-based) of the indexed rows or of the queries holds NaN or an infinity.
    NotFinite { what: &'static str, row: usize },
    /// More neighbours asked than one graph search returns.
    BeyondSearchWidth { wanted: usize, ef_search: usize },
    /// The worker pool for a deterministic build could not be started.
    WorkerPool(String),
    /// Stored graph bytes are unusable.
    Graph(GraphFault),
}

impl fmt::Display for IndexFault {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            IndexFault::DimensionUnsupported { dim, max } => write!(
                f,
                "the embedded dimension is {dim}, the k-d tree supports at most {max}; \
                 reduce the dimension or use the brute-force index"
            ),
            IndexFault::TooManyRows { rows, max } => {
                write!(f, "{rows} rows, the index holds at most {max}")
            }
            IndexFault::NotFinite { what, row } => {
                write!(
                    f,
                    "row {row} of the {what} holds a value that is not finite"
                )
            }
            IndexFault::BeyondSearchWidth { wanted, ef_search } => write!(
                f,
                "{wanted} candidates asked per query, one graph search returns at most \
                 {ef_search} (ef_search); build the graph with a larger ef_search"
            ),
            IndexFault::WorkerPool(detail) => {
                write!(f, "the build's worker thread could not start: {detail}")
            }
            IndexFault::Graph(fault) => write!(f, "the stored graph is unusable: {fault}"),
        }
    }
}

/// What is wrong with the bytes of a stored neighbour graph.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum GraphFault {
    /// The bytes do not start with the graph signature.
    NotAGraph,
    /// Written by another format version.
    Version { found: u32, supported: u32 },
    /// The bytes end before their declared content, or go on past it.
    Length,
    /// The checksum does not match: the bytes were changed or damaged.
    Checksum,
    /// The graph was built on another number of rows or another dimension.
    Shape {
        stored_rows: u64,
        stored_dim: u64,
        rows: usize,
        dim: usize,
    },
    /// The graph was built with other construction settings than those given.
    Settings,
    /// The graph's points are not the rows it is restored with.
    Points,
    /// The graph's encoding could not be read.
    Decode(String),
    /// The decoded graph breaks one of its invariants.
    Structure(&'static str),
}

impl fmt::Display for GraphFault {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            GraphFault::NotAGraph => write!(f, "these bytes are not a kilter neighbour graph"),
            GraphFault::Version { found, supported } => write!(
                f,
                "graph format version {found}, this kilter reads version {supported}"
            ),
            GraphFault::Length => write!(f, "the length does not match the declared content"),
            GraphFault::Checksum => write!(f, "the checksum does not match"),
            GraphFault::Shape {
                stored_rows,
                stored_dim,
                rows,
                dim,
            } => write!(
                f,
                "it was built on {stored_rows} rows of dimension {stored_dim}, \
                 restored with {rows} rows of dimension {dim}"
            ),
            GraphFault::Settings => {
                write!(f, "it was built with other construction settings")
            }
            GraphFault::Points => write!(f, "its points are not the rows it is restored with"),
            GraphFault::Decode(detail) => write!(f, "its encoding cannot be read ({detail})"),
            GraphFault::Structure(what) => write!(f, "{what}"),
        }
    }
}

/// Every error of the library.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum Error {
    /// A file could not be opened, read or written.
    #[error("{path}: {source}")]
    Io {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },

    /// A matrix file has an extension kilter does not read.
    #[error("{path}: unknown file type; matrix files end in .csv or .npy")]
    UnknownFileType { path: PathBuf },

    /// The CSV reader failed (for example invalid UTF-8 in a quoted field).
    #[error("{path}: {detail}")]
    CsvSyntax { path: PathBuf, detail: String },

    /// A CSV header is missing or unusable.
    #[error("{path}: {fault}")]
    Header { path: PathBuf, fault: HeaderFault },

    /// A data row has a different number of cells than the header.
    #[error("{path}: row {row} has {found} cells, the header has {expected}")]
    RaggedRow {
        path: PathBuf,
        row: usize,
        expected: usize,
        found: usize,
    },

    /// One cell is empty, not a number, or not finite.
    #[error(
        "{path}: row {row}, {column}: {fault}{}",
        text_column_hint(column, fault)
    )]
    BadCell {
        path: PathBuf,
        row: usize,
        column: ColumnRef,
        fault: CellFault,
    },

    /// A matrix file has a header but no data rows.
    #[error("{path}: the file has no data rows")]
    NoRows { path: PathBuf },

    /// A profile loaded in part was asked for a part it does not hold (a program error,
    /// not a user's).
    #[error("the profile in memory lacks {missing}")]
    PartialProfile { missing: &'static str },

    /// An `.npy` file cannot be used.
    #[error("{path}: {detail}")]
    Npy { path: PathBuf, detail: String },

    /// A command-line setting is out of range or malformed.
    #[error("invalid value \"{value}\" for {flag}: {expected}")]
    InvalidSetting {
        flag: &'static str,
        value: String,
        expected: String,
    },

    /// The settings ask for more working memory than the machine has available.
    #[error(
        "these settings need about {needed_gb:.1} GB of working memory ({detail}), more than \
         the {available_gb:.1} GB available; lower them"
    )]
    TooMuchMemory {
        needed_gb: f64,
        available_gb: f64,
        detail: String,
    },

    /// A column is constant, so it cannot be standardized.
    #[error(
        "column \"{column}\" is constant ({value}) in the reference rows, so it cannot be \
         standardized; drop it (for example with --id-column \"{column}\") or use --embed none"
    )]
    ConstantColumn { column: String, value: f64 },

    /// The data has too few rows for what was asked.
    #[error("{what}: needs at least {needed} rows, has {found}")]
    TooFewRows {
        what: String,
        needed: usize,
        found: usize,
    },

    /// Every fitted reference row is the same point once embedded.
    #[error(
        "{path}: the {rows} fitted reference rows are identical (after the embedding), so no \
         distance from them can be measured; the reference corpus needs rows that differ"
    )]
    IdenticalRows { path: PathBuf, rows: usize },

    /// The empirical covariance is singular.
    #[error(
        "the empirical covariance of the embedded reference rows ({dim} dimensions, {rows} rows) \
         is singular or numerically so; use --covariance ledoit-wolf, or reduce the dimension \
         with --embed pca:R"
    )]
    SingularCovariance { dim: usize, rows: usize },

    /// A matrix that must be positive definite is not (an internal numerical failure).
    #[error("{what} is not positive definite")]
    NotPositiveDefinite { what: &'static str },

    /// An eigen-decomposition did not converge.
    #[error("the eigen-decomposition of {what} did not converge")]
    EigenFailed { what: &'static str },

    /// A profile file is unusable.
    #[error("{path}: {fault}")]
    Profile { path: PathBuf, fault: ProfileFault },

    /// `audit --fail-under R`: rows scored below the bar (their records were written).
    #[error("{count} of {rows} rows have reliability below --fail-under {bar} (lowest {lowest:.3}, {lowest_row})")]
    BelowBar {
        count: usize,
        rows: usize,
        bar: f64,
        lowest: f64,
        /// The lowest-scoring row: `row N`, or `ID (row N)` when rows have ids.
        lowest_row: String,
    },

    /// An input does not fit the profile it is scored against.
    #[error("{path}: {detail}")]
    InputMismatch { path: PathBuf, detail: String },

    /// A model file cannot be used (bad JSON, wrong shapes, not ONNX, unsupported type).
    #[error("{path}: {detail}")]
    ModelFile { path: PathBuf, detail: String },

    /// An ONNX model uses an operator the in-process runtime does not implement.
    #[error(
        "{path}: the ONNX operator {operator} is not supported by kilter's in-process runtime; \
         {advice}"
    )]
    OnnxOperator {
        path: PathBuf,
        operator: String,
        advice: String,
    },

    /// A model's input width differs from the data's.
    #[error("the model {model} takes {expected} features, the data has {found}")]
    ModelInputWidth {
        model: String,
        expected: usize,
        found: usize,
    },

    /// The model answered, but not with what was asked.
    #[error("the model {model} answered wrongly: {detail}")]
    ModelAnswer { model: String, detail: String },

    /// The model reported an error of its own (`{"error": ...}`).
    #[error("the model {model} reported an error: {message}")]
    ModelReported { model: String, message: String },

    /// The model process failed: it could not start, crashed or closed its output.
    #[error("the model {model} failed: {detail}{}", stderr_section(stderr_tail))]
    ModelFailed {
        model: String,
        detail: String,
        stderr_tail: String,
    },

    /// The model took longer than `--model-timeout` to answer.
    #[error(
        "the model {model} did not answer within {seconds} s (--model-timeout); it was stopped{}",
        stderr_section(stderr_tail)
    )]
    ModelTimeout {
        model: String,
        seconds: f64,
        stderr_tail: String,
    },

    /// A neighbour index cannot be built, queried or restored.
    #[error("{index} neighbour index: {fault}")]
    NeighbourIndex {
        index: &'static str,
        fault: IndexFault,
    },

    /// An output path is unusable.
    #[error("{path}: {detail}")]
    Output { path: PathBuf, detail: String },
}

impl Error {
    /// The process exit status SPEC assigns to this error: 2 for bad usage or bad input,
    /// 1 for work that failed.
    pub fn exit_status(&self) -> u8 {
        match self {
            Error::NotPositiveDefinite { .. }
            | Error::EigenFailed { .. }
            | Error::ModelAnswer { .. }
            | Error::ModelReported { .. }
            | Error::ModelFailed { .. }
            | Error::ModelTimeout { .. }
            | Error::PartialProfile { .. }
            | Error::NeighbourIndex {
                fault: IndexFault::WorkerPool(_),
                ..
            } => 1,
            Error::BelowBar { .. } => 3,
            _ => 2,
        }
    }

    /// Wraps an I/O error with the path it concerns.
    pub fn io(path: impl Into<PathBuf>, source: std::io::Error) -> Self {
        Error::Io {
            path: path.into(),
            source,
        }
    }
}

fn stderr_section(tail: &str) -> String {
    let tail = tail.trim_end();
    if tail.is_empty() {
        String::new()
    } else {
        let indented: Vec<String> = tail.lines().map(|l| format!("    {l}")).collect();
        format!("\n  last lines of its stderr:\n{}", indented.join("\n"))
    }
}

/// A text cell in a named column is most often an identifier or a label.
fn text_column_hint(column: &ColumnRef, fault: &CellFault) -> String {
    match (column, fault) {
        (ColumnRef::Named(name), CellFault::NotNumeric(_)) => format!(
            " (if \"{name}\" identifies rows or holds labels, drop it with --id-column \"{name}\" \
             or --label-column \"{name}\")"
        ),
        _ => String::new(),
    }
}
