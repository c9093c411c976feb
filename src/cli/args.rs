//! Raw command-line arguments, as clap parses them.

use std::path::PathBuf;

use clap::{Args, Parser, Subcommand};

/// kilter: can this explanation be trusted? Measures how far the inputs behind an
/// explanation fall from a reference corpus.
#[derive(Debug, Parser)]
#[command(name = "kilter", version, about, long_about = None, propagate_version = true)]
pub struct Cli {
    /// No summaries or progress output (records and errors still appear).
    #[arg(long, global = true)]
    pub quiet: bool,

    #[command(subcommand)]
    pub command: Command,
}

#[derive(Debug, Subcommand)]
pub enum Command {
    /// Fit a reference profile (embedding, covariance, neighbour index, calibration).
    #[command(after_help = FIT_EXAMPLE)]
    Fit(FitArgs),
    /// Score inputs against a profile: distance from the data and calibrated p-values.
    #[command(after_help = SCORE_EXAMPLE)]
    Score(ScoreArgs),
    /// Run a model on inputs and print its outputs (check that it loads and answers).
    #[command(after_help = PREDICT_EXAMPLE)]
    Predict(PredictArgs),
    /// Audit explanations: attributions three ways, their distance from the data, their
    /// agreement, and a reliability score with reasons for every input row.
    #[command(after_help = AUDIT_EXAMPLE)]
    Audit(Box<AuditArgs>),
    /// Rank baselines for path methods: how far each lies from the data, how its path
    /// behaves, and how its attribution agrees with the in-distribution one.
    #[command(after_help = BASELINE_EXAMPLE)]
    Baseline(Box<BaselineArgs>),
    /// Run the whole job on kilter's invented scenario: train a model, fit, audit, rank
    /// baselines and write a report.
    #[command(after_help = DEMO_EXAMPLE)]
    Demo(DemoArgs),
}

const FIT_EXAMPLE: &str = "Example:
  kilter fit --reference reference-corpora/wine.csv --label-column cultivar --out wine.kprofile";
const SCORE_EXAMPLE: &str = "Example:
  kilter score --profile wine.kprofile --input new_batch.csv --label-column cultivar --out scores.jsonl";
const PREDICT_EXAMPLE: &str = "Examples:
  kilter predict --model model.onnx --input rows.csv --label-column label
  kilter predict --model-cmd \"python3 examples/pipe_risk_model.py\" --input kilter-demo/segments.csv --id-column segment_id";
const AUDIT_EXAMPLE: &str = "Examples:
  kilter audit --profile wine.kprofile --model wine_model.json \\
      --input new_batch.csv --label-column cultivar --out audit.jsonl
  kilter audit --profile digits.kprofile --model digits.onnx --input digits.npy \\
      --image 8x8 --patch 2 --sampler neighbours --fail-under 0.4

Exit status 3 with --fail-under R: some row scored below R (all records are still written).";
const BASELINE_EXAMPLE: &str = "Examples:
  kilter baseline --profile wine.kprofile --model wine_model.json --input new_batch.csv \\
      --label-column cultivar --out baselines.jsonl
  kilter baseline --profile digits.kprofile --model digits.onnx --input digits.npy \\
      --image 8x8 --patch 2 --candidates zero,mean,blur:1,reference:16";
const DEMO_EXAMPLE: &str = "Example:
  kilter demo --out kilter-demo";

/// Columns of a CSV file that are not features.
#[derive(Debug, Args)]
pub struct ColumnArgs {
    /// A CSV column that identifies rows; dropped from the features (repeatable).
    #[arg(long = "id-column", value_name = "NAME")]
    pub id_columns: Vec<String>,
    /// A CSV column that holds labels; dropped from the features (repeatable).
    #[arg(long = "label-column", value_name = "NAME")]
    pub label_columns: Vec<String>,
}

#[derive(Debug, Args)]
pub struct FitArgs {
    /// Reference corpus: a .csv (with header) or .npy matrix, one row per input.
    #[arg(long, value_name = "FILE")]
    pub reference: PathBuf,
    /// Where to write the profile.
    #[arg(long, value_name = "PROFILE")]
    pub out: PathBuf,
    /// Embedding: none, standardize, pca:R, or onnx:FILE[:OUTPUT] (a learned encoder).
    #[arg(long, default_value = "standardize", value_name = "EMBED")]
    pub embed: String,
    /// Covariance estimator: empirical or ledoit-wolf.
    #[arg(long, default_value = "ledoit-wolf", value_name = "METHOD")]
    pub covariance: String,
    /// Neighbours for the k-NN distance and the local outlier factor.
    #[arg(long, default_value_t = 10, value_name = "K")]
    pub k: usize,
    /// Fraction of rows held out for calibration; 0 calibrates in-sample.
    #[arg(long, default_value_t = 0.2, value_name = "F")]
    pub holdout: f64,
    /// Seed of the holdout split (and of the approximate index's graph).
    #[arg(long, default_value_t = 0, value_name = "S")]
    pub seed: u64,
    /// Neighbour index: auto (exact k-d tree up to 5 embedded dimensions on processors
    /// with AVX-512, up to 8 elsewhere, exact brute force above; the answers are the same),
    /// exact, tree, or approximate (a graph search for corpora of millions of rows; its
    /// recall is measured and printed).
    #[arg(long, default_value = "auto", value_name = "KIND")]
    pub index: String,
    #[command(flatten)]
    pub columns: ColumnArgs,
}

#[derive(Debug, Args)]
pub struct ScoreArgs {
    /// Profile written by `kilter fit`.
    #[arg(long, value_name = "PROFILE")]
    pub profile: PathBuf,
    /// Inputs to score: .csv or .npy, the profile's columns in the profile's order.
    #[arg(long, value_name = "FILE")]
    pub input: PathBuf,
    /// Records file (.jsonl or .csv); JSON Lines on stdout without it.
    #[arg(long, value_name = "FILE")]
    pub out: Option<PathBuf>,
    /// Significance level for `off_manifold`.
    #[arg(long, default_value_t = 0.01, value_name = "A")]
    pub alpha: f64,
    /// Print on stderr how long each phase took: loading the profile, reading the input,
    /// scoring (embedding, distances, neighbours, p-values) and writing the records.
    #[arg(long)]
    pub timings: bool,
    #[command(flatten)]
    pub columns: ColumnArgs,
}

/// Which model to run: exactly one of `--model` or `--model-cmd`.
#[derive(Debug, Args)]
pub struct ModelArgs {
    /// Model file: .onnx (run in-process) or .json (kilter's own network format).
    #[arg(
        long,
        value_name = "FILE",
        conflicts_with = "model_cmd",
        required_unless_present = "model_cmd"
    )]
    pub model: Option<PathBuf>,
    /// A command (run through sh -c) that speaks kilter's line protocol.
    #[arg(long = "model-cmd", value_name = "CMD")]
    pub model_cmd: Option<String>,
    /// ONNX output to use instead of the first floating-point one.
    #[arg(long = "model-output", value_name = "NAME")]
    pub model_output: Option<String>,
    /// Rows per request to a --model-cmd process.
    #[arg(long = "batch-size", default_value_t = 256, value_name = "N")]
    pub batch_size: usize,
    /// Seconds a --model-cmd process may take to answer one request.
    #[arg(long = "model-timeout", default_value_t = 60.0, value_name = "SECONDS")]
    pub model_timeout: f64,
}

#[derive(Debug, Args)]
pub struct PredictArgs {
    #[command(flatten)]
    pub model: ModelArgs,
    /// Inputs: .csv or .npy, one row per input.
    #[arg(long, value_name = "FILE")]
    pub input: PathBuf,
    /// Records file (.jsonl or .csv); JSON Lines on stdout without it.
    #[arg(long, value_name = "FILE")]
    pub out: Option<PathBuf>,
    #[command(flatten)]
    pub columns: ColumnArgs,
}

#[derive(Debug, Args)]
pub struct DemoArgs {
    /// Directory for the demo's files (created if missing).
    #[arg(long, default_value = "kilter-demo", value_name = "DIR")]
    pub out: PathBuf,
}

/// What audit and baseline share: the groups, the target, the mask design, the
/// replacement sampler and the path.
#[derive(Debug, Args)]
pub struct AttributionArgs {
    /// Groups of features (JSON list of lists of indices or names); default one per feature.
    #[arg(long, value_name = "FILE", conflicts_with = "image")]
    pub groups: Option<PathBuf>,
    /// Inputs are row-major images HxW or HxWxC (channels last); needs --patch.
    #[arg(long, value_name = "HxW[xC]", requires = "patch")]
    pub image: Option<String>,
    /// Side of the square patches that group image pixels.
    #[arg(long, value_name = "P", requires = "image")]
    pub patch: Option<usize>,
    /// Output index explained; default: the top-scoring output of each input.
    #[arg(long, value_name = "T")]
    pub target: Option<usize>,
    /// Masks (coalitions of groups) per row, shared by deletion and replacement.
    #[arg(long, default_value_t = 1024, value_name = "N")]
    pub samples: usize,
    /// Replacement draws per mask, averaged.
    #[arg(long, default_value_t = 4, value_name = "D")]
    pub draws: usize,
    /// How replacement draws masked groups: auto (neighbours where binary, coarse
    /// integer or one-hot columns make a Gaussian a poor model, else gaussian), gaussian,
    /// neighbours or marginal.
    #[arg(long, default_value = "auto", value_name = "SAMPLER")]
    pub sampler: String,
    /// Path points of the interpolation family.
    #[arg(long, default_value_t = 64, value_name = "M")]
    pub steps: usize,
    /// Quadrature rule of the path: midpoint, trapezoid or gauss-legendre.
    #[arg(long, default_value = "midpoint", value_name = "RULE")]
    pub rule: String,
    /// Groups in the top-k overlap of the agreement statistics.
    #[arg(long = "top-k", default_value_t = 3, value_name = "K")]
    pub top_k: usize,
    /// Seed of the masks, the draws and the detectability splits.
    #[arg(long, default_value_t = 0, value_name = "S")]
    pub seed: u64,
    /// Significance level for off-manifold inputs.
    #[arg(long, default_value_t = 0.01, value_name = "A")]
    pub alpha: f64,
}

#[derive(Debug, Args)]
pub struct AuditArgs {
    /// Profile written by `kilter fit`.
    #[arg(long, value_name = "PROFILE")]
    pub profile: PathBuf,
    #[command(flatten)]
    pub model: ModelArgs,
    /// Inputs whose explanations are audited: .csv or .npy, the profile's columns.
    #[arg(long, value_name = "FILE")]
    pub input: PathBuf,
    /// Attributions computed elsewhere: one row per input row, one column per group.
    #[arg(long, value_name = "FILE")]
    pub explanations: Option<PathBuf>,
    #[command(flatten)]
    pub attribution: AttributionArgs,
    /// Baseline of the interpolation path: best (the top candidate of `kilter baseline`),
    /// or zero, mean, median, constant:V, nearest, uniform:N, reference:N, blur:S.
    #[arg(long, default_value = "best", value_name = "NAME")]
    pub baseline: String,
    /// What deletion sets masked groups to: zero, mean, median, typical (a valid value of
    /// each column's kind: mean, rounded median, most frequent value or level), or a number.
    #[arg(
        long,
        default_value = "zero",
        value_name = "zero|mean|median|typical|VALUE"
    )]
    pub fill: String,
    /// How the supplied explanations were made, so kilter recomputes that method:
    /// occlusion:FILL, surrogate:FILL, shapley:SAMPLER, shapley:FILL or
    /// integrated-gradients:BASELINE. It sets --fill, --sampler or --baseline to match.
    #[arg(long, value_name = "METHOD", requires = "explanations")]
    pub method: Option<String>,
    /// Exit with status 3 if any row's reliability is below R (records are still written).
    #[arg(long = "fail-under", value_name = "R")]
    pub fail_under: Option<f64>,
    /// Records file (.jsonl or .csv); JSON Lines on stdout without it.
    #[arg(long, value_name = "FILE")]
    pub out: Option<PathBuf>,
    /// Also write a self-contained HTML report (inline CSS and SVG, no script).
    #[arg(long, value_name = "FILE.html")]
    pub report: Option<PathBuf>,
    /// Also write one CSV line per row: row, id, verdict, reliability, the first
    /// finding's code, the groups it blames and its sentence (for tickets and spreadsheets).
    #[arg(long, value_name = "FILE.csv")]
    pub findings: Option<PathBuf>,
    #[command(flatten)]
    pub columns: ColumnArgs,
}

#[derive(Debug, Args)]
pub struct BaselineArgs {
    /// Profile written by `kilter fit`.
    #[arg(long, value_name = "PROFILE")]
    pub profile: PathBuf,
    #[command(flatten)]
    pub model: ModelArgs,
    /// Inputs whose path baselines are ranked: .csv or .npy, the profile's columns.
    #[arg(long, value_name = "FILE")]
    pub input: PathBuf,
    /// Candidates, a comma list (zero, mean, median, constant:V, nearest, uniform:N,
    /// reference:N, blur:S), or all: every one that applies.
    #[arg(long, default_value = "all", value_name = "LIST")]
    pub candidates: String,
    #[command(flatten)]
    pub attribution: AttributionArgs,
    /// Records file (.jsonl or .csv); JSON Lines on stdout without it.
    #[arg(long, value_name = "FILE")]
    pub out: Option<PathBuf>,
    /// Also write a self-contained HTML report (inline CSS and SVG, no script).
    #[arg(long, value_name = "FILE.html")]
    pub report: Option<PathBuf>,
    #[command(flatten)]
    pub columns: ColumnArgs,
}
