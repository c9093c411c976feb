//! `kilter predict`: the model's outputs for every input row, to check that a model loads
//! and answers as it does elsewhere.

use ndarray::Axis;
use serde::Serialize;

use kilter::corpus::MatrixChunks;
use kilter::models::{Model, ModelSource};
use kilter::{Error, Result};

use super::args::{ModelArgs, PredictArgs};
use super::fit::csv_options;
use super::{record_io, row_id, Context, RecordDestination};

/// One record of `kilter predict`.
#[derive(Serialize)]
struct PredictRecord<'a> {
    row: usize,
    #[serde(skip_serializing_if = "Option::is_none")]
    id: Option<String>,
    outputs: &'a [f64],
}

pub fn model_source(args: &ModelArgs) -> Result<ModelSource> {
    ModelSource::from_flags(
        args.model.clone(),
        args.model_cmd.clone(),
        args.model_output.clone(),
        args.batch_size,
        args.model_timeout,
    )
}

/// Loads the model and checks its declared width against the data's.
pub fn load_model(source: &ModelSource, features: usize) -> Result<Box<dyn Model>> {
    let model = source.load()?;
    if let Some(expected) = model.input_dim() {
        if expected != features {
            return Err(Error::ModelInputWidth {
                model: model.describe(),
                expected,
                found: features,
            });
        }
    }
    Ok(model)
}

pub fn run(args: PredictArgs, _context: &Context) -> Result<()> {
    let source = model_source(&args.model)?;
    let mut inputs = source.input_paths();
    inputs.push(&args.input);
    let destination = RecordDestination::new(args.out.as_deref(), &inputs)?;
    let mut input = MatrixChunks::open(&args.input, &csv_options(&args.columns))?.keeping_ids();
    let model = load_model(&source, input.columns())?;
    let chunk_rows = model.preferred_batch().max(1024);
    destination.write(|writer| {
        while let Some((block, ids)) = input.next_block()? {
            let first_row = input.rows_done() - block.nrows();
            for (c, chunk) in block.axis_chunks_iter(Axis(0), chunk_rows).enumerate() {
                let outputs = model.predict(chunk)?;
                for (i, row) in outputs.outer_iter().enumerate() {
                    let record = PredictRecord {
                        row: first_row + c * chunk_rows + i,
                        id: row_id(ids.as_deref(), c * chunk_rows + i),
                        outputs: row.as_slice().expect("fresh outputs are contiguous"),
                    };
                    writer.write(&record).map_err(record_io)?;
                }
            }
        }
        Ok(())
    })
}
