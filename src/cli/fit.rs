//! `kilter fit`: reference corpus in, profile out, with a short summary.

use kilter::corpus::{CsvOptions, MatrixChunks, MissingCells};
use kilter::neighbours::IndexChoice;
use kilter::output::check_output_path;
use kilter::profile::{Profile, ProfileSettings};
use kilter::{Error, Result};

use super::args::{ColumnArgs, FitArgs};
use super::Context;

pub fn run(args: FitArgs, context: &Context) -> Result<()> {
    let settings = ProfileSettings {
        embed: args.embed.parse()?,
        covariance: args.covariance.parse()?,
        k: args.k,
        holdout: args.holdout,
        seed: args.seed,
        index: IndexChoice::parse(&args.index, args.seed)?,
    };
    settings.validate()?;
    check_output_path(&args.out, &[&args.reference])?;
    // Rows with missing cells are left out of the reference, and said so: the scores are
    // defined on complete rows.
    let (reference, missing) = MatrixChunks::open(&args.reference, &csv_options(&args.columns))?
        .keeping_missing()
        .read_all()?
        .complete_rows();
    if reference.rows() == 0 {
        return Err(Error::TooFewRows {
            what: format!(
                "fitting a profile: every row of {} has a missing cell",
                args.reference.display()
            ),
            needed: 1,
            found: 0,
        });
    }
    let profile = settings.fit(&reference)?;
    profile.save(&args.out)?;
    if !context.quiet {
        println!("{}", summary(&profile, &args.out.display().to_string()));
        if let Some(missing) = missing {
            println!("{}", missing_line(&missing, &reference.names));
        }
    }
    Ok(())
}

/// The line on the reference rows left out for missing cells.
fn missing_line(missing: &MissingCells, names: &[String]) -> String {
    let mut columns: Vec<(usize, &String)> = missing
        .per_column
        .iter()
        .copied()
        .zip(names)
        .filter(|(n, _)| *n > 0)
        .collect();
    columns.sort_by_key(|c| std::cmp::Reverse(c.0));
    let listed: Vec<String> = columns
        .iter()
        .take(5)
        .map(|(n, name)| format!("{name} {n}"))
        .collect();
    let more = columns.len().saturating_sub(5);
    format!(
        "  missing cells    {} reference rows left out (missing cells: {}{})",
        missing.rows,
        listed.join(", "),
        if more > 0 {
            format!(" and {more} more columns")
        } else {
            String::new()
        }
    )
}

pub fn csv_options(columns: &ColumnArgs) -> CsvOptions {
    CsvOptions {
        id_columns: columns.id_columns.clone(),
        label_columns: columns.label_columns.clone(),
    }
}

/// The lines `fit` prints: what was fitted, and the p = 0.01 thresholds.
pub fn summary(profile: &Profile, path: &str) -> String {
    let s = profile.settings();
    let n_cal = profile.calibration_mahalanobis().len();
    let calibration = if s.holdout == 0.0 {
        format!(
            "in-sample on the {} fitted rows (each row's own neighbour excluded)",
            n_cal
        )
    } else {
        format!(
            "{n_cal} held-out rows (--holdout {}, --seed {})",
            s.holdout, s.seed
        )
    };
    let shrinkage = match profile.shrinkage() {
        Some(v) => format!("ledoit-wolf, shrinkage intensity {v:.4}"),
        None => "empirical (maximum likelihood)".to_string(),
    };
    let threshold = |t: Option<f64>| match t {
        Some(v) => format!("{v:.4}"),
        None => "unreachable".to_string(),
    };
    let mut lines = vec![
        format!("profile written to {path}"),
        format!(
            "  reference rows   {} ({} fitted)",
            profile.reference_rows(),
            profile.fitted_rows()
        ),
        format!(
            "  embedding        {} features -> {} dimensions ({})",
            profile.feature_names().len(),
            profile.embedded_dim(),
            s.embed
        ),
        format!(
            "  feature kinds    {}",
            profile
                .feature_distribution()
                .ok()
                .and_then(|f| f.kinds().summary(profile.feature_names()))
                .unwrap_or_else(|| "all continuous".to_string())
        ),
        format!("  covariance       {shrinkage}"),
        format!(
            "  neighbours       k = {}, {}{}",
            s.k,
            s.index,
            match profile.index_recall() {
                Some(r) => format!(
                    ", recall at k {r:.4} against the exact search on {} calibration rows",
                    profile
                        .calibration_mahalanobis()
                        .len()
                        .min(kilter::profile::RECALL_QUERIES)
                ),
                None => format!(" ({})", kilter::linalg::BACKEND),
            }
        ),
        format!("  calibration      {calibration}"),
        format!(
            "  at p = 0.01      mahalanobis_d2 >= {}, knn_kth >= {}",
            threshold(profile.calibration_mahalanobis().threshold(0.01)),
            threshold(profile.calibration_knn().threshold(0.01))
        ),
    ];
    let floor = profile.smallest_p_combined();
    if floor >= 0.01 {
        lines.push(format!(
            "  note: with {n_cal} calibration rows the smallest possible p_combined is {floor:.3}, \
             so nothing can be flagged at --alpha 0.01; use a larger reference corpus or --holdout"
        ));
    }
    lines.join("\n")
}
