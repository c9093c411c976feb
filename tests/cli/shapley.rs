//! Shapley-value estimation from a coalition design, against the definition.
//!
//! Reference: the Shapley value (Shapley 1953, "A value for n-person games") as the mean
//! marginal contribution over all orderings of the players, computed here by brute force;
//! that kernel-weighted least squares over all coalitions reproduces it exactly is the
//! result of Charnes, Golany, Keane & Rousseau (1988) used by Lundberg & Lee (2017).

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

use kilter::attribution::{estimate_shapley, CoalitionDesign};

/// A nonlinear model of five inputs, and the deletion game on it: masked inputs are set
/// to the fill value c.
fn model(x: &[f64]) -> f64 {
    x[0] * x[1] + x[2].sin() + x[3] * x[3] * x[4] - 0.5 * x[1] * x[4]
}

fn deletion_value(f: &dyn Fn(&[f64]) -> f64, x: &[f64], fill: f64, kept: &[bool]) -> f64 {
    let masked: Vec<f64> = x
        .iter()
        .zip(kept)
        .map(|(&v, &k)| if k { v } else { fill })
        .collect();
    f(&masked)
}

/// Shapley values by the permutation definition (all M! orderings).
fn shapley_by_definition(v: &dyn Fn(&[bool]) -> f64, m: usize) -> Vec<f64> {
    fn permutations(items: &mut Vec<usize>, k: usize, out: &mut Vec<Vec<usize>>) {
        if k == items.len() {
            out.push(items.clone());
            return;
        }
        for i in k..items.len() {
            items.swap(k, i);
            permutations(items, k + 1, out);
            items.swap(k, i);
        }
    }
    let mut orders = Vec::new();
    permutations(&mut (0..m).collect(), 0, &mut orders);
    let mut phi = vec![0.0; m];
    for order in &orders {
        let mut kept = vec![false; m];
        let mut before = v(&kept);
        for &player in order {
            kept[player] = true;
            let after = v(&kept);
            phi[player] += after - before;
            before = after;
        }
    }
    phi.iter().map(|p| p / orders.len() as f64).collect()
}

fn values_on(design: &CoalitionDesign, v: &dyn Fn(&[bool]) -> f64) -> Vec<f64> {
    design.coalitions().iter().map(|k| v(k)).collect()
}

#[test]
fn the_exhaustive_kernel_design_gives_the_shapley_values() {
    let x = [1.3, -0.7, 2.1, 0.9, 1.6];
    let fill = 0.2;
    let v = |kept: &[bool]| deletion_value(&model, &x, fill, kept);
    let exact = shapley_by_definition(&v, 5);
    let design = CoalitionDesign::enumerate(5);
    let estimate = estimate_shapley(
        &design,
        &values_on(&design, &v),
        v(&[false; 5]),
        v(&[true; 5]),
    )
    .unwrap();
    for (a, b) in estimate.values.iter().zip(&exact) {
        assert!((a - b).abs() < 1e-12, "{a} vs {b}");
    }
    assert!(estimate.standard_errors.iter().all(|&s| s == 0.0));
}

/// Lundberg & Lee (2017): for a linear model, deletion to c gives φᵢ = wᵢ (xᵢ - c), and a
/// sampled design recovers it exactly because the game is additive.
#[test]
fn linear_models_get_weight_times_displacement() {
    let w = [
        0.5, -1.5, 2.0, 0.25, -0.75, 1.0, 3.0, -2.0, 0.1, 0.6, -0.4, 1.2,
    ];
    let x = [
        1.0, 2.0, -1.0, 0.5, 3.0, -2.0, 0.7, 1.1, -0.3, 2.2, 0.0, -1.4,
    ];
    let c = 0.3;
    let f = |z: &[f64]| 0.7 + z.iter().zip(&w).map(|(a, b)| a * b).sum::<f64>();
    let v = |kept: &[bool]| deletion_value(&f, &x, c, kept);
    let mut rng = ChaCha8Rng::seed_from_u64(3);
    let design = CoalitionDesign::shapley_kernel(12, 300, &mut rng);
    assert!(!design.is_exhaustive());
    let estimate = estimate_shapley(
        &design,
        &values_on(&design, &v),
        v(&[false; 12]),
        v(&[true; 12]),
    )
    .unwrap();
    for i in 0..12 {
        let want = w[i] * (x[i] - c);
        assert!(
            (estimate.values[i] - want).abs() < 1e-10,
            "group {i}: {} vs {want}",
            estimate.values[i]
        );
        assert!(estimate.standard_errors[i] < 1e-8);
    }
}

/// A sampled design on a nonlinear 10-player game: the estimates fall within a few
/// standard errors of the exact values, and ten times the samples shrink the standard
/// errors by about √10.
#[test]
fn sampled_estimates_carry_honest_standard_errors() {
    let m = 10;
    let x: Vec<f64> = (0..m).map(|i| 0.3 + 0.17 * i as f64).collect();
    let f = |z: &[f64]| {
        z[0] * z[1] * 2.0 + (z[2] + z[3]).tanh() * 3.0 + z[4] * z[5] * z[6] + z[7].powi(2)
            - z[8] * z[9]
    };
    let v = |kept: &[bool]| deletion_value(&f, &x, 0.0, kept);
    let exact_design = CoalitionDesign::enumerate(m);
    let exact = estimate_shapley(
        &exact_design,
        &values_on(&exact_design, &v),
        v(&vec![false; m]),
        v(&vec![true; m]),
    )
    .unwrap()
    .values;
    let mut rng = ChaCha8Rng::seed_from_u64(11);
    let mut mean_se = Vec::new();
    for samples in [100, 1000] {
        let design = CoalitionDesign::shapley_kernel(m, samples, &mut rng);
        let e = estimate_shapley(
            &design,
            &values_on(&design, &v),
            v(&vec![false; m]),
            v(&vec![true; m]),
        )
        .unwrap();
        let sum: f64 = e.values.iter().sum();
        assert!(
            (sum - (v(&vec![true; m]) - v(&vec![false; m]))).abs() < 1e-10,
            "efficiency"
        );
        let outside = (0..m)
            .filter(|&i| (e.values[i] - exact[i]).abs() > 4.0 * e.standard_errors[i] + 1e-9)
            .count();
        assert!(
            outside <= 1,
            "{outside} of {m} estimates beyond 4 standard errors at {samples} samples"
        );
        mean_se.push(e.standard_errors.iter().sum::<f64>() / m as f64);
    }
    let ratio = mean_se[0] / mean_se[1];
    assert!(
        ratio > 2.0 && ratio < 5.0,
        "standard errors shrank by {ratio}, expected about 3.2"
    );
}

/// The standard error propagated from noisy values is the spread of the estimate over
/// repeated noise: the definition of a standard error (common practice), checked by
/// simulation. Values of an enumerated 5-player game get independent Gaussian noise of
/// known, unequal variances; over 4,000 repetitions the sample standard deviation of each
/// estimate must match the propagated error within 6% (the sampling error of a standard
/// deviation from 4,000 draws is about 1.1%).
#[test]
fn propagated_errors_match_the_spread_over_repeated_noise() {
    use kilter::attribution::{estimate_shapley_with_noise, ValueNoise};
    use rand_distr::{Distribution, StandardNormal};
    let m = 5;
    let design = CoalitionDesign::enumerate(m);
    let x = [1.0, -0.5, 2.0, 0.3, -1.2];
    let v = |kept: &[bool]| deletion_value(&model, &x, 0.0, kept);
    let truth = values_on(&design, &v);
    let variances: Vec<f64> = (0..truth.len()).map(|k| 0.01 + 0.002 * k as f64).collect();
    let empty_variance = 0.02;
    let noise = ValueNoise {
        coalitions: &variances,
        empty: empty_variance,
    };
    let (empty, full) = (v(&vec![false; m]), v(&vec![true; m]));
    let propagated = estimate_shapley_with_noise(&design, &truth, empty, full, Some(noise))
        .unwrap()
        .standard_errors;
    let mut rng = ChaCha8Rng::seed_from_u64(21);
    let repetitions = 4000;
    let mut sums = vec![0.0; m];
    let mut squares = vec![0.0; m];
    for _ in 0..repetitions {
        let noisy: Vec<f64> = truth
            .iter()
            .zip(&variances)
            .map(|(t, var)| {
                let z: f64 = StandardNormal.sample(&mut rng);
                t + var.sqrt() * z
            })
            .collect();
        let e: f64 = StandardNormal.sample(&mut rng);
        let phi = estimate_shapley(&design, &noisy, empty + empty_variance.sqrt() * e, full)
            .unwrap()
            .values;
        for g in 0..m {
            sums[g] += phi[g];
            squares[g] += phi[g] * phi[g];
        }
    }
    for g in 0..m {
        let n = repetitions as f64;
        let mean = sums[g] / n;
        let sd = ((squares[g] - n * mean * mean) / (n - 1.0)).sqrt();
        let ratio = sd / propagated[g];
        assert!(
            (ratio - 1.0).abs() < 0.06,
            "group {g}: spread {sd}, propagated {}",
            propagated[g]
        );
    }
}
