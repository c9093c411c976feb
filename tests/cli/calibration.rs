//! The conformal guarantee and the holdout split.
//!
//! For calibration scores exchangeable with a new score, the conformal p-value satisfies
//! `P(p ≤ α) = ⌊α (n + 1)⌋ / (n + 1) ≤ α` when scores have no ties (Vovk, Gammerman &
//! Shafer 2005, "Algorithmic Learning in a Random World", ch. 2). The test draws many
//! seeded reference corpora from one Gaussian, fits a profile with held-out calibration,
//! scores fresh draws from the same Gaussian, and checks the observed rejection rate
//! against that value, with a tolerance of four standard errors of the mean over seeds.

use ndarray::Array2;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, Normal};

use kilter::corpus::FeatureMatrix;
use kilter::profile::ProfileSettings;

const DIM: usize = 3;

/// Rows from a correlated 3-D Gaussian: x = A z with a fixed mixing matrix.
fn gaussian_rows(rows: usize, rng: &mut ChaCha8Rng) -> Array2<f64> {
    let mix = [[1.0, 0.0, 0.0], [0.8, 0.6, 0.0], [0.3, -0.4, 0.9]];
    let normal = Normal::new(0.0, 1.0).unwrap();
    let z: Vec<f64> = (0..rows * DIM).map(|_| normal.sample(rng)).collect();
    let z = Array2::from_shape_vec((rows, DIM), z).unwrap();
    Array2::from_shape_fn((rows, DIM), |(r, i)| {
        (0..DIM).map(|j| mix[i][j] * z[[r, j]]).sum()
    })
}

fn matrix(values: Array2<f64>) -> FeatureMatrix {
    FeatureMatrix {
        names: (0..DIM).map(|i| format!("x{i}")).collect(),
        named: true,
        values,
        source: "generated".into(),
    }
}

struct Rates {
    mean: f64,
    standard_error: f64,
}

fn rates(per_seed: &[f64]) -> Rates {
    let n = per_seed.len() as f64;
    let mean = per_seed.iter().sum::<f64>() / n;
    let var = per_seed.iter().map(|r| (r - mean).powi(2)).sum::<f64>() / (n - 1.0);
    Rates {
        mean,
        standard_error: (var / n).sqrt(),
    }
}

#[test]
fn conformal_p_values_hold_their_level_on_exchangeable_data() {
    const SEEDS: u64 = 150;
    const REFERENCE: usize = 400;
    const QUERIES: usize = 200;
    const ALPHA: f64 = 0.1;
    let settings = ProfileSettings {
        holdout: 0.5,
        k: 10,
        ..ProfileSettings::default()
    };
    let n_cal = (REFERENCE as f64 * settings.holdout).round();
    let exact = (ALPHA * (n_cal + 1.0)).floor() / (n_cal + 1.0);

    let (mut maha, mut knn, mut combined) = (Vec::new(), Vec::new(), Vec::new());
    for seed in 0..SEEDS {
        let mut rng = ChaCha8Rng::seed_from_u64(1000 + seed);
        let reference = matrix(gaussian_rows(REFERENCE, &mut rng));
        let queries = gaussian_rows(QUERIES, &mut rng);
        let profile = ProfileSettings {
            seed,
            ..settings.clone()
        }
        .fit(&reference)
        .unwrap();
        let records = profile.score(queries.view(), 0, ALPHA).unwrap();
        let rate = |f: &dyn Fn(&kilter::profile::ScoreRecord) -> bool| {
            records.iter().filter(|r| f(r)).count() as f64 / QUERIES as f64
        };
        maha.push(rate(&|r| r.p_mahalanobis <= ALPHA));
        knn.push(rate(&|r| r.p_knn <= ALPHA));
        combined.push(rate(&|r| r.p_combined <= ALPHA));
    }
    for (name, per_seed) in [("p_mahalanobis", &maha), ("p_knn", &knn)] {
        let r = rates(per_seed);
        let slack = 4.0 * r.standard_error;
        assert!(
            (r.mean - exact).abs() <= slack,
            "{name}: rejection rate {:.4} at alpha {ALPHA}, theory {exact:.4} ± {slack:.4}",
            r.mean
        );
    }
    // The Bonferroni combination is valid (never above alpha) but conservative.
    let r = rates(&combined);
    assert!(
        r.mean <= ALPHA + 4.0 * r.standard_error,
        "p_combined rate {:.4}",
        r.mean
    );
    assert!(
        r.mean > 0.25 * ALPHA,
        "p_combined is uselessly conservative: {:.4}",
        r.mean
    );
}

#[test]
fn holdout_splits_rows_by_seed() {
    let mut rng = ChaCha8Rng::seed_from_u64(5);
    let reference = matrix(gaussian_rows(101, &mut rng));
    let settings = ProfileSettings {
        holdout: 0.3,
        ..ProfileSettings::default()
    };
    let a = settings.fit(&reference).unwrap();
    assert_eq!(a.calibration_mahalanobis().len(), 30); // round(0.3 * 101)
    assert_eq!(a.fitted_rows(), 71);
    let again = settings.fit(&reference).unwrap();
    assert_eq!(a.to_bytes(), again.to_bytes(), "same seed, same profile");
    let other = ProfileSettings {
        seed: 1,
        ..settings.clone()
    }
    .fit(&reference)
    .unwrap();
    assert_ne!(
        a.to_bytes(),
        other.to_bytes(),
        "another seed, another split"
    );

    let in_sample = ProfileSettings {
        holdout: 0.0,
        ..settings.clone()
    }
    .fit(&reference)
    .unwrap();
    assert_eq!(in_sample.fitted_rows(), 101);
    assert_eq!(in_sample.calibration_knn().len(), 101);
}
