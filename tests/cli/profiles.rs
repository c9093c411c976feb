//! Profiles: written whole, refused when damaged, and matched against their inputs.

use std::path::Path;

use crate::harness::{fit_wine, kilter, listing, repo, temp_dir};

fn score(dir: &Path, profile: &str) -> crate::harness::Run {
    let wine = repo("reference-corpora/wine.csv");
    kilter(
        dir,
        &[
            "score",
            "--profile",
            profile,
            "--input",
            wine.to_str().unwrap(),
            "--label-column",
            "cultivar",
        ],
    )
}

#[test]
fn fit_summary_reports_what_was_fitted() {
    let dir = temp_dir();
    let wine = repo("reference-corpora/wine.csv");
    let run = kilter(
        dir.path(),
        &[
            "fit",
            "--reference",
            wine.to_str().unwrap(),
            "--label-column",
            "cultivar",
            "--out",
            "w.kprofile",
        ],
    );
    run.expect_status(0);
    for fragment in [
        "reference rows   178 (142 fitted)",
        "13 features -> 13 dimensions (standardize)",
        "ledoit-wolf, shrinkage intensity",
        "36 held-out rows",
        "at p = 0.01",
        // 36 calibration rows: the smallest p_combined is 2/37 > 0.01, and fit says so.
        "smallest possible p_combined is 0.054",
    ] {
        assert!(
            run.stdout.contains(fragment),
            "summary lacks {fragment:?}:\n{}",
            run.stdout
        );
    }
    assert_eq!(listing(dir.path()), vec!["w.kprofile"]);
}

#[test]
fn damaged_profiles_are_refused() {
    let dir = temp_dir();
    fit_wine(dir.path(), &[]);
    let good = std::fs::read(dir.path().join("w.kprofile")).unwrap();
    score(dir.path(), "w.kprofile").expect_status(0);

    let cases: Vec<(&str, Vec<u8>, &str)> = vec![
        ("truncated", good[..good.len() / 2].to_vec(), "truncated"),
        ("empty", Vec::new(), "not a kilter profile"),
        ("text", b"a,b\n1,2\n".to_vec(), "not a kilter profile"),
        (
            "flipped",
            {
                let mut b = good.clone();
                let at = b.len() - 100;
                b[at] ^= 0x40;
                b
            },
            "checksum",
        ),
        (
            "version",
            {
                let mut b = good.clone();
                b[12..16].copy_from_slice(&99u32.to_le_bytes());
                b
            },
            "format version 99",
        ),
        (
            "appended",
            {
                let mut b = good.clone();
                b.extend_from_slice(b"junk");
                b
            },
            "after the declared content",
        ),
    ];
    for (name, bytes, message) in cases {
        let file = format!("{name}.kprofile");
        std::fs::write(dir.path().join(&file), bytes).unwrap();
        score(dir.path(), &file)
            .expect_status(2)
            .expect_stderr(&[&file, message]);
    }
    score(dir.path(), "absent.kprofile")
        .expect_status(2)
        .expect_stderr(&["absent.kprofile"]);
}

#[test]
fn profile_roundtrip_keeps_every_score() {
    // Scoring with the profile as fitted in memory and as read back from disk agree
    // exactly: the file keeps every bit of the fitted state.
    use kilter::corpus::{read_matrix, CsvOptions};
    use kilter::profile::{Profile, ProfileSettings};
    let options = CsvOptions {
        id_columns: vec![],
        label_columns: vec!["cultivar".into()],
    };
    let wine = read_matrix(&repo("reference-corpora/wine.csv"), &options).unwrap();
    let fitted = ProfileSettings::default().fit(&wine).unwrap();
    let reread = Profile::from_bytes(&fitted.to_bytes()).unwrap();
    let a = fitted.score(wine.values.view(), 0, 0.01).unwrap();
    let b = reread.score(wine.values.view(), 0, 0.01).unwrap();
    assert_eq!(a, b);
}

#[test]
fn inputs_must_match_the_profile() {
    let dir = temp_dir();
    fit_wine(dir.path(), &[]);
    let wine = std::fs::read_to_string(repo("reference-corpora/wine.csv")).unwrap();
    // One column fewer.
    let fewer: String = wine
        .lines()
        .map(|l| l.split(',').skip(1).collect::<Vec<_>>().join(",") + "\n")
        .collect();
    std::fs::write(dir.path().join("fewer.csv"), fewer).unwrap();
    kilter(
        dir.path(),
        &[
            "score",
            "--profile",
            "w.kprofile",
            "--input",
            "fewer.csv",
            "--label-column",
            "cultivar",
        ],
    )
    .expect_status(2)
    .expect_stderr(&[
        "fewer.csv",
        "has 12 feature columns, the profile was fitted on 13",
    ]);
    // Same count, two columns swapped.
    let swapped = wine.replacen("alcohol,malic_acid", "malic_acid,alcohol", 1);
    std::fs::write(dir.path().join("swapped.csv"), swapped).unwrap();
    kilter(
        dir.path(),
        &[
            "score",
            "--profile",
            "w.kprofile",
            "--input",
            "swapped.csv",
            "--label-column",
            "cultivar",
        ],
    )
    .expect_status(2)
    .expect_stderr(&["feature column 1 is \"malic_acid\"", "expects \"alcohol\""]);
}

/// The per-feature spread is the population standard deviation of the fitted rows,
/// whatever the embedding (checked against a direct computation on the wine corpus).
#[test]
fn feature_spread_is_the_population_sd() {
    use kilter::corpus::{read_matrix, CsvOptions};
    use kilter::embedding::EmbeddingSpec;
    use kilter::profile::ProfileSettings;
    let options = CsvOptions {
        id_columns: vec![],
        label_columns: vec!["cultivar".into()],
    };
    let wine = read_matrix(&repo("reference-corpora/wine.csv"), &options).unwrap();
    let n = wine.rows() as f64;
    let direct: Vec<f64> = wine
        .values
        .columns()
        .into_iter()
        .map(|c| {
            let m = c.sum() / n;
            (c.iter().map(|v| (v - m).powi(2)).sum::<f64>() / n).sqrt()
        })
        .collect();
    for embed in [
        EmbeddingSpec::None,
        EmbeddingSpec::Standardize,
        EmbeddingSpec::Pca { components: 4 },
    ] {
        let settings = ProfileSettings {
            embed: embed.clone(),
            holdout: 0.0,
            ..ProfileSettings::default()
        };
        let spread = settings.fit(&wine).unwrap().feature_spread();
        for (a, b) in spread.iter().zip(&direct) {
            assert!((a - b).abs() <= 1e-12 * b, "{embed}: {a} vs {b}");
        }
    }
}
