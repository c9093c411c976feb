//! The perturbation families and their attributions, against published identities.
//!
//! Sources, each named beside its check:
//! - Sundararajan, Taly & Yan (2017), "Axiomatic attribution for deep networks": integrated
//!   gradients of a linear model are `wᵢ (xᵢ - x'ᵢ)`; completeness for any differentiable
//!   model.
//! - Composite quadrature error orders (Abramowitz & Stegun 1964, §25.4): midpoint and
//!   trapezoid errors fall as M⁻² on a smooth integrand, Gauss-Legendre faster.
//! - Lundberg & Lee (2017): Shapley values of a linear model with independent features are
//!   `wᵢ (xᵢ - E[xᵢ])` under marginal replacement, and `wᵢ (xᵢ - c)` under deletion to c.
//! - The conditional distribution of a multivariate normal (Anderson 2003, Theorem 2.5.1).
//! - A saturating soft-OR (common practice, no source): the gradient at (1, 1) vanishes
//!   while integrated gradients from (0, 0) split f(1,1) - f(0,0) equally.
//!
//! Reference data: the open breast-cancer corpus (reference-corpora/, UCI), columns
//! shuffled independently where independence is needed.

use std::sync::Arc;

use ndarray::{array, Array1, Array2, Axis};
use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

use kilter::attribution::{integrated_gradients, CoalitionDesign, QuadratureRule};
use kilter::corpus::{read_matrix, CsvOptions, FeatureMatrix};
use kilter::groups::Groups;
use kilter::models::network::{ModelFile, NetworkModel};
use kilter::models::{FiniteDifference, GradientMethod, Model};
use kilter::perturbation::masking::evaluate_design;
use kilter::perturbation::{
    ConditionalGaussian, Deletion, FillValue, MarginalRows, PerturbationFamily,
};

use crate::harness::repo;

pub fn network(json: serde_json::Value) -> NetworkModel {
    let file: ModelFile = serde_json::from_value(json).expect("model JSON");
    NetworkModel::from_file(file, "test model").expect("valid model")
}

pub fn linear(weights: &[f64], bias: f64) -> NetworkModel {
    network(serde_json::json!({
        "format": "kilter-model", "version": 1, "kind": "linear", "inputs": weights.len(),
        "layers": [{"weights": [weights], "bias": [bias], "activation": "identity"}]
    }))
}

/// A smooth two-layer tanh network of `d` inputs with fixed, varied weights.
fn smooth_network(d: usize) -> NetworkModel {
    let hidden: Vec<Vec<f64>> = (0..6)
        .map(|h| {
            (0..d)
                .map(|i| ((h * 7 + i * 3) % 11) as f64 / 11.0 - 0.45)
                .collect()
        })
        .collect();
    network(serde_json::json!({
        "format": "kilter-model", "version": 1, "kind": "mlp", "inputs": d,
        "layers": [
            {"weights": hidden, "bias": [0.1, -0.2, 0.05, 0.3, -0.1, 0.0], "activation": "tanh"},
            {"weights": [[1.2, -0.7, 0.5, 0.9, -1.1, 0.4]], "bias": [0.2], "activation": "sigmoid"}
        ]
    }))
}

/// The breast-cancer corpus, standardized (so model weights act on comparable scales).
pub fn breast_cancer_standardized() -> FeatureMatrix {
    let options = CsvOptions {
        label_columns: vec!["diagnosis".into()],
        ..CsvOptions::default()
    };
    let mut m = read_matrix(&repo("reference-corpora/breast_cancer.csv"), &options).unwrap();
    let mean = m.values.mean_axis(Axis(0)).unwrap();
    let sd = m.values.std_axis(Axis(0), 0.0);
    m.values = (&m.values - &mean) / &sd;
    m
}

/// Each column shuffled on its own: the marginals of real data, independent features.
fn independent_columns(values: &Array2<f64>, seed: u64) -> Array2<f64> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut out = values.clone();
    for mut column in out.columns_mut() {
        let mut v = column.to_vec();
        v.shuffle(&mut rng);
        column.assign(&Array1::from(v));
    }
    out
}

#[test]
fn integrated_gradients_of_a_linear_model_are_weight_times_displacement() {
    // Sundararajan et al. 2017: for f(x) = w·x + b, IGᵢ = wᵢ (xᵢ - x'ᵢ) exactly, for
    // every quadrature rule (the gradient is constant along the path).
    let w = [0.5, -1.25, 2.0, 0.0, 3.5];
    let model = linear(&w, 0.75);
    let x = array![1.0, 2.0, -0.5, 4.0, 0.25];
    let baseline = array![[0.2, -1.0, 0.5, 1.0, -0.75]];
    let fd = FiniteDifference::new(&[1.0; 5], f64::EPSILON);
    for rule in [
        QuadratureRule::Midpoint,
        QuadratureRule::Trapezoid,
        QuadratureRule::GaussLegendre,
    ] {
        let ig = integrated_gradients(&model, &fd, x.view(), baseline.view(), 0, rule, 7).unwrap();
        assert_eq!(ig.gradients, GradientMethod::Exact);
        for i in 0..5 {
            let expected = w[i] * (x[i] - baseline[[0, i]]);
            assert!(
                (ig.per_feature[i] - expected).abs() < 1e-12,
                "{rule} feature {i}: {} vs {expected}",
                ig.per_feature[i]
            );
        }
        assert!(ig.completeness_gap < 1e-12, "{}", ig.completeness_gap);
    }
}

#[test]
fn completeness_error_falls_at_the_rate_of_each_rule() {
    // On a smooth network, |Σ IG - (f(x) - f(x'))| is the quadrature error of a smooth
    // integral: midpoint and trapezoid fall as M⁻² (doubling M divides it by about 4),
    // Gauss-Legendre geometrically.
    let model = smooth_network(4);
    let x = array![1.5, -2.0, 0.7, 2.5];
    let baseline = array![[-1.0, 1.0, -1.5, 0.0]];
    let fd = FiniteDifference::new(&[1.0; 4], f64::EPSILON);
    let gap = |rule, m| {
        let ig = integrated_gradients(&model, &fd, x.view(), baseline.view(), 0, rule, m).unwrap();
        let expected = ig.at_input - ig.at_baselines[0];
        (ig.per_feature.sum() - expected).abs()
    };
    for rule in [QuadratureRule::Midpoint, QuadratureRule::Trapezoid] {
        let (e8, e16, e32) = (gap(rule, 8), gap(rule, 16), gap(rule, 32));
        for (coarse, fine) in [(e8, e16), (e16, e32)] {
            let ratio = fine / coarse;
            assert!(
                (3.0..5.5).contains(&(1.0 / ratio)),
                "{rule}: error {coarse:e} -> {fine:e} (ratio {ratio})"
            );
        }
    }
    let gl4 = gap(QuadratureRule::GaussLegendre, 4);
    let gl12 = gap(QuadratureRule::GaussLegendre, 12);
    let gl24 = gap(QuadratureRule::GaussLegendre, 24);
    // Geometric convergence: each extra point multiplies the error by a constant < 1.
    assert!(
        gl12 < gl4 * 1e-3,
        "Gauss-Legendre: {gl4:e} at 4, {gl12:e} at 12"
    );
    assert!(gl24 < 1e-12, "Gauss-Legendre, 24 points: {gl24:e}");
    assert!(gl12 < gap(QuadratureRule::Midpoint, 64) / 100.0);
}

#[test]
fn finite_difference_gradients_give_the_same_path_integral() {
    // A model that offers no gradients is integrated with central differences; on a
    // smooth model the two attributions agree to the difference scheme's accuracy.
    struct NoGradients(NetworkModel);
    impl Model for NoGradients {
        fn input_dim(&self) -> Option<usize> {
            self.0.input_dim()
        }
        fn predict(&self, inputs: ndarray::ArrayView2<'_, f64>) -> kilter::Result<Array2<f64>> {
            self.0.predict(inputs)
        }
        fn gradients(
            &self,
            _: ndarray::ArrayView2<'_, f64>,
            _: usize,
        ) -> kilter::Result<Option<Array2<f64>>> {
            Ok(None)
        }
        fn preferred_batch(&self) -> usize {
            256
        }
        fn describe(&self) -> String {
            "no gradients".into()
        }
    }
    let exact = smooth_network(4);
    let numeric = NoGradients(smooth_network(4));
    let x = array![1.5, -2.0, 0.7, 2.5];
    let baseline = array![[-1.0, 1.0, -1.5, 0.0]];
    let fd = FiniteDifference::new(&[1.0; 4], f64::EPSILON);
    let rule = QuadratureRule::GaussLegendre;
    let a = integrated_gradients(&exact, &fd, x.view(), baseline.view(), 0, rule, 16).unwrap();
    let b = integrated_gradients(&numeric, &fd, x.view(), baseline.view(), 0, rule, 16).unwrap();
    assert_eq!(b.gradients, GradientMethod::FiniteDifference);
    for (p, q) in a.per_feature.iter().zip(&b.per_feature) {
        assert!((p - q).abs() < 1e-8, "{p} vs {q}");
    }
}

#[test]
fn soft_or_gradient_vanishes_while_integrated_gradients_split_evenly() {
    // f(a, b) = σ(10 a + 10 b - 5): saturated at (1, 1), where ∂f/∂a = 10 σ (1 - σ) ≈ 3e-6.
    // Integrated gradients from (0, 0) split f(1,1) - f(0,0) equally (the path is symmetric).
    let model = network(serde_json::json!({
        "format": "kilter-model", "version": 1, "kind": "mlp", "inputs": 2,
        "layers": [{"weights": [[10.0, 10.0]], "bias": [-5.0], "activation": "identity"},
                   {"weights": [[1.0]], "bias": [0.0], "activation": "sigmoid"}]
    }));
    let x = array![1.0, 1.0];
    let gradient = model
        .gradients(x.view().insert_axis(Axis(0)), 1)
        .unwrap()
        .unwrap();
    assert!(gradient[[0, 0]].abs() < 1e-5, "{}", gradient[[0, 0]]);
    let fd = FiniteDifference::new(&[1.0; 2], f64::EPSILON);
    let ig = integrated_gradients(
        &model,
        &fd,
        x.view(),
        array![[0.0, 0.0]].view(),
        1,
        QuadratureRule::GaussLegendre,
        32,
    )
    .unwrap();
    let total = ig.at_input - ig.at_baselines[0];
    assert!(total > 0.98, "{total}");
    assert!((ig.per_feature[0] - ig.per_feature[1]).abs() < 1e-12);
    assert!(
        (ig.per_feature[0] - total / 2.0).abs() < 1e-6,
        "{}",
        ig.per_feature[0]
    );
    // The gradient times the input ranks both features at almost nothing.
    assert!(gradient[[0, 0]] * x[0] < 1e-3 * ig.per_feature[0]);
}

#[test]
fn deletion_shapley_values_of_a_linear_model_are_weight_times_distance_to_the_fill() {
    // Lundberg & Lee 2017: under deletion to c, v(S) = f(x_S, c) is additive, so
    // φᵢ = wᵢ (xᵢ - c) exactly, for enumerated and for sampled designs alike.
    let w = [0.8, -0.3, 1.7, 0.0, -2.2, 0.4, 1.1, -0.9, 0.5, 0.25];
    let model = linear(&w, -0.5);
    let x: Array1<f64> = (0..10).map(|i| i as f64 * 0.37 - 1.2).collect();
    let c = 0.6;
    let deletion = Deletion::new(
        FillValue::Constant(c),
        &Array1::zeros(10),
        &Array1::zeros(10),
    );
    let names: Vec<String> = (0..10).map(|i| format!("f{i}")).collect();
    let groups = Groups::singletons(&names);
    let full = model.predict(x.view().insert_axis(Axis(0))).unwrap()[[0, 0]];
    let mut rng = ChaCha8Rng::seed_from_u64(7);
    for samples in [2000, 300] {
        let design = CoalitionDesign::shapley_kernel(10, samples, &mut rng);
        let game = evaluate_design(
            &model,
            &deletion,
            x.view(),
            &groups,
            &design,
            0,
            full,
            &mut rng,
        )
        .unwrap();
        for i in 0..10 {
            let expected = w[i] * (x[i] - c);
            let got = game.estimate.values[i];
            assert!(
                (got - expected).abs() < 1e-9,
                "{samples} samples, feature {i}: {got} vs {expected}"
            );
        }
    }
}

#[test]
fn replacement_shapley_values_of_a_linear_model_on_independent_features() {
    // Lundberg & Lee 2017: with independent features, marginal (and here also conditional
    // Gaussian, the covariance being nearly diagonal) replacement gives
    // φᵢ = wᵢ (xᵢ - E[xᵢ]). The estimate carries sampling noise from the draws; it must
    // lie within 4 of its own standard errors, plus the small dependence the shrunk
    // covariance of shuffled columns still holds.
    let data = breast_cancer_standardized();
    let independent = independent_columns(&data.values, 11);
    let d = 6;
    let rows = independent.slice(ndarray::s![.., ..d]).to_owned();
    let w = [1.0, -0.5, 0.8, 0.3, -1.2, 0.6];
    let model = linear(&w, 0.1);
    let mean = rows.mean_axis(Axis(0)).unwrap();
    let names: Vec<String> = (0..d).map(|i| format!("f{i}")).collect();
    let groups = Groups::singletons(&names);
    let x = array![1.2, -0.8, 0.4, 2.0, -1.5, 0.3];
    let full = model.predict(x.view().insert_axis(Axis(0))).unwrap()[[0, 0]];
    let design = CoalitionDesign::enumerate(d);
    let shared = Arc::new(rows.clone());
    let centred = &rows - &mean;
    let covariance = centred.t().dot(&centred) / rows.nrows() as f64;
    let diagonal = Array2::from_diag(&covariance.diag());
    let families: Vec<(&str, Box<dyn PerturbationFamily>)> = vec![
        ("marginal", Box::new(MarginalRows::new(shared, 400))),
        (
            "gaussian",
            Box::new(ConditionalGaussian::new(mean.clone(), diagonal, 400)),
        ),
    ];
    for (name, family) in families {
        let mut rng = ChaCha8Rng::seed_from_u64(5);
        let game = evaluate_design(
            &model,
            family.as_ref(),
            x.view(),
            &groups,
            &design,
            0,
            full,
            &mut rng,
        )
        .unwrap();
        // Exhaustive design: no coalition-sampling error; the draws' error is that of a
        // mean of 400 draws per coalition, about sd/20 ≈ 0.05 per feature weight.
        for i in 0..d {
            let expected = w[i] * (x[i] - mean[i]);
            let got = game.estimate.values[i];
            assert!(
                (got - expected).abs() < 0.06,
                "{name}, feature {i}: {got} vs {expected}"
            );
        }
    }
}

#[test]
fn conditional_gaussian_draws_match_the_closed_form() {
    // Anderson (2003), Thm 2.5.1, on μ = (1, -2, 0.5) and
    //     Σ = [[4, 1.2, -0.8], [1.2, 2, 0.6], [-0.8, 0.6, 1]],
    // keeping x₂ = 1 (the second feature) and masking the other two:
    //     mean = μ_U + Σ_U2 (1 - (-2)) / 2 = (1 + 1.2·1.5, 0.5 + 0.6·1.5) = (2.8, 1.4)
    //     cov  = Σ_UU - Σ_U2 Σ_2U / 2 = [[4 - 0.72, -0.8 - 0.36], [-1.16, 1 - 0.18]]
    //          = [[3.28, -1.16], [-1.16, 0.82]].
    let mu = array![1.0, -2.0, 0.5];
    let sigma = array![[4.0, 1.2, -0.8], [1.2, 2.0, 0.6], [-0.8, 0.6, 1.0]];
    let sampler = ConditionalGaussian::new(mu, sigma, 1);
    let x = array![9.0, 1.0, 9.0];
    let kept = [false, true, false];
    let (mean, cov) = sampler.conditional_moments(x.view(), &kept).unwrap();
    let expected_mean = [2.8, 1.4];
    let expected_cov = [[3.28, -1.16], [-1.16, 0.82]];
    for a in 0..2 {
        assert!((mean[a] - expected_mean[a]).abs() < 1e-12, "{mean}");
        for b in 0..2 {
            assert!((cov[[a, b]] - expected_cov[a][b]).abs() < 1e-12, "{cov}");
        }
    }
    // Draws: the sample moments of 40,000 draws lie within 5 standard errors.
    let n = 40_000;
    let mut out = Array2::<f64>::zeros((n, 3));
    let mut rng = ChaCha8Rng::seed_from_u64(2);
    sampler
        .fill(x.view(), &kept, &mut rng, out.view_mut())
        .unwrap();
    assert!(
        out.column(1).iter().all(|&v| v == 1.0),
        "kept feature untouched"
    );
    let masked = out.select(Axis(1), &[0, 2]);
    let m = masked.mean_axis(Axis(0)).unwrap();
    let c = {
        let z = &masked - &m;
        z.t().dot(&z) / n as f64
    };
    for a in 0..2 {
        let se = (expected_cov[a][a] / n as f64).sqrt();
        assert!(
            (m[a] - expected_mean[a]).abs() < 5.0 * se,
            "mean {a}: {}",
            m[a]
        );
        for b in 0..2 {
            // Var of a sample covariance: (σ_aa σ_bb + σ_ab²) / n.
            let se = ((expected_cov[a][a] * expected_cov[b][b] + expected_cov[a][b].powi(2))
                / n as f64)
                .sqrt();
            assert!(
                (c[[a, b]] - expected_cov[a][b]).abs() < 5.0 * se,
                "cov {a}{b}: {}",
                c[[a, b]]
            );
        }
    }
}

#[test]
fn the_mask_design_is_shared_and_seeded() {
    // The same seed gives the same design; deletion and replacement read the same one.
    let mut a = ChaCha8Rng::seed_from_u64(42);
    let mut b = ChaCha8Rng::seed_from_u64(42);
    let da = CoalitionDesign::shapley_kernel(12, 500, &mut a);
    let db = CoalitionDesign::shapley_kernel(12, 500, &mut b);
    assert_eq!(da, db);
    assert_eq!(da.coalitions().len(), 500);
}
