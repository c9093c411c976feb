//! `kilter baseline`: every baseline candidate of the interpolation family ranked for each
//! input row, with a summary of which wins how often.

use std::collections::BTreeMap;
use std::io::Write;

use kilter::audit::{Auditor, BaselineRecord};
use kilter::baselines::{parse_candidates, BaselineChoice};
use kilter::corpus::MatrixChunks;
use kilter::perturbation::FillValue;
use kilter::profile::Profile;
use kilter::Result;

use super::args::BaselineArgs;
use super::audit::{attribution_settings, groups_for, image_shape, in_waves, record_labels};
use super::fit::csv_options;
use super::predict::{load_model, model_source};
use super::{check_report_path, row_id, write_report, Context, RecordDestination};
use kilter::report::{BaselineSection, Report};

pub fn run(args: BaselineArgs, context: &Context) -> Result<()> {
    let a = &args.attribution;
    let image = a.image.as_deref().map(image_shape).transpose()?;
    let candidates = parse_candidates(&args.candidates, image.is_some())?;
    let settings = attribution_settings(
        a,
        image,
        BaselineChoice::Best(candidates.clone()),
        FillValue::Zero,
    )?;
    let source = model_source(&args.model)?;
    let mut inputs = source.input_paths();
    inputs.push(&args.profile);
    inputs.push(&args.input);
    if let Some(p) = &a.groups {
        inputs.push(p);
    }
    let destination = RecordDestination::new(args.out.as_deref(), &inputs)?;
    check_report_path(args.report.as_deref(), &inputs, args.out.as_deref())?;

    let profile = Profile::load(&args.profile)?;
    let mut input = MatrixChunks::open(&args.input, &csv_options(&args.columns))?.keeping_ids();
    profile.check_input(input.header())?;
    let groups = groups_for(a.groups.as_deref(), image, a.patch, &profile, None)?;
    let model = load_model(&source, input.columns())?;
    let auditor = Auditor::new(&profile, model.as_ref(), groups, settings)?;

    let mut wins: BTreeMap<String, usize> = BTreeMap::new();
    let mut rows = 0;
    let mut emitter = context.emitter(
        input.rows_hint(),
        "ranking baselines",
        args.report.is_some(),
    );
    destination.write(|writer| {
        while let Some((block, ids)) = input.next_block()? {
            let first_row = input.rows_done() - block.nrows();
            in_waves(
                block.nrows(),
                |i| {
                    let mut record =
                        auditor.baseline_row(first_row + i, block.row(i), &candidates)?;
                    record.id = row_id(ids.as_deref(), i);
                    Ok(record)
                },
                |record: BaselineRecord| {
                    *wins.entry(record.recommended.clone()).or_default() += 1;
                    rows += 1;
                    emitter.emit(writer, record)
                },
            )?;
        }
        Ok(())
    })?;
    let kept = emitter.finish();
    if let Some(path) = &args.report {
        let labels = record_labels(kept.iter().map(|r| r.id.as_deref()));
        let mut report = Report::new("kilter baseline");
        report.baselines(&BaselineSection {
            title: format!("Baselines for {}", args.input.display()),
            settings: format!(
                "{} candidates; {} {} points; replacement: {} sampler, {} draws, {} masks; seed {}",
                candidates.len(),
                a.steps,
                a.rule,
                a.sampler,
                a.draws,
                a.samples,
                a.seed
            ),
            records: &kept,
            labels: labels.as_deref(),
        });
        write_report(path, &report.finish())?;
        if !context.quiet {
            eprintln!("report written to {}", path.display());
        }
    }
    if !context.quiet {
        let mut stderr = std::io::stderr().lock();
        let mut order: Vec<(&String, &usize)> = wins.iter().collect();
        order.sort_by(|x, y| y.1.cmp(x.1).then(x.0.cmp(y.0)));
        let listed: Vec<String> = order
            .iter()
            .map(|(name, n)| format!("{name} {n}"))
            .collect();
        let _ = writeln!(
            stderr,
            "ranked {} candidates on {rows} rows; recommended: {}",
            candidates.len(),
            listed.join(", ")
        );
        let _ = writeln!(stderr, "  {}", kilter::report::CAUTION);
    }
    Ok(())
}
