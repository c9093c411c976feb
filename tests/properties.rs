//! Property tests: invariants that must hold for every input, each named with its source,
//! checked on inputs proptest generates and on rows of the open wine and iris corpora
//! (reference-corpora/PROVENANCE.md). Case counts stay at a few dozen so that `cargo test`
//! stays quick; every random draw inside a case comes from a proptest-chosen seed, so a
//! failure shrinks and replays.

use std::path::Path;

use nalgebra::DMatrix;
use ndarray::{Array1, Array2, ArrayView1, Axis};
use proptest::prelude::*;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

use kilter::attribution::{integrated_gradients, CoalitionDesign, QuadratureRule};
use kilter::corpus::{read_matrix, CsvOptions, FeatureMatrix};
use kilter::groups::Groups;
use kilter::models::network::{Activation, Kind, LayerFile, ModelFile};
use kilter::models::{FiniteDifference, Model, NetworkModel};
use kilter::neighbours::{BruteForceIndex, Exclusion, NeighbourIndex};
use kilter::perturbation::masking::evaluate_design;
use kilter::perturbation::{ConditionalGaussian, Deletion, FillValue, PerturbationFamily};
use kilter::profile::ProfileSettings;
use kilter::stats::{CalibrationScores, CovarianceMethod, MahalanobisModel};

fn corpus(name: &str, label: &str) -> FeatureMatrix {
    let path = Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("reference-corpora")
        .join(name);
    let options = CsvOptions {
        id_columns: vec![],
        label_columns: vec![label.into()],
    };
    read_matrix(&path, &options).expect("the corpus reads")
}

/// `max |a - b|` over `max(scale, 1e-300)`.
fn relative_gap(a: &[f64], b: &[f64], scale: f64) -> f64 {
    assert_eq!(a.len(), b.len());
    a.iter()
        .zip(b)
        .map(|(x, y)| (x - y).abs())
        .fold(0.0, f64::max)
        / scale.max(1e-300)
}

fn largest_magnitude(values: &[f64]) -> f64 {
    values.iter().fold(0.0, |m, v| m.max(v.abs()))
}

/// `v[perm]`: entry j of the result is entry `perm[j]` of `v`.
fn permuted(v: ArrayView1<'_, f64>, perm: &[usize]) -> Array1<f64> {
    perm.iter().map(|&p| v[p]).collect()
}

/// A shuffled `0..n`.
fn permutation(n: usize) -> impl Strategy<Value = Vec<usize>> {
    Just((0..n).collect::<Vec<_>>()).prop_shuffle()
}

// ---------------------------------------------------------------------------------------
// Neighbour index: exact k-NN by definition.
// ---------------------------------------------------------------------------------------

/// The definition of the k nearest neighbours: every squared Euclidean distance computed
/// directly in double precision, sorted by distance and then by index.
fn naive_neighbours(
    rows: &Array2<f64>,
    query: ArrayView1<'_, f64>,
    own: Option<usize>,
    k: usize,
) -> Vec<(f64, usize)> {
    let mut all: Vec<(f64, usize)> = rows
        .outer_iter()
        .enumerate()
        .filter(|(i, _)| Some(*i) != own)
        .map(|(i, r)| {
            let d2: f64 = query.iter().zip(r).map(|(a, b)| (a - b) * (a - b)).sum();
            (d2, i)
        })
        .collect();
    all.sort_by(|a, b| a.0.total_cmp(&b.0).then(a.1.cmp(&b.1)));
    all.truncate(k);
    all
}

/// Points of a coarse integer grid scaled by a power of two and shifted by an integer:
/// every coordinate difference, square and sum is then exact in double precision, so the
/// index and the definition must agree bit for bit, and many distances tie exactly,
/// which exercises the order among ties (by index).
fn grid(cells: &[i8], d: usize, exponent: i32, offset: f64) -> Array2<f64> {
    let scale = 2f64.powi(exponent);
    Array2::from_shape_fn((cells.len() / d, d), |(i, j)| {
        offset + scale * f64::from(cells[i * d + j])
    })
}

fn grid_case() -> impl Strategy<Value = (usize, Vec<i8>, Vec<i8>, usize, i32, f64)> {
    (2usize..70, 1usize..6, 1usize..25).prop_flat_map(|(n, d, m)| {
        (
            Just(d),
            proptest::collection::vec(-3i8..=3, n * d),
            proptest::collection::vec(-4i8..=4, m * d),
            1..n,
            -3i32..4,
            prop_oneof![Just(0.0), Just(1e6), Just(-4096.0)],
        )
    })
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(48))]

    /// The index returns exactly the neighbours of the definition, ties ordered by index,
    /// for new queries and in-sample (each row's own index excluded, duplicates kept).
    #[test]
    fn index_equals_the_definition_ties_by_index(
        (d, cells, query_cells, k, exponent, offset) in grid_case()
    ) {
        let rows = grid(&cells, d, exponent, offset);
        let queries = grid(&query_cells, d, exponent, offset);
        let index = BruteForceIndex::new(rows.clone());
        for (qs, exclusion) in [(&queries, Exclusion::None), (&rows, Exclusion::SameIndex)] {
            let got = index.k_nearest(qs.view(), k, exclusion).unwrap();
            for (qi, q) in qs.outer_iter().enumerate() {
                let own = (exclusion == Exclusion::SameIndex).then_some(qi);
                let want = naive_neighbours(&rows, q, own, k);
                let got_pairs: Vec<(f64, usize)> = (0..k)
                    .map(|j| (got.distances[[qi, j]], got.indices[[qi, j]]))
                    .collect();
                let want_pairs: Vec<(f64, usize)> =
                    want.iter().map(|&(d2, i)| (d2.sqrt(), i)).collect();
                prop_assert_eq!(got_pairs, want_pairs, "query {} ({:?})", qi, exclusion);
            }
        }
    }

    /// Euclidean distance is a metric: non-negative, zero from a point to itself, and
    /// symmetric. Querying set A against an index of set B and B against an index of A
    /// must report the same distance for every pair, bit for bit.
    #[test]
    fn index_distances_are_symmetric_and_non_negative(
        (d, cells, query_cells, _k, exponent, offset) in grid_case(),
        spread in 0.0f64..3.0,
        seed in any::<u64>(),
    ) {
        // Off the grid as well: a seeded jitter of the grid points.
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let jitter = |m: Array2<f64>, rng: &mut ChaCha8Rng| {
            m.mapv(|v| v + spread * rand::Rng::random::<f64>(rng))
        };
        let a = jitter(grid(&cells, d, exponent, offset), &mut rng);
        let b = jitter(grid(&query_cells, d, exponent, offset), &mut rng);
        let from_a = BruteForceIndex::new(b.clone())
            .k_nearest(a.view(), b.nrows(), Exclusion::None)
            .unwrap();
        let from_b = BruteForceIndex::new(a.clone())
            .k_nearest(b.view(), a.nrows(), Exclusion::None)
            .unwrap();
        let mut ab = Array2::<f64>::from_elem((a.nrows(), b.nrows()), f64::NAN);
        for ((i, j), &bj) in from_a.indices.indexed_iter() {
            ab[[i, bj]] = from_a.distances[[i, j]];
        }
        for ((j, l), &ai) in from_b.indices.indexed_iter() {
            let there = ab[[ai, j]];
            let back = from_b.distances[[j, l]];
            prop_assert!(back >= 0.0);
            prop_assert_eq!(there.to_bits(), back.to_bits(), "pair ({}, {})", ai, j);
        }
        // Every pair was reported once in each direction (no NaN left).
        prop_assert!(ab.iter().all(|v| *v >= 0.0));
        let selves = BruteForceIndex::new(a.clone())
            .k_nearest(a.view(), 1, Exclusion::None)
            .unwrap();
        prop_assert!(selves.distances.iter().all(|&v| v == 0.0));
    }
}

// ---------------------------------------------------------------------------------------
// Mahalanobis distance.
// ---------------------------------------------------------------------------------------

/// Rows of uniform values on [-5, 5], from a seed.
fn uniform_rows(n: usize, d: usize, seed: u64) -> Array2<f64> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    Array2::from_shape_fn((n, d), |_| rand::Rng::random_range(&mut rng, -5.0..5.0))
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(48))]

    /// Under the empirical (maximum-likelihood) covariance the squared Mahalanobis distance
    /// is invariant to an affine change of coordinates y = A x + b with A invertible: the
    /// mean maps to A m + b and the covariance to A S Aᵀ, so (y - m_y)ᵀ (A S Aᵀ)⁻¹ (y - m_y)
    /// = (x - m)ᵀ S⁻¹ (x - m) (a textbook fact, e.g. Mardia, Kent & Bibby 1979, §2.2,
    /// from memory). It is non-negative, and its mean over the fitted rows is exactly d,
    /// since Σᵢ (xᵢ - m)ᵀ S⁻¹ (xᵢ - m) = n tr(S⁻¹ S) = n d (the trace identity).
    ///
    /// A is lower triangular with diagonal in [1, 2] and other entries in [-0.5, 0.5],
    /// d ≤ 6, and the data are uniform with n ≥ 4d rows: both covariances have modest
    /// condition numbers (well below 1e6), so the two double-precision computations agree
    /// to about κ d ε ≈ 1e-9; 1e-7 of the distance's scale leaves room.
    #[test]
    fn mahalanobis_is_affine_invariant_under_the_empirical_covariance(
        d in 1usize..7,
        extra in 0usize..40,
        seed in any::<u64>(),
    ) {
        let n = 4 * d + 2 + extra;
        let x = uniform_rows(n, d, seed);
        let queries = uniform_rows(20, d, seed ^ 0x9e37_79b9).mapv(|v| 3.0 * v);
        let mut rng = ChaCha8Rng::seed_from_u64(seed.rotate_left(17));
        let a = Array2::from_shape_fn((d, d), |(i, j)| match i.cmp(&j) {
            std::cmp::Ordering::Equal => rand::Rng::random_range(&mut rng, 1.0..2.0),
            std::cmp::Ordering::Greater => rand::Rng::random_range(&mut rng, -0.5..0.5),
            std::cmp::Ordering::Less => 0.0,
        });
        let b = Array1::from_shape_fn(d, |_| rand::Rng::random_range(&mut rng, -100.0..100.0));
        let transform = |m: &Array2<f64>| m.dot(&a.t()) + &b;

        let fit = |rows: &Array2<f64>| {
            let estimate = CovarianceMethod::Empirical.estimate(rows.view()).unwrap();
            MahalanobisModel::new(&estimate, rows.nrows())
        };
        let (Ok(original), Ok(changed)) = (fit(&x), fit(&transform(&x))) else {
            // A uniform sample of n >= 4d rows is singular with probability 0.
            return Err(TestCaseError::fail("the empirical covariance was refused"));
        };
        for (rows, what) in [(&x, "fitted rows"), (&queries, "queries")] {
            let before = original.squared_distances(rows.view()).to_vec();
            let after = changed.squared_distances(transform(rows).view()).to_vec();
            prop_assert!(before.iter().chain(&after).all(|&v| v >= 0.0));
            let gap = relative_gap(&before, &after, largest_magnitude(&before).max(1.0));
            prop_assert!(gap < 1e-7, "{}: relative gap {:e}", what, gap);
        }
        let in_sample = original.squared_distances(x.view());
        let mean = in_sample.sum() / n as f64;
        prop_assert!((mean - d as f64).abs() < 1e-9 * d as f64, "mean d2 {} for d = {}", mean, d);
    }
}

// ---------------------------------------------------------------------------------------
// Conformal p-values.
// ---------------------------------------------------------------------------------------

/// SPEC (`kilter score`): `(1 + #{calibration scores >= s}) / (1 + n_cal)`, counted
/// directly over the unsorted scores.
fn conformal_by_definition(calibration: &[f64], s: f64) -> f64 {
    let at_or_above = calibration.iter().filter(|&&c| c >= s).count();
    (1 + at_or_above) as f64 / (1 + calibration.len()) as f64
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(64))]

    /// p-values equal the SPEC formula exactly, ties counted against the query, and lie in
    /// (0, 1]. Scores on a quarter grid make ties frequent; queries fall on the grid,
    /// between its points and outside its range.
    #[test]
    fn conformal_p_values_follow_the_definition(
        grid_scores in proptest::collection::vec(0u8..24, 1..80),
        queries in proptest::collection::vec(-8i32..120, 1..40),
    ) {
        let calibration: Vec<f64> = grid_scores.iter().map(|&v| f64::from(v) / 4.0).collect();
        let scores = CalibrationScores::new(calibration.clone());
        for q in queries {
            let s = f64::from(q) / 16.0;
            let p = scores.p_value(s);
            prop_assert!(p > 0.0 && p <= 1.0);
            prop_assert_eq!(p, conformal_by_definition(&calibration, s), "score {}", s);
        }
    }
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(12))]

    /// The same formula in the records of a profile fitted on the open iris corpus, for
    /// both scores, with p_combined = min(1, 2 min(p_mahalanobis, p_knn)) (SPEC).
    #[test]
    fn score_records_carry_the_conformal_definition(
        holdout in prop_oneof![Just(0.0), Just(0.2), Just(0.4)],
        seed in any::<u64>(),
        spread in 0.1f64..4.0,
    ) {
        let iris = corpus("iris.csv", "species");
        let settings = ProfileSettings { holdout, seed, k: 5, ..ProfileSettings::default() };
        let profile = settings.fit(&iris).unwrap();
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let location = profile.feature_distribution().unwrap().location().clone();
        let scale = profile.feature_distribution().unwrap().scale().clone();
        let queries = Array2::from_shape_fn((30, 4), |(_, j)| {
            location[j] + spread * scale[j] * rand::Rng::random_range(&mut rng, -2.0..2.0)
        });
        let records = profile.score(queries.view(), 0, 0.05).unwrap();
        let cal_m = profile.calibration_mahalanobis().sorted().to_vec();
        let cal_k = profile.calibration_knn().sorted().to_vec();
        for r in &records {
            prop_assert_eq!(r.p_mahalanobis, conformal_by_definition(&cal_m, r.mahalanobis_d2));
            prop_assert_eq!(r.p_knn, conformal_by_definition(&cal_k, r.knn_kth));
            prop_assert_eq!(r.p_combined, (2.0 * r.p_mahalanobis.min(r.p_knn)).min(1.0));
            prop_assert!(r.p_combined > 0.0 && r.p_combined <= 1.0);
        }
    }
}

// ---------------------------------------------------------------------------------------
// The conditional Gaussian sampler.
// ---------------------------------------------------------------------------------------

/// A covariance B Bᵀ + 0.1 I (B uniform on [-1, 1]): symmetric positive definite, with
/// eigenvalues in [0.1, 0.1 + d²], so a condition number below 400 for d ≤ 6.
fn random_covariance(d: usize, rng: &mut ChaCha8Rng) -> Array2<f64> {
    let b = Array2::from_shape_fn((d, d), |_| rand::Rng::random_range(&mut *rng, -1.0..1.0));
    b.dot(&b.t()) + Array2::<f64>::eye(d) * 0.1
}

/// The conditional moments of a multivariate normal by the Schur complement, with an
/// explicit inverse of Σ_KK (nalgebra's LU), independently of the sampler's Cholesky
/// route: mean μ_U + Σ_UK Σ_KK⁻¹ (x_K - μ_K), covariance Σ_UU - Σ_UK Σ_KK⁻¹ Σ_KU
/// (Anderson 2003, "An Introduction to Multivariate Statistical Analysis", Theorem 2.5.1).
fn schur_moments(
    mu: &Array1<f64>,
    sigma: &Array2<f64>,
    x: &Array1<f64>,
    kept: &[bool],
) -> (Vec<f64>, DMatrix<f64>) {
    let k: Vec<usize> = (0..kept.len()).filter(|&i| kept[i]).collect();
    let u: Vec<usize> = (0..kept.len()).filter(|&i| !kept[i]).collect();
    let sub =
        |r: &[usize], c: &[usize]| DMatrix::from_fn(r.len(), c.len(), |a, b| sigma[[r[a], c[b]]]);
    let s_uu = sub(&u, &u);
    if k.is_empty() {
        return (u.iter().map(|&i| mu[i]).collect(), s_uu);
    }
    let s_uk = sub(&u, &k);
    let s_kk_inv = sub(&k, &k)
        .try_inverse()
        .expect("Σ_KK is positive definite");
    let dev = nalgebra::DVector::from_iterator(k.len(), k.iter().map(|&i| x[i] - mu[i]));
    let shift = &s_uk * &s_kk_inv * dev;
    let mean = u
        .iter()
        .enumerate()
        .map(|(a, &i)| mu[i] + shift[a])
        .collect();
    let cov = s_uu - &s_uk * &s_kk_inv * s_uk.transpose();
    (mean, cov)
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(24))]

    /// The sampler's conditional mean and covariance equal the Schur-complement formula,
    /// and the moments of many draws approach them.
    ///
    /// Formula: Σ_KK has condition number below 400, so the Cholesky and LU routes agree
    /// to about 400 d ε ≈ 1e-12 of the covariance's scale; 1e-9 leaves room.
    ///
    /// Draws: 40 000 draws in antithetic pairs (z, -z) give 20 000 independent normal
    /// vectors (the first of each pair). Around the known mean m their sample mean has
    /// standard deviation sqrt(C_ii / n) and the sample covariance S_ij = mean of
    /// (x_i - m_i)(x_j - m_j) has variance (C_ii C_jj + C_ij²) / n (Isserlis' theorem for
    /// the fourth moments of a normal). Every entry must lie within 5 of those standard
    /// deviations: with at most 6 + 21 entries per case, a correct sampler fails a case
    /// with probability below 27 × 6e-7. The mean of each antithetic pair is the
    /// conditional mean up to rounding, and kept features are copied unchanged.
    #[test]
    fn conditional_gaussian_matches_the_schur_complement(
        d in 2usize..7,
        kept_bits in any::<u8>(),
        seed in any::<u64>(),
    ) {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let sigma = random_covariance(d, &mut rng);
        let mu = Array1::from_shape_fn(d, |_| rand::Rng::random_range(&mut rng, -3.0..3.0));
        let x = Array1::from_shape_fn(d, |_| rand::Rng::random_range(&mut rng, -6.0..6.0));
        let mut kept: Vec<bool> = (0..d).map(|i| kept_bits >> i & 1 == 1).collect();
        kept[0] = false; // at least one masked feature

        let sampler = ConditionalGaussian::new(mu.clone(), sigma.clone(), 2);
        let (mean, cov) = sampler.conditional_moments(x.view(), &kept).unwrap();
        let (want_mean, want_cov) = schur_moments(&mu, &sigma, &x, &kept);
        let u = want_mean.len();
        let scale = largest_magnitude(sigma.as_slice().unwrap());
        let mean_gap = relative_gap(mean.as_slice().unwrap(), &want_mean, scale.max(1.0));
        prop_assert!(mean_gap < 1e-9, "mean gap {:e}", mean_gap);
        let cov_flat: Vec<f64> = cov.iter().copied().collect();
        let want_flat: Vec<f64> = (0..u)
            .flat_map(|i| (0..u).map(move |j| (i, j)))
            .map(|(i, j)| want_cov[(i, j)])
            .collect();
        let cov_gap = relative_gap(&cov_flat, &want_flat, scale);
        prop_assert!(cov_gap < 1e-9, "covariance gap {:e}", cov_gap);

        let draws = 40_000;
        let mut out = Array2::<f64>::zeros((draws, d));
        let mut draw_rng = ChaCha8Rng::seed_from_u64(seed ^ 0x5eed);
        sampler.fill(x.view(), &kept, &mut draw_rng, out.view_mut()).unwrap();
        let masked: Vec<usize> = (0..d).filter(|&i| !kept[i]).collect();
        for row in out.outer_iter() {
            for i in (0..d).filter(|&i| kept[i]) {
                prop_assert_eq!(row[i], x[i]);
            }
        }
        for pair in out.axis_chunks_iter(Axis(0), 2) {
            for (a, &i) in masked.iter().enumerate() {
                let centre = 0.5 * (pair[[0, i]] + pair[[1, i]]);
                prop_assert!((centre - want_mean[a]).abs() < 1e-9 * (1.0 + want_mean[a].abs()));
            }
        }
        let firsts: Vec<usize> = (0..draws).step_by(2).collect();
        let n = firsts.len() as f64;
        for (a, &i) in masked.iter().enumerate() {
            let sample_mean = firsts.iter().map(|&r| out[[r, i]]).sum::<f64>() / n;
            let sd = (want_cov[(a, a)] / n).sqrt();
            prop_assert!(
                (sample_mean - want_mean[a]).abs() < 5.0 * sd,
                "mean of feature {}: {} against {} (sd {:e})", i, sample_mean, want_mean[a], sd
            );
            for (b, &j) in masked.iter().enumerate().skip(a) {
                let s_ij = firsts
                    .iter()
                    .map(|&r| (out[[r, i]] - want_mean[a]) * (out[[r, j]] - want_mean[b]))
                    .sum::<f64>()
                    / n;
                let c = want_cov[(a, b)];
                let sd = ((want_cov[(a, a)] * want_cov[(b, b)] + c * c) / n).sqrt();
                prop_assert!(
                    (s_ij - c).abs() < 5.0 * sd,
                    "covariance ({}, {}): {} against {} (sd {:e})", i, j, s_ij, c, sd
                );
            }
        }
    }
}

// ---------------------------------------------------------------------------------------
// Attributions and the order of the features.
// ---------------------------------------------------------------------------------------

/// The first `d` wine features, standardized (population sd), as a named matrix.
fn wine_features(d: usize) -> FeatureMatrix {
    let wine = corpus("wine.csv", "cultivar");
    let values = wine.values.slice(ndarray::s![.., ..d]).to_owned();
    let mean = values.mean_axis(Axis(0)).unwrap();
    let sd = values.std_axis(Axis(0), 0.0);
    FeatureMatrix {
        names: wine.names[..d].to_vec(),
        named: true,
        values: (&values - &mean) / &sd,
        source: wine.source,
    }
}

/// Columns in the order `perm` (column j of the result is column `perm[j]`).
fn permuted_columns(m: &FeatureMatrix, perm: &[usize]) -> FeatureMatrix {
    FeatureMatrix {
        names: perm.iter().map(|&p| m.names[p].clone()).collect(),
        named: true,
        values: m.values.select(Axis(1), perm),
        source: m.source.clone(),
    }
}

/// A d → 4 (tanh) → 2 (softmax) network; with `perm` the first layer's weight columns
/// are taken in that order, so that the permuted network on permuted inputs computes the
/// same function.
fn network(d: usize, weights: &[f64], perm: &[usize]) -> NetworkModel {
    let w = |i: usize| weights[i % weights.len()];
    let hidden = (0..4)
        .map(|h| perm.iter().map(|&p| w(h * d + p)).collect())
        .collect();
    let file = ModelFile {
        format: "kilter-model".into(),
        version: 1,
        kind: Kind::Mlp,
        inputs: d,
        layers: vec![
            LayerFile {
                weights: hidden,
                bias: (0..4).map(|h| w(100 + h)).collect(),
                activation: Activation::Tanh,
            },
            LayerFile {
                weights: (0..2)
                    .map(|c| (0..4).map(|h| w(200 + 4 * c + h)).collect())
                    .collect(),
                bias: vec![w(300), w(301)],
                activation: Activation::Softmax,
            },
        ],
        description: None,
    };
    NetworkModel::from_file(file, "permutation test network").unwrap()
}

/// Groups of feature indices written as a `--groups` file and read back.
fn groups_of(members: &[Vec<usize>], names: &[String]) -> Groups {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("groups.json");
    std::fs::write(&path, serde_json::to_string(members).unwrap()).unwrap();
    Groups::from_json_file(&path, names).unwrap()
}

/// A permutation problem: `d` features, each assigned to one of up to `g` groups
/// (features of no group never happen here), the feature order `perm`, the group order
/// `group_perm` (applied to the non-empty groups), a wine row as input, the network's
/// weights and a seed.
fn permutation_case(
) -> impl Strategy<Value = (Vec<usize>, Vec<usize>, Vec<usize>, usize, Vec<f64>, u64)> {
    (2usize..7).prop_flat_map(|d| {
        (
            permutation(d),
            proptest::collection::vec(0usize..4, d),
            permutation(4),
            0usize..178,
            proptest::collection::vec(-1.5f64..1.5, 302),
            any::<u64>(),
        )
    })
}

/// The groups as member lists (non-empty groups, in label order).
fn member_lists(labels: &[usize]) -> Vec<Vec<usize>> {
    (0..4)
        .map(|g| {
            (0..labels.len())
                .filter(|&i| labels[i] == g)
                .collect::<Vec<_>>()
        })
        .filter(|m| !m.is_empty())
        .collect()
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(24))]

    /// Attributions do not depend on the order in which features are listed: permuting
    /// the features of the input, the baseline and the network's input weights permutes
    /// integrated gradients the same way (the integrand is the same function of the path
    /// parameter, Sundararajan et al. 2017's definition). Back-propagation sums the first
    /// layer's products in another order, so values agree to rounding: d ≤ 6 products of
    /// magnitude below 10, 1e-12 of the largest attribution (plus 1e-15) leaves room.
    #[test]
    fn integrated_gradients_follow_a_permutation_of_the_features(
        (perm, _labels, _group_perm, row, weights, seed) in permutation_case()
    ) {
        let d = perm.len();
        let wine = wine_features(d);
        let identity: Vec<usize> = (0..d).collect();
        let model = network(d, &weights, &identity);
        let model_p = network(d, &weights, &perm);
        let input = wine.values.row(row).to_owned();
        let baseline_row = (row + 1 + (seed % 177) as usize) % 178;
        let baseline = wine.values.row(baseline_row).insert_axis(Axis(0)).to_owned();
        let differences = FiniteDifference::new(&vec![1.0; d], f64::EPSILON);
        for rule in [QuadratureRule::Midpoint, QuadratureRule::GaussLegendre] {
            let ig = integrated_gradients(
                &model, &differences, input.view(), baseline.view(), 1, rule, 16,
            ).unwrap();
            let baseline_p = baseline.select(Axis(1), &perm);
            let ig_p = integrated_gradients(
                &model_p, &differences, permuted(input.view(), &perm).view(),
                baseline_p.view(), 1, rule, 16,
            ).unwrap();
            let want = permuted(ig.per_feature.view(), &perm).to_vec();
            let got = ig_p.per_feature.to_vec();
            let scale = largest_magnitude(&want) + 1e-15;
            prop_assert!(relative_gap(&got, &want, scale) < 1e-12, "{:?} against {:?}", got, want);
            prop_assert!((ig.at_input - ig_p.at_input).abs() < 1e-14);
        }
    }

    /// Shapley values are symmetric in the players (Shapley 1953): relabelling the groups
    /// relabels their values. With features permuted as above, the reference (the wine
    /// rows behind the profile) permuted with them, and the groups listed in another
    /// order, the exact Shapley values of deletion (to zero and to the profile's mean)
    /// over every coalition come out in the groups' new order. The kernel estimator
    /// solves a small least-squares problem in another order, so to rounding: 1e-10 of the
    /// largest value (the normal matrix of the exact design for at most 4 groups is well
    /// conditioned).
    ///
    /// A sampled design draws coalitions of group indices, so relabelling the groups
    /// changes which masks are drawn and the estimates cannot be equal; with the group
    /// order kept and only the features permuted, the same seed draws the same masks over
    /// the same features, and the sampled estimates must agree to the same rounding.
    #[test]
    fn shapley_values_follow_a_relabelling_of_features_and_groups(
        (perm, labels, group_perm, row, weights, seed) in permutation_case()
    ) {
        let d = perm.len();
        let wine = wine_features(d);
        let wine_p = permuted_columns(&wine, &perm);
        // perm[j] is the original feature at new position j; inverse[i] its new position.
        let mut inverse = vec![0; d];
        for (j, &p) in perm.iter().enumerate() {
            inverse[p] = j;
        }
        let identity: Vec<usize> = (0..d).collect();
        let model = network(d, &weights, &identity);
        let model_p = network(d, &weights, &perm);
        let settings = ProfileSettings { k: 5, ..ProfileSettings::default() };
        let profile = settings.fit(&wine).unwrap();
        let profile_p = settings.fit(&wine_p).unwrap();
        let mean = profile.feature_distribution().unwrap().location().clone();
        let mean_p = profile_p.feature_distribution().unwrap().location().clone();
        prop_assert!(relative_gap(
            mean_p.as_slice().unwrap(), permuted(mean.view(), &perm).as_slice().unwrap(), 1.0,
        ) < 1e-15);

        let members = member_lists(&labels);
        let g = members.len();
        // The groups' new order: the non-empty groups ranked by group_perm.
        let mut order: Vec<usize> = (0..g).collect();
        order.sort_by_key(|&h| group_perm[h]);
        let members_p: Vec<Vec<usize>> = order
            .iter()
            .map(|&h| members[h].iter().map(|&i| inverse[i]).collect())
            .collect();
        let members_same_order: Vec<Vec<usize>> = members
            .iter()
            .map(|m| m.iter().map(|&i| inverse[i]).collect())
            .collect();
        let groups = groups_of(&members, &wine.names);
        let groups_p = groups_of(&members_p, &wine_p.names);
        let groups_same = groups_of(&members_same_order, &wine_p.names);

        let input = wine.values.row(row).to_owned();
        let input_p = permuted(input.view(), &perm);
        let target = 1;
        let full = model.predict(input.view().insert_axis(Axis(0))).unwrap()[[0, target]];
        let full_p = model_p.predict(input_p.view().insert_axis(Axis(0))).unwrap()[[0, target]];
        prop_assert!((full - full_p).abs() < 1e-14);

        for fill in [FillValue::Zero, FillValue::Mean] {
            let deletion = Deletion::new(fill, &mean, &mean);
            let deletion_p = Deletion::new(fill, &mean_p, &mean_p);
            let try_shapley = |m: &NetworkModel, f: &dyn PerturbationFamily, x: &Array1<f64>,
                               gr: &Groups, design: &CoalitionDesign, full: f64| {
                let mut rng = ChaCha8Rng::seed_from_u64(seed);
                evaluate_design(m, f, x.view(), gr, design, target, full, &mut rng)
                    .map(|game| game.estimate.values)
            };
            let shapley = |m: &NetworkModel, f: &dyn PerturbationFamily, x: &Array1<f64>,
                           gr: &Groups, design: &CoalitionDesign, full: f64| {
                try_shapley(m, f, x, gr, design, full).unwrap()
            };
            if g >= 2 {
                let exact = CoalitionDesign::enumerate(g);
                let phi = shapley(&model, &deletion, &input, &groups, &exact, full);
                let phi_p = shapley(&model_p, &deletion_p, &input_p, &groups_p, &exact, full_p);
                let want: Vec<f64> = order.iter().map(|&h| phi[h]).collect();
                let scale = largest_magnitude(&want) + 1e-15;
                prop_assert!(relative_gap(&phi_p, &want, scale) < 1e-10,
                    "{}: {:?} against {:?}", fill, phi_p, want);
            }
            if d >= 4 {
                // Singleton groups and all but two of the 2^d - 2 proper coalitions'
                // worth of draws: a sampled design (drawn with repeats).
                let singles = Groups::singletons(&wine.names);
                let singles_p = groups_of(
                    &(0..d).map(|i| vec![inverse[i]]).collect::<Vec<_>>(), &wine_p.names,
                );
                let mut design_rng = ChaCha8Rng::seed_from_u64(seed);
                let budget = (1usize << d) - 4;
                let sampled = CoalitionDesign::shapley_kernel(d, budget, &mut design_rng);
                prop_assert!(!sampled.is_exhaustive());
                let phi = try_shapley(&model, &deletion, &input, &singles, &sampled, full);
                let phi_p =
                    try_shapley(&model_p, &deletion_p, &input_p, &singles_p, &sampled, full_p);
                match (phi, phi_p) {
                    (Ok(phi), Ok(phi_p)) => {
                        let scale = largest_magnitude(&phi) + 1e-15;
                        prop_assert!(relative_gap(&phi_p, &phi, scale) < 1e-10,
                            "sampled, {}: {:?} against {:?}", fill, phi_p, phi);
                    }
                    // Draws that happen not to separate every group are refused, and
                    // then in both orders alike (the same masks).
                    (Err(_), Err(_)) => {}
                    (a, b) => prop_assert!(false, "only one order refused: {:?} / {:?}", a, b),
                }
            }
            // The same masks over the same features, the group order kept.
            if g >= 2 {
                let exact = CoalitionDesign::enumerate(g);
                let phi = shapley(&model, &deletion, &input, &groups, &exact, full);
                let phi_same = shapley(&model_p, &deletion_p, &input_p, &groups_same, &exact, full_p);
                let scale = largest_magnitude(&phi) + 1e-15;
                prop_assert!(relative_gap(&phi_same, &phi, scale) < 1e-10);
            }
        }

        // The replacement sampler built from the permuted profile: its conditional moments
        // are those of the original, permuted (the conditional distribution does not
        // depend on the order of the coordinates; Anderson 2003, Theorem 2.5.1). Its
        // draws are not comparable one by one: the standard normal draws are assigned to
        // the masked features in their new order.
        let cg = ConditionalGaussian::new(mean.clone(),
            profile.feature_distribution().unwrap().covariance().clone(), 2);
        let cg_p = ConditionalGaussian::new(mean_p.clone(),
            profile_p.feature_distribution().unwrap().covariance().clone(), 2);
        let kept: Vec<bool> = (0..d).map(|i| labels[i] % 2 == 0 && i != perm[0]).collect();
        let kept_p: Vec<bool> = perm.iter().map(|&p| kept[p]).collect();
        let (m, c) = cg.conditional_moments(input.view(), &kept).unwrap();
        let (m_p, c_p) = cg_p.conditional_moments(input_p.view(), &kept_p).unwrap();
        // Masked features in original order, and where each sits in the permuted order.
        let masked: Vec<usize> = (0..d).filter(|&i| !kept[i]).collect();
        let masked_p: Vec<usize> = (0..d).filter(|&j| !kept_p[j]).collect();
        let slot = |i: usize| masked_p.iter().position(|&j| perm[j] == i).unwrap();
        for (a, &i) in masked.iter().enumerate() {
            prop_assert!((m[a] - m_p[slot(i)]).abs() < 1e-10 * (1.0 + m[a].abs()));
            for (b, &j) in masked.iter().enumerate() {
                prop_assert!((c[[a, b]] - c_p[[slot(i), slot(j)]]).abs() < 1e-10);
            }
        }
    }
}
