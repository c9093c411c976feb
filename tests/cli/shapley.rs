//! Shapley-value estimation from a coalition design, against the definition.
//!
//! Reference: the Shapley value (Shapley 1953, "A value for n-person games") as the mean
//! marginal contribution over all orderings of the players, computed here by brute force;
//! that kernel-weighted least squares over all coalitions reproduces it exactly is the
//! result of Charnes, Golany, Keane & Rousseau (1988) used by Lundberg & Lee (2017).
//! Standard errors are checked against their definition, the spread over repetitions, on
//! the open breast-cancer corpus and the reference network of `tests/golden/models/`.

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

/// What a sampled-design standard error promises, checked by simulation: a standard
/// error is the standard deviation of the estimate over repetitions of the whole random
/// procedure (the definition; common practice). Each seed draws a new mask design (160
/// masks, 80 complementary pairs, for 12 or 15 groups: sampled, not enumerated) and new
/// fills for the same row, as an audit with another `--seed` would, on streams of its
/// own. Over 200 seeds, for every group, the sample standard deviation of the estimates
/// is compared with the root mean square of the reported standard errors (the root of the
/// mean reported variance, which is what an unbiased variance estimate matches); the
/// ratio must lie in [0.8, 1.25]. Every group of every family is held to it on its own,
/// so a pooled figure cannot hide a group whose error is off. The sampling error of a
/// standard deviation from 200 draws is about 5% (more with heavy tails), so the band
/// leaves room for it while it refuses errors off by a fifth or more.
///
/// The least-squares error `σ² (XᵀWX)⁻¹` this replaced gave ratios from 0.64 to 1.35 here
/// (linear: gaussian 0.64-1.15, neighbours 0.68-1.10, marginal 0.87-1.01; network:
/// deletion 0.96-1.35, gaussian 0.77-0.94, neighbours 0.66-1.08, marginal 0.91-1.02); the
/// pair sandwich gives 0.87-1.17.
mod sampled_standard_errors {
    use std::sync::Arc;

    use ndarray::{Array1, Axis};
    use rand::SeedableRng;
    use rand_chacha::ChaCha8Rng;
    use rayon::prelude::*;

    use kilter::attribution::CoalitionDesign;
    use kilter::corpus::{read_matrix, CsvOptions};
    use kilter::groups::Groups;
    use kilter::models::network::NetworkModel;
    use kilter::models::Model;
    use kilter::perturbation::masking::evaluate_design;
    use kilter::perturbation::{
        ConditionalGaussian, Deletion, FillValue, MarginalRows, NearestRows, PerturbationFamily,
    };
    use kilter::profile::FeatureDistribution;

    use crate::families::{breast_cancer_standardized, linear};
    use crate::harness::{repo, temp_dir};

    const SEEDS: u64 = 200;
    const LOW: f64 = 0.8;
    const HIGH: f64 = 1.25;

    /// Per group: the standard deviation of the estimates over the seeds and the root
    /// mean square of the reported standard errors.
    fn spread_and_reported(
        model: &dyn Model,
        family: &dyn PerturbationFamily,
        input: &Array1<f64>,
        groups: &Groups,
        samples: usize,
    ) -> (Vec<f64>, Vec<f64>) {
        let m = groups.len();
        let full = model.predict(input.view().insert_axis(Axis(0))).unwrap()[[0, 0]];
        let runs: Vec<(Vec<f64>, Vec<f64>)> = (0..SEEDS)
            .into_par_iter()
            .map(|seed| {
                let mut design_rng = ChaCha8Rng::seed_from_u64(seed);
                design_rng.set_stream(0);
                let design = CoalitionDesign::shapley_kernel(m, samples, &mut design_rng);
                assert!(!design.is_exhaustive());
                let mut fill_rng = ChaCha8Rng::seed_from_u64(seed);
                fill_rng.set_stream(1);
                let game = evaluate_design(
                    model,
                    family,
                    input.view(),
                    groups,
                    &design,
                    0,
                    full,
                    &mut fill_rng,
                )
                .unwrap();
                (game.estimate.values, game.estimate.standard_errors)
            })
            .collect();
        let n = SEEDS as f64;
        let mut sd = Vec::with_capacity(m);
        let mut rms = Vec::with_capacity(m);
        for g in 0..m {
            let mean = runs.iter().map(|r| r.0[g]).sum::<f64>() / n;
            let ss: f64 = runs.iter().map(|r| (r.0[g] - mean).powi(2)).sum();
            sd.push((ss / (n - 1.0)).sqrt());
            rms.push((runs.iter().map(|r| r.1[g] * r.1[g]).sum::<f64>() / n).sqrt());
        }
        (sd, rms)
    }

    fn families(
        distribution: &FeatureDistribution,
        draws: usize,
    ) -> Vec<(&'static str, Box<dyn PerturbationFamily>)> {
        let rows = Arc::new(distribution.rows().to_owned());
        vec![
            (
                "deletion (mean)",
                Box::new(Deletion::new(
                    FillValue::Mean,
                    distribution.location(),
                    &distribution.median(),
                )),
            ),
            (
                "replacement (gaussian)",
                Box::new(ConditionalGaussian::new(
                    distribution.location().clone(),
                    distribution.covariance().clone(),
                    draws,
                )),
            ),
            (
                "replacement (neighbours)",
                Box::new(NearestRows::new(rows.clone(), distribution.scale(), draws)),
            ),
            (
                "replacement (marginal)",
                Box::new(MarginalRows::new(rows, draws)),
            ),
        ]
    }

    fn check(label: &str, name: &str, sd: &[f64], rms: &[f64]) -> Vec<String> {
        let ratios: Vec<f64> = sd.iter().zip(rms).map(|(s, r)| s / r).collect();
        eprintln!(
            "{label}, {name}: spread / reported per group {:?}",
            ratios.iter().map(|r| format!("{r:.2}")).collect::<Vec<_>>()
        );
        ratios
            .iter()
            .enumerate()
            .filter(|(_, r)| !(LOW..=HIGH).contains(*r))
            .map(|(g, r)| format!("{label}, {name}, group {g}: ratio {r:.3}"))
            .collect()
    }

    /// (a) A linear model of twelve strongly correlated columns of the breast-cancer
    /// corpus (mean radius, perimeter and area correlate at 0.987 to 0.998), standardized.
    #[test]
    fn linear_model_on_correlated_features() {
        let data = breast_cancer_standardized();
        let d = 12;
        let rows = data.values.slice(ndarray::s![.., ..d]).to_owned();
        let input = rows.row(7).to_owned();
        let distribution = FeatureDistribution::fit(rows, &data.names[..d]).unwrap();
        let w = [
            0.8, -0.5, 0.6, 0.4, -0.9, 0.3, 0.7, -0.6, 0.5, -0.2, 0.9, -0.4,
        ];
        let model = linear(&w, 0.2);
        let groups = Groups::singletons(&data.names[..d]);
        let mut failures = Vec::new();
        for (name, family) in families(&distribution, 4) {
            let (sd, rms) = spread_and_reported(&model, family.as_ref(), &input, &groups, 160);
            if name.starts_with("deletion") {
                // Lundberg & Lee (2017): deletion of a linear model is an additive game,
                // which every design recovers exactly: no spread, no error to report.
                for g in 0..d {
                    assert!(
                        sd[g] < 1e-9 && rms[g] < 1e-9,
                        "group {g}: {} {}",
                        sd[g],
                        rms[g]
                    );
                }
                continue;
            }
            failures.extend(check("linear", name, &sd, &rms));
        }
        assert!(failures.is_empty(), "{failures:#?}");
    }

    /// (b) The breast-cancer network of the reference models (two ReLU layers, sigmoid
    /// output; tests/golden/models/README.md) on its 30 raw features in 15 groups of two,
    /// at the query row whose prediction is nearest one half.
    #[test]
    fn network_on_grouped_features() {
        let options = CsvOptions {
            label_columns: vec!["diagnosis".into()],
            ..CsvOptions::default()
        };
        let fit = read_matrix(&repo("tests/golden/breast_cancer_fit.csv"), &options).unwrap();
        let query = read_matrix(&repo("tests/golden/breast_cancer_query.csv"), &options).unwrap();
        let model = NetworkModel::load(&repo("tests/golden/models/mlp.json")).unwrap();
        let predictions = model.predict(query.values.view()).unwrap();
        let row = (0..query.values.nrows())
            .min_by(|&a, &b| {
                (predictions[[a, 0]] - 0.5)
                    .abs()
                    .total_cmp(&(predictions[[b, 0]] - 0.5).abs())
            })
            .unwrap();
        let input = query.values.row(row).to_owned();
        let dir = temp_dir();
        let path = dir.path().join("groups.json");
        let pairs: Vec<[usize; 2]> = (0..15).map(|g| [2 * g, 2 * g + 1]).collect();
        std::fs::write(&path, serde_json::to_string(&pairs).unwrap()).unwrap();
        let groups = Groups::from_json_file(&path, &fit.names).unwrap();
        let distribution = FeatureDistribution::fit(fit.values.clone(), &fit.names).unwrap();
        let mut failures = Vec::new();
        for (name, family) in families(&distribution, 4) {
            let (sd, rms) = spread_and_reported(&model, family.as_ref(), &input, &groups, 160);
            failures.extend(check("network", name, &sd, &rms));
        }
        assert!(failures.is_empty(), "{failures:#?}");
    }
}
