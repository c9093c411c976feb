//! ONNX models run in-process with tract.
//!
//! What loads:
//!
//! - **Input**: exactly one tensor input (initializers excepted) of shape `[batch, d]` with
//!   a fixed width `d`, of type `float` (kilter converts its double-precision rows) or
//!   `double` (fed as they are). The batch dimension may be symbolic (`None`, `"N"`) or a
//!   fixed number `N`: then rows run in chunks of exactly `N`, the last chunk padded with
//!   copies of its last row and the padding's answers dropped.
//! - **Output**: the first floating-point graph output (`float`, `double`, `float16`),
//!   `[batch, c]` or `[batch]` (c = 1); trailing dimensions beyond the second are flattened
//!   row by row. `--model-output NAME` picks another graph output, or any intermediate
//!   value of the graph by name (a hidden layer as an embedding, say). Only the nodes the
//!   chosen output depends on run.
//! - **Operators**: those tract implements, including the ONNX-ML `LinearClassifier`,
//!   `LinearRegressor`, `Normalizer` and `TreeEnsembleClassifier`, plus two that kilter
//!   registers itself on tract's kernels: `Scaler` (what scikit-learn's scalers export to)
//!   and `TreeEnsembleRegressor` (sum or average aggregation). Operators the runtime lacks
//!   are refused before any work with [`Error::OnnxOperator`], naming them, with advice for
//!   the common cases (`ZipMap`: export without it).
//!
//! Rows are split into chunks (the fixed batch; otherwise an eighth of the call, between
//! 64 and 512 rows) that run in parallel with rayon on the one optimized plan, which is
//! shared across threads; each thread runs it on a state of its own, kept between chunks.
//! The split depends on the call alone, never on the number of threads: the runtime's
//! vector kernels may round a row differently by its place in a chunk, and records must
//! not change with the threads.
//! ONNX models give no gradients here; callers use finite differences, with the step set
//! by [`Model::precision`]: the epsilon of the least precise floating-point type anywhere in
//! the optimized graph (single precision for a float graph, and for every tree ensemble,
//! which compares in single precision).

use std::cell::Cell;
use std::collections::{HashMap, HashSet};
use std::panic::{catch_unwind, AssertUnwindSafe};
use std::path::Path;
use std::sync::Once;
use std::sync::{Arc, Mutex};

use ndarray::{Array2, ArrayView2, Axis};
use rayon::prelude::*;
use tract_onnx::pb;
use tract_onnx::prelude::{
    tvec, DatumType, Framework, InferenceFact, InferenceModelExt, IntoRunnable, TDim, TValue, TVec,
    Tensor, ToDim, TractResult, TypedRunnableModel, TypedSimpleState,
};
use tract_onnx::Onnx;

use super::{check_outputs, Model};
use crate::error::{Error, Result};

/// Rows per run when the batch dimension is free.
const CHUNK_ROWS: usize = 512;
/// Smallest chunk worth a run of its own when spreading a call across cores.
const MIN_CHUNK_ROWS: usize = 64;
/// Chunks a large call is split into, whatever the number of threads (enough to keep
/// eight cores busy).
const SHARES: usize = 8;

/// ONNX element types (`TensorProto.DataType`).
const ONNX_FLOAT: i32 = 1;
const ONNX_FLOAT16: i32 = 10;
const ONNX_DOUBLE: i32 = 11;
const ONNX_BFLOAT16: i32 = 16;

/// The element type kilter feeds the input.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum InputType {
    F32,
    F64,
}

/// A loaded ONNX model, optimized and ready to run.
#[derive(Debug)]
pub struct OnnxModel {
    name: String,
    plan: Arc<TypedRunnableModel>,
    /// Idle run states (tract's sessions), at most one per thread that ran the model at
    /// once: a state keeps its buffers between chunks instead of allocating them anew.
    states: Mutex<Vec<TypedSimpleState>>,
    inputs: usize,
    input_type: InputType,
    /// `Some(N)` when the model's batch dimension is fixed.
    fixed_batch: Option<usize>,
    output: String,
    /// Values per row of the output, found by a trial run at load.
    outputs: usize,
    precision: f64,
}

/// One graph output as declared.
struct DeclaredOutput {
    name: String,
    /// `None` when the output is not a tensor (a sequence or a map).
    elem_type: Option<i32>,
}

impl DeclaredOutput {
    fn is_float(&self) -> bool {
        matches!(
            self.elem_type,
            Some(ONNX_FLOAT | ONNX_DOUBLE | ONNX_FLOAT16 | ONNX_BFLOAT16)
        )
    }

    fn describe(&self) -> String {
        format!("{} ({})", self.name, type_name(self.elem_type))
    }
}

impl OnnxModel {
    /// Reads, checks and optimizes an ONNX model; `output` names the output to answer with
    /// (`--model-output`), by default the first floating-point graph output.
    pub fn load(path: &Path, output: Option<&str>) -> Result<OnnxModel> {
        let bytes = std::fs::read(path).map_err(|e| Error::io(path, e))?;
        // tract has internal assertions that some malformed graphs reach (a weight matrix
        // of the wrong size, say); such a panic becomes a typed error.
        match guarded(|| load_bytes(path, &bytes, output)) {
            Ok(result) => result,
            Err(panic) => Err(Error::ModelFile {
                path: path.to_path_buf(),
                detail: format!(
                    "the ONNX runtime failed while reading the model: {}",
                    panic_message(&panic)
                ),
            }),
        }
    }

    /// Builds a model from ONNX bytes held in memory (an encoder kept inside a profile);
    /// `origin` names it in errors.
    pub fn from_bytes(origin: &Path, bytes: &[u8], output: Option<&str>) -> Result<OnnxModel> {
        match guarded(|| load_bytes(origin, bytes, output)) {
            Ok(result) => result,
            Err(panic) => Err(Error::ModelFile {
                path: origin.to_path_buf(),
                detail: format!(
                    "the ONNX runtime failed while reading the model: {}",
                    panic_message(&panic)
                ),
            }),
        }
    }

    /// The name of the output the model answers with.
    pub fn output_name(&self) -> &str {
        &self.output
    }

    /// Values per row of the output.
    pub fn outputs(&self) -> usize {
        self.outputs
    }

    /// The fixed batch dimension of the model's input, if it has one.
    pub fn fixed_batch(&self) -> Option<usize> {
        self.fixed_batch
    }

    /// Rows per run for a call of `rows` rows.
    fn chunk_rows(&self, rows: usize) -> usize {
        match self.fixed_batch {
            Some(n) => n,
            None => rows.div_ceil(SHARES).clamp(MIN_CHUNK_ROWS, CHUNK_ROWS),
        }
    }

    /// Runs one chunk (at most one batch for a fixed-batch model), a runtime panic
    /// becoming a typed error.
    /// Runs the plan on an idle state, or a new one; a state that failed is dropped.
    fn run_plan(&self, inputs: TVec<TValue>) -> TractResult<TVec<TValue>> {
        let idle = self.states.lock().ok().and_then(|mut idle| idle.pop());
        let mut state = match idle {
            Some(state) => state,
            None => self.plan.spawn()?,
        };
        let outputs = state.run(inputs)?;
        if let Ok(mut idle) = self.states.lock() {
            idle.push(state);
        }
        Ok(outputs)
    }

    fn run_chunk(&self, chunk: ArrayView2<'_, f64>) -> Result<Array2<f64>> {
        match guarded(|| self.run_chunk_unguarded(chunk)) {
            Ok(result) => result,
            Err(panic) => Err(self.failure(format!(
                "the ONNX runtime failed: {}",
                panic_message(&panic)
            ))),
        }
    }

    fn run_chunk_unguarded(&self, chunk: ArrayView2<'_, f64>) -> Result<Array2<f64>> {
        let rows = chunk.nrows();
        let batch = self.fixed_batch.unwrap_or(rows);
        let d = self.inputs;
        let input = match self.input_type {
            InputType::F32 => {
                let data = padded(chunk, batch, |v| v as f32);
                Tensor::from_shape(&[batch, d], &data)
            }
            InputType::F64 => {
                let data = padded(chunk, batch, |v| v);
                Tensor::from_shape(&[batch, d], &data)
            }
        }
        .map_err(|e| self.failure(format!("could not build the input tensor: {e:#}")))?;
        let outputs = self
            .run_plan(tvec![input.into()])
            .map_err(|e| self.failure(format!("inference failed: {e:#}")))?;
        let answer = outputs
            .into_iter()
            .next()
            .ok_or_else(|| self.wrong("the runtime returned no output".into()))?;
        let shape = answer.shape().to_vec();
        if shape.is_empty() || shape[0] != batch {
            return Err(self.wrong(format!(
                "output {} has shape {:?} for a batch of {batch} rows; expected [{batch}, c] \
                 or [{batch}]",
                self.output, shape
            )));
        }
        let width: usize = shape[1..].iter().product();
        let values = answer
            .cast_to::<f64>()
            .map_err(|e| self.wrong(format!("output {} is not numeric: {e:#}", self.output)))?;
        let view = values
            .to_plain_array_view::<f64>()
            .map_err(|e| self.wrong(format!("output {} is unreadable: {e:#}", self.output)))?;
        let flat: Vec<f64> = view.iter().copied().take(rows * width).collect();
        Array2::from_shape_vec((rows, width), flat)
            .map_err(|e| self.wrong(format!("output {} is unreadable: {e}", self.output)))
    }

    fn failure(&self, detail: String) -> Error {
        Error::ModelFailed {
            model: self.name.clone(),
            detail,
            stderr_tail: String::new(),
        }
    }

    fn wrong(&self, detail: String) -> Error {
        Error::ModelAnswer {
            model: self.name.clone(),
            detail,
        }
    }

    fn predict_unchecked(&self, inputs: ArrayView2<'_, f64>) -> Result<Array2<f64>> {
        let rows = inputs.nrows();
        if rows == 0 {
            return Ok(Array2::zeros((0, self.outputs)));
        }
        let chunk = self.chunk_rows(rows);
        let parts: Vec<Array2<f64>> = if rows <= chunk {
            vec![self.run_chunk(inputs)?]
        } else {
            let chunks: Vec<ArrayView2<'_, f64>> =
                inputs.axis_chunks_iter(Axis(0), chunk).collect();
            chunks
                .into_par_iter()
                .map(|c| self.run_chunk(c))
                .collect::<Result<Vec<_>>>()?
        };
        let width = self.outputs;
        if let Some(part) = parts.iter().find(|p| p.ncols() != width) {
            return Err(self.wrong(format!(
                "output {} has {} values per row here and {width} in the trial run at load",
                self.output,
                part.ncols()
            )));
        }
        let views: Vec<ArrayView2<'_, f64>> = parts.iter().map(|p| p.view()).collect();
        ndarray::concatenate(Axis(0), &views)
            .map_err(|e| self.wrong(format!("could not assemble the outputs: {e}")))
    }
}

impl Model for OnnxModel {
    fn input_dim(&self) -> Option<usize> {
        Some(self.inputs)
    }

    fn predict(&self, inputs: ArrayView2<'_, f64>) -> Result<Array2<f64>> {
        if inputs.ncols() != self.inputs {
            return Err(Error::ModelInputWidth {
                model: self.name.clone(),
                expected: self.inputs,
                found: inputs.ncols(),
            });
        }
        let outputs = self.predict_unchecked(inputs)?;
        check_outputs(&outputs, inputs.nrows(), &self.name)?;
        Ok(outputs)
    }

    fn gradients(
        &self,
        inputs: ArrayView2<'_, f64>,
        _target: usize,
    ) -> Result<Option<Array2<f64>>> {
        if inputs.ncols() != self.inputs {
            return Err(Error::ModelInputWidth {
                model: self.name.clone(),
                expected: self.inputs,
                found: inputs.ncols(),
            });
        }
        Ok(None)
    }

    fn preferred_batch(&self) -> usize {
        // Independent of the thread count, like the chunks: callers batch by it.
        match self.fixed_batch {
            // Whole batches, enough of them to keep the cores busy.
            Some(n) => n * CHUNK_ROWS.div_ceil(n) * SHARES,
            None => CHUNK_ROWS * SHARES,
        }
    }

    fn precision(&self) -> f64 {
        self.precision
    }

    fn describe(&self) -> String {
        let batch = match self.fixed_batch {
            Some(n) => n.to_string(),
            None => "batch".into(),
        };
        let ty = match self.input_type {
            InputType::F32 => "float",
            InputType::F64 => "double",
        };
        format!(
            "{} (ONNX, input [{batch}, {}] {ty}, output \"{}\")",
            self.name, self.inputs, self.output
        )
    }
}

/// The rows of `chunk` converted, padded to `batch` rows with copies of the last row.
fn padded<T: Copy>(chunk: ArrayView2<'_, f64>, batch: usize, convert: impl Fn(f64) -> T) -> Vec<T> {
    let mut data: Vec<T> = Vec::with_capacity(batch * chunk.ncols());
    for row in chunk.rows() {
        data.extend(row.iter().map(|&v| convert(v)));
    }
    if let Some(last) = chunk.rows().into_iter().next_back() {
        for _ in chunk.nrows()..batch {
            data.extend(last.iter().map(|&v| convert(v)));
        }
    }
    data
}

thread_local! {
    /// Whether this thread is inside [`guarded`].
    static GUARDED: Cell<bool> = const { Cell::new(false) };
}

static QUIET_HOOK: Once = Once::new();

/// Runs `f`, catching a panic. The panic hook stays silent for panics caught here (they
/// become typed errors, reported once by the caller) and is unchanged for every other
/// panic: the hook installed the first time wraps the one in place.
fn guarded<T>(f: impl FnOnce() -> T) -> std::thread::Result<T> {
    QUIET_HOOK.call_once(|| {
        let previous = std::panic::take_hook();
        std::panic::set_hook(Box::new(move |info| {
            if !GUARDED.with(Cell::get) {
                previous(info);
            }
        }));
    });
    let outer = GUARDED.with(|g| g.replace(true));
    let result = catch_unwind(AssertUnwindSafe(f));
    GUARDED.with(|g| g.set(outer));
    result
}

fn panic_message(panic: &Box<dyn std::any::Any + Send>) -> String {
    if let Some(s) = panic.downcast_ref::<&str>() {
        (*s).to_string()
    } else if let Some(s) = panic.downcast_ref::<String>() {
        s.clone()
    } else {
        "an internal error".into()
    }
}

fn type_name(elem_type: Option<i32>) -> &'static str {
    match elem_type {
        None => "not a tensor",
        Some(t) => match pb::tensor_proto::DataType::try_from(t) {
            Ok(pb::tensor_proto::DataType::Float) => "float",
            Ok(pb::tensor_proto::DataType::Double) => "double",
            Ok(pb::tensor_proto::DataType::Float16) => "float16",
            Ok(pb::tensor_proto::DataType::Bfloat16) => "bfloat16",
            Ok(pb::tensor_proto::DataType::Int64) => "int64",
            Ok(pb::tensor_proto::DataType::Int32) => "int32",
            Ok(pb::tensor_proto::DataType::Int16) => "int16",
            Ok(pb::tensor_proto::DataType::Int8) => "int8",
            Ok(pb::tensor_proto::DataType::Uint8) => "uint8",
            Ok(pb::tensor_proto::DataType::Bool) => "bool",
            Ok(pb::tensor_proto::DataType::String) => "string",
            _ => "another tensor type",
        },
    }
}

/// tract's ONNX reader with kilter's extra operators registered.
fn framework() -> Onnx {
    let mut onnx = tract_onnx::onnx();
    extra_ops::register(&mut onnx.op_register);
    onnx
}

/// Advice for an operator the runtime lacks; `named` prefixes the operator's name (when
/// several are listed).
fn advice_for(op_type: &str, named: bool) -> String {
    const ZIPMAP: &str = "it turns class probabilities into a list of maps; export the \
        classifier without it, with skl2onnx: options={id(model): {'zipmap': False}}, so that \
        the probabilities are a plain float tensor";
    const TREE_ENSEMBLE: &str = "it is the ai.onnx.ml opset 5 form of tree ensembles; export \
        with ai.onnx.ml opset 3 (skl2onnx: target_opset={'': 18, 'ai.onnx.ml': 3}), which \
        writes TreeEnsembleClassifier or TreeEnsembleRegressor";
    const OTHER: &str = "convert the model to standard operators, or serve it through \
        --model-cmd (the line protocol)";
    let advice = match op_type {
        "ZipMap" => ZIPMAP,
        "TreeEnsemble" => TREE_ENSEMBLE,
        _ => OTHER,
    };
    if named {
        format!("{op_type}: {advice}")
    } else {
        advice.to_string()
    }
}

fn load_bytes(path: &Path, bytes: &[u8], output: Option<&str>) -> Result<OnnxModel> {
    let file_error = |detail: String| Error::ModelFile {
        path: path.to_path_buf(),
        detail,
    };
    let onnx = framework();
    let proto = onnx.proto_model_for_read(&mut &bytes[..]).map_err(|e| {
        file_error(format!(
            "not an ONNX model (the protobuf does not decode: {e:#})"
        ))
    })?;
    let graph = proto
        .graph
        .as_ref()
        .ok_or_else(|| file_error("not an ONNX model: it contains no graph".into()))?;
    if graph.output.is_empty() {
        return Err(file_error(
            "not an ONNX model: its graph declares no outputs".into(),
        ));
    }

    // The one real input.
    let initialized: HashSet<&str> = graph.initializer.iter().map(|t| t.name.as_str()).collect();
    let inputs: Vec<&pb::ValueInfoProto> = graph
        .input
        .iter()
        .filter(|i| !initialized.contains(i.name.as_str()))
        .collect();
    let input = match inputs.as_slice() {
        [one] => *one,
        [] => return Err(file_error("the graph has no input".into())),
        many => {
            let names: Vec<&str> = many.iter().map(|i| i.name.as_str()).collect();
            return Err(file_error(format!(
                "the graph has {} inputs ({}); kilter feeds one [batch, d] tensor",
                many.len(),
                names.join(", ")
            )));
        }
    };
    let (input_type, fixed_batch, width) = input_shape(input).map_err(file_error)?;

    // Every graph output must be produced by something (tract assumes so).
    let mut produced: HashSet<&str> = graph.input.iter().map(|i| i.name.as_str()).collect();
    produced.extend(initialized.iter().copied());
    for node in &graph.node {
        produced.extend(
            node.output
                .iter()
                .filter(|o| !o.is_empty())
                .map(String::as_str),
        );
    }
    if let Some(dangling) = graph
        .output
        .iter()
        .find(|o| !produced.contains(o.name.as_str()))
    {
        return Err(file_error(format!(
            "the graph output \"{}\" is not produced by any node",
            dangling.name
        )));
    }

    // The output to answer with.
    let declared: Vec<DeclaredOutput> = graph
        .output
        .iter()
        .map(|o| DeclaredOutput {
            name: o.name.clone(),
            elem_type: o
                .r#type
                .as_ref()
                .and_then(|t| t.value.as_ref())
                .map(|pb::type_proto::Value::TensorType(t)| t.elem_type),
        })
        .collect();
    let listing = declared
        .iter()
        .map(DeclaredOutput::describe)
        .collect::<Vec<_>>()
        .join(", ");
    let unsupported = |nodes: &[&pb::NodeProto]| -> Option<Error> {
        let mut all = Vec::new();
        for node in nodes {
            collect_nodes(node, &mut all);
        }
        let mut missing: Vec<&pb::NodeProto> = Vec::new();
        for node in all {
            if !onnx.op_register.0.contains_key(&node.op_type)
                && !missing.iter().any(|m| m.op_type == node.op_type)
            {
                missing.push(node);
            }
        }
        if missing.is_empty() {
            return None;
        }
        let operator = missing
            .iter()
            .map(|n| qualified_op(n))
            .collect::<Vec<_>>()
            .join(", ");
        let advice = missing
            .iter()
            .map(|n| advice_for(&n.op_type, missing.len() > 1))
            .collect::<Vec<_>>()
            .join("; ");
        Some(Error::OnnxOperator {
            path: path.to_path_buf(),
            operator,
            advice,
        })
    };
    let chosen: String = match output {
        Some(name) => {
            if let Some(found) = declared.iter().find(|o| o.name == name) {
                if found.elem_type.is_some() && !found.is_float() {
                    return Err(Error::InvalidSetting {
                        flag: "--model-output",
                        value: name.to_string(),
                        expected: format!(
                            "a floating-point output of {}; \"{name}\" is {}. Its outputs: \
                             {listing}",
                            path.display(),
                            type_name(found.elem_type)
                        ),
                    });
                }
            } else if !graph
                .node
                .iter()
                .any(|n| n.output.iter().any(|o| o == name))
            {
                return Err(Error::InvalidSetting {
                    flag: "--model-output",
                    value: name.to_string(),
                    expected: format!(
                        "an output of {} (or the name of an intermediate value of its graph). \
                         Its outputs: {listing}",
                        path.display()
                    ),
                });
            }
            name.to_string()
        }
        None => match declared.iter().find(|o| o.is_float()) {
            Some(found) => found.name.clone(),
            None => {
                let all: Vec<&pb::NodeProto> = graph.node.iter().collect();
                if let Some(error) = unsupported(&all) {
                    return Err(error);
                }
                return Err(file_error(format!(
                    "the model has no floating-point tensor output (its outputs: {listing}); \
                     kilter answers with a [batch, c] float output"
                )));
            }
        },
    };

    // Operators: only those the chosen output depends on must be supported.
    let needed = ancestors(graph, &chosen);
    if let Some(error) = unsupported(&needed) {
        return Err(error);
    }

    // Parse, pick the output, fix the input, optimize.
    let dir = path.parent().and_then(Path::to_str);
    let parsed = onnx.parse(&proto, dir).map_err(|e| parse_error(path, &e))?;
    if !parsed.unresolved_inputs.is_empty() {
        return Err(file_error(format!(
            "the graph uses values that nothing defines: {}",
            parsed.unresolved_inputs.join(", ")
        )));
    }
    let mut model = parsed.model;
    let outlet = *parsed
        .outlets_by_name
        .get(&chosen)
        .ok_or_else(|| file_error(format!("the graph has no value named \"{chosen}\"")))?;
    let prepare = |e: tract_onnx::prelude::TractError| {
        file_error(format!(
            "the model could not be prepared for inference: {e:#}"
        ))
    };
    model.select_output_outlets(&[outlet]).map_err(prepare)?;
    let batch_dim: TDim = match fixed_batch {
        Some(n) => n.to_dim(),
        None => model.symbols.sym("batch").to_dim(),
    };
    let datum = match input_type {
        InputType::F32 => DatumType::F32,
        InputType::F64 => DatumType::F64,
    };
    model
        .set_input_fact(
            0,
            InferenceFact::dt_shape(datum, tvec![batch_dim, width.to_dim()]),
        )
        .map_err(prepare)?;
    let optimized = model
        .into_optimized()
        .map_err(|e| optimize_error(path, &e))?;
    let answer_type = optimized.output_fact(0).map_err(prepare)?.datum_type;
    if !answer_type.is_float() {
        let detail = format!(
            "a floating-point output of {}; \"{chosen}\" is {answer_type:?}. Its outputs: \
             {listing}",
            path.display()
        );
        return Err(match output {
            Some(_) => Error::InvalidSetting {
                flag: "--model-output",
                value: chosen.clone(),
                expected: detail,
            },
            None => file_error(format!("the answer must be {detail}")),
        });
    }
    let precision = graph_precision(&optimized);
    let plan = optimized.into_runnable().map_err(prepare)?;
    let mut model = OnnxModel {
        name: path.display().to_string(),
        plan,
        states: Mutex::new(Vec::new()),
        inputs: width,
        input_type,
        fixed_batch,
        output: chosen,
        outputs: 0,
        precision,
    };
    // A trial run on one row of zeros: kernels that exist for some element types only, and
    // outputs of the wrong shape, show here rather than in the middle of the work.
    let trial = model
        .run_chunk(Array2::<f64>::zeros((1, width)).view())
        .map_err(|e| file_error(format!("the model fails a trial run on one row: {e}")))?;
    if trial.ncols() == 0 {
        return Err(file_error(format!(
            "the output \"{}\" is empty for a row",
            model.output
        )));
    }
    model.outputs = trial.ncols();
    Ok(model)
}

/// Element type, fixed batch and width of the input, or why it does not fit.
fn input_shape(
    input: &pb::ValueInfoProto,
) -> std::result::Result<(InputType, Option<usize>, usize), String> {
    let name = &input.name;
    let Some(pb::type_proto::Value::TensorType(tensor)) =
        input.r#type.as_ref().and_then(|t| t.value.as_ref())
    else {
        return Err(format!("the input \"{name}\" is not a tensor"));
    };
    let input_type = match tensor.elem_type {
        ONNX_FLOAT => InputType::F32,
        ONNX_DOUBLE => InputType::F64,
        other => {
            return Err(format!(
                "the input \"{name}\" is of type {}; kilter feeds float or double",
                type_name(Some(other))
            ))
        }
    };
    let Some(shape) = tensor.shape.as_ref() else {
        return Err(format!(
            "the input \"{name}\" declares no shape; kilter needs [batch, d] with d fixed"
        ));
    };
    use pb::tensor_shape_proto::dimension::Value;
    let dims: Vec<Option<i64>> = shape
        .dim
        .iter()
        .map(|d| match d.value {
            Some(Value::DimValue(v)) if v > 0 => Some(v),
            _ => None,
        })
        .collect();
    match dims.as_slice() {
        [batch, Some(width)] => {
            let width = usize::try_from(*width)
                .map_err(|_| format!("the input \"{name}\" is too wide ({width})"))?;
            let batch = batch.map(|b| b as usize);
            Ok((input_type, batch, width))
        }
        [_, None] => Err(format!(
            "the input \"{name}\" has no fixed width (its second dimension is symbolic); \
             kilter needs [batch, d] with d fixed"
        )),
        _ => Err(format!(
            "the input \"{name}\" has {} dimensions; kilter feeds one [batch, d] matrix",
            dims.len()
        )),
    }
}

/// The node and those of its sub-graphs (`If`, `Loop`, `Scan` bodies).
fn collect_nodes<'a>(node: &'a pb::NodeProto, out: &mut Vec<&'a pb::NodeProto>) {
    out.push(node);
    for attribute in &node.attribute {
        for graph in attribute.g.iter().chain(attribute.graphs.iter()) {
            for inner in &graph.node {
                collect_nodes(inner, out);
            }
        }
    }
}

fn qualified_op(node: &pb::NodeProto) -> String {
    if node.domain.is_empty() || node.domain == "ai.onnx" {
        node.op_type.clone()
    } else {
        format!("{}:{}", node.domain, node.op_type)
    }
}

/// The nodes `value` depends on, in graph order.
fn ancestors<'a>(graph: &'a pb::GraphProto, value: &str) -> Vec<&'a pb::NodeProto> {
    let producer: HashMap<&str, usize> = graph
        .node
        .iter()
        .enumerate()
        .flat_map(|(i, n)| n.output.iter().map(move |o| (o.as_str(), i)))
        .collect();
    let mut needed = vec![false; graph.node.len()];
    let mut stack = vec![value];
    while let Some(name) = stack.pop() {
        if let Some(&i) = producer.get(name) {
            if !needed[i] {
                needed[i] = true;
                let node = &graph.node[i];
                stack.extend(
                    node.input
                        .iter()
                        .filter(|s| !s.is_empty())
                        .map(String::as_str),
                );
                // Sub-graphs may read outer values by name.
                let mut inner = Vec::new();
                collect_nodes(node, &mut inner);
                for n in inner.into_iter().skip(1) {
                    stack.extend(n.input.iter().filter(|s| !s.is_empty()).map(String::as_str));
                }
            }
        }
    }
    graph
        .node
        .iter()
        .zip(needed)
        .filter(|(_, n)| *n)
        .map(|(node, _)| node)
        .collect()
}

/// A parse failure: an operator tract rejects in this form, or a broken file.
fn parse_error(path: &Path, error: &tract_onnx::prelude::TractError) -> Error {
    for cause in error.chain() {
        let text = cause.to_string();
        if let Some(rest) = text.strip_prefix("Building node ") {
            if let (Some(open), Some(close)) = (rest.rfind('('), rest.rfind(')')) {
                if open < close {
                    let operator = rest[open + 1..close].to_string();
                    let node = rest[..open].trim();
                    let root = error
                        .chain()
                        .last()
                        .map(|c| c.to_string())
                        .unwrap_or_default();
                    return Error::OnnxOperator {
                        path: path.to_path_buf(),
                        operator,
                        advice: format!("the runtime does not read its node \"{node}\": {root}"),
                    };
                }
            }
        }
    }
    Error::ModelFile {
        path: path.to_path_buf(),
        detail: format!("the ONNX graph could not be read: {error:#}"),
    }
}

fn optimize_error(path: &Path, error: &tract_onnx::prelude::TractError) -> Error {
    Error::ModelFile {
        path: path.to_path_buf(),
        detail: format!("the ONNX graph could not be prepared for a [batch, d] input: {error:#}"),
    }
}

/// The epsilon of the least precise floating-point type in the graph.
fn graph_precision(model: &tract_onnx::prelude::TypedModel) -> f64 {
    let mut precision = f64::EPSILON;
    for node in model.nodes() {
        for output in &node.outputs {
            let eps = match output.fact.datum_type {
                DatumType::F16 => 9.765625e-4, // 2^-10
                DatumType::F32 => f32::EPSILON as f64,
                _ => continue,
            };
            precision = precision.max(eps);
        }
    }
    precision
}

/// ONNX-ML operators that scikit-learn pipelines use and tract does not register, built
/// from tract's own kernels.
///
/// - `Sigmoid` in double precision (tract's kernel is single and half precision only).
/// - `TreeEnsembleClassifier`: tract's, with the base value of skl2onnx's binary
///   gradient-boosting export completed (see `tree_classifier` below).
/// - `Scaler`: `(x - offset) * scale` per feature (offset and scale of length 1 or of the
///   feature count), answered in single precision as the ONNX-ML definition has it. It is
///   what StandardScaler, MinMaxScaler, RobustScaler and MaxAbsScaler export to.
/// - `TreeEnsembleRegressor`: the node is rewritten as a tree-ensemble classifier over
///   "classes" `0..max(n_targets, 3)` (three at least, so that tract's two-class output
///   layout does not apply), its leaves' target weights becoming class weights; the
///   classifier's scores, sliced to the first `n_targets` columns, are the regression
///   outputs. Average aggregation divides each leaf weight by the number of trees (the
///   classifier kernel sums). `MIN` and `MAX` aggregation are refused.
mod extra_ops {
    use tract_onnx::model::{OnnxOpRegister, ParsingContext};
    use tract_onnx::pb::{self, attribute_proto::AttributeType, NodeProto};
    use tract_onnx::tract_hir::internal::*;
    use tract_onnx::tract_hir::ops::array::Slice;
    use tract_onnx::tract_hir::tract_core::ops::change_axes::wire_with_rank_broadcast;

    /// Where tract's own tree-ensemble classifier builder stays reachable once
    /// `TreeEnsembleClassifier` is wrapped (not a name an ONNX operator can have).
    const TRACT_TREE_CLASSIFIER: &str = "kilter/tract/TreeEnsembleClassifier";

    pub fn register(register: &mut OnnxOpRegister) {
        if let Some(&builder) = register.0.get("TreeEnsembleClassifier") {
            register.0.insert(TRACT_TREE_CLASSIFIER.into(), builder);
        }
        register.insert("Scaler", scaler);
        register.insert("Sigmoid", sigmoid);
        register.insert("TreeEnsembleClassifier", tree_classifier);
        register.insert("TreeEnsembleRegressor", tree_regressor);
    }

    fn tract_builder(
        ctx: &ParsingContext,
        alias: &str,
        node: &NodeProto,
    ) -> TractResult<(Box<dyn InferenceOp>, Vec<String>)> {
        let builder = ctx
            .framework
            .op_register
            .0
            .get(alias)
            .with_context(|| format!("the runtime has no {}", node.op_type))?;
        builder(ctx, node)
    }

    /// `Sigmoid`: tract's kernel for single and half precision; `1 / (1 + exp(-x))` from
    /// double-precision kernels for `double` (tract's sigmoid has none).
    #[derive(Debug, Clone)]
    struct Sigmoid;

    fn sigmoid(
        _ctx: &ParsingContext,
        _node: &NodeProto,
    ) -> TractResult<(Box<dyn InferenceOp>, Vec<String>)> {
        Ok((expand(Sigmoid), vec![]))
    }

    impl Expansion for Sigmoid {
        fn name(&self) -> StaticName {
            "Sigmoid".into()
        }

        fn rules<'r, 'p: 'r, 's: 'r>(
            &'s self,
            s: &mut Solver<'r>,
            inputs: &'p [TensorProxy],
            outputs: &'p [TensorProxy],
        ) -> InferenceResult {
            check_input_arity(inputs, 1)?;
            check_output_arity(outputs, 1)?;
            s.equals(&inputs[0].datum_type, &outputs[0].datum_type)?;
            s.equals(&inputs[0].shape, &outputs[0].shape)?;
            Ok(())
        }

        fn wire(
            &self,
            prefix: &str,
            model: &mut TypedModel,
            inputs: &[OutletId],
        ) -> TractResult<TVec<OutletId>> {
            use tract_onnx::tract_hir::tract_core::ops::math;
            let x = inputs[0];
            if model.outlet_fact(x)?.datum_type != f64::datum_type() {
                return model.wire_node(
                    prefix,
                    tract_onnx::tract_hir::tract_core::ops::nn::sigmoid(),
                    &[x],
                );
            }
            let negated = model.wire_node(format!("{prefix}.neg"), math::neg(), &[x])?;
            let exp = model.wire_node(format!("{prefix}.exp"), math::exp(), &negated)?[0];
            let one = model.add_const(format!("{prefix}.one"), rctensor0(1f64))?;
            let denominator =
                wire_with_rank_broadcast(format!("{prefix}.add"), model, math::add(), &[exp, one])?;
            model.wire_node(format!("{prefix}.recip"), math::recip(), &denominator)
        }
    }

    /// `TreeEnsembleClassifier`: tract's, after one repair. skl2onnx writes a binary
    /// classifier scored by one class (gradient boosting: every leaf on class 0, a logistic
    /// transform) with a single base value; tract expects one per class. The second
    /// class's score is unused in that layout (tract answers `[1 - s, s]` from the first),
    /// so the base values are completed with a zero.
    fn tree_classifier(
        ctx: &ParsingContext,
        node: &NodeProto,
    ) -> TractResult<(Box<dyn InferenceOp>, Vec<String>)> {
        let labels = node
            .get_attr_opt_slice::<i64>("classlabels_int64s")?
            .map(<[i64]>::len)
            .or(attribute(node, "classlabels_strings").map(|a| a.strings.len()));
        let one_score = node
            .get_attr_opt_slice::<i64>("class_ids")?
            .is_some_and(|ids| ids.iter().all(|&id| id == 0));
        let short_base = attribute(node, "base_values").is_some_and(|a| a.floats.len() == 1);
        if labels == Some(2) && one_score && short_base {
            let mut repaired = node.clone();
            for attr in &mut repaired.attribute {
                if attr.name == "base_values" {
                    attr.floats.push(0.0);
                }
            }
            return tract_builder(ctx, TRACT_TREE_CLASSIFIER, &repaired);
        }
        tract_builder(ctx, TRACT_TREE_CLASSIFIER, node)
    }

    #[derive(Debug, Clone)]
    struct Scaler {
        offset: Arc<Tensor>,
        scale: Arc<Tensor>,
    }

    fn scaler(
        _ctx: &ParsingContext,
        node: &NodeProto,
    ) -> TractResult<(Box<dyn InferenceOp>, Vec<String>)> {
        let offset: Vec<f32> = node
            .get_attr_opt_vec("offset")?
            .unwrap_or_else(|| vec![0.0]);
        let scale: Vec<f32> = node.get_attr_opt_vec("scale")?.unwrap_or_else(|| vec![1.0]);
        ensure!(
            !offset.is_empty() && !scale.is_empty(),
            "Scaler: offset and scale must not be empty"
        );
        Ok((
            expand(Scaler {
                offset: rctensor1(&offset),
                scale: rctensor1(&scale),
            }),
            vec![],
        ))
    }

    impl Expansion for Scaler {
        fn name(&self) -> StaticName {
            "Scaler".into()
        }

        fn rules<'r, 'p: 'r, 's: 'r>(
            &'s self,
            s: &mut Solver<'r>,
            inputs: &'p [TensorProxy],
            outputs: &'p [TensorProxy],
        ) -> InferenceResult {
            check_input_arity(inputs, 1)?;
            check_output_arity(outputs, 1)?;
            s.equals(&outputs[0].datum_type, DatumType::F32)?;
            s.equals(&inputs[0].shape, &outputs[0].shape)?;
            Ok(())
        }

        fn wire(
            &self,
            prefix: &str,
            model: &mut TypedModel,
            inputs: &[OutletId],
        ) -> TractResult<TVec<OutletId>> {
            let fact = model.outlet_fact(inputs[0])?.clone();
            ensure!(fact.rank() >= 1, "Scaler needs an input of rank 1 or more");
            if let Some(width) = fact.shape.last().and_then(|d| d.to_usize().ok()) {
                for (what, values) in [("offset", &self.offset), ("scale", &self.scale)] {
                    ensure!(
                        values.len() == 1 || values.len() == width,
                        "Scaler: {what} has {} values for {width} features",
                        values.len()
                    );
                }
            }
            let mut x = inputs[0];
            if fact.datum_type != f32::datum_type() {
                x = model.wire_node(
                    format!("{prefix}.to_f32"),
                    tract_onnx::tract_hir::tract_core::ops::cast::cast(f32::datum_type()),
                    &[x],
                )?[0];
            }
            let offset = model.add_const(format!("{prefix}.offset"), self.offset.clone())?;
            let scale = model.add_const(format!("{prefix}.scale"), self.scale.clone())?;
            let centred = wire_with_rank_broadcast(
                format!("{prefix}.sub"),
                model,
                tract_onnx::tract_hir::tract_core::ops::math::sub(),
                &[x, offset],
            )?[0];
            wire_with_rank_broadcast(
                format!("{prefix}.mul"),
                model,
                tract_onnx::tract_hir::tract_core::ops::math::mul(),
                &[centred, scale],
            )
        }
    }

    #[derive(Debug, Clone)]
    struct TreeRegressor {
        classifier: Box<dyn Expansion>,
        n_targets: usize,
    }

    impl Expansion for TreeRegressor {
        fn name(&self) -> StaticName {
            "TreeEnsembleRegressor".into()
        }

        fn rules<'r, 'p: 'r, 's: 'r>(
            &'s self,
            s: &mut Solver<'r>,
            inputs: &'p [TensorProxy],
            outputs: &'p [TensorProxy],
        ) -> InferenceResult {
            check_input_arity(inputs, 1)?;
            check_output_arity(outputs, 1)?;
            s.equals(&outputs[0].datum_type, DatumType::F32)?;
            s.equals(&outputs[0].rank, 2)?;
            s.equals(&outputs[0].shape[0], &inputs[0].shape[0])?;
            s.equals(&outputs[0].shape[1], self.n_targets.to_dim())?;
            Ok(())
        }

        fn wire(
            &self,
            prefix: &str,
            model: &mut TypedModel,
            inputs: &[OutletId],
        ) -> TractResult<TVec<OutletId>> {
            let wires = self.classifier.wire(prefix, model, inputs)?;
            let scores = *wires.get(1).context("tree classifier without scores")?;
            model.wire_node(
                format!("{prefix}.targets"),
                Slice::new(1, 0, self.n_targets),
                &[scores],
            )
        }
    }

    fn attribute<'a>(node: &'a NodeProto, name: &str) -> Option<&'a pb::AttributeProto> {
        node.attribute.iter().find(|a| a.name == name)
    }

    fn tree_regressor(
        ctx: &ParsingContext,
        node: &NodeProto,
    ) -> TractResult<(Box<dyn InferenceOp>, Vec<String>)> {
        for tensor_form in [
            "nodes_values_as_tensor",
            "target_weights_as_tensor",
            "base_values_as_tensor",
        ] {
            if attribute(node, tensor_form).is_some() {
                bail!(
                    "{tensor_form} (a double-precision tree ensemble) is not supported; export \
                     the trees with single-precision thresholds"
                );
            }
        }
        let output = node
            .output
            .first()
            .context("TreeEnsembleRegressor without an output")?;
        let n_targets: i64 = node.get_attr("n_targets")?;
        ensure!(
            n_targets >= 1,
            "n_targets must be at least 1, got {n_targets}"
        );
        let n_targets = n_targets as usize;
        let aggregate = node
            .get_attr_opt::<&str>("aggregate_function")?
            .unwrap_or("SUM");
        let tree_ids = node.get_attr_slice::<i64>("target_treeids")?;
        let n_trees = tree_ids.iter().copied().max().unwrap_or(0) + 1;
        let scale = match aggregate {
            "SUM" => 1.0f32,
            "AVERAGE" => 1.0 / n_trees as f32,
            other => bail!("aggregate_function {other} is not supported (SUM and AVERAGE are)"),
        };
        let classes = n_targets.max(3);
        let mut classifier = node.clone();
        classifier.op_type = "TreeEnsembleClassifier".into();
        classifier.attribute.clear();
        for attr in &node.attribute {
            let mut attr = attr.clone();
            match attr.name.as_str() {
                "n_targets" | "aggregate_function" => continue,
                "target_ids" | "target_nodeids" | "target_treeids" => {
                    attr.name = attr.name.replacen("target_", "class_", 1);
                }
                "target_weights" => {
                    attr.name = "class_weights".into();
                    for w in &mut attr.floats {
                        *w *= scale;
                    }
                }
                "base_values" => attr.floats.resize(classes, 0.0),
                _ => {}
            }
            classifier.attribute.push(attr);
        }
        classifier.attribute.push(pb::AttributeProto {
            name: "classlabels_int64s".into(),
            r#type: AttributeType::Ints as i32,
            ints: (0..classes as i64).collect(),
            ..Default::default()
        });
        classifier.output = vec![format!("{}.label", node.name), output.clone()];
        let (op, closures) = tract_builder(ctx, TRACT_TREE_CLASSIFIER, &classifier)?;
        let classifier = op
            .as_op()
            .downcast_ref::<Box<dyn Expansion>>()
            .context("unexpected form of the tree-ensemble kernel")?
            .clone();
        Ok((
            expand(TreeRegressor {
                classifier,
                n_targets,
            }),
            closures,
        ))
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;
    use pb::tensor_shape_proto::{dimension::Value, Dimension};

    fn input(elem_type: i32, dims: &[Option<i64>]) -> pb::ValueInfoProto {
        let dim = dims
            .iter()
            .map(|d| Dimension {
                value: Some(match d {
                    Some(v) => Value::DimValue(*v),
                    None => Value::DimParam("N".into()),
                }),
                ..Default::default()
            })
            .collect();
        pb::ValueInfoProto {
            name: "x".into(),
            r#type: Some(pb::TypeProto {
                value: Some(pb::type_proto::Value::TensorType(pb::type_proto::Tensor {
                    elem_type,
                    shape: Some(pb::TensorShapeProto { dim }),
                })),
                ..Default::default()
            }),
            ..Default::default()
        }
    }

    #[test]
    fn input_shapes_are_read_and_checked() {
        let symbolic = input_shape(&input(ONNX_FLOAT, &[None, Some(30)])).unwrap();
        assert_eq!(symbolic, (InputType::F32, None, 30));
        let fixed = input_shape(&input(ONNX_DOUBLE, &[Some(16), Some(4)])).unwrap();
        assert_eq!(fixed, (InputType::F64, Some(16), 4));
        let free_width = input_shape(&input(ONNX_FLOAT, &[None, None])).unwrap_err();
        assert!(free_width.contains("no fixed width"), "{free_width}");
        let image = input_shape(&input(ONNX_FLOAT, &[None, Some(3), Some(8)])).unwrap_err();
        assert!(image.contains("3 dimensions"), "{image}");
        let integer = input_shape(&input(7, &[None, Some(3)])).unwrap_err();
        assert!(integer.contains("int64"), "{integer}");
    }

    #[test]
    fn padding_repeats_the_last_row() {
        let chunk = array![[1.0, 2.0], [3.0, 4.0]];
        assert_eq!(
            padded(chunk.view(), 4, |v| v as f32),
            vec![1.0, 2.0, 3.0, 4.0, 3.0, 4.0, 3.0, 4.0]
        );
        assert_eq!(padded(chunk.view(), 2, |v| v), vec![1.0, 2.0, 3.0, 4.0]);
    }

    #[test]
    fn only_the_chosen_outputs_ancestors_are_needed() {
        let node = |op: &str, inputs: &[&str], outputs: &[&str]| pb::NodeProto {
            op_type: op.into(),
            input: inputs.iter().map(|s| s.to_string()).collect(),
            output: outputs.iter().map(|s| s.to_string()).collect(),
            ..Default::default()
        };
        let graph = pb::GraphProto {
            node: vec![
                node("Scaler", &["x"], &["z"]),
                node("LinearClassifier", &["z"], &["label", "p"]),
                node("ZipMap", &["p"], &["maps"]),
            ],
            ..Default::default()
        };
        let ops = |value: &str| -> Vec<String> {
            ancestors(&graph, value)
                .iter()
                .map(|n| n.op_type.clone())
                .collect()
        };
        assert_eq!(ops("p"), ["Scaler", "LinearClassifier"]);
        assert_eq!(ops("maps"), ["Scaler", "LinearClassifier", "ZipMap"]);
        assert_eq!(ops("z"), ["Scaler"]);
    }

    #[test]
    fn registered_operators_cover_scikit_learn_exports() {
        let onnx = framework();
        for op in [
            "Scaler",
            "LinearClassifier",
            "TreeEnsembleClassifier",
            "TreeEnsembleRegressor",
            "Sigmoid",
            "MatMul",
        ] {
            assert!(
                onnx.op_register.0.contains_key(op),
                "{op} is not registered"
            );
        }
        assert!(!onnx.op_register.0.contains_key("ZipMap"));
        assert!(advice_for("ZipMap", false).contains("'zipmap': False"));
        assert!(advice_for("TreeEnsemble", true).starts_with("TreeEnsemble: "));
    }
}
