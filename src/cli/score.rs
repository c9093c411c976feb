//! `kilter score`: one record of off-manifold scores per input row.

use std::io::{self, Write};

use ndarray::{s, Axis};

use kilter::corpus::read_matrix;
use kilter::output::{check_output_path, write_atomically, RecordFormat, RecordWriter};
use kilter::profile::{validate_alpha, Profile};
use kilter::{Error, Result};

use super::args::ScoreArgs;
use super::fit::csv_options;
use super::Context;

/// Rows scored per batch: bounds the intermediate distance and neighbour arrays.
const CHUNK_ROWS: usize = 8192;

pub fn run(args: ScoreArgs, _context: &Context) -> Result<()> {
    validate_alpha(args.alpha)?;
    let format = match &args.out {
        Some(out) => {
            check_output_path(out, &[&args.profile, &args.input])?;
            RecordFormat::for_path(out)?
        }
        None => RecordFormat::JsonLines,
    };
    let profile = Profile::load(&args.profile)?;
    let input = read_matrix(&args.input, &csv_options(&args.columns))?;
    profile.check_input(&input)?;

    let write_all = |out: &mut dyn Write| -> Result<io::Result<()>> {
        let mut writer = RecordWriter::new(out, format);
        for (c, chunk) in input
            .values
            .axis_chunks_iter(Axis(0), CHUNK_ROWS)
            .enumerate()
        {
            let records = profile.score(chunk.slice(s![.., ..]), c * CHUNK_ROWS, args.alpha)?;
            for record in &records {
                if let Err(e) = writer.write(record) {
                    return Ok(Err(e));
                }
            }
        }
        Ok(writer.finish().map(|_| ()))
    };

    match &args.out {
        None => {
            let stdout = io::stdout();
            let mut lock = io::BufWriter::new(stdout.lock());
            write_all(&mut lock)?.map_err(|e| Error::io("<stdout>", e))
        }
        Some(out) => {
            let mut failure = None;
            write_atomically(out, |w| match write_all(w) {
                Ok(result) => result,
                Err(e) => {
                    failure = Some(e);
                    Err(io::Error::other("scoring failed"))
                }
            })
            .map_err(|e| failure.take().unwrap_or(e))
        }
    }
}
