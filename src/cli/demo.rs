//! `kilter demo`: the whole job on kilter's invented scenario, offline, from a fresh clone.
//!
//! A water utility (invented) ranks pipe segments for inspection with a small network
//! trained on an invented failure history. kilter fits a profile to the reference
//! segments, audits the explanations of sixteen new segments and ranks the baselines of
//! their paths: eight typical segments, and eight from unusually high or low pressure
//! zones, where filling one pressure reading with the network's average fakes a pressure
//! drop no real segment has. A second, small case audits a digit classifier on the open
//! 8 x 8 digits corpus with 2 x 2 patch groups. Everything goes into the demo directory,
//! with one HTML report.

use std::io::Write as _;
use std::path::Path;

use ndarray::{concatenate, Array2, Axis};

use kilter::audit::{AuditRecord, AuditSettings, Auditor, BaselineRecord, Sampler, Verdict};
use kilter::baselines::{default_candidates, BaselineChoice, ImageShape};
use kilter::corpus::{read_matrix, CsvOptions};
use kilter::groups::Groups;
use kilter::models::network::{ModelFile, NetworkModel};
use kilter::output::{write_atomically, RecordFormat, RecordWriter};
use kilter::perturbation::FillValue;
use kilter::profile::{Profile, ProfileSettings};
use kilter::report::{AuditSection, BaselineSection, Report};
use kilter::scenario::{
    failure_history, pipe_segments, pipe_segments_in_zone, train_network, FaultFallback, FEATURES,
    HEAD_MEAN, HEAD_SD,
};
use kilter::{Error, Result};

use super::args::DemoArgs;
use super::audit::settings_line;
use super::Context;

const HISTORY_ROWS: usize = 3000;
const TYPICAL: usize = 8;
const PER_ZONE: usize = 4;
/// Zone heads this many network spreads above and below the mean.
const ZONE_OFFSET: f64 = 2.6;
/// The open digits corpus, kept inside the binary so the demo runs from anywhere.
const DIGITS_CSV: &str = include_str!("../../reference-corpora/digits_8x8.csv");
const DIGIT_QUERIES: usize = 4;

/// The demo's segment ids: what each new segment was built to be.
fn segment_ids() -> Vec<String> {
    let mut ids: Vec<String> = (1..=TYPICAL).map(|i| format!("typical-{i:02}")).collect();
    ids.extend((1..=PER_ZONE).map(|i| format!("high-zone-{i:02}")));
    ids.extend((1..=PER_ZONE).map(|i| format!("low-zone-{i:02}")));
    ids
}

/// Whether a demo segment comes from an unusually high or low pressure zone, where
/// mean-filling one pressure fakes a pressure drop no real segment has.
pub fn in_unusual_zone(id: &str) -> bool {
    id.contains("zone")
}

pub fn run(args: DemoArgs, context: &Context) -> Result<()> {
    let dir = &args.out;
    std::fs::create_dir_all(dir).map_err(|e| Error::io(dir, e))?;
    let started = std::time::Instant::now();

    // The invented history, its failures, and the network trained on them.
    let history = pipe_segments(HISTORY_ROWS, 1);
    let failed = failure_history(&history, 11);
    let network = train_network(&history, &failed, 5, "invented pipe-failure risk network");
    let network_path = dir.join("pipe_risk_network.json");
    save_model(&network_path, &network)?;
    let model = NetworkModel::load(&network_path)?;

    // New segments: the typical ones are the pool's closest to the network's average.
    let mean = history.mean_axis(Axis(0)).expect("rows");
    let sd = history.std_axis(Axis(0), 0.0);
    let pool = pipe_segments(2000, 2);
    let mut order: Vec<usize> = (0..pool.nrows()).collect();
    let distance = |r: usize| ((&pool.row(r) - &mean) / &sd).mapv(|v| v * v).sum();
    order.sort_by(|&a, &b| distance(a).total_cmp(&distance(b)));
    let typical = pool.select(Axis(0), &order[..TYPICAL]);
    let high = pipe_segments_in_zone(PER_ZONE, 3, HEAD_MEAN + ZONE_OFFSET * HEAD_SD);
    let low = pipe_segments_in_zone(PER_ZONE, 4, HEAD_MEAN - ZONE_OFFSET * HEAD_SD);
    let segments = concatenate![Axis(0), typical, high, low];
    let ids = segment_ids();
    let history_ids: Vec<String> = (0..HISTORY_ROWS).map(|i| format!("ref-{i:05}")).collect();
    write_table(&dir.join("reference.csv"), &history, &history_ids)?;
    write_table(&dir.join("segments.csv"), &segments, &ids)?;

    let columns = CsvOptions {
        id_columns: vec!["segment_id".into()],
        label_columns: vec![],
    };
    let reference = read_matrix(&dir.join("reference.csv"), &columns)?;
    let new = read_matrix(&dir.join("segments.csv"), &columns)?;
    let profile_path = dir.join("pipes.kprofile");
    ProfileSettings::default()
        .fit(&reference)?
        .save(&profile_path)?;
    let profile = Profile::load(&profile_path)?;
    profile.check_input(new.header())?;

    let groups = Groups::singletons(profile.feature_names());
    let settings = AuditSettings {
        fill: FillValue::Typical,
        target: Some(1),
        ..AuditSettings::default()
    };
    let auditor = Auditor::new(&profile, &model, groups.clone(), settings.clone())?;
    let audits: Vec<AuditRecord> = (0..new.rows())
        .map(|r| {
            let record = auditor.audit_row(r, new.values.row(r), None)?;
            Ok(AuditRecord {
                id: Some(ids[r].clone()),
                ..record
            })
        })
        .collect::<Result<_>>()?;
    write_records(&dir.join("pipe-audit.jsonl"), &audits)?;
    // The vendor's copy: the same network behind a sensor-fault fallback that no real
    // segment triggers (checked on the reference rows).
    let vendor = FaultFallback {
        network: NetworkModel::load(&network_path)?,
        pivot_temperature: mean[8],
    };
    let faults = (0..reference.rows())
        .filter(|&r| FaultFallback::<NetworkModel>::is_fault(reference.values.row(r)))
        .count();
    let vendor_auditor = Auditor::new(&profile, &vendor, groups.clone(), settings)?;
    let vendor_audits: Vec<AuditRecord> = (0..new.rows())
        .map(|r| {
            let record = vendor_auditor.audit_row(r, new.values.row(r), None)?;
            Ok(AuditRecord {
                id: Some(ids[r].clone()),
                ..record
            })
        })
        .collect::<Result<_>>()?;
    write_records(&dir.join("pipe-audit-vendor.jsonl"), &vendor_audits)?;
    let candidates = default_candidates(false);
    let baselines: Vec<BaselineRecord> = (0..new.rows())
        .map(|r| {
            let record = auditor.baseline_row(r, new.values.row(r), &candidates)?;
            Ok(BaselineRecord {
                id: Some(ids[r].clone()),
                ..record
            })
        })
        .collect::<Result<_>>()?;
    write_records(&dir.join("pipe-baselines.jsonl"), &baselines)?;

    // The image case: is this digit a 3? Patches of 2 x 2 pixels.
    let digits_path = dir.join("digits.csv");
    write_atomically(&digits_path, |w| w.write_all(DIGITS_CSV.as_bytes()))?;
    let digit_columns = CsvOptions {
        id_columns: vec![],
        label_columns: vec!["digit".into()],
    };
    let digits = read_matrix(&digits_path, &digit_columns)?;
    let labels = digit_labels(DIGITS_CSV);
    let is_three: Vec<f64> = labels
        .iter()
        .map(|&d| f64::from(u8::from(d == 3)))
        .collect();
    let digit_network = train_network(
        &digits.values,
        &is_three,
        7,
        "invented is-it-a-3 classifier",
    );
    let digit_model_path = dir.join("digit_three_network.json");
    save_model(&digit_model_path, &digit_network)?;
    let digit_model = NetworkModel::load(&digit_model_path)?;
    let digit_profile = ProfileSettings {
        embed: kilter::embedding::EmbeddingSpec::None,
        holdout: 0.0,
        ..ProfileSettings::default()
    }
    .fit(&digits)?;
    let digit_profile_path = dir.join("digits.kprofile");
    digit_profile.save(&digit_profile_path)?;
    let shape = ImageShape {
        height: 8,
        width: 8,
        channels: 1,
    };
    let digit_groups = Groups::image_patches(8, 8, 1, 2, 64)?;
    let picks: Vec<usize> = (0..labels.len())
        .filter(|&i| labels[i] == 3)
        .take(DIGIT_QUERIES / 2)
        .chain(
            (0..labels.len())
                .filter(|&i| labels[i] == 8)
                .take(DIGIT_QUERIES / 2),
        )
        .collect();
    let digit_inputs = digits.values.select(Axis(0), &picks);
    let digit_settings = AuditSettings {
        samples: 512,
        sampler: Sampler::Neighbours,
        target: Some(1),
        image: Some(shape),
        baseline: BaselineChoice::Best(default_candidates(true)),
        ..AuditSettings::default()
    };
    let digit_auditor = Auditor::new(
        &digit_profile,
        &digit_model,
        digit_groups.clone(),
        digit_settings,
    )?;
    let digit_audits: Vec<AuditRecord> = (0..digit_inputs.nrows())
        .map(|r| digit_auditor.audit_row(r, digit_inputs.row(r), None))
        .collect::<Result<_>>()?;
    write_records(&dir.join("digit-audit.jsonl"), &digit_audits)?;

    let digit_ids: Vec<String> = picks
        .iter()
        .map(|&i| format!("digit {} (corpus row {})", labels[i], i + 1))
        .collect();
    let mut report = Report::new("kilter demo: pipe segments and digits");
    report
        .audit(&AuditSection {
            title: "Pipe segments: explanations of the inspection-risk network".into(),
            settings: settings_line(&auditor),
            groups: &groups,
            records: &audits,
            labels: Some(&ids),
            image: None,
        })
        .audit(&AuditSection {
            title: "Pipe segments: the vendor's copy with a sensor-fault fallback".into(),
            settings: settings_line(&vendor_auditor),
            groups: &groups,
            records: &vendor_audits,
            labels: Some(&ids),
            image: None,
        })
        .baselines(&BaselineSection {
            title: "Pipe segments: baselines for integrated gradients".into(),
            settings: format!("{} candidates", candidates.len()),
            records: &baselines,
            labels: Some(&ids),
        })
        .audit(&AuditSection {
            title: "Digits: is this a 3? (open 8 x 8 digits corpus, 2 x 2 patches)".into(),
            settings: settings_line(&digit_auditor),
            groups: &digit_groups,
            records: &digit_audits,
            labels: Some(&digit_ids),
            image: Some((shape, &digit_inputs)),
        });
    let report_path = dir.join("report.html");
    super::write_report(&report_path, &report.finish())?;

    print_summary(
        dir,
        &ids,
        (&audits, &vendor_audits, faults),
        &digit_ids,
        &digit_audits,
        &report_path,
        started,
    );
    let _ = context;
    Ok(())
}

fn print_summary(
    dir: &Path,
    ids: &[String],
    (audits, vendor_audits, faults): (&[AuditRecord], &[AuditRecord], usize),
    digit_ids: &[String],
    digit_audits: &[AuditRecord],
    report: &Path,
    started: std::time::Instant,
) {
    println!("kilter demo: an invented water utility ranks pipe segments for inspection");
    println!();
    println!(
        "The network was trained on {HISTORY_ROWS} invented segments. Each new segment's \
         explanation was computed three ways: deletion (masked readings set to a typical value: \
         the average reading, the median count of repairs), replacement (masked readings drawn from the data given the others) and \
         integrated gradients; the verdict judges deletion. Segments from unusually high or \
         low pressure zones were built so that filling one pressure with the average fakes a \
         pressure drop no real segment has: the masked inputs leave the data, but the network is \
         the same function there, and for most of them the story its explanation tells is the \
         one it tells on real segments."
    );
    println!();
    table(ids, audits);
    println!();
    println!(
        "The vendor's copy: the same network behind a sensor-fault fallback (pressures that \
         contradict the flow make it answer from a seasonal rule on water temperature alone; {faults} of the \
         {HISTORY_ROWS} real segments trigger it). Filling a pressure with the average \
         triggers it, so deletion credits water temperature, which the network hardly uses on \
         real segments:"
    );
    table(ids, vendor_audits);
    println!();
    println!("Digits (open 8 x 8 corpus), is this a 3?, 2 x 2 patches, deletion to black:");
    table(digit_ids, digit_audits);
    println!();
    let count = |records: &[AuditRecord], mislead: bool, v: Verdict| {
        records
            .iter()
            .zip(ids)
            .filter(|(r, id)| in_unusual_zone(id) == mislead && r.verdict == v)
            .count()
    };
    println!(
        "typical segments: {} reliable of {TYPICAL}; zone segments: network {} reliable, {} \
         unreliable of {}; vendor's copy {} reliable, {} unreliable of {}",
        count(audits, false, Verdict::Reliable),
        count(audits, true, Verdict::Reliable),
        count(audits, true, Verdict::Unreliable),
        2 * PER_ZONE,
        count(vendor_audits, true, Verdict::Reliable),
        count(vendor_audits, true, Verdict::Unreliable),
        2 * PER_ZONE
    );
    println!("report: {}", report.display());
    println!(
        "files in {}: reference.csv, segments.csv, pipe_risk_network.json, pipes.kprofile, \
         pipe-audit.jsonl, pipe-audit-vendor.jsonl, pipe-baselines.jsonl, digits.csv, digit_three_network.json, \
         digits.kprofile, digit-audit.jsonl, report.html",
        dir.display()
    );
    println!("done in {:.1} s", started.elapsed().as_secs_f64());
    println!();
    println!("Caution: {}", kilter::report::CAUTION);
}

fn table(ids: &[String], records: &[AuditRecord]) {
    println!(
        "  {:<28} {:>10} {:>11}  {:<10}  main finding (full reasons in the report)",
        "input", "prediction", "reliability", "verdict"
    );
    for (r, id) in records.iter().zip(ids) {
        let finding = match r.findings.first() {
            None => "nothing to report".to_string(),
            Some(f) => format!("{}: {}", f.severity.as_str(), f.title),
        };
        println!(
            "  {:<28} {:>10.3} {:>11}  {:<10}  {finding}",
            id,
            r.prediction,
            kilter::audit::reliability::score_text(r.reliability),
            r.verdict.as_str(),
        );
    }
}

fn digit_labels(csv: &str) -> Vec<u8> {
    csv.lines()
        .skip(1)
        .filter_map(|l| l.rsplit(',').next().and_then(|v| v.trim().parse().ok()))
        .collect()
}

fn save_model(path: &Path, model: &ModelFile) -> Result<()> {
    let text = serde_json::to_string_pretty(model)
        .map_err(|e| Error::io(path, std::io::Error::other(e)))?;
    write_atomically(path, |w| w.write_all(text.as_bytes()))
}

fn write_records<T: serde::Serialize>(path: &Path, records: &[T]) -> Result<()> {
    write_atomically(path, |w| {
        let mut writer = RecordWriter::new(w, RecordFormat::JsonLines);
        for record in records {
            writer.write(record)?;
        }
        writer.finish().map(|_| ())
    })
}

fn write_table(path: &Path, values: &Array2<f64>, ids: &[String]) -> Result<()> {
    write_atomically(path, |w| {
        write!(w, "segment_id")?;
        for name in FEATURES {
            write!(w, ",{name}")?;
        }
        writeln!(w)?;
        for (row, id) in values.outer_iter().zip(ids) {
            write!(w, "{id}")?;
            for v in row {
                write!(w, ",{v}")?;
            }
            writeln!(w)?;
        }
        Ok(())
    })
}
