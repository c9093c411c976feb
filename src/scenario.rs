//! The invented scenario behind `kilter demo`: a water utility that ranks pipe segments
//! for inspection from a dozen sensor and asset readings.
//!
//! Everything is generated from a seed; no real utility or data stands behind it. The
//! readings are built to have the structure that makes masking explanations fragile:
//! the three pressure readings along a segment are driven by one zone head and move
//! together, flow follows the pressure drop, vibration follows flow, and chlorine decays
//! with pipe age. Zeroing one pressure reading produces a segment that cannot exist.

use ndarray::Array2;
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

/// `rows` invented pipe segments, one per row, columns as [`FEATURES`].
pub fn pipe_segments(rows: usize, seed: u64) -> Array2<f64> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let unit = Normal::new(0.0, 1.0).expect("unit normal");
    let mut out = Array2::<f64>::zeros((rows, FEATURES.len()));
    for mut row in out.outer_iter_mut() {
        let head = 480.0 + 45.0 * unit.sample(&mut rng);
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
