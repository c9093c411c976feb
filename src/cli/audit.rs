//! `kilter audit`: for every input row, the attribution three ways, how far each family's
//! inputs fall from the data, their agreement, and a reliability score with reasons.

use std::io::Write;

use ndarray::{concatenate, s, Array2, Axis};
use rayon::prelude::*;

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
use super::{check_report_path, write_report, Context, RecordDestination};
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

    let profile = Profile::load(&args.profile)?;
    let options = csv_options(&args.columns);
    let mut input = MatrixChunks::open(&args.input, &options)?;
    profile.check_input(input.header())?;
    let supplied_columns = match &args.explanations {
        Some(path) => Some(MatrixChunks::open(path, &options)?.columns()),
        None => None,
    };
    let groups = groups_for(
        a.groups.as_deref(),
        image,
        a.patch,
        &profile,
        supplied_columns,
    )?;
    let mut supplied = match &args.explanations {
        None => None,
        Some(path) => Some(SuppliedRows::open(path, &options, groups.len())?),
    };
    let model = load_model(&source, input.columns())?;
    let auditor = Auditor::new(&profile, model.as_ref(), groups, settings)?;

    let mut summary = Summary::default();
    // The report draws images of the audited rows, so it keeps them.
    let mut kept_inputs: Vec<f64> = Vec::new();
    let mut emitter = context.emitter(input.rows_hint(), "auditing", args.report.is_some());
    destination.write(|writer| {
        while let Some(block) = input.next_chunk()? {
            let first_row = input.rows_done() - block.nrows();
            let own = match supplied.as_mut() {
                Some(s) => Some(s.take(block.nrows(), first_row)?),
                None => None,
            };
            if args.report.is_some() && image.is_some() {
                kept_inputs.extend(block.iter());
            }
            in_waves(
                block.nrows(),
                |i| {
                    let own = own.as_ref().map(|o| o.row(i).to_vec());
                    auditor.audit_row(first_row + i, block.row(i), own.as_deref())
                },
                |record: AuditRecord| {
                    summary.add(&record);
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
    if let Some(path) = &args.report {
        let width = auditor.groups().features();
        let kept_images = Array2::from_shape_vec((kept_inputs.len() / width, width), kept_inputs)
            .expect("whole rows were kept");
        let mut report = Report::new("kilter audit");
        report.audit(&AuditSection {
            title: format!("Audit of {}", args.input.display()),
            settings: settings_line(&auditor),
            groups: auditor.groups(),
            records: &kept,
            labels: None,
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
        let below: Vec<&(f64, usize, String)> = summary
            .all
            .iter()
            .filter(|(score, _, _)| *score < bar)
            .collect();
        if let Some(lowest) = below.iter().min_by(|a, b| a.0.total_cmp(&b.0)) {
            return Err(Error::BelowBar {
                count: below.len(),
                rows,
                bar,
                lowest: lowest.0,
                lowest_row: lowest.1,
            });
        }
    }
    Ok(())
}

/// Supplied explanations, read alongside the input a block at a time: one row per input
/// row, one column per group.
struct SuppliedRows {
    chunks: MatrixChunks,
    path: std::path::PathBuf,
    /// Rows read but not yet handed out.
    pending: Array2<f64>,
    groups: usize,
}

impl SuppliedRows {
    fn open(path: &std::path::Path, options: &CsvOptions, groups: usize) -> Result<Self> {
        let chunks = MatrixChunks::open(path, options)?;
        if chunks.columns() != groups {
            let rows = chunks.rows_hint().unwrap_or(0);
            check_supplied(rows, chunks.columns(), rows, groups, path)?;
        }
        Ok(SuppliedRows {
            chunks,
            path: path.to_path_buf(),
            pending: Array2::zeros((0, groups)),
            groups,
        })
    }

    /// The explanations of the `n` input rows starting at `first_row`.
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
        let taken = self.pending.slice(s![..n, ..]).to_owned();
        self.pending = self.pending.slice(s![n.., ..]).to_owned();
        Ok(taken)
    }

    /// After the last input row: no explanation rows may be left over.
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

/// What the closing summary needs: every row's score, row and first reason.
#[derive(Default)]
struct Summary {
    all: Vec<(f64, usize, String)>,
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
        let mut worst: Vec<&(f64, usize, String)> = self.all.iter().collect();
        worst.sort_by(|a, b| a.0.total_cmp(&b.0).then(a.1.cmp(&b.1)));
        let shown: Vec<_> = worst.into_iter().filter(|w| w.0 < 0.7).take(3).collect();
        if !shown.is_empty() {
            let _ = writeln!(stderr, "  lowest reliability:");
            for (score, row, reason) in shown {
                let score = kilter::audit::reliability::score_text(*score);
                let _ = writeln!(stderr, "    row {row}: {score}  {reason}");
            }
        }
        let _ = writeln!(stderr, "  {}", kilter::report::CAUTION);
    }
}

/// The deletion fill a record's verdict judges.
fn auditor_fill(record: &AuditRecord) -> String {
    format!("fill {}", record.families.deletion.fill)
}
