//! kilter's own model file: dense feed-forward networks in JSON, with exact gradients by
//! back-propagation.
//!
//! ```json
//! {
//!   "format": "kilter-model",
//!   "version": 1,
//!   "kind": "mlp",
//!   "inputs": 4,
//!   "layers": [
//!     {"weights": [[0.1, -0.2, 0.3, 0.0], [0.5, 0.1, -0.1, 0.2]], "bias": [0.0, 0.1],
//!      "activation": "relu"},
//!     {"weights": [[1.0, -1.0], [0.5, 0.5], [-0.3, 0.2]], "bias": [0.0, 0.0, 0.1],
//!      "activation": "softmax"}
//!   ]
//! }
//! ```
//!
//! Each layer maps `a` to `act(W a + b)`; `weights` has one row per output unit (so a
//! layer of `m` units over `n` inputs is `m` rows of `n` numbers). Hidden activations:
//! `identity`, `relu`, `tanh`, `sigmoid`. The last layer's activation is `identity`
//! (scores), `softmax` (class probabilities) or `sigmoid`; a last layer of a single
//! sigmoid unit is a binary classifier and outputs the two probabilities `[1 - p, p]`,
//! in the order of scikit-learn's `predict_proba`.
//!
//! `kind` names the shape and is checked: `linear` (one identity layer), `logistic` (one
//! sigmoid unit), `softmax` (one softmax layer), `mlp` (any stack).

use std::path::Path;

use ndarray::{Array1, Array2, ArrayView2, Axis};
use serde::{Deserialize, Serialize};

use super::Model;
use crate::error::{Error, Result};

const FORMAT: &str = "kilter-model";
const VERSION: u32 = 1;
/// Rows per forward pass: the products stay in cache while amortising the call.
const BATCH: usize = 1024;

/// An activation function.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Activation {
    Identity,
    Relu,
    Tanh,
    Sigmoid,
    Softmax,
}

/// The shape a model file declares.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Kind {
    Linear,
    Logistic,
    Softmax,
    Mlp,
}

/// One dense layer as stored.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct LayerFile {
    pub weights: Vec<Vec<f64>>,
    pub bias: Vec<f64>,
    pub activation: Activation,
}

/// The model file as stored.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ModelFile {
    pub format: String,
    pub version: u32,
    pub kind: Kind,
    pub inputs: usize,
    pub layers: Vec<LayerFile>,
    /// Optional free text (where the weights came from).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub description: Option<String>,
}

#[derive(Debug, Clone)]
struct Layer {
    /// `units x inputs`.
    weights: Array2<f64>,
    bias: Array1<f64>,
    activation: Activation,
}

/// A loaded network.
#[derive(Debug, Clone)]
pub struct NetworkModel {
    name: String,
    inputs: usize,
    layers: Vec<Layer>,
    /// The last layer is one sigmoid unit, answered as `[1 - p, p]`.
    binary: bool,
}

impl NetworkModel {
    /// Reads and validates a model file.
    pub fn load(path: &Path) -> Result<NetworkModel> {
        let text = std::fs::read_to_string(path).map_err(|e| Error::io(path, e))?;
        let file: ModelFile = serde_json::from_str(&text).map_err(|e| Error::ModelFile {
            path: path.to_path_buf(),
            detail: format!("not a valid kilter model file: {e}"),
        })?;
        NetworkModel::from_file(file, &path.display().to_string()).map_err(|detail| {
            Error::ModelFile {
                path: path.to_path_buf(),
                detail,
            }
        })
    }

    /// Builds a model from its parsed file, checking every shape.
    pub fn from_file(file: ModelFile, name: &str) -> std::result::Result<NetworkModel, String> {
        if file.format != FORMAT {
            return Err(format!(
                "\"format\" is \"{}\", expected \"{FORMAT}\"",
                file.format
            ));
        }
        if file.version != VERSION {
            return Err(format!(
                "model format version {} is not supported (this kilter reads version {VERSION})",
                file.version
            ));
        }
        if file.inputs == 0 || file.layers.is_empty() {
            return Err("a model needs at least one input and one layer".into());
        }
        let mut width = file.inputs;
        let mut layers = Vec::with_capacity(file.layers.len());
        let last = file.layers.len() - 1;
        for (l, layer) in file.layers.into_iter().enumerate() {
            let units = layer.weights.len();
            if units == 0 || layer.bias.len() != units {
                return Err(format!(
                    "layer {}: {} weight rows but {} biases",
                    l + 1,
                    units,
                    layer.bias.len()
                ));
            }
            if let Some(r) = layer.weights.iter().position(|row| row.len() != width) {
                return Err(format!(
                    "layer {}: weight row {} has {} values, the layer's input has {width}",
                    l + 1,
                    r + 1,
                    layer.weights[r].len()
                ));
            }
            if layer.activation == Activation::Softmax && l != last {
                return Err(format!(
                    "layer {}: softmax is only allowed on the last layer",
                    l + 1
                ));
            }
            let values: Vec<f64> = layer.weights.iter().flatten().copied().collect();
            if values.iter().chain(&layer.bias).any(|v| !v.is_finite()) {
                return Err(format!("layer {}: non-finite weight or bias", l + 1));
            }
            layers.push(Layer {
                weights: Array2::from_shape_vec((units, width), values).expect("checked shape"),
                bias: Array1::from(layer.bias),
                activation: layer.activation,
            });
            width = units;
        }
        let final_layer = &layers[last];
        let shape_ok = match file.kind {
            Kind::Linear => layers.len() == 1 && final_layer.activation == Activation::Identity,
            Kind::Logistic => {
                layers.len() == 1
                    && final_layer.activation == Activation::Sigmoid
                    && final_layer.bias.len() == 1
            }
            Kind::Softmax => layers.len() == 1 && final_layer.activation == Activation::Softmax,
            Kind::Mlp => true,
        };
        if !shape_ok {
            return Err(format!(
                "\"kind\": {:?} does not match the layers (linear: one identity layer; logistic: \
                 one sigmoid unit; softmax: one softmax layer)",
                file.kind
            ));
        }
        let binary = final_layer.activation == Activation::Sigmoid && final_layer.bias.len() == 1;
        Ok(NetworkModel {
            name: name.to_string(),
            inputs: file.inputs,
            layers,
            binary,
        })
    }

    /// Number of outputs per input.
    pub fn outputs(&self) -> usize {
        if self.binary {
            2
        } else {
            self.layers.last().expect("at least one layer").bias.len()
        }
    }

    fn check_width(&self, inputs: ArrayView2<'_, f64>) -> Result<()> {
        if inputs.ncols() != self.inputs {
            return Err(Error::ModelInputWidth {
                model: self.name.clone(),
                expected: self.inputs,
                found: inputs.ncols(),
            });
        }
        Ok(())
    }

    /// Forward pass keeping every layer's activations (`activations[0]` is the input) and
    /// pre-activations (`pre[l]` of layer l), from which derivatives are taken stably.
    fn forward(&self, inputs: ArrayView2<'_, f64>) -> (Vec<Array2<f64>>, Vec<Array2<f64>>) {
        let mut activations = vec![inputs.to_owned()];
        let mut pre = Vec::with_capacity(self.layers.len());
        for layer in &self.layers {
            let previous = activations.last().expect("input is first");
            let mut z = previous.dot(&layer.weights.t());
            z += &layer.bias;
            let mut a = z.clone();
            activate(&mut a, layer.activation);
            pre.push(z);
            activations.push(a);
        }
        (activations, pre)
    }

    fn answer(&self, last: Array2<f64>) -> Array2<f64> {
        if self.binary {
            let p = last.column(0);
            let mut out = Array2::<f64>::zeros((last.nrows(), 2));
            out.column_mut(0).assign(&p.mapv(|v| 1.0 - v));
            out.column_mut(1).assign(&p);
            out
        } else {
            last
        }
    }

    /// `∂ output[target] / ∂ input` by back-propagation.
    fn backward(&self, inputs: ArrayView2<'_, f64>, target: usize) -> Array2<f64> {
        let (activations, pre) = self.forward(inputs);
        let last = activations.last().expect("output layer");
        let rows = inputs.nrows();
        // Gradient with respect to the last layer's pre-activation z.
        let final_layer = self.layers.last().expect("a layer");
        let mut delta = Array2::<f64>::zeros(last.raw_dim());
        match final_layer.activation {
            Activation::Softmax => {
                // ∂p_T/∂z_j = p_T (δ_Tj - p_j)
                for r in 0..rows {
                    let p_t = last[[r, target]];
                    for j in 0..last.ncols() {
                        let kronecker = if j == target { 1.0 } else { 0.0 };
                        delta[[r, j]] = p_t * (kronecker - last[[r, j]]);
                    }
                }
            }
            activation => {
                let (unit, sign) = if self.binary {
                    (0, if target == 0 { -1.0 } else { 1.0 })
                } else {
                    (target, 1.0)
                };
                let z = &pre[self.layers.len() - 1];
                for r in 0..rows {
                    delta[[r, unit]] = sign * derivative(activation, z[[r, unit]]);
                }
            }
        }
        // Through the layers: ∂/∂a_{l-1} = δ_l W_l, then δ_{l-1} = that ⊙ act'(a_{l-1}).
        for l in (0..self.layers.len()).rev() {
            let upstream = delta.dot(&self.layers[l].weights);
            if l == 0 {
                return upstream;
            }
            let activation = self.layers[l - 1].activation;
            delta = upstream;
            ndarray::Zip::from(&mut delta)
                .and(&pre[l - 1])
                .for_each(|d, &z| *d *= derivative(activation, z));
        }
        unreachable!("the loop returns at the first layer")
    }
}

/// Applies an activation in place, row by row for softmax.
fn activate(z: &mut Array2<f64>, activation: Activation) {
    match activation {
        Activation::Identity => {}
        Activation::Relu => z.mapv_inplace(|v| v.max(0.0)),
        Activation::Tanh => z.mapv_inplace(f64::tanh),
        Activation::Sigmoid => z.mapv_inplace(sigmoid),
        Activation::Softmax => {
            for mut row in z.axis_iter_mut(Axis(0)) {
                let max = row.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
                row.mapv_inplace(|v| (v - max).exp());
                let sum = row.sum();
                row.mapv_inplace(|v| v / sum);
            }
        }
    }
}

/// Numerically stable logistic function.
fn sigmoid(v: f64) -> f64 {
    if v >= 0.0 {
        1.0 / (1.0 + (-v).exp())
    } else {
        let e = v.exp();
        e / (1.0 + e)
    }
}

/// Derivative of an elementwise activation at pre-activation `z`. Written in `z`, not in
/// the output: `σ(z)σ(-z)` and `1/cosh²(z)` keep full relative precision where the output
/// saturates, which `a(1 - a)` and `1 - a²` lose.
fn derivative(activation: Activation, z: f64) -> f64 {
    match activation {
        Activation::Identity => 1.0,
        // The sub-gradient 0 at the kink, as the common frameworks use.
        Activation::Relu => {
            if z > 0.0 {
                1.0
            } else {
                0.0
            }
        }
        Activation::Tanh => {
            let c = z.cosh();
            1.0 / (c * c)
        }
        Activation::Sigmoid => sigmoid(z) * sigmoid(-z),
        Activation::Softmax => unreachable!("softmax is handled as a whole row"),
    }
}

impl Model for NetworkModel {
    fn input_dim(&self) -> Option<usize> {
        Some(self.inputs)
    }

    fn predict(&self, inputs: ArrayView2<'_, f64>) -> Result<Array2<f64>> {
        self.check_width(inputs)?;
        let mut out = Array2::<f64>::zeros((inputs.nrows(), self.outputs()));
        for (chunk, mut target) in inputs
            .axis_chunks_iter(Axis(0), BATCH)
            .zip(out.axis_chunks_iter_mut(Axis(0), BATCH))
        {
            let (mut activations, _) = self.forward(chunk);
            let last = activations.pop().expect("output layer");
            target.assign(&self.answer(last));
        }
        Ok(out)
    }

    fn gradients(&self, inputs: ArrayView2<'_, f64>, target: usize) -> Result<Option<Array2<f64>>> {
        self.check_width(inputs)?;
        if target >= self.outputs() {
            return Err(Error::InvalidSetting {
                flag: "--target",
                value: target.to_string(),
                expected: format!("an output index below {}", self.outputs()),
            });
        }
        let mut out = Array2::<f64>::zeros(inputs.raw_dim());
        for (chunk, mut rows) in inputs
            .axis_chunks_iter(Axis(0), BATCH)
            .zip(out.axis_chunks_iter_mut(Axis(0), BATCH))
        {
            rows.assign(&self.backward(chunk, target));
        }
        Ok(Some(out))
    }

    fn preferred_batch(&self) -> usize {
        BATCH
    }

    fn describe(&self) -> String {
        format!(
            "{} (kilter network, {} layers)",
            self.name,
            self.layers.len()
        )
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    fn model(json: &str) -> NetworkModel {
        NetworkModel::from_file(serde_json::from_str(json).unwrap(), "test").unwrap()
    }

    /// The logistic model's gradient is analytic: ∂p/∂x = p (1 - p) w.
    #[test]
    fn logistic_gradient_is_p_one_minus_p_w() {
        let m = model(
            r#"{"format":"kilter-model","version":1,"kind":"logistic","inputs":2,
                "layers":[{"weights":[[2.0,-1.0]],"bias":[0.5],"activation":"sigmoid"}]}"#,
        );
        let x = array![[0.3, 0.8]];
        let p = sigmoid(2.0 * 0.3 - 0.8 + 0.5);
        let out = m.predict(x.view()).unwrap();
        assert!((out[[0, 1]] - p).abs() < 1e-15 && (out[[0, 0]] - (1.0 - p)).abs() < 1e-15);
        let g = m.gradients(x.view(), 1).unwrap().unwrap();
        assert!((g[[0, 0]] - p * (1.0 - p) * 2.0).abs() < 1e-15);
        assert!((g[[0, 1]] + p * (1.0 - p)).abs() < 1e-15);
        let g0 = m.gradients(x.view(), 0).unwrap().unwrap();
        assert!((g0[[0, 0]] + g[[0, 0]]).abs() < 1e-15);
    }

    #[test]
    fn shapes_are_checked() {
        let bad = r#"{"format":"kilter-model","version":1,"kind":"mlp","inputs":3,
            "layers":[{"weights":[[1.0,2.0]],"bias":[0.0],"activation":"identity"}]}"#;
        let err = NetworkModel::from_file(serde_json::from_str(bad).unwrap(), "t").unwrap_err();
        assert!(err.contains("weight row 1 has 2 values"), "{err}");
        let wrong_kind = r#"{"format":"kilter-model","version":1,"kind":"linear","inputs":1,
            "layers":[{"weights":[[1.0]],"bias":[0.0],"activation":"relu"}]}"#;
        let err =
            NetworkModel::from_file(serde_json::from_str(wrong_kind).unwrap(), "t").unwrap_err();
        assert!(err.contains("does not match"), "{err}");
    }
}
