//! `kilter audit`: for every input row, the attribution three ways, how far each family's
//! inputs fall from the data, their agreement, and a reliability score with reasons.

use std::collections::HashMap;
use std::io::Write;
use std::path::{Path, PathBuf};

use ndarray::{concatenate, s, Array2, Axis};
use rayon::prelude::*;
use serde::Serialize;

use kilter::audit::{check_supplied, AuditRecord, AuditSettings, Auditor, Verdict};
use kilter::baselines::{BaselineChoice, ImageShape};
use kilter::corpus::{CsvOptions, MatrixChunks};
use kilter::groups::Groups;
use kilter::perturbation::FillValue;
use kilter::profile::Profile;
use kilter::{Error, Result};

use super::args::{AttributionArgs, AuditArgs};
use super::fit::csv_options;
use super::predict::{load_model, model_source};
use super::{check_report_path, record_io, row_id, write_report, Context, RecordDestination};
use kilter::output::{check_output_path, write_atomically, RecordFormat, RecordWriter};
use kilter::report::{AuditSection, Report};

/// Rows audited together: each is a few thousand model calls, so a handful per core keeps
/// every core busy while records stream out in input order.
const ROWS_PER_WAVE: usize = 16;

/// Computes `work(row)` for every row, a wave of rows at a time in parallel, and hands the
/// results to `emit` in row order; the first error stops the work.
pub fn in_waves<R: Send>(
    rows: usize,
    work: impl Fn(usize) -> Result<R> + Sync,
    mut emit: impl FnMut(R) -> Result<()>,
) -> Result<()> {
    let wave = ROWS_PER_WAVE.max(2 * rayon::current_num_threads());
    for start in (0..rows).step_by(wave) {
        let end = (start + wave).min(rows);
        let results: Vec<Result<R>> = (start..end).into_par_iter().map(&work).collect();
        for result in results {
            emit(result?)?;
        }
    }
    Ok(())
}

/// Parses `--image HxW[xC]`.
pub fn image_shape(text: &str) -> Result<ImageShape> {
    let parts: Vec<Option<usize>> = text.split('x').map(|p| p.parse().ok()).collect();
    let (height, width, channels) = match parts.as_slice() {
        [Some(h), Some(w)] => (*h, *w, 1),
        [Some(h), Some(w), Some(c)] => (*h, *w, *c),
        _ => {
            return Err(Error::InvalidSetting {
                flag: "--image",
                value: text.to_string(),
                expected: "HxW or HxWxC, such as 8x8 or 32x32x3".into(),
            })
        }
    };
    Ok(ImageShape {
        height,
        width,
        channels,
    })
}

/// Groups from `--groups`, `--image --patch`, or one per feature with each one-hot block
/// of the profile as one group; one per feature when supplied explanations have one
/// column per feature (`supplied_columns`).
pub fn groups_for(
    groups: Option<&std::path::Path>,
    image: Option<ImageShape>,
    patch: Option<usize>,
    profile: &Profile,
    supplied_columns: Option<usize>,
) -> Result<Groups> {
    let names = profile.feature_names();
    match (groups, image) {
        (Some(path), _) => Groups::from_json_file(path, names),
        (None, Some(shape)) => Groups::image_patches(
            shape.height,
            shape.width,
            shape.channels,
            patch.unwrap_or(1),
            names.len(),
        ),
        (None, None) => {
            let blocks: Vec<Vec<usize>> = match profile.feature_distribution() {
                Ok(f) => f
                    .kinds()
                    .blocks()
                    .iter()
                    .map(|b| b.columns.clone())
                    .collect(),
                Err(_) => Vec::new(),
            };
            let merged = Groups::singletons_and_blocks(names, &blocks);
            Ok(match supplied_columns {
                Some(columns) if columns == names.len() => Groups::singletons(names),
                _ => merged,
            })
        }
    }
}

/// The settings shared with `kilter baseline`, validated.
pub fn attribution_settings(
    a: &AttributionArgs,
    image: Option<ImageShape>,
    baseline: BaselineChoice,
    fill: FillValue,
) -> Result<AuditSettings> {
    let settings = AuditSettings {
        samples: a.samples,
        draws: a.draws,
        steps: a.steps,
        rule: a.rule.parse()?,
        fill,
        sampler: a.sampler.parse()?,
        baseline,
        image,
        target: a.target,
        seed: a.seed,
        alpha: a.alpha,
        top_k: a.top_k,
        method: None,
    };
    settings.validate()?;
    Ok(settings)
}

fn settings(args: &AuditArgs, image: Option<ImageShape>) -> Result<AuditSettings> {
    let mut settings = attribution_settings(
        &args.attribution,
        image,
        BaselineChoice::parse(&args.baseline, image.is_some())?,
        args.fill.parse()?,
    )?;
    settings.method = args.method.as_deref().map(str::parse).transpose()?;
    if let Some(bar) = args.fail_under {
        if !(0.0..=1.0).contains(&bar) {
            return Err(Error::InvalidSetting {
                flag: "--fail-under",
                value: bar.to_string(),
                expected: "a reliability between 0 and 1".into(),
            });
        }
    }
    Ok(settings)
}

pub fn run(args: AuditArgs, context: &Context) -> Result<()> {
    let a = &args.attribution;
    let image = a.image.as_deref().map(image_shape).transpose()?;
    let settings = settings(&args, image)?;
    let source = model_source(&args.model)?;
    let mut inputs = source.input_paths();
    inputs.push(&args.profile);
    inputs.push(&args.input);
    if let Some(p) = &args.explanations {
        inputs.push(p);
    }
    if let Some(p) = &a.groups {
        inputs.push(p);
    }
    let destination = RecordDestination::new(args.out.as_deref(), &inputs)?;
    check_report_path(args.report.as_deref(), &inputs, args.out.as_deref())?;
    check_findings_path(
        args.findings.as_deref(),
        &inputs,
        &[args.out.as_deref(), args.report.as_deref()],
    )?;

    let profile = Profile::load(&args.profile)?;
    let options = csv_options(&args.columns);
    let mut input = MatrixChunks::open(&args.input, &options)?.keeping_ids();
    profile.check_input(input.header())?;
    let supplied_file = match &args.explanations {
        Some(path) => Some(SuppliedFile::open(path, &options)?),
        None => None,
    };
    let groups = groups_for(
        a.groups.as_deref(),
        image,
        a.patch,
        &profile,
        supplied_file.as_ref().map(|f| f.columns),
    )?;
    let mut supplied = match supplied_file {
        None => None,
        Some(file) => {
            let join_id = options.id_columns.first().filter(|_| input.has_ids());
            Some(file.rows(groups.names(), join_id, &args.input, &options)?)
        }
    };
    let model = load_model(&source, input.columns())?;
    let auditor = Auditor::new(&profile, model.as_ref(), groups, settings)?;

    let mut summary = Summary::default();
    let mut findings = args
        .findings
        .as_ref()
        .map(|_| RecordWriter::new(Vec::new(), RecordFormat::Csv));
    // The report draws images of the audited rows, so it keeps them.
    let mut kept_inputs: Vec<f64> = Vec::new();
    let mut emitter = context.emitter(input.rows_hint(), "auditing", args.report.is_some());
    destination.write(|writer| {
        while let Some((block, ids)) = input.next_block()? {
            let first_row = input.rows_done() - block.nrows();
            let own = match supplied.as_mut() {
                Some(s) => Some(s.take(block.nrows(), first_row, ids.as_deref())?),
                None => None,
            };
            if args.report.is_some() && image.is_some() {
                kept_inputs.extend(block.iter());
            }
            in_waves(
                block.nrows(),
                |i| {
                    let own = own.as_ref().map(|o| o.row(i).to_vec());
                    let mut record =
                        auditor.audit_row(first_row + i, block.row(i), own.as_deref())?;
                    record.id = row_id(ids.as_deref(), i);
                    Ok(record)
                },
                |record: AuditRecord| {
                    summary.add(&record);
                    if let Some(f) = findings.as_mut() {
                        f.write(&FindingLine::of(&record)).map_err(record_io)?;
                    }
                    emitter.emit(writer, record)
                },
            )?;
        }
        match supplied {
            Some(s) => s.finish(input.rows_done()),
            None => Ok(()),
        }
    })?;
    let rows = input.rows_done();
    let kept = emitter.finish();
    if let (Some(path), Some(lines)) = (&args.findings, findings) {
        let bytes = lines.finish().map_err(record_io)?;
        write_atomically(path, |w| w.write_all(&bytes))?;
    }
    if let Some(path) = &args.report {
        let width = auditor.groups().features();
        let kept_images = Array2::from_shape_vec((kept_inputs.len() / width, width), kept_inputs)
            .expect("whole rows were kept");
        let labels = record_labels(kept.iter().map(|r| r.id.as_deref()));
        let mut report = Report::new("kilter audit");
        report.audit(&AuditSection {
            title: format!("Audit of {}", args.input.display()),
            settings: settings_line(&auditor),
            groups: auditor.groups(),
            records: &kept,
            labels: labels.as_deref(),
            image: image.map(|shape| (shape, &kept_images)),
        });
        write_report(path, &report.finish())?;
        if !context.quiet {
            eprintln!("report written to {}", path.display());
        }
    }
    if !context.quiet {
        summary.print(&auditor);
    }
    if let Some(bar) = args.fail_under {
        let below: Vec<&(f64, usize, String, String)> = summary
            .all
            .iter()
            .filter(|(score, ..)| *score < bar)
            .collect();
        if let Some(lowest) = below.iter().min_by(|a, b| a.0.total_cmp(&b.0)) {
            return Err(Error::BelowBar {
                count: below.len(),
                rows,
                bar,
                lowest: lowest.0,
                lowest_row: lowest.2.clone(),
            });
        }
    }
    Ok(())
}

/// How a row is named to a person: `row N`, or `ID (row N)` when it has an id.
fn row_label(row: usize, id: Option<&str>) -> String {
    match id {
        Some(id) => format!("{id} (row {row})"),
        None => format!("row {row}"),
    }
}

/// The report's labels of records in row order: their ids, when they have them.
pub fn record_labels<'a>(ids: impl Iterator<Item = Option<&'a str>>) -> Option<Vec<String>> {
    let ids: Vec<Option<&str>> = ids.collect();
    if ids.iter().all(Option::is_none) {
        return None;
    }
    Some(ids.iter().map(|id| id.unwrap_or("").to_string()).collect())
}

/// Checks `audit --findings FILE.csv` before any work: a `.csv` name, a writable place,
/// not an input, not another output.
fn check_findings_path(
    findings: Option<&std::path::Path>,
    inputs: &[&std::path::Path],
    outputs: &[Option<&std::path::Path>],
) -> Result<()> {
    let Some(path) = findings else {
        return Ok(());
    };
    if RecordFormat::for_path(path).ok() != Some(RecordFormat::Csv) {
        return Err(Error::InvalidSetting {
            flag: "--findings",
            value: path.display().to_string(),
            expected: "a file name ending in .csv".into(),
        });
    }
    let mut all: Vec<&std::path::Path> = inputs.to_vec();
    all.extend(outputs.iter().flatten());
    check_output_path(path, &all)
}

/// One line of `audit --findings`: a row's verdict and its first finding.
#[derive(Serialize)]
struct FindingLine<'a> {
    row: usize,
    /// Always a column; empty without ids.
    id: Option<&'a str>,
    verdict: Verdict,
    reliability: f64,
    /// The first finding's stable code (the largest; empty when there is none).
    finding: &'a str,
    /// The groups it names, joined with `;`.
    groups_blamed: String,
    reason: &'a str,
}

impl<'a> FindingLine<'a> {
    fn of(record: &'a AuditRecord) -> Self {
        let first = record.findings.first();
        FindingLine {
            row: record.row,
            id: record.id.as_deref(),
            verdict: record.verdict,
            reliability: record.reliability,
            finding: first.map_or("", |f| f.code.as_str()),
            groups_blamed: first.map_or_else(String::new, |f| f.groups.join(";")),
            reason: first.map_or("", |f| f.reason.as_str()),
        }
    }
}

/// The header of a supplied explanations file and how its columns are read: the input's
/// id and label columns are dropped where it has them.
struct SuppliedFile {
    path: PathBuf,
    /// Its id and label columns, those of the input that it has.
    options: CsvOptions,
    /// Explanation columns, after dropping them.
    columns: usize,
    /// Their names, when they come from a header.
    names: Option<Vec<String>>,
}

impl SuppliedFile {
    fn open(path: &Path, input_options: &CsvOptions) -> Result<Self> {
        let raw = MatrixChunks::open(path, &CsvOptions::default())?;
        let header = raw.header().names.to_vec();
        let present = |names: &[String]| -> Vec<String> {
            names
                .iter()
                .filter(|n| header.contains(n))
                .cloned()
                .collect()
        };
        let options = CsvOptions {
            id_columns: present(&input_options.id_columns),
            label_columns: present(&input_options.label_columns),
        };
        let chunks = MatrixChunks::open(path, &options)?;
        Ok(SuppliedFile {
            path: path.to_path_buf(),
            columns: chunks.columns(),
            names: chunks
                .header()
                .named
                .then(|| chunks.header().names.to_vec()),
            options,
        })
    }

    /// The order in which to read its columns: by name when its header names are the
    /// group names, else by position.
    fn column_order(&self, groups: &[String]) -> Vec<usize> {
        let by_name = self.names.as_ref().and_then(|names| {
            if names.len() != groups.len() {
                return None;
            }
            groups
                .iter()
                .map(|g| names.iter().position(|n| n == g))
                .collect::<Option<Vec<usize>>>()
        });
        by_name.unwrap_or_else(|| (0..self.columns).collect())
    }

    /// Its rows, joined to the input's by the id column `join_id` when both files have it,
    /// else by position.
    fn rows(
        self,
        groups: &[String],
        join_id: Option<&String>,
        input: &Path,
        input_options: &CsvOptions,
    ) -> Result<SuppliedRows> {
        let order = self.column_order(groups);
        match join_id {
            Some(id) if self.options.id_columns.first() == Some(id) => {
                let joined = ByIdRows::read(&self, id, groups.len(), &order)?;
                joined.check_against(input, input_options)?;
                Ok(SuppliedRows::ById(joined))
            }
            _ => {
                let chunks = MatrixChunks::open(&self.path, &self.options)?;
                if chunks.columns() != groups.len() {
                    // The row count is not known yet (CSV is streamed): name the columns.
                    return Err(Error::InputMismatch {
                        path: self.path.clone(),
                        detail: format!(
                            "has {} value columns; the audit needs one column per group ({}): {}",
                            chunks.columns(),
                            groups.len(),
                            groups.join(", ")
                        ),
                    });
                }
                Ok(SuppliedRows::InOrder(InOrderRows {
                    chunks,
                    path: self.path,
                    pending: Array2::zeros((0, groups.len())),
                    groups: groups.len(),
                    order,
                }))
            }
        }
    }
}

/// Supplied explanations, one row per input row, one column per group, in group order.
enum SuppliedRows {
    /// Joined by position, read alongside the input a block at a time.
    InOrder(InOrderRows),
    /// Joined by id, read whole.
    ById(ByIdRows),
}

impl SuppliedRows {
    /// The explanations of the `n` input rows starting at `first_row`, whose ids are
    /// `ids` when the input has them.
    fn take(&mut self, n: usize, first_row: usize, ids: Option<&[String]>) -> Result<Array2<f64>> {
        match self {
            SuppliedRows::InOrder(rows) => rows.take(n, first_row),
            SuppliedRows::ById(rows) => rows.take(n, first_row, ids),
        }
    }

    /// After the last input row: no explanation rows may be left over.
    fn finish(self, input_rows: usize) -> Result<()> {
        match self {
            SuppliedRows::InOrder(rows) => rows.finish(input_rows),
            // Checked against the whole input before the audit began.
            SuppliedRows::ById(_) => Ok(()),
        }
    }
}

/// Explanations joined by position.
struct InOrderRows {
    chunks: MatrixChunks,
    path: PathBuf,
    /// Rows read but not yet handed out, in the file's column order.
    pending: Array2<f64>,
    groups: usize,
    /// The file column of each group.
    order: Vec<usize>,
}

impl InOrderRows {
    fn take(&mut self, n: usize, first_row: usize) -> Result<Array2<f64>> {
        while self.pending.nrows() < n {
            match self.chunks.next_chunk()? {
                Some(more) => {
                    self.pending = concatenate![Axis(0), self.pending, more];
                }
                None => {
                    let found = self.chunks.rows_done();
                    return Err(Error::InputMismatch {
                        path: self.path.clone(),
                        detail: format!(
                            "holds {found} rows; the input has at least {} (one row of explanations per input row)",
                            first_row + n
                        ),
                    });
                }
            }
        }
        let taken = self.pending.slice(s![..n, ..]).select(Axis(1), &self.order);
        self.pending = self.pending.slice(s![n.., ..]).to_owned();
        Ok(taken)
    }

    fn finish(mut self, input_rows: usize) -> Result<()> {
        let mut extra = self.pending.nrows();
        while let Some(more) = self.chunks.next_chunk()? {
            extra += more.nrows();
        }
        if extra > 0 {
            check_supplied(
                self.chunks.rows_done(),
                self.groups,
                input_rows,
                self.groups,
                &self.path,
            )?;
        }
        Ok(())
    }
}

/// Explanations joined by id: the whole file, its rows in group order.
struct ByIdRows {
    path: PathBuf,
    /// The id column's name.
    column: String,
    values: Array2<f64>,
    /// Each row's id, in file order.
    ids: Vec<String>,
    /// Row of each id.
    index: HashMap<String, usize>,
}

impl ByIdRows {
    fn read(file: &SuppliedFile, column: &str, groups: usize, order: &[usize]) -> Result<Self> {
        let mut chunks = MatrixChunks::open(&file.path, &file.options)?.keeping_ids();
        if chunks.columns() != groups {
            return Err(Error::InputMismatch {
                path: file.path.clone(),
                detail: format!(
                    "holds {} columns besides {column}; the audit needs one column per group ({groups})",
                    chunks.columns()
                ),
            });
        }
        let mut values = Vec::new();
        let mut ids = Vec::new();
        let mut index = HashMap::new();
        while let Some((block, block_ids)) = chunks.next_block()? {
            values.extend(block.select(Axis(1), order).iter());
            for id in block_ids.unwrap_or_default() {
                if let Some(&earlier) = index.get(&id) {
                    return Err(duplicate_id(&file.path, column, &id, earlier, ids.len()));
                }
                index.insert(id.clone(), ids.len());
                ids.push(id);
            }
        }
        let values = Array2::from_shape_vec((ids.len(), groups), values).map_err(|_| {
            Error::InputMismatch {
                path: file.path.clone(),
                detail: format!("rows are joined by {column}, but some rows have no id"),
            }
        })?;
        Ok(ByIdRows {
            path: file.path.clone(),
            column: column.to_string(),
            values,
            ids,
            index,
        })
    }

    /// Reads the input's ids ahead of the audit: each must be unique and have a row here,
    /// and every row here must belong to an input row.
    fn check_against(&self, input: &Path, options: &CsvOptions) -> Result<()> {
        let mut chunks = MatrixChunks::open(input, options)?.keeping_ids();
        let mut seen: HashMap<String, usize> = HashMap::new();
        while let Some((_, ids)) = chunks.next_block()? {
            for id in ids.unwrap_or_default() {
                let row = seen.len();
                if let Some(&earlier) = seen.get(&id) {
                    return Err(duplicate_id(input, &self.column, &id, earlier, row));
                }
                if !self.index.contains_key(&id) {
                    return Err(Error::InputMismatch {
                        path: self.path.clone(),
                        detail: format!(
                            "no row has {} \"{id}\", which row {} of {} has (rows are joined by {})",
                            self.column,
                            row + 1,
                            input.display(),
                            self.column
                        ),
                    });
                }
                seen.insert(id, row);
            }
        }
        if let Some((row, id)) = self
            .ids
            .iter()
            .enumerate()
            .find(|(_, id)| !seen.contains_key(*id))
        {
            return Err(Error::InputMismatch {
                path: self.path.clone(),
                detail: format!(
                    "row {} has {} \"{id}\", which no row of {} has (rows are joined by {})",
                    row + 1,
                    self.column,
                    input.display(),
                    self.column
                ),
            });
        }
        Ok(())
    }

    fn take(&self, n: usize, first_row: usize, ids: Option<&[String]>) -> Result<Array2<f64>> {
        let ids = ids.unwrap_or_default();
        let rows: Vec<usize> = (0..n)
            .map(|i| match ids.get(i).and_then(|id| self.index.get(id)) {
                Some(&r) => Ok(r),
                None => Err(Error::InputMismatch {
                    path: self.path.clone(),
                    detail: format!(
                        "no row has the {} of input row {}",
                        self.column,
                        first_row + i + 1
                    ),
                }),
            })
            .collect::<Result<_>>()?;
        Ok(self.values.select(Axis(0), &rows))
    }
}

/// Two rows (0-based `first`, `second`) of a file share an id.
fn duplicate_id(path: &Path, column: &str, id: &str, first: usize, second: usize) -> Error {
    Error::InputMismatch {
        path: path.to_path_buf(),
        detail: format!(
            "rows {} and {} both have {column} \"{id}\"; rows are joined by {column}, so each id must appear once",
            first + 1,
            second + 1
        ),
    }
}

/// One line on how the audit was run.
pub fn settings_line(auditor: &Auditor<'_>) -> String {
    let s = auditor.settings();
    let sampler = match auditor.sampler_choice() {
        Some(why) => format!("{why} (--sampler auto)"),
        None => format!("{} sampler", s.sampler),
    };
    format!(
        "deletion: {}; replacement: {sampler}, {} draws; {} masks{}; path: baseline {}, {} {} points; seed {}",
        auditor.deletion_fill(),
        s.draws,
        auditor.masks_per_row(),
        if auditor.masks_per_row() < s.samples {
            " (every coalition)"
        } else {
            ""
        },
        s.baseline,
        s.steps,
        s.rule,
        s.seed
    )
}

/// What the closing summary needs: every row's score, row, label and first reason.
#[derive(Default)]
struct Summary {
    all: Vec<(f64, usize, String, String)>,
    counts: [usize; 3],
    /// What the verdicts judge.
    subject: String,
}

impl Summary {
    fn add(&mut self, record: &AuditRecord) {
        let slot = match record.verdict {
            Verdict::Reliable => 0,
            Verdict::Doubtful => 1,
            Verdict::Unreliable => 2,
        };
        self.counts[slot] += 1;
        self.subject = match (record.subject.as_str(), &record.method) {
            ("supplied", Some(method)) => format!("the supplied explanations (declared {method})"),
            ("supplied", None) => "the supplied explanations (method not declared)".into(),
            (_, _) => format!("kilter's deletion recomputation ({})", auditor_fill(record)),
        };
        self.all.push((
            record.reliability,
            record.row,
            row_label(record.row, record.id.as_deref()),
            record.reasons.first().cloned().unwrap_or_default(),
        ));
    }

    fn print(&self, auditor: &Auditor<'_>) {
        let mut stderr = std::io::stderr().lock();
        let _ = writeln!(
            stderr,
            "audited {} rows over {} groups: {} reliable, {} doubtful, {} unreliable",
            self.all.len(),
            auditor.groups().len(),
            self.counts[0],
            self.counts[1],
            self.counts[2]
        );
        let _ = writeln!(stderr, "  judged: {}", self.subject);
        let _ = writeln!(stderr, "  {}", settings_line(auditor));
        let mut worst: Vec<&(f64, usize, String, String)> = self.all.iter().collect();
        worst.sort_by(|a, b| a.0.total_cmp(&b.0).then(a.1.cmp(&b.1)));
        let shown: Vec<_> = worst.into_iter().filter(|w| w.0 < 0.7).take(3).collect();
        if !shown.is_empty() {
            let _ = writeln!(stderr, "  lowest reliability:");
            for (score, _, label, reason) in shown {
                let score = kilter::audit::reliability::score_text(*score);
                let _ = writeln!(stderr, "    {label}: {score}  {reason}");
            }
        }
        let _ = writeln!(stderr, "  {}", kilter::report::CAUTION);
    }
}

/// The deletion fill a record's verdict judges.
fn auditor_fill(record: &AuditRecord) -> String {
    format!("fill {}", record.families.deletion.fill)
}
