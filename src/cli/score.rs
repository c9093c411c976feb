//! `kilter score`: one record of off-manifold scores per input row.

use ndarray::Axis;

use kilter::corpus::MatrixChunks;
use kilter::profile::{validate_alpha, Profile, ProfileScope};
use kilter::Result;

use super::args::ScoreArgs;
use super::fit::csv_options;
use super::{record_io, Context, RecordDestination};

/// Rows scored per batch: bounds the intermediate distance and neighbour arrays.
const CHUNK_ROWS: usize = 8192;

pub fn run(args: ScoreArgs, _context: &Context) -> Result<()> {
    validate_alpha(args.alpha)?;
    let destination = RecordDestination::new(args.out.as_deref(), &[&args.profile, &args.input])?;
    let profile = Profile::load_scoped(&args.profile, ProfileScope::Scoring)?;
    let mut input = MatrixChunks::open(&args.input, &csv_options(&args.columns))?;
    profile.check_input(input.header())?;
    // Records go out as each block of the input is scored, so memory holds the profile
    // and one block, whatever the input's length.
    destination.write(|writer| {
        while let Some(block) = input.next_chunk()? {
            let first_row = input.rows_done() - block.nrows();
            for (c, chunk) in block.axis_chunks_iter(Axis(0), CHUNK_ROWS).enumerate() {
                for record in profile.score(chunk, first_row + c * CHUNK_ROWS, args.alpha)? {
                    writer.write(&record).map_err(record_io)?;
                }
            }
        }
        Ok(())
    })
}
