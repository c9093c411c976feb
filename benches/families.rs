//! Criterion benchmarks of the audit's core: one row's attributions three ways, and whole
//! rows per second.
//!
//! Workload (issue 4's yardstick): one row of the 30-feature breast-cancer table, the JSON
//! MLP of `tests/golden/models/mlp.json` (30 → 16 → 8 → 1), 1,000 masks, 4 replacement
//! draws per mask and 64 path points. The profile is fitted on the 455 rows of
//! `tests/golden/breast_cancer_fit.csv` (standardize, Ledoit-Wolf, k = 10, in-sample
//! calibration).
//!
//! - `one_core/attributions`: deletion, conditional-Gaussian replacement and integrated
//!   gradients of one row (mask design, fills, model calls, least squares), on a
//!   one-thread pool;
//! - `one_core/audit_row`: the whole record of one row: off-manifold scoring of its
//!   ~5,000 masked inputs, the six default baselines ranked (their paths scored too),
//!   detectability tests and the reliability;
//! - `all_cores/audit_rows`: 16 rows audited in parallel on every core (throughput in rows).
//!
//! `cargo bench --bench families`

use std::hint::black_box;
use std::path::Path;

use criterion::{criterion_group, criterion_main, Criterion, Throughput};
use ndarray::Axis;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;

use kilter::attribution::{integrated_gradients, CoalitionDesign, QuadratureRule};
use kilter::audit::{AuditSettings, Auditor};
use kilter::corpus::{read_matrix, CsvOptions};
use kilter::groups::Groups;
use kilter::models::{FiniteDifference, NetworkModel};
use kilter::perturbation::masking::evaluate_design;
use kilter::perturbation::{ConditionalGaussian, Deletion, FillValue};
use kilter::profile::ProfileSettings;

fn repo(relative: &str) -> std::path::PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join(relative)
}

fn bench(c: &mut Criterion) {
    let options = CsvOptions {
        label_columns: vec!["diagnosis".into()],
        ..Default::default()
    };
    let reference = read_matrix(&repo("tests/golden/breast_cancer_fit.csv"), &options).unwrap();
    let queries = read_matrix(&repo("tests/golden/breast_cancer_query.csv"), &options).unwrap();
    let profile = ProfileSettings {
        holdout: 0.0,
        ..ProfileSettings::default()
    }
    .fit(&reference)
    .unwrap();
    let model = NetworkModel::load(&repo("tests/golden/models/mlp.json")).unwrap();
    let groups = Groups::singletons(profile.feature_names());
    let x = queries.values.row(0);
    let settings = AuditSettings {
        samples: 1000,
        draws: 4,
        steps: 64,
        ..AuditSettings::default()
    };
    let one_thread = rayon::ThreadPoolBuilder::new()
        .num_threads(1)
        .build()
        .unwrap();

    let distribution = profile.feature_distribution().unwrap();
    let deletion = Deletion::new(
        FillValue::Zero,
        distribution.location(),
        &distribution.median(),
    );
    let gaussian = ConditionalGaussian::new(
        distribution.location().clone(),
        distribution.covariance().clone(),
        4,
    );
    let differences = FiniteDifference::new(&profile.feature_spread(), f64::EPSILON);
    let target = 1;
    let full = {
        use kilter::models::Model;
        model.predict(x.insert_axis(Axis(0))).unwrap()[[0, target]]
    };
    let mut group = c.benchmark_group("one_core");
    group.sample_size(20);
    group.bench_function("attributions", |b| {
        b.iter(|| {
            one_thread.install(|| {
                let mut rng = ChaCha8Rng::seed_from_u64(1);
                let design = CoalitionDesign::shapley_kernel(30, 1000, &mut rng);
                let d = evaluate_design(
                    &model, &deletion, x, &groups, &design, target, full, &mut rng,
                )
                .unwrap();
                let r = evaluate_design(
                    &model, &gaussian, x, &groups, &design, target, full, &mut rng,
                )
                .unwrap();
                let baseline = distribution.location().view().insert_axis(Axis(0));
                let ig = integrated_gradients(
                    &model,
                    &differences,
                    x,
                    baseline,
                    target,
                    QuadratureRule::Midpoint,
                    64,
                )
                .unwrap();
                black_box((d.estimate, r.estimate, ig.per_feature))
            })
        })
    });
    let auditor = Auditor::new(&profile, &model, groups.clone(), settings.clone()).unwrap();
    group.bench_function("audit_row", |b| {
        b.iter(|| one_thread.install(|| black_box(auditor.audit_row(0, x, None).unwrap())))
    });
    group.finish();

    let mut group = c.benchmark_group("all_cores");
    group.sample_size(10);
    group.throughput(Throughput::Elements(16));
    group.bench_function("audit_rows", |b| {
        b.iter(|| {
            let records: Vec<_> = (0..16)
                .into_par_iter()
                .map(|r| auditor.audit_row(r, queries.values.row(r), None).unwrap())
                .collect();
            black_box(records)
        })
    });
    group.finish();
}

criterion_group!(benches, bench);
criterion_main!(benches);
