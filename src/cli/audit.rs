//! `kilter audit`: for every input row, the attribution three ways, how far each family's
//! inputs fall from the data, their agreement, and a reliability score with reasons.

use std::io::Write;

use ndarray::Axis;
use rayon::prelude::*;

use kilter::audit::{check_supplied, AuditRecord, AuditSettings, Auditor, Verdict};
use kilter::corpus::read_matrix;
use kilter::groups::Groups;
use kilter::profile::Profile;
use kilter::{Error, Result};

use super::args::AuditArgs;
use super::fit::csv_options;
use super::predict::{load_model, model_source};
use super::{record_io, Context, RecordDestination};

/// Rows audited together: each is a few thousand model calls, so a handful per core keeps
/// every core busy while records stream out in input order.
const ROWS_PER_WAVE: usize = 16;

/// Parses `--image HxW[xC]`.
fn image_shape(text: &str) -> Result<(usize, usize, usize)> {
    let parts: Vec<Option<usize>> = text.split('x').map(|p| p.parse().ok()).collect();
    match parts.as_slice() {
        [Some(h), Some(w)] => Ok((*h, *w, 1)),
        [Some(h), Some(w), Some(c)] => Ok((*h, *w, *c)),
        _ => Err(Error::InvalidSetting {
            flag: "--image",
            value: text.to_string(),
            expected: "HxW or HxWxC, such as 8x8 or 32x32x3".into(),
        }),
    }
}

fn settings(args: &AuditArgs) -> Result<AuditSettings> {
    let settings = AuditSettings {
        samples: args.samples,
        draws: args.draws,
        steps: args.steps,
        rule: args.rule.parse()?,
        fill: args.fill.parse()?,
        sampler: args.sampler.parse()?,
        baseline: args.baseline.parse()?,
        target: args.target,
        seed: args.seed,
        alpha: args.alpha,
        top_k: args.top_k,
    };
    settings.validate()?;
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
    let settings = settings(&args)?;
    let image = args.image.as_deref().map(image_shape).transpose()?;
    let source = model_source(&args.model)?;
    let mut inputs = source.input_paths();
    inputs.push(&args.profile);
    inputs.push(&args.input);
    if let Some(p) = &args.explanations {
        inputs.push(p);
    }
    if let Some(p) = &args.groups {
        inputs.push(p);
    }
    let destination = RecordDestination::new(args.out.as_deref(), &inputs)?;

    let profile = Profile::load(&args.profile)?;
    let options = csv_options(&args.columns);
    let input = read_matrix(&args.input, &options)?;
    profile.check_input(&input)?;
    let names = profile.feature_names();
    let groups = match (&args.groups, image) {
        (Some(path), _) => Groups::from_json_file(path, names)?,
        (None, Some((h, w, c))) => {
            Groups::image_patches(h, w, c, args.patch.unwrap_or(1), names.len())?
        }
        (None, None) => Groups::singletons(names),
    };
    let supplied = match &args.explanations {
        None => None,
        Some(path) => {
            let m = read_matrix(path, &options)?;
            check_supplied(&m.values, input.rows(), groups.len(), path)?;
            Some(m.values)
        }
    };
    let model = load_model(&source, input.columns())?;
    let auditor = Auditor::new(&profile, model.as_ref(), groups, settings)?;

    let rows = input.rows();
    let mut summary = Summary::default();
    destination.write(|writer| {
        let wave = ROWS_PER_WAVE.max(2 * rayon::current_num_threads());
        for start in (0..rows).step_by(wave) {
            let end = (start + wave).min(rows);
            let records: Vec<Result<AuditRecord>> = (start..end)
                .into_par_iter()
                .map(|r| {
                    let own = supplied.as_ref().map(|s| s.row(r).to_vec());
                    auditor.audit_row(r, input.values.index_axis(Axis(0), r), own.as_deref())
                })
                .collect();
            for record in records {
                let record = record?;
                summary.add(&record);
                writer.write(&record).map_err(record_io)?;
            }
        }
        Ok(())
    })?;
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

/// What the closing summary needs: every row's score, row and first reason.
#[derive(Default)]
struct Summary {
    all: Vec<(f64, usize, String)>,
    counts: [usize; 3],
}

impl Summary {
    fn add(&mut self, record: &AuditRecord) {
        let slot = match record.verdict {
            Verdict::Reliable => 0,
            Verdict::Doubtful => 1,
            Verdict::Unreliable => 2,
        };
        self.counts[slot] += 1;
        self.all.push((
            record.reliability,
            record.row,
            record.reasons.first().cloned().unwrap_or_default(),
        ));
    }

    fn print(&self, auditor: &Auditor<'_>) {
        let mut stderr = std::io::stderr().lock();
        let s = auditor.settings();
        let _ = writeln!(
            stderr,
            "audited {} rows over {} groups: {} reliable, {} doubtful, {} unreliable",
            self.all.len(),
            auditor.groups().len(),
            self.counts[0],
            self.counts[1],
            self.counts[2]
        );
        let _ = writeln!(
            stderr,
            "  deletion: {}; replacement: {} sampler, {} draws; {} masks; path: {} baseline, {} {} points; seed {}",
            auditor.deletion_fill(),
            s.sampler,
            s.draws,
            s.samples,
            s.baseline,
            s.steps,
            s.rule,
            s.seed
        );
        let mut worst: Vec<&(f64, usize, String)> = self.all.iter().collect();
        worst.sort_by(|a, b| a.0.total_cmp(&b.0).then(a.1.cmp(&b.1)));
        let shown: Vec<_> = worst.into_iter().filter(|w| w.0 < 0.7).take(3).collect();
        if !shown.is_empty() {
            let _ = writeln!(stderr, "  lowest reliability:");
            for (score, row, reason) in shown {
                let _ = writeln!(stderr, "    row {row}: {score:.2}  {reason}");
            }
        }
        let _ = writeln!(
            stderr,
            "  a reliability score is a diagnostic, not a guarantee; decisions about people \
             defer to the applicable regulations and your organisation's model-risk practice"
        );
    }
}
