//! The invented scenario behind `kilter demo`: a water utility that ranks pipe segments
//! for inspection from a dozen sensor and asset readings.
//!
//! Everything is generated from a seed; no real utility or data stands behind it. The
//! readings are built to have the structure that makes masking explanations fragile:
//! the three pressure readings along a segment are driven by one zone head and move
//! together, flow follows the pressure drop, vibration follows flow, and chlorine decays
//! with pipe age. Zeroing one pressure reading produces a segment that cannot exist.

use ndarray::{Array1, Array2};

use crate::models::network::{Activation, Kind, LayerFile, ModelFile};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, Normal, Poisson};

/// Column names of the scenario's table, in order.
pub const FEATURES: [&str; 12] = [
    "pressure_inlet_kpa",
    "pressure_mid_kpa",
    "pressure_outlet_kpa",
    "flow_l_per_s",
    "vibration_mm_per_s",
    "pipe_age_years",
    "diameter_mm",
    "soil_corrosivity",
    "water_temp_c",
    "chlorine_mg_per_l",
    "turbidity_ntu",
    "repairs_last_5y",
];

/// The zone head (kPa) of ordinary segments: mean and spread.
pub const HEAD_MEAN: f64 = 480.0;
/// Spread of the zone head across the network.
pub const HEAD_SD: f64 = 45.0;

/// `rows` invented pipe segments, one per row, columns as [`FEATURES`].
pub fn pipe_segments(rows: usize, seed: u64) -> Array2<f64> {
    pipe_segments_with_heads(rows, seed, None)
}

/// Segments whose zone heads are all `head` kPa (for segments in an unusually high or
/// low pressure zone); otherwise as [`pipe_segments`].
pub fn pipe_segments_in_zone(rows: usize, seed: u64, head: f64) -> Array2<f64> {
    pipe_segments_with_heads(rows, seed, Some(head))
}

fn pipe_segments_with_heads(rows: usize, seed: u64, zone: Option<f64>) -> Array2<f64> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let unit = Normal::new(0.0, 1.0).expect("unit normal");
    let mut out = Array2::<f64>::zeros((rows, FEATURES.len()));
    for mut row in out.outer_iter_mut() {
        let spread = HEAD_SD * unit.sample(&mut rng);
        let head = zone.unwrap_or(HEAD_MEAN + spread);
        let age: f64 = rng.random_range(3.0..85.0);
        let diameter = [100.0, 150.0, 200.0, 250.0, 300.0][rng.random_range(0..5)]
            + 2.0 * unit.sample(&mut rng);
        let roughness = 1.0 + age / 60.0;
        let drop_per_stage = (14.0 + 4.0 * unit.sample(&mut rng)) * roughness * 150.0 / diameter;
        let inlet = head + 4.0 * unit.sample(&mut rng);
        let mid = head - drop_per_stage + 4.0 * unit.sample(&mut rng);
        let outlet = head - 2.0 * drop_per_stage + 4.0 * unit.sample(&mut rng);
        let flow = (diameter / 100.0).powi(2) * (2.0 * drop_per_stage / roughness).sqrt() * 2.2
            + 0.8 * unit.sample(&mut rng);
        let vibration = 0.3 + 0.09 * flow + 0.15 * unit.sample(&mut rng).abs();
        let corrosivity: f64 = (4.5 + 2.0 * unit.sample(&mut rng)).clamp(0.0, 10.0);
        let temperature = 13.0 + 5.0 * unit.sample(&mut rng);
        let chlorine = (1.1 - 0.008 * age + 0.08 * unit.sample(&mut rng)).max(0.05);
        let turbidity = (0.25 + 0.004 * age + 0.1 * unit.sample(&mut rng).abs()).max(0.02);
        let rate = 0.15 + 0.02 * age * (0.5 + corrosivity / 10.0);
        let repairs = Poisson::new(rate).expect("positive rate").sample(&mut rng);
        let values = [
            inlet,
            mid,
            outlet,
            flow,
            vibration,
            age,
            diameter,
            corrosivity,
            temperature,
            chlorine,
            turbidity,
            repairs,
        ];
        for (cell, v) in row.iter_mut().zip(values) {
            *cell = v;
        }
    }
    out
}

/// The invented inspection history: whether each segment failed (burst or leak) within
/// two years, drawn from a hidden logistic risk of age, soil corrosivity, past repairs and
/// the pressure lost along the segment beyond what its age and diameter explain.
pub fn failure_history(segments: &Array2<f64>, seed: u64) -> Vec<f64> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    segments
        .outer_iter()
        .map(|x| {
            let drop = x[0] - x[2];
            let expected_drop = 28.0 * (1.0 + x[5] / 60.0) * 150.0 / x[6];
            let z = -2.2
                + 0.035 * (x[5] - 44.0)
                + 0.3 * (x[7] - 4.5)
                + 0.55 * x[11]
                + 0.06 * (drop - expected_drop);
            let p = 1.0 / (1.0 + (-z).exp());
            f64::from(u8::from(rng.random::<f64>() < p))
        })
        .collect()
}

/// Trains a small binary classifier for the demo: inputs standardized (folded into the
/// first layer of the stored network; a constant column keeps scale 1), 8 tanh units, one
/// sigmoid output, full-batch Adam on the cross-entropy with a small weight decay, from a
/// seeded start. Deterministic. Used for the pipe-failure risk and the demo's digit model.
pub fn train_network(segments: &Array2<f64>, failed: &[f64], seed: u64, about: &str) -> ModelFile {
    const HIDDEN: usize = 8;
    const STEPS: usize = 600;
    const RATE: f64 = 0.02;
    const DECAY: f64 = 1e-3;
    let (n, d) = segments.dim();
    let mean = segments.mean_axis(ndarray::Axis(0)).expect("rows");
    let sd = segments
        .std_axis(ndarray::Axis(0), 0.0)
        .mapv(|s| s.max(1e-12));
    let z = (segments - &mean) / &sd;
    let y = Array1::from(failed.to_vec());
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let init = Normal::new(0.0, 0.4).expect("normal");
    // Parameters: W1 (HIDDEN x d), b1, w2 (HIDDEN), b2, flattened for Adam.
    let mut w1 = Array2::from_shape_fn((HIDDEN, d), |_| init.sample(&mut rng));
    let mut b1 = Array1::<f64>::zeros(HIDDEN);
    let mut w2 = Array1::from_shape_fn(HIDDEN, |_| init.sample(&mut rng));
    let mut b2 = 0.0;
    let count = HIDDEN * d + 2 * HIDDEN + 1;
    let (mut m1, mut m2) = (vec![0.0; count], vec![0.0; count]);
    for step in 1..=STEPS {
        let h = (z.dot(&w1.t()) + &b1).mapv(f64::tanh);
        let logit = h.dot(&w2) + b2;
        let p = logit.mapv(|v| 1.0 / (1.0 + (-v).exp()));
        let residual = (&p - &y) / n as f64;
        let g_w2 = h.t().dot(&residual) + &(&w2 * DECAY);
        let g_b2 = residual.sum();
        let dh = residual
            .view()
            .insert_axis(ndarray::Axis(1))
            .dot(&w2.view().insert_axis(ndarray::Axis(0)))
            * h.mapv(|v| 1.0 - v * v);
        let g_w1 = dh.t().dot(&z) + &(&w1 * DECAY);
        let g_b1 = dh.sum_axis(ndarray::Axis(0));
        let grads: Vec<f64> = g_w1
            .iter()
            .chain(g_b1.iter())
            .chain(g_w2.iter())
            .chain(std::iter::once(&g_b2))
            .copied()
            .collect();
        let (beta1, beta2) = (0.9_f64, 0.999_f64);
        let mut params: Vec<&mut f64> = w1
            .iter_mut()
            .chain(b1.iter_mut())
            .chain(w2.iter_mut())
            .chain(std::iter::once(&mut b2))
            .collect();
        for (i, (param, g)) in params.iter_mut().zip(&grads).enumerate() {
            m1[i] = beta1 * m1[i] + (1.0 - beta1) * g;
            m2[i] = beta2 * m2[i] + (1.0 - beta2) * g * g;
            let m_hat = m1[i] / (1.0 - beta1.powi(step as i32));
            let v_hat = m2[i] / (1.0 - beta2.powi(step as i32));
            **param -= RATE * m_hat / (v_hat.sqrt() + 1e-8);
        }
    }
    // Fold the standardization into the first layer: W1 (x - m)/s = (W1/s) x - W1 (m/s).
    let scaled = &w1 / &sd;
    let folded_bias = &b1 - &scaled.dot(&mean);
    ModelFile {
        format: "kilter-model".into(),
        version: 1,
        kind: Kind::Mlp,
        inputs: d,
        layers: vec![
            LayerFile {
                weights: scaled.outer_iter().map(|r| r.to_vec()).collect(),
                bias: folded_bias.to_vec(),
                activation: Activation::Tanh,
            },
            LayerFile {
                weights: vec![w2.to_vec()],
                bias: vec![b2],
                activation: Activation::Sigmoid,
            },
        ],
        description: Some(format!(
            "kilter demo: {about}, trained on {n} rows (seed {seed})"
        )),
    }
}

/// How far a downstream pressure may exceed an upstream one before the fallback calls it a
/// sensor fault (readings this far against the flow are never seen in the history).
pub const FAULT_MARGIN_KPA: f64 = 10.0;

/// A copy of the risk network as a vendor might ship it, with a sensor-fault fallback:
/// when the pressure readings contradict the direction of flow (inlet below mid, or mid
/// below outlet by more than [`FAULT_MARGIN_KPA`]), it distrusts them and answers from a seasonal rule on water temperature alone. No real
/// segment triggers the fallback, so on the data it is the network; a masking explanation
/// that fills one pressure with an average can trigger it, and then credits water
/// temperature, which the network hardly uses on real segments (the construction of Slack et al.,
/// AIES 2020, arising here from a plausible engineering rule).
pub struct FaultFallback<M> {
    /// The network it answers with on consistent readings.
    pub network: M,
    /// The water temperature (°C) at which the fallback's risk is one half.
    pub pivot_temperature: f64,
}

impl<M: crate::models::Model> FaultFallback<M> {
    /// Whether a row's pressures contradict the direction of flow by more than
    /// [`FAULT_MARGIN_KPA`].
    pub fn is_fault(row: ndarray::ArrayView1<'_, f64>) -> bool {
        row[0] < row[1] - FAULT_MARGIN_KPA || row[1] < row[2] - FAULT_MARGIN_KPA
    }
}

impl<M: crate::models::Model> crate::models::Model for FaultFallback<M> {
    fn input_dim(&self) -> Option<usize> {
        Some(FEATURES.len())
    }

    fn predict(&self, inputs: ndarray::ArrayView2<'_, f64>) -> crate::Result<Array2<f64>> {
        let mut out = self.network.predict(inputs)?;
        for (row, mut answer) in inputs.outer_iter().zip(out.outer_iter_mut()) {
            if Self::is_fault(row) {
                let p = 1.0 / (1.0 + (-(row[8] - self.pivot_temperature)).exp());
                answer[0] = 1.0 - p;
                answer[1] = p;
            }
        }
        Ok(out)
    }

    fn gradients(
        &self,
        _inputs: ndarray::ArrayView2<'_, f64>,
        _target: usize,
    ) -> crate::Result<Option<Array2<f64>>> {
        Ok(None)
    }

    fn preferred_batch(&self) -> usize {
        self.network.preferred_batch()
    }

    fn describe(&self) -> String {
        format!("{} with a sensor-fault fallback", self.network.describe())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn pressures_move_together() {
        let x = pipe_segments(2000, 7);
        let corr = |a: usize, b: usize| {
            let (ca, cb) = (x.column(a), x.column(b));
            let (ma, mb) = (ca.mean().unwrap(), cb.mean().unwrap());
            let cov = ca
                .iter()
                .zip(cb)
                .map(|(p, q)| (p - ma) * (q - mb))
                .sum::<f64>();
            let va = ca.iter().map(|p| (p - ma).powi(2)).sum::<f64>();
            let vb = cb.iter().map(|q| (q - mb).powi(2)).sum::<f64>();
            cov / (va * vb).sqrt()
        };
        assert!(corr(0, 1) > 0.8, "inlet~mid {}", corr(0, 1));
        assert!(corr(1, 2) > 0.8, "mid~outlet {}", corr(1, 2));
        assert_eq!(pipe_segments(5, 7), pipe_segments(5, 7));
    }
}
