//! `kilter score`: one record of off-manifold scores per input row.

use ndarray::Axis;

use kilter::corpus::read_matrix;
use kilter::profile::{validate_alpha, Profile};
use kilter::Result;

use super::args::ScoreArgs;
use super::fit::csv_options;
use super::{record_io, Context, RecordDestination};

/// Rows scored per batch: bounds the intermediate distance and neighbour arrays.
const CHUNK_ROWS: usize = 8192;

pub fn run(args: ScoreArgs, _context: &Context) -> Result<()> {
    validate_alpha(args.alpha)?;
    let destination = RecordDestination::new(args.out.as_deref(), &[&args.profile, &args.input])?;
    let profile = Profile::load(&args.profile)?;
    let input = read_matrix(&args.input, &csv_options(&args.columns))?;
    profile.check_input(&input)?;
    destination.write(|writer| {
        for (c, chunk) in input
            .values
            .axis_chunks_iter(Axis(0), CHUNK_ROWS)
            .enumerate()
        {
            for record in profile.score(chunk, c * CHUNK_ROWS, args.alpha)? {
                writer.write(&record).map_err(record_io)?;
            }
        }
        Ok(())
    })
}
