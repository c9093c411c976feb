//! Hostile inputs, table-driven: every command that reads a file or a flag is handed one
//! broken thing at a time, and each case asserts what SPEC promises (SPEC: input files,
//! exit status, outputs written whole or not at all, no panic):
//!
//! (a) the exit status: 2 for bad usage or bad input, 1 for a model that failed, 0 for
//!     inputs SPEC says are valid (a BOM, CRLF line ends, Fortran order, a chatty model);
//! (b) stderr names the fault and its place (the file, the 1-based data row, the column
//!     by header name or 1-based position), checked by a few stable words, not the
//!     whole sentence;
//! (c) no panic text (`panicked`, `RUST_BACKTRACE`) on stderr;
//! (d) on failure the case's directory is byte-for-byte what it was: no output created,
//!     the pre-existing `prior.jsonl` / `prior.kprofile` unchanged, no stray temporary
//!     file (the assertion helper snapshots the whole directory before and after).
//!
//! The suite holds 193 cases (the test `the_documented_count_is_the_real_count` keeps
//! this number honest):
//!
//! | category | cases |
//! | --- | --- |
//! | CSV matrix faults (empty file, header only, ragged row, NaN, inf, text and empty cells, duplicate and empty column names) through fit, score, predict, audit `--input`, audit `--explanations` and baseline; missing cells (NaN, `n/a`, empty) not through fit, which leaves such reference rows out (tests/cli/kinds.rs) | 51 |
//! | `.npy` faults (integer and half-precision dtypes, rank 1 and 3, truncated data, bad magic, format version 3, trailing bytes, NaN) through fit and score, NaN through score only | 17 |
//! | accepted forms: BOM + CRLF through all six readers, Fortran order, big-endian, a single input row, more features than rows under shrinkage, a model flooding stderr | 11 |
//! | fit: a single row, more features than rows (empirical), constant, duplicated and identical columns, `--k` 0, at and above the row count, `--holdout` out of range or too large for the rows, bad `--embed` | 14 |
//! | out-of-range and malformed flags of score, predict, audit and baseline, and sizes past the machine's memory (`--steps`, `--draws`, `reference:N`, `uniform:N`) | 31 |
//! | profiles: truncated, garbage, zero bytes, a CSV, a directory, an edited byte, another format version (binary field and header field, checksum fixed up) through score; three of them through audit and baseline | 14 |
//! | inputs whose columns differ from the profile's by count, name or order | 6 |
//! | explanations and groups that do not fit the input | 14 |
//! | model processes that fail and model files that do not fit | 17 |
//! | output paths that are inputs (other spellings, symlinks), missing directories, directories, failures mid-run | 18 |
//!
//! Data: the open wine corpus (reference-corpora/wine.csv, UCI via scikit-learn), its
//! label column dropped; the hostile files are edits of its first rows.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use crate::harness::{kilter, repo, temp_dir, write_model, write_npy};

/// Cases this file documents at the top; see `the_documented_count_is_the_real_count`.
const DOCUMENTED_CASES: usize = 193;

/// The wine corpus's 13 feature names, in file order.
const NAMES: [&str; 13] = [
    "alcohol",
    "malic_acid",
    "ash",
    "alcalinity_of_ash",
    "magnesium",
    "total_phenols",
    "flavanoids",
    "nonflavanoid_phenols",
    "proanthocyanins",
    "color_intensity",
    "hue",
    "od280_od315_of_diluted_wines",
    "proline",
];

/// Rows of `in.csv`, the inputs every command reads unless a case says otherwise.
const INPUT_ROWS: usize = 3;

/// One hostile input and what kilter must do with it.
#[derive(Clone, Debug)]
struct Case {
    name: String,
    /// Files the case adds to the fixture (relative path, bytes).
    files: Vec<(String, Vec<u8>)>,
    /// Symbolic links the case adds (link, target).
    links: Vec<(String, String)>,
    args: Vec<String>,
    status: i32,
    /// Stable words stderr must contain.
    fragments: Vec<String>,
}

fn case(name: &str, args: &[&str]) -> Case {
    Case {
        name: name.to_string(),
        files: Vec::new(),
        links: Vec::new(),
        args: args.iter().map(|s| s.to_string()).collect(),
        status: 2,
        fragments: Vec::new(),
    }
}

impl Case {
    fn file(mut self, name: &str, bytes: impl Into<Vec<u8>>) -> Self {
        self.files.push((name.to_string(), bytes.into()));
        self
    }

    fn link(mut self, link: &str, target: &str) -> Self {
        self.links.push((link.to_string(), target.to_string()));
        self
    }

    fn arg(mut self, extra: &[&str]) -> Self {
        self.args.extend(extra.iter().map(|s| s.to_string()));
        self
    }

    /// Expects exit status `status` and every fragment on stderr.
    fn fails(mut self, status: i32, fragments: &[&str]) -> Self {
        self.status = status;
        self.fragments = fragments.iter().map(|s| s.to_string()).collect();
        self
    }
}

// ---------------------------------------------------------------------------------------
// The fixture: a profile of the wine corpus, three input rows, a kilter network.

/// The wine corpus without its label, as CSV text with `rows` data rows (all when None).
fn wine_text(rows: Option<usize>) -> String {
    let text = std::fs::read_to_string(repo("reference-corpora/wine.csv")).expect("wine.csv");
    let mut out = String::new();
    for (i, line) in text.lines().enumerate() {
        if rows.is_some_and(|n| i > n) {
            break;
        }
        let cells: Vec<&str> = line.split(',').collect();
        out.push_str(&cells[..13].join(","));
        out.push('\n');
    }
    out
}

/// The input rows as numbers (row-major).
fn input_values() -> Vec<Vec<f64>> {
    wine_text(Some(INPUT_ROWS))
        .lines()
        .skip(1)
        .map(|l| l.split(',').map(|c| c.parse().unwrap()).collect())
        .collect()
}

/// A logistic kilter network over the 13 features: two outputs, `[1 - p, p]`.
fn network(inputs: usize) -> serde_json::Value {
    let weights: Vec<f64> = (0..inputs)
        .map(|i| if i % 2 == 0 { 0.01 } else { -0.01 })
        .collect();
    serde_json::json!({
        "format": "kilter-model", "version": 1, "kind": "logistic", "inputs": inputs,
        "layers": [{"weights": [weights], "bias": [0.1], "activation": "sigmoid"}]
    })
}

/// Files every case starts from: ref.csv (178 rows), in.csv (3 rows), p.kprofile,
/// m.json, and the pre-existing outputs prior.jsonl and prior.kprofile.
fn fixture() -> tempfile::TempDir {
    let dir = temp_dir();
    let d = dir.path();
    std::fs::write(d.join("ref.csv"), wine_text(None)).unwrap();
    std::fs::write(d.join("in.csv"), wine_text(Some(INPUT_ROWS))).unwrap();
    write_model(&d.join("m.json"), &network(13));
    kilter(
        d,
        &[
            "--quiet",
            "fit",
            "--reference",
            "ref.csv",
            "--out",
            "p.kprofile",
            "--k",
            "5",
            "--holdout",
            "0",
        ],
    )
    .expect_status(0);
    std::fs::write(d.join("prior.jsonl"), "records of an earlier run\n").unwrap();
    std::fs::write(d.join("prior.kprofile"), "an earlier profile\n").unwrap();
    dir
}

fn copy_tree(from: &Path, to: &Path) {
    for entry in std::fs::read_dir(from).unwrap() {
        let entry = entry.unwrap();
        let target = to.join(entry.file_name());
        if entry.file_type().unwrap().is_dir() {
            std::fs::create_dir(&target).unwrap();
            copy_tree(&entry.path(), &target);
        } else {
            std::fs::copy(entry.path(), target).unwrap();
        }
    }
}

/// Every entry under `dir`: a file's bytes, a link's target, or a directory marker.
fn snapshot(dir: &Path) -> BTreeMap<PathBuf, Vec<u8>> {
    fn walk(root: &Path, dir: &Path, out: &mut BTreeMap<PathBuf, Vec<u8>>) {
        for entry in std::fs::read_dir(dir).unwrap() {
            let entry = entry.unwrap();
            let path = entry.path();
            let key = path.strip_prefix(root).unwrap().to_path_buf();
            let kind = entry.file_type().unwrap();
            if kind.is_symlink() {
                let target = std::fs::read_link(&path).unwrap();
                out.insert(key, format!("-> {}", target.display()).into_bytes());
            } else if kind.is_dir() {
                out.insert(key, b"<dir>".to_vec());
                walk(root, &path, out);
            } else {
                out.insert(key, std::fs::read(&path).unwrap());
            }
        }
    }
    let mut out = BTreeMap::new();
    walk(dir, dir, &mut out);
    out
}

/// What differs between two snapshots, for the failure message.
fn differences(
    before: &BTreeMap<PathBuf, Vec<u8>>,
    after: &BTreeMap<PathBuf, Vec<u8>>,
) -> Vec<String> {
    let mut out = Vec::new();
    for (path, bytes) in after {
        match before.get(path) {
            None => out.push(format!("created {}", path.display())),
            Some(old) if old != bytes => out.push(format!("changed {}", path.display())),
            _ => {}
        }
    }
    for path in before.keys().filter(|p| !after.contains_key(*p)) {
        out.push(format!("removed {}", path.display()));
    }
    out
}

/// Runs one case in a fresh copy of the fixture; the list of what went wrong.
fn run_case(fixture: &Path, case: &Case) -> Vec<String> {
    let dir = temp_dir();
    let d = dir.path();
    copy_tree(fixture, d);
    for (name, bytes) in &case.files {
        let path = d.join(name);
        if let Some(parent) = path.parent() {
            std::fs::create_dir_all(parent).unwrap();
        }
        std::fs::write(path, bytes).unwrap();
    }
    for (link, target) in &case.links {
        std::os::unix::fs::symlink(target, d.join(link)).unwrap();
    }
    let before = snapshot(d);
    let args: Vec<&str> = case.args.iter().map(String::as_str).collect();
    let run = kilter(d, &args);
    let mut problems = Vec::new();
    if run.status != case.status {
        problems.push(format!(
            "exit status {} where {} was expected",
            run.status, case.status
        ));
    }
    for fragment in &case.fragments {
        if !run.stderr.contains(fragment.as_str()) {
            problems.push(format!("stderr lacks {fragment:?}"));
        }
    }
    for banned in ["panicked", "RUST_BACKTRACE"] {
        if run.stderr.contains(banned) {
            problems.push(format!("stderr shows {banned:?}"));
        }
    }
    if run.status != 0 {
        problems.extend(differences(&before, &snapshot(d)));
    }
    if !problems.is_empty() {
        problems.push(format!("stderr was:\n{}", run.stderr.trim_end()));
    }
    problems
}

/// Runs every case and fails once, listing each case that went wrong.
fn run_all(cases: &[Case]) {
    let fixture = fixture();
    let mut names = std::collections::HashSet::new();
    let mut failures = Vec::new();
    for case in cases {
        assert!(names.insert(&case.name), "case name {} twice", case.name);
        let problems = run_case(fixture.path(), case);
        if !problems.is_empty() {
            failures.push(format!(
                "case {} (kilter {}):\n  {}",
                case.name,
                case.args.join(" "),
                problems.join("\n  ")
            ));
        }
    }
    assert!(
        failures.is_empty(),
        "{} of {} hostile cases failed:\n\n{}",
        failures.len(),
        cases.len(),
        failures.join("\n\n")
    );
}

// ---------------------------------------------------------------------------------------
// Command lines with one slot for the hostile file.

fn fit_args(reference: &str) -> Vec<&str> {
    vec![
        "fit",
        "--reference",
        reference,
        "--out",
        "prior.kprofile",
        "--k",
        "5",
        "--holdout",
        "0",
    ]
}

fn score_args(input: &str) -> Vec<&str> {
    vec![
        "score",
        "--profile",
        "p.kprofile",
        "--input",
        input,
        "--out",
        "prior.jsonl",
    ]
}

fn predict_args(input: &str) -> Vec<&str> {
    vec![
        "predict",
        "--model",
        "m.json",
        "--input",
        input,
        "--out",
        "prior.jsonl",
    ]
}

/// Small settings (13 groups: 64 masks, 8 path points, the zero baseline) so that the
/// cases that reach the model stay quick.
const QUICK: [&str; 6] = ["--samples", "64", "--steps", "8", "--baseline", "zero"];

/// `audit` or `baseline` of `input` with the fixture's profile and network; the records
/// go to the pre-existing prior.jsonl (argument 9).
fn with_model<'a>(command: &'a str, input: &'a str) -> Vec<&'a str> {
    vec![
        "--quiet",
        command,
        "--profile",
        "p.kprofile",
        "--model",
        "m.json",
        "--input",
        input,
        "--out",
        "prior.jsonl",
    ]
}

fn audit_args(input: &str) -> Vec<&str> {
    let mut args = with_model("audit", input);
    args.extend(QUICK);
    args
}

fn baseline_args(input: &str) -> Vec<&str> {
    let mut args = with_model("baseline", input);
    args.extend([
        "--candidates",
        "zero,mean",
        "--samples",
        "64",
        "--steps",
        "8",
    ]);
    args
}

/// Every way a matrix file is read: (label, command line with the file in its slot).
fn readers(file: &str) -> Vec<(&'static str, Vec<&str>)> {
    let mut explanations = audit_args("in.csv");
    explanations.extend(["--explanations", file]);
    vec![
        ("fit", fit_args(file)),
        ("score", score_args(file)),
        ("predict", predict_args(file)),
        ("audit", audit_args(file)),
        ("explanations", explanations),
        ("baseline", baseline_args(file)),
    ]
}

// ---------------------------------------------------------------------------------------
// The hostile files.

/// in.csv with one cell replaced: `row` 1-based data row, `column` a feature name.
fn with_cell(row: usize, column: &str, text: &str) -> String {
    let c = NAMES.iter().position(|n| *n == column).unwrap();
    wine_text(Some(INPUT_ROWS))
        .lines()
        .enumerate()
        .map(|(i, line)| {
            let mut cells: Vec<String> = line.split(',').map(str::to_string).collect();
            if i == row {
                cells[c] = text.to_string();
            }
            cells.join(",") + "\n"
        })
        .collect()
}

/// in.csv with the header's `column` renamed.
fn with_header(column: &str, name: &str) -> String {
    let text = wine_text(Some(INPUT_ROWS));
    let (header, rest) = text.split_once('\n').unwrap();
    let renamed: Vec<&str> = header
        .split(',')
        .map(|n| if n == column { name } else { n })
        .collect();
    format!("{}\n{rest}", renamed.join(","))
}

/// The CSV faults and the words that must name them.
fn csv_faults() -> Vec<(&'static str, Vec<u8>, Vec<&'static str>)> {
    let text = wine_text(Some(INPUT_ROWS));
    let ragged: String = text
        .lines()
        .enumerate()
        .map(|(i, l)| {
            if i == 2 {
                l.rsplit_once(',').unwrap().0.to_string() + "\n"
            } else {
                l.to_string() + "\n"
            }
        })
        .collect();
    vec![
        ("empty-file", Vec::new(), vec!["header row is required"]),
        (
            "header-only",
            format!("{}\n", NAMES.join(",")).into_bytes(),
            vec!["no data rows"],
        ),
        (
            "ragged-row",
            ragged.into_bytes(),
            vec!["row 2 has 12 cells, the header has 13"],
        ),
        (
            "nan-cell",
            with_cell(3, "ash", "NaN").into_bytes(),
            vec!["row 3", "column \"ash\"", "\"NaN\" marks a missing value"],
        ),
        (
            "inf-cell",
            with_cell(1, "proline", "-inf").into_bytes(),
            vec!["row 1", "column \"proline\"", "not a finite number"],
        ),
        (
            "text-cell",
            with_cell(2, "hue", "n/a").into_bytes(),
            vec!["row 2", "column \"hue\"", "\"n/a\" marks a missing value"],
        ),
        (
            "empty-cell",
            with_cell(2, "magnesium", "").into_bytes(),
            vec!["row 2", "column \"magnesium\"", "empty"],
        ),
        (
            "duplicate-name",
            with_header("ash", "alcohol").into_bytes(),
            vec!["column \"alcohol\" twice"],
        ),
        (
            "empty-name",
            with_header("ash", "").into_bytes(),
            vec!["column 3", "empty name"],
        ),
    ]
}

fn csv_matrix_cases() -> Vec<Case> {
    let mut cases = Vec::new();
    for (fault, bytes, words) in csv_faults() {
        for (reader, args) in readers("bad.csv") {
            // fit reads missing cells and leaves their rows out of the reference.
            if reader == "fit" && ["nan-cell", "text-cell", "empty-cell"].contains(&fault) {
                continue;
            }
            let mut fragments = vec!["bad.csv"];
            fragments.extend(&words);
            cases.push(
                case(&format!("csv-{fault}-{reader}"), &args)
                    .file("bad.csv", bytes.clone())
                    .fails(2, &fragments),
            );
        }
    }
    cases
}

/// The .npy header of `write_npy`, with `fortran_order` True; data column-major.
fn npy_bytes(descr: &str, shape: &[usize], data: &[u8]) -> Vec<u8> {
    let dir = temp_dir();
    let path = dir.path().join("x.npy");
    write_npy(&path, 1, descr, shape, data);
    std::fs::read(path).unwrap()
}

fn f8(values: &[f64]) -> Vec<u8> {
    values.iter().flat_map(|v| v.to_le_bytes()).collect()
}

fn npy_faults() -> Vec<(&'static str, Vec<u8>, Vec<&'static str>)> {
    let flat: Vec<f64> = input_values().into_iter().flatten().collect();
    let good = f8(&flat);
    let shape = [INPUT_ROWS, 13];
    let mut nan = flat.clone();
    nan[13 + 2] = f64::NAN; // row 2, column 3
    let mut version3 = npy_bytes("<f8", &shape, &good);
    version3[6] = 3;
    let mut bad_magic = npy_bytes("<f8", &shape, &good);
    bad_magic[1..6].copy_from_slice(b"NUMPX");
    let mut trailing = npy_bytes("<f8", &shape, &good);
    trailing.extend_from_slice(&[0u8; 8]);
    vec![
        (
            "int64",
            npy_bytes("<i8", &shape, &good),
            vec!["dtype", "<i8", "'<f4'", "'<f8'"],
        ),
        (
            "float16",
            npy_bytes("<f2", &shape, &good[..shape[0] * shape[1] * 2]),
            vec!["dtype", "<f2", "not supported"],
        ),
        (
            "rank-1",
            npy_bytes("<f8", &[flat.len()], &good),
            vec!["1 dimensions", "exactly 2"],
        ),
        (
            "rank-3",
            npy_bytes("<f8", &[INPUT_ROWS, 13, 1], &good),
            vec!["3 dimensions", "exactly 2"],
        ),
        (
            "truncated",
            npy_bytes("<f8", &shape, &good[..good.len() - 12]),
            vec!["shorter than its header says"],
        ),
        ("bad-magic", bad_magic, vec!["not a NumPy .npy file"]),
        ("version-3", version3, vec!["format version 3"]),
        (
            "trailing-bytes",
            trailing,
            vec!["8 bytes after the array data"],
        ),
        (
            "nan",
            npy_bytes("<f8", &shape, &f8(&nan)),
            vec!["row 2", "column 3", "not a finite number"],
        ),
    ]
}

fn npy_cases() -> Vec<Case> {
    let mut cases = Vec::new();
    for (fault, bytes, words) in npy_faults() {
        for (reader, args) in [
            ("fit", fit_args("bad.npy")),
            ("score", score_args("bad.npy")),
        ] {
            if reader == "fit" && fault == "nan" {
                continue;
            }
            let mut fragments = vec!["bad.npy"];
            fragments.extend(&words);
            cases.push(
                case(&format!("npy-{fault}-{reader}"), &args)
                    .file("bad.npy", bytes.clone())
                    .fails(2, &fragments),
            );
        }
    }
    cases
}

/// Columns 1..=n of in.csv's first `rows` rows (`rows` may exceed nothing: in.csv's 3).
fn narrow_csv(columns: usize, rows: usize) -> String {
    wine_text(Some(rows))
        .lines()
        .map(|l| l.split(',').take(columns).collect::<Vec<_>>().join(",") + "\n")
        .collect()
}

fn fit_cases() -> Vec<Case> {
    let five = wine_text(Some(5));
    let constant: String = five
        .lines()
        .enumerate()
        .map(|(i, l)| {
            let mut cells: Vec<&str> = l.split(',').collect();
            if i > 0 {
                cells[4] = "100";
            }
            cells.join(",") + "\n"
        })
        .collect();
    // ash copied into a second column under another name.
    let duplicated: String = wine_text(None)
        .lines()
        .enumerate()
        .map(|(i, l)| {
            let cells: Vec<&str> = l.split(',').collect();
            let copy = if i == 0 { "ash_again" } else { cells[2] };
            format!("{},{copy}\n", cells.join(","))
        })
        .collect();
    // Every row the same: no spread at all.
    let first_row = wine_text(Some(1)).lines().nth(1).unwrap().to_string();
    let identical = format!(
        "{}\n{}",
        NAMES.join(","),
        (0..12)
            .map(|_| format!("{first_row}\n"))
            .collect::<String>()
    );
    let fit = |name: &str, reference: &str, extra: &[&str]| {
        let mut args = vec!["fit", "--reference", reference, "--out", "prior.kprofile"];
        args.extend_from_slice(extra);
        case(name, &args)
    };
    vec![
        fit("fit-single-row", "one.csv", &["--k", "1", "--holdout", "0"])
            .file("one.csv", wine_text(Some(1)))
            .fails(2, &["needs at least 2 rows, has 1"]),
        fit(
            "fit-more-features-than-rows-empirical",
            "five.csv",
            &["--k", "2", "--holdout", "0", "--covariance", "empirical"],
        )
        .file("five.csv", five.clone())
        .fails(
            2,
            &[
                "singular",
                "13 dimensions, 5 rows",
                "--covariance ledoit-wolf",
            ],
        ),
        fit(
            "fit-constant-column",
            "constant.csv",
            &["--k", "2", "--holdout", "0"],
        )
        .file("constant.csv", constant)
        .fails(2, &["column \"magnesium\" is constant"]),
        fit(
            "fit-duplicated-column-empirical",
            "dup.csv",
            &["--holdout", "0", "--covariance", "empirical"],
        )
        .file("dup.csv", duplicated)
        .fails(2, &["singular", "--covariance ledoit-wolf"]),
        fit(
            "fit-identical-rows-no-embedding",
            "same.csv",
            &["--k", "2", "--holdout", "0", "--embed", "none"],
        )
        .file("same.csv", identical)
        .fails(2, &["same.csv", "identical"]),
        fit(
            "fit-k-equal-rows",
            "five.csv",
            &["--k", "5", "--holdout", "0"],
        )
        .file("five.csv", five.clone())
        .fails(2, &["--k 5", "needs at least 6 rows, has 5"]),
        fit(
            "fit-k-above-rows",
            "five.csv",
            &["--k", "9", "--holdout", "0"],
        )
        .file("five.csv", five.clone())
        .fails(2, &["--k 9", "needs at least 10 rows, has 5"]),
        fit("fit-k-zero", "ref.csv", &["--k", "0"]).fails(2, &["--k", "at least 1"]),
        fit("fit-holdout-above-one", "ref.csv", &["--holdout", "1.5"])
            .fails(2, &["--holdout", "[0, 1)"]),
        fit("fit-holdout-one", "ref.csv", &["--holdout", "1"]).fails(2, &["--holdout", "[0, 1)"]),
        fit("fit-holdout-negative", "ref.csv", &["--holdout=-0.1"])
            .fails(2, &["--holdout", "[0, 1)"]),
        // 5 rows at --holdout 0.5 hold out round(2.5) = 3 and leave 2 to fit, where k = 2
        // needs 3; 6 rows hold out 3 and fit 3. The count named must be one that works,
        // not one the file already has.
        fit(
            "fit-holdout-too-large-for-rows",
            "five.csv",
            &["--k", "2", "--holdout", "0.5"],
        )
        .file("five.csv", five)
        .fails(2, &["--holdout 0.5", "needs at least 6 rows, has 5"]),
        fit("fit-pca-above-features", "ref.csv", &["--embed", "pca:20"])
            .fails(2, &["at most 13 components"]),
        fit(
            "fit-encoder-not-onnx",
            "ref.csv",
            &["--embed", "onnx:m.json"],
        )
        .fails(2, &["m.json", "not an ONNX model"]),
    ]
}

fn accepted_count() -> usize {
    // bom_and_crlf_are_accepted_by_every_reader (fit, score, predict, audit, explanations,
    // baseline); fortran_order_is_read_as_numpy_writes_it (Fortran order, big-endian);
    // a_single_input_row_is_scored; more_features_than_rows_fit_under_shrinkage;
    // a_model_flooding_stderr_during_an_audit_still_succeeds.
    6 + 2 + 1 + 1 + 1
}

/// `args` with the flags of `extra` set to `extra`'s values (clap refuses a flag given
/// twice) and `extra`'s other flags added.
fn overriding<'a>(args: Vec<&'a str>, extra: &[&'a str]) -> Vec<&'a str> {
    let mut out: Vec<&str> = Vec::new();
    let mut i = 0;
    while i < args.len() {
        if args[i].starts_with("--") && extra.contains(&args[i]) && i + 1 < args.len() {
            i += 2;
        } else {
            out.push(args[i]);
            i += 1;
        }
    }
    out.extend_from_slice(extra);
    out
}

fn flag_cases() -> Vec<Case> {
    let score = |name: &str, extra: &[&str]| case(name, &score_args("in.csv")).arg(extra);
    let predict_cmd = |name: &str, extra: &[&str]| {
        case(
            name,
            &[
                "predict",
                "--model-cmd",
                "cat",
                "--input",
                "in.csv",
                "--out",
                "prior.jsonl",
            ],
        )
        .arg(extra)
    };
    let audit = |name: &str, extra: &[&str]| case(name, &overriding(audit_args("in.csv"), extra));
    let baseline =
        |name: &str, extra: &[&str]| case(name, &overriding(baseline_args("in.csv"), extra));
    vec![
        score("score-alpha-two", &["--alpha", "2"]).fails(2, &["--alpha", "between 0 and 1"]),
        score("score-alpha-zero", &["--alpha", "0"]).fails(2, &["--alpha", "between 0 and 1"]),
        score("score-alpha-text", &["--alpha", "low"]).fails(2, &["--alpha"]),
        predict_cmd("predict-timeout-negative", &["--model-timeout=-1"])
            .fails(2, &["--model-timeout", "positive number of seconds"]),
        predict_cmd("predict-timeout-zero", &["--model-timeout", "0"])
            .fails(2, &["--model-timeout", "positive number of seconds"]),
        predict_cmd(
            "predict-timeout-beyond-any-clock",
            &["--model-timeout", "1e30"],
        )
        .fails(2, &["--model-timeout", "positive number of seconds"]),
        predict_cmd("predict-batch-size-zero", &["--batch-size", "0"])
            .fails(2, &["--batch-size", "at least 1"]),
        audit("audit-samples-zero", &["--samples", "0"]).fails(2, &["--samples", "at least 1"]),
        audit("audit-samples-below-design", &["--samples", "5"])
            .fails(2, &["at least 28 masks for 13 groups"]),
        audit("audit-steps-zero", &["--steps", "0"]).fails(2, &["--steps", "at least 1"]),
        audit("audit-draws-zero", &["--draws", "0"]).fails(2, &["--draws", "at least 1"]),
        // Sizes past any machine's memory are refused before anything is allocated, with the
        // need named (they used to panic or abort on the allocation).
        audit("audit-steps-past-memory", &["--steps", "4294967296"])
            .fails(2, &["GB of working memory", "--steps 4294967296"]),
        audit(
            "audit-draws-past-memory",
            &["--draws", "1152921504606846976"],
        )
        .fails(2, &["GB of working memory", "--draws 1152921504606846976"]),
        audit(
            "audit-reference-baseline-past-memory",
            &["--baseline", "reference:18446744073709551615"],
        )
        .fails(
            2,
            &["GB of working memory", "18446744073709551615 baseline path"],
        ),
        baseline(
            "baseline-uniform-past-memory",
            &["--candidates", "uniform:1000000000"],
        )
        .fails(2, &["GB of working memory"]),
        audit("audit-top-k-zero", &["--top-k", "0"]).fails(2, &["--top-k"]),
        audit("audit-alpha-two", &["--alpha", "2"]).fails(2, &["--alpha", "between 0 and 1"]),
        audit("audit-fail-under-above-one", &["--fail-under", "1.5"])
            .fails(2, &["--fail-under", "between 0 and 1"]),
        audit("audit-fill-nan", &["--fill", "nan"]).fails(2, &["--fill", "finite number"]),
        audit("audit-sampler-unknown", &["--sampler", "copula"]).fails(2, &["--sampler"]),
        audit("audit-image-mismatch", &["--image", "3x3", "--patch", "1"])
            .fails(2, &["--image", "exactly 13 values"]),
        audit(
            "audit-image-malformed",
            &["--image", "3by4", "--patch", "1"],
        )
        .fails(2, &["--image", "HxW"]),
        audit("audit-patch-zero", &["--image", "13x1", "--patch", "0"])
            .fails(2, &["--patch 0", "positive"]),
        audit(
            "audit-patch-covers-image",
            &["--image", "13x1", "--patch", "13"],
        )
        .fails(2, &["--patch", "one patch"]),
        audit("audit-target-beyond-outputs", &["--target", "2"]).fails(2, &["--target", "below 2"]),
        audit("audit-baseline-no-draws", &["--baseline", "uniform:0"])
            .fails(2, &["--baseline", "uniform:0"]),
        audit("audit-blur-without-image", &["--baseline", "blur:1"])
            .fails(2, &["blur:S only for images"]),
        audit("audit-report-not-html", &["--report", "r.txt"]).fails(2, &["--report", ".html"]),
        audit("audit-model-and-command", &["--model-cmd", "cat"]).fails(2, &["--model"]),
        baseline(
            "baseline-unknown-candidate",
            &["--candidates", "zero,sideways"],
        )
        .fails(2, &["--candidates", "sideways"]),
        baseline("baseline-target-beyond-outputs", &["--target", "7"])
            .fails(2, &["--target", "below 2"]),
    ]
}

/// The profile with its format version set to `version` in the binary field (`binary`)
/// or in the JSON header, and the checksum recomputed so that only the version is wrong.
fn profile_with_version(good: &[u8], version: u32, binary: bool) -> Vec<u8> {
    let mut bytes = good.to_vec();
    if binary {
        bytes[12..16].copy_from_slice(&version.to_le_bytes());
    } else {
        let header_len = u64::from_le_bytes(bytes[16..24].try_into().unwrap()) as usize;
        let header = std::str::from_utf8(&bytes[24..24 + header_len]).unwrap();
        let at = header
            .find(&format!("\"version\":{}", kilter::profile::FORMAT_VERSION))
            .expect("the header's version field")
            + 24;
        let edited = format!("\"version\":{version}");
        assert_eq!(edited.len(), 11, "same length keeps the offsets");
        bytes[at..at + 11].copy_from_slice(edited.as_bytes());
    }
    assert!(kilter::profile::reseal(&mut bytes));
    bytes
}

fn profile_cases(good: &[u8]) -> Vec<Case> {
    let mut flipped = good.to_vec();
    let at = flipped.len() - 40;
    flipped[at] ^= 0x10;
    let faults: Vec<(&str, Vec<u8>, Vec<&str>)> = vec![
        (
            "truncated",
            good[..good.len() * 2 / 3].to_vec(),
            vec!["truncated"],
        ),
        (
            "garbage",
            (0..2000u32).map(|i| (i * 7919 % 251) as u8).collect(),
            vec!["not a kilter profile"],
        ),
        ("zero-bytes", Vec::new(), vec!["not a kilter profile"]),
        (
            "csv-as-profile",
            wine_text(Some(3)).into_bytes(),
            vec!["not a kilter profile"],
        ),
        ("edited-byte", flipped, vec!["checksum"]),
        (
            "binary-version",
            profile_with_version(good, 7, true),
            vec!["format version 7", "reads version 4"],
        ),
        (
            "header-version",
            profile_with_version(good, 2, false),
            vec!["format version 2", "reads version 4"],
        ),
    ];
    let mut cases = Vec::new();
    for (fault, bytes, words) in faults {
        let mut fragments = vec!["bad.kprofile"];
        fragments.extend(&words);
        let mut score = score_args("in.csv");
        score[2] = "bad.kprofile";
        cases.push(
            case(&format!("profile-{fault}-score"), &score)
                .file("bad.kprofile", bytes.clone())
                .fails(2, &fragments),
        );
        if matches!(fault, "truncated" | "header-version" | "csv-as-profile") {
            for (command, mut args) in [
                ("audit", audit_args("in.csv")),
                ("baseline", baseline_args("in.csv")),
            ] {
                args[3] = "bad.kprofile";
                cases.push(
                    case(&format!("profile-{fault}-{command}"), &args)
                        .file("bad.kprofile", bytes.clone())
                        .fails(2, &fragments),
                );
            }
        }
    }
    let mut directory = score_args("in.csv");
    directory[2] = "somewhere";
    cases.push(
        case("profile-is-a-directory", &directory)
            .file("somewhere/x", "x")
            .fails(2, &["somewhere"]),
    );
    cases
}

fn mismatch_cases() -> Vec<Case> {
    let swapped = with_header("alcohol", "TMP")
        .replacen("malic_acid", "alcohol", 1)
        .replacen("TMP", "malic_acid", 1);
    let renamed = with_header("hue", "colour_hue");
    let mut cases = Vec::new();
    for (command, args) in [
        ("score", score_args("x.csv")),
        ("audit", audit_args("x.csv")),
        ("baseline", baseline_args("x.csv")),
    ] {
        cases.push(
            case(&format!("columns-fewer-{command}"), &args)
                .file("x.csv", narrow_csv(12, INPUT_ROWS))
                .fails(2, &["x.csv", "12 feature columns", "fitted on 13"]),
        );
        let (name, bytes, words) = if command == "audit" {
            (
                "renamed",
                renamed.clone(),
                ["column 11 is \"colour_hue\"", "expects \"hue\""],
            )
        } else {
            (
                "swapped",
                swapped.clone(),
                ["column 1 is \"malic_acid\"", "expects \"alcohol\""],
            )
        };
        let mut fragments = vec!["x.csv"];
        fragments.extend(words);
        cases.push(
            case(&format!("columns-{name}-{command}"), &args)
                .file("x.csv", bytes)
                .fails(2, &fragments),
        );
    }
    cases
}

fn explanation_and_group_cases() -> Vec<Case> {
    let audit = |name: &str, extra: &[&str]| case(name, &audit_args("in.csv")).arg(extra);
    let two_rows = wine_text(Some(2));
    let groups = |name: &str, json: &str, words: &[&str]| {
        let mut fragments = vec!["g.json"];
        fragments.extend_from_slice(words);
        audit(name, &["--groups", "g.json"])
            .file("g.json", json)
            .fails(2, &fragments)
    };
    vec![
        audit("explanations-too-few-rows", &["--explanations", "e.csv"])
            .file("e.csv", two_rows)
            .fails(
                2,
                &[
                    "e.csv",
                    "holds 2 rows",
                    "at least 3",
                    "one row of explanations per input row",
                ],
            ),
        audit("explanations-too-few-columns", &["--explanations", "e.csv"])
            .file("e.csv", narrow_csv(4, INPUT_ROWS))
            .fails(2, &["e.csv", "one column per group (13)"]),
        audit(
            "explanations-against-groups",
            &["--explanations", "in.csv", "--groups", "g.json"],
        )
        .file("g.json", "[[0, 1], [2, 3]]")
        .fails(2, &["in.csv", "one column per group (2)"]),
        audit(
            "explanations-not-a-matrix-file",
            &["--explanations", "e.json"],
        )
        .file("e.json", "[[0.1, 0.2]]")
        .fails(2, &["e.json", ".csv or .npy"]),
        groups(
            "groups-index-out-of-range",
            "[[0, 1], [13]]",
            &["group 2", "13 is not a feature index (0 to 12)"],
        ),
        groups(
            "groups-negative-index",
            "[[-1]]",
            &["-1 is not a feature index"],
        ),
        groups(
            "groups-fractional-index",
            "[[0.5]]",
            &["0.5 is not a feature index"],
        ),
        groups(
            "groups-feature-in-two",
            "[[0, 1], [1, 2]]",
            &["feature 1 is in group 1 and in group 2"],
        ),
        groups(
            "groups-feature-twice-in-one",
            "[[3, 3]]",
            &["feature 3", "twice in group 1"],
        ),
        groups(
            "groups-unknown-name",
            "[[\"alcohol\"], [\"sweetness\"]]",
            &["group 2", "no feature \"sweetness\""],
        ),
        groups("groups-not-json", "alcohol, ash", &["not valid JSON"]),
        groups("groups-not-a-list", "{\"a\": [0]}", &["JSON list of lists"]),
        groups("groups-empty-group", "[[0], []]", &["group 2 is empty"]),
        groups("groups-none", "[]", &["there are no groups"]),
    ]
}

/// A Python line-protocol model: `body` runs once per request with `rows` and `n` (the
/// request count) bound, and prints its answer.
fn python_model(body: &str) -> String {
    format!(
        "import json, sys\nn = 0\nfor line in sys.stdin:\n    rows = json.loads(line)[\"inputs\"]\n    n += 1\n{}\n",
        body.lines()
            .map(|l| format!("    {l}\n"))
            .collect::<String>()
    )
}

const ANSWER: &str = "print(json.dumps({\"outputs\": [[0.4, 0.6] for _ in rows]}), flush=True)";

fn model_cases() -> Vec<Case> {
    let process = |name: &str, command: &str, extra: &[&str]| {
        let mut args = vec![
            "--quiet",
            "audit",
            "--profile",
            "p.kprofile",
            "--model-cmd",
            command,
            "--input",
            "in.csv",
            "--out",
            "prior.jsonl",
        ];
        args.extend(QUICK);
        args.extend_from_slice(extra);
        case(name, &args)
    };
    let python = |name: &str, body: &str| {
        process(name, "python3 model.py", &[]).file("model.py", python_model(body))
    };
    let file_model = |name: &str, model: &str| {
        let mut args = predict_args("in.csv");
        args[2] = model;
        case(name, &args)
    };
    let onnx = repo("tests/golden/models/lr.onnx");
    let lr_onnx = std::fs::read(onnx).unwrap();
    let mut malformed = network(13);
    malformed["layers"][0]["weights"] = serde_json::json!([[1.0, 2.0]]);
    vec![
        process("model-exits-at-once", "exit 3", &[])
            .fails(1, &["exited without answering", "exit status: 3"]),
        python("model-dies-after-first-answer", &format!("if n > 1:\n    sys.exit(4)\n{ANSWER}"))
            .fails(1, &["exited without answering"]),
        python("model-prints-non-json", "print('ready to serve', flush=True)")
            .fails(1, &["not JSON", "ready to serve"]),
        python(
            "model-answers-too-few-rows",
            "print(json.dumps({\"outputs\": [[0.4, 0.6]] * max(1, len(rows) - 1)}), flush=True)",
        )
        .fails(1, &["answered wrongly", "output rows for"]),
        python(
            "model-changes-output-width",
            "w = 2 if n == 1 else 3\nprint(json.dumps({\"outputs\": [[0.5] * w for _ in rows]}), flush=True)",
        )
        .fails(1, &["3 outputs per row, earlier 2"]),
        python(
            "model-answers-nan",
            "print(json.dumps({\"outputs\": [[float('nan'), 0.5] for _ in rows]}), flush=True)",
        )
        .fails(1, &["answered wrongly", "NaN"]),
        python(
            "model-answers-text",
            "print(json.dumps({\"outputs\": [[\"high\", 0.5] for _ in rows]}), flush=True)",
        )
        .fails(1, &["\"high\", not a number"]),
        python(
            "model-reports-error",
            "print(json.dumps({\"error\": \"weights file missing\"}), flush=True)",
        )
        .fails(1, &["reported an error: weights file missing"]),
        process("model-hangs", "python3 model.py", &["--model-timeout", "1"])
            .file(
                "model.py",
                python_model(&format!("if n > 1:\n    import time\n    time.sleep(30)\n{ANSWER}")),
            )
        .fails(1, &["did not answer within 1 s", "--model-timeout"]),
        process("model-command-not-found", "no-such-model-program-here", &[])
            .fails(1, &["exited without answering", "not found"]),
        file_model("model-onnx-not-onnx", "fake.onnx")
            .file("fake.onnx", "this is not a protobuf")
            .fails(2, &["fake.onnx", "not an ONNX model"]),
        file_model("model-onnx-wrong-width", "lr.onnx")
            .file("lr.onnx", lr_onnx)
            .fails(2, &["takes 30 features", "the data has 13"]),
        file_model("model-json-truncated", "cut.json")
            .file("cut.json", "{\"format\": \"kilter-model\", \"version\": 1, \"layers\": [")
            .fails(2, &["cut.json", "not a valid kilter model file"]),
        file_model("model-json-wrong-shapes", "bad.json")
            .file("bad.json", malformed.to_string())
            .fails(2, &["bad.json"]),
        file_model("model-json-wrong-width", "narrow.json")
            .file("narrow.json", network(4).to_string())
            .fails(2, &["takes 4 features", "the data has 13"]),
        file_model("model-unknown-kind", "m.txt")
            .file("m.txt", "x")
            .fails(2, &["m.txt", ".json", ".onnx"]),
        file_model("model-file-missing", "absent.json").fails(2, &["absent.json"]),
    ]
}

fn output_cases() -> Vec<Case> {
    let score_to = |name: &str, out: &str| {
        let mut args = score_args("in.csv");
        args[6] = out;
        case(name, &args)
    };
    let audit_to = |name: &str, out: &str| {
        let mut args = audit_args("in.csv");
        args[9] = out;
        case(name, &args)
    };
    let refused = ["is also an input", "would destroy the input"];
    let dies_late = python_model(&format!("if n > 3:\n    sys.exit(5)\n{ANSWER}"));
    let dying = |name: &str, extra: &[&str]| {
        let mut args = vec![
            "--quiet",
            "audit",
            "--profile",
            "p.kprofile",
            "--model-cmd",
            "python3 model.py",
            "--input",
            "in.csv",
            "--out",
            "prior.jsonl",
        ];
        args.extend(QUICK);
        args.extend_from_slice(extra);
        case(name, &args).file("model.py", dies_late.clone())
    };
    vec![
        score_to("out-is-the-input", "in.csv").fails(2, &refused),
        score_to("out-is-the-input-dot-slash", "./in.csv").fails(2, &refused),
        score_to("out-is-the-input-via-parent", "sub/../in.csv")
            .file("sub/keep", "")
            .fails(2, &refused),
        score_to("out-is-a-symlink-to-the-input", "link.csv")
            .link("link.csv", "in.csv")
            .fails(2, &refused),
        {
            let mut args = score_args("link.csv");
            args[6] = "in.csv";
            case("out-is-the-input-read-through-a-symlink", &args)
                .link("link.csv", "in.csv")
                .fails(2, &refused)
        },
        score_to("out-is-the-profile", "p.kprofile").fails(2, &refused),
        audit_to("out-is-the-model", "./m.json").fails(2, &refused),
        audit_to("out-is-the-explanations", "e.csv")
            .arg(&["--explanations", "e.csv"])
            .file("e.csv", "")
            .fails(2, &refused),
        audit_to("out-is-the-groups", "g.json")
            .arg(&["--groups", "g.json"])
            .file("g.json", "[[0]]")
            .fails(2, &refused),
        case("report-is-the-records-via-symlink", &audit_args("in.csv"))
            .arg(&["--report", "r.html"])
            .link("r.html", "prior.jsonl")
            .fails(2, &refused),
        {
            let mut args = fit_args("ref.csv");
            args[4] = "./ref.csv";
            case("fit-out-is-the-reference", &args).fails(2, &refused)
        },
        {
            let mut args = fit_args("ref.csv");
            args[4] = "alias.csv";
            case("fit-out-is-a-symlink-to-the-reference", &args)
                .link("alias.csv", "ref.csv")
                .fails(2, &refused)
        },
        score_to("out-in-missing-directory", "no/such/dir/s.jsonl")
            .fails(2, &["no/such/dir", "does not exist"]),
        score_to("out-is-a-directory", "records.jsonl")
            .file("records.jsonl/keep", "")
            .fails(2, &["records.jsonl", "is a directory"]),
        score_to("out-ends-in-a-separator", "s.jsonl/")
            .fails(2, &["s.jsonl/", "names a directory"]),
        score_to("out-of-unknown-format", "s.txt").fails(2, &[".jsonl (JSON Lines) or .csv"]),
        dying("out-kept-when-model-dies-mid-audit", &[]).fails(1, &["exited without answering"]),
        dying(
            "report-not-written-when-model-dies",
            &["--report", "r.html"],
        )
        .fails(1, &["exited without answering"]),
    ]
}

fn all_cases() -> Vec<Case> {
    let good = std::fs::read(fixture().path().join("p.kprofile")).unwrap();
    let mut cases = csv_matrix_cases();
    cases.extend(npy_cases());
    cases.extend(fit_cases());
    cases.extend(flag_cases());
    cases.extend(profile_cases(&good));
    cases.extend(mismatch_cases());
    cases.extend(explanation_and_group_cases());
    cases.extend(model_cases());
    cases.extend(output_cases());
    cases
}

#[test]
fn the_documented_count_is_the_real_count() {
    let good = std::fs::read(fixture().path().join("p.kprofile")).unwrap();
    let counts = [
        csv_matrix_cases().len(),
        npy_cases().len(),
        accepted_count(),
        fit_cases().len(),
        flag_cases().len(),
        profile_cases(&good).len(),
        mismatch_cases().len(),
        explanation_and_group_cases().len(),
        model_cases().len(),
        output_cases().len(),
    ];
    assert_eq!(
        counts,
        [51, 17, 11, 14, 31, 14, 6, 14, 17, 18],
        "update the table at the top of hostile.rs"
    );
    assert_eq!(counts.iter().sum::<usize>(), DOCUMENTED_CASES);
}

#[test]
fn hostile_matrix_files_are_refused_where_they_are_read() {
    let mut cases = csv_matrix_cases();
    cases.extend(npy_cases());
    cases.extend(fit_cases());
    cases.extend(mismatch_cases());
    run_all(&cases);
}

#[test]
fn hostile_flags_profiles_groups_and_explanations_are_refused() {
    let good = std::fs::read(fixture().path().join("p.kprofile")).unwrap();
    let mut cases = flag_cases();
    cases.extend(profile_cases(&good));
    cases.extend(explanation_and_group_cases());
    run_all(&cases);
}

#[test]
fn failing_models_are_reported_and_leave_nothing_behind() {
    run_all(&model_cases());
}

#[test]
fn bad_output_paths_are_refused_before_any_work() {
    run_all(&output_cases());
}

#[test]
fn every_case_name_is_unique() {
    let cases = all_cases();
    let names: std::collections::HashSet<&str> = cases.iter().map(|c| c.name.as_str()).collect();
    assert_eq!(names.len(), cases.len());
}

// ---------------------------------------------------------------------------------------
// Inputs that SPEC says are valid: they must be accepted and read as the same numbers.

/// Runs `kilter ARGS` in `dir`, expects success, and returns the named output's bytes.
fn output_of(dir: &Path, args: &[&str], out: &str) -> Vec<u8> {
    let run = kilter(dir, args);
    run.expect_status(0);
    assert!(!run.stderr.contains("panicked"), "{}", run.stderr);
    std::fs::read(dir.join(out)).unwrap()
}

/// The score records of `input` against the fixture's profile.
fn scored(dir: &Path, input: &str) -> String {
    let mut args = score_args(input);
    args[6] = "s.jsonl";
    String::from_utf8(output_of(dir, &args, "s.jsonl")).unwrap()
}

/// Swaps in.csv for `file` in a command line and sends its records to `out`.
fn swapped<'a>(args: &[&'a str], file: &'a str, out: &'a str) -> Vec<&'a str> {
    args.iter()
        .map(|&a| match a {
            "bad.csv" => file,
            "prior.jsonl" | "prior.kprofile" => out,
            other => other,
        })
        .collect()
}

#[test]
fn bom_and_crlf_are_accepted_by_every_reader() {
    // SPEC: "A BOM and CRLF line ends are valid CSV and are accepted." The same numbers
    // with a UTF-8 byte-order mark and CRLF line ends must give byte-identical records.
    let fixture = fixture();
    let d = fixture.path();
    let plain = wine_text(Some(INPUT_ROWS));
    let fancy = format!("\u{feff}{}", plain.replace('\n', "\r\n"));
    std::fs::write(d.join("plain.csv"), &plain).unwrap();
    std::fs::write(d.join("fancy.csv"), &fancy).unwrap();
    // fit needs more rows than in.csv has: the whole corpus, both ways.
    let whole = wine_text(None);
    std::fs::write(d.join("plain_ref.csv"), &whole).unwrap();
    std::fs::write(
        d.join("fancy_ref.csv"),
        format!("\u{feff}{}", whole.replace('\n', "\r\n")),
    )
    .unwrap();
    let mut checked = 0;
    for (reader, args) in readers("bad.csv") {
        let (a, b) = if reader == "fit" {
            let a = output_of(
                d,
                &swapped(&args, "plain_ref.csv", "a.kprofile"),
                "a.kprofile",
            );
            let b = output_of(
                d,
                &swapped(&args, "fancy_ref.csv", "b.kprofile"),
                "b.kprofile",
            );
            (a, b)
        } else {
            let a = output_of(d, &swapped(&args, "plain.csv", "a.jsonl"), "a.jsonl");
            let b = output_of(d, &swapped(&args, "fancy.csv", "b.jsonl"), "b.jsonl");
            (a, b)
        };
        assert!(!a.is_empty(), "{reader}: an empty output");
        assert!(a == b, "{reader}: BOM and CRLF changed the output");
        checked += 1;
    }
    assert_eq!(checked, 6);
}

#[test]
fn fortran_order_is_read_as_numpy_writes_it() {
    // numpy.save of a Fortran-ordered array writes `fortran_order: True` and the data
    // column by column (numpy.lib.format); numpy.load gives back the same matrix, and so
    // must kilter: its scores equal those of the C-ordered file of the same values.
    let fixture = fixture();
    let d = fixture.path();
    let rows = input_values();
    let c_order: Vec<f64> = rows.iter().flatten().copied().collect();
    let f_order: Vec<f64> = (0..13)
        .flat_map(|j| rows.iter().map(move |r| r[j]))
        .collect();
    let mut fortran = npy_bytes("<f8", &[INPUT_ROWS, 13], &f8(&f_order));
    let at = fortran
        .windows(5)
        .position(|w| w == b"False")
        .expect("the fortran_order field");
    fortran[at..at + 5].copy_from_slice(b"True ");
    std::fs::write(d.join("f.npy"), fortran).unwrap();
    write_npy(&d.join("c.npy"), 1, "<f8", &[INPUT_ROWS, 13], &f8(&c_order));
    // A big-endian '>f8' array (NumPy's `astype('>f8')`) is decoded as well: SPEC asks
    // for little-endian, and reading the other byte order right does no harm.
    let big: Vec<u8> = c_order.iter().flat_map(|v| v.to_be_bytes()).collect();
    write_npy(&d.join("b.npy"), 1, ">f8", &[INPUT_ROWS, 13], &big);
    let score = |input: &str| scored(d, input);
    let c = score("c.npy");
    assert_eq!(c.lines().count(), INPUT_ROWS);
    assert!(
        score("f.npy") == c,
        "Fortran order read differently from C order"
    );
    assert!(score("b.npy") == c, "big-endian values read differently");
    assert!(
        score("in.csv") == c,
        "the .npy values differ from the CSV's"
    );
}

#[test]
fn a_single_input_row_is_scored() {
    // One data row is a valid input: its record is the first record of the 3-row input.
    let fixture = fixture();
    let d = fixture.path();
    std::fs::write(d.join("one.csv"), wine_text(Some(1))).unwrap();
    let one = scored(d, "one.csv");
    let three = scored(d, "in.csv");
    assert_eq!(one.lines().count(), 1);
    assert_eq!(one.lines().next(), three.lines().next());
}

#[test]
fn more_features_than_rows_fit_under_shrinkage() {
    // Ledoit & Wolf (2004) is built for p > n: 13 features on 5 rows fit, with a
    // shrinkage intensity reported, where the empirical covariance is refused (see
    // fit-more-features-than-rows-empirical above).
    let fixture = fixture();
    let d = fixture.path();
    std::fs::write(d.join("five.csv"), wine_text(Some(5))).unwrap();
    let run = kilter(
        d,
        &[
            "fit",
            "--reference",
            "five.csv",
            "--out",
            "five.kprofile",
            "--k",
            "2",
            "--holdout",
            "0",
        ],
    );
    run.expect_status(0);
    assert!(
        run.stdout.contains("ledoit-wolf, shrinkage intensity"),
        "{}",
        run.stdout
    );
    assert!(d.join("five.kprofile").exists());
}

#[test]
fn a_model_flooding_stderr_during_an_audit_still_succeeds() {
    // Megabytes on stderr before and while answering: kilter drains the pipe, so the
    // model never blocks and the audit finishes with every record.
    let fixture = fixture();
    let d = fixture.path();
    let body = format!("sys.stderr.write('x' * 1_000_000 + '\\n')\nsys.stderr.flush()\n{ANSWER}");
    std::fs::write(
        d.join("chatty.py"),
        format!(
            "import sys\nsys.stderr.write('y' * 3_000_000)\n{}",
            python_model(&body)
        ),
    )
    .unwrap();
    let mut args = vec![
        "--quiet",
        "audit",
        "--profile",
        "p.kprofile",
        "--model-cmd",
        "python3 chatty.py",
        "--model-timeout",
        "20",
        "--input",
        "in.csv",
        "--out",
        "chatty.jsonl",
    ];
    args.extend(QUICK);
    let records = String::from_utf8(output_of(d, &args, "chatty.jsonl")).unwrap();
    assert_eq!(records.lines().count(), INPUT_ROWS);
}
