//! Classifier two-sample test (Lopez-Paz & Oquab 2017, "Revisiting classifier two-sample
//! tests", ICLR): how well can a classifier tell a family's perturbed inputs from
//! reference rows?
//!
//! Both samples are cut to the same size (at most [`MAX_PER_CLASS`] rows each, drawn at
//! random), shuffled and split in halves. A logistic regression with a small ridge
//! penalty (λ = 1 on standardized features, fitted by Newton's method) learns on one half;
//! its held-out AUC on the other is the detectability: 0.5 when the samples are
//! indistinguishable, 1 when they separate completely. The AUC is the Mann-Whitney
//! statistic with ties counted one half (Hanley & McNeil 1982).

use ndarray::{Array1, Array2, ArrayView2, Axis};
use rand::seq::index::sample;
use rand::seq::SliceRandom;
use rand_chacha::ChaCha8Rng;

use crate::linalg;

/// Rows per class at most.
pub const MAX_PER_CLASS: usize = 256;
/// Ridge penalty on the coefficients (not the intercept), standardized units.
const RIDGE: f64 = 1.0;
/// Newton iterations at most.
const ITERATIONS: usize = 25;

/// Held-out AUC of a logistic classifier telling `perturbed` rows from `reference` rows
/// (both embedded). `None` with fewer than 4 rows in either sample.
pub fn detectability_auc(
    perturbed: ArrayView2<'_, f64>,
    reference: ArrayView2<'_, f64>,
    rng: &mut ChaCha8Rng,
) -> Option<f64> {
    let per_class = perturbed.nrows().min(reference.nrows()).min(MAX_PER_CLASS);
    if per_class < 4 {
        return None;
    }
    // A random subset in random order: perturbed inputs come in design order (an
    // enumerated design lists coalitions by their bits), so splitting them by position
    // without shuffling would train and test on systematically different masks.
    let pick = |rows: ArrayView2<'_, f64>, rng: &mut ChaCha8Rng| {
        let mut idx = sample(rng, rows.nrows(), per_class).into_vec();
        idx.shuffle(rng);
        rows.select(Axis(0), &idx)
    };
    let positive = pick(perturbed, rng);
    let negative = pick(reference, rng);
    // Alternate rows into training and test halves (the picks are in random order).
    let half = |rows: &Array2<f64>, parity: usize| {
        let idx: Vec<usize> = (0..rows.nrows()).filter(|r| r % 2 == parity).collect();
        rows.select(Axis(0), &idx)
    };
    let train = ndarray::concatenate![Axis(0), half(&positive, 0), half(&negative, 0)];
    let train_labels: Vec<f64> = (0..train.nrows())
        .map(|r| f64::from(u8::from(r < per_class.div_ceil(2))))
        .collect();
    let test_pos = half(&positive, 1);
    let test_neg = half(&negative, 1);

    // Standardize by the training rows.
    let mean = train.mean_axis(Axis(0))?;
    let sd = train
        .var_axis(Axis(0), 0.0)
        .mapv(|v| if v > 1e-24 { v.sqrt() } else { 1.0 });
    let design = |rows: &Array2<f64>| {
        let z = (rows - &mean) / &sd;
        ndarray::concatenate![Axis(1), Array2::ones((rows.nrows(), 1)), z]
    };
    let x = design(&train);
    let beta = fit_logistic(&x, &train_labels)?;
    let score = |rows: &Array2<f64>| design(rows).dot(&beta);
    Some(auc(&score(&test_pos), &score(&test_neg)))
}

/// Ridge logistic regression by Newton's method; column 0 is the unpenalised intercept.
fn fit_logistic(x: &Array2<f64>, y: &[f64]) -> Option<Array1<f64>> {
    let p = x.ncols();
    let mut beta = Array1::<f64>::zeros(p);
    let y = Array1::from(y.to_vec());
    for _ in 0..ITERATIONS {
        let eta = x.dot(&beta);
        let prob = eta.mapv(|e| 1.0 / (1.0 + (-e).exp()));
        let weight = prob.mapv(|q| (q * (1.0 - q)).max(1e-10));
        let mut gradient = x.t().dot(&(&y - &prob));
        let weighted = x * &weight.view().insert_axis(Axis(1));
        let mut hessian = x.t().dot(&weighted);
        for j in 1..p {
            gradient[j] -= RIDGE * beta[j];
            hessian[[j, j]] += RIDGE;
        }
        hessian[[0, 0]] += 1e-8;
        let factor = linalg::cholesky_lower(&hessian)?;
        let half = linalg::solve_lower_rows(&factor, gradient.view().insert_axis(Axis(0)));
        let step = linalg::solve_upper_from_lower(&factor, half.row(0));
        beta += &step;
        if step.iter().map(|s| s.abs()).fold(0.0, f64::max) < 1e-8 {
            break;
        }
    }
    Some(beta)
}

/// Area under the ROC curve: P(score of a positive > score of a negative), ties one half.
pub fn auc(positive: &Array1<f64>, negative: &Array1<f64>) -> f64 {
    // Rank-sum form: sort all scores, average ranks over ties.
    let mut all: Vec<(f64, bool)> = positive
        .iter()
        .map(|&s| (s, true))
        .chain(negative.iter().map(|&s| (s, false)))
        .collect();
    all.sort_by(|a, b| a.0.total_cmp(&b.0));
    let mut rank_sum = 0.0;
    let mut i = 0;
    while i < all.len() {
        let mut j = i;
        while j + 1 < all.len() && all[j + 1].0 == all[i].0 {
            j += 1;
        }
        let average_rank = (i + j) as f64 / 2.0 + 1.0;
        rank_sum += average_rank * all[i..=j].iter().filter(|e| e.1).count() as f64;
        i = j + 1;
    }
    let np = positive.len() as f64;
    let nn = negative.len() as f64;
    (rank_sum - np * (np + 1.0) / 2.0) / (np * nn)
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;
    use rand::SeedableRng;
    use rand_distr::{Distribution, StandardNormal};

    /// Hand-worked: positives {0.9, 0.4}, negatives {0.4, 0.1}: pairs (0.9 > 0.4),
    /// (0.9 > 0.1), (0.4 = 0.4, one half), (0.4 > 0.1) give 3.5 / 4.
    #[test]
    fn auc_counts_ties_as_half() {
        assert_eq!(auc(&array![0.9, 0.4], &array![0.4, 0.1]), 0.875);
    }

    #[test]
    fn separated_samples_are_detected_and_identical_ones_are_not() {
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        let mut draw = |shift: f64, n: usize| {
            Array2::from_shape_fn((n, 3), |_| {
                let z: f64 = StandardNormal.sample(&mut rng);
                z + shift
            })
        };
        let reference = draw(0.0, 600);
        let same = draw(0.0, 600);
        let shifted = draw(3.0, 600);
        let mut rng = ChaCha8Rng::seed_from_u64(4);
        let far = detectability_auc(shifted.view(), reference.view(), &mut rng).unwrap();
        let near = detectability_auc(same.view(), reference.view(), &mut rng).unwrap();
        assert!(far > 0.97, "{far}");
        // 256 per class in each half: the AUC's standard error is about 0.036.
        assert!((near - 0.5).abs() < 0.12, "{near}");
    }

    /// Perturbed inputs arrive in design order. Two clusters alternating row by row, drawn
    /// from the same mixture as the reference, are indistinguishable from it: a split by
    /// position alone would train on one cluster and test on the other.
    #[test]
    fn input_order_does_not_leak_into_the_split() {
        let mut rng = ChaCha8Rng::seed_from_u64(8);
        let mut mixture = |n: usize, alternate: bool| {
            let mut rows = Array2::<f64>::zeros((n, 2));
            for (r, mut row) in rows.outer_iter_mut().enumerate() {
                let side = if alternate {
                    r % 2 == 0
                } else {
                    rand::Rng::random::<bool>(&mut rng)
                };
                for v in row.iter_mut() {
                    let z: f64 = StandardNormal.sample(&mut rng);
                    *v = z + if side { 4.0 } else { -4.0 };
                }
            }
            rows
        };
        let reference = mixture(600, false);
        let ordered = mixture(200, true);
        let mut rng = ChaCha8Rng::seed_from_u64(9);
        let auc = detectability_auc(ordered.view(), reference.view(), &mut rng).unwrap();
        assert!((auc - 0.5).abs() < 0.12, "{auc}");
    }
}
