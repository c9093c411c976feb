//! `kilter score`: one record of off-manifold scores per input row.

use std::time::{Duration, Instant};

use ndarray::Axis;

use kilter::corpus::MatrixChunks;
use kilter::profile::{validate_alpha, Profile, ProfileScope};
use kilter::Result;

use super::args::ScoreArgs;
use super::fit::csv_options;
use super::{record_io, row_id, Context, RecordDestination};

/// Rows scored per batch: bounds the intermediate distance and neighbour arrays.
const CHUNK_ROWS: usize = 8192;

pub fn run(args: ScoreArgs, _context: &Context) -> Result<()> {
    validate_alpha(args.alpha)?;
    let destination = RecordDestination::new(args.out.as_deref(), &[&args.profile, &args.input])?;
    let started = Instant::now();
    let profile = Profile::load_scoped(&args.profile, ProfileScope::Scoring)?;
    let mut phases = Phases {
        load: started.elapsed(),
        ..Phases::default()
    };
    let mut input = MatrixChunks::open(&args.input, &csv_options(&args.columns))?.keeping_ids();
    profile.check_input(input.header())?;
    // Records go out as each block of the input is scored, so memory holds the profile
    // and one block, whatever the input's length.
    destination.write(|writer| {
        loop {
            let clock = Instant::now();
            let Some((block, ids)) = input.next_block()? else {
                break;
            };
            phases.read += clock.elapsed();
            let first_row = input.rows_done() - block.nrows();
            for (c, chunk) in block.axis_chunks_iter(Axis(0), CHUNK_ROWS).enumerate() {
                let clock = Instant::now();
                let records = profile.score(chunk, first_row + c * CHUNK_ROWS, args.alpha)?;
                phases.score += clock.elapsed();
                let clock = Instant::now();
                for (i, mut record) in records.into_iter().enumerate() {
                    record.id = row_id(ids.as_deref(), c * CHUNK_ROWS + i);
                    writer.write(&record).map_err(record_io)?;
                }
                phases.write += clock.elapsed();
            }
        }
        Ok(())
    })?;
    if args.timings {
        eprintln!(
            "timings: load {:.3} s, read {:.3} s, score {:.3} s, write {:.3} s, total {:.3} s ({} rows)",
            phases.load.as_secs_f64(),
            phases.read.as_secs_f64(),
            phases.score.as_secs_f64(),
            phases.write.as_secs_f64(),
            started.elapsed().as_secs_f64(),
            input.rows_done()
        );
    }
    Ok(())
}

/// Where a score run's time went (`--timings`).
#[derive(Default)]
struct Phases {
    load: Duration,
    read: Duration,
    score: Duration,
    write: Duration,
}
