//! Matrix input through the binary: accepted forms, and bad files refused with the file,
//! row and column named, exit status 2, and no output created.

use std::path::Path;

use crate::harness::{kilter, listing, temp_dir, write_npy, Run};

/// A small table with enough rows for k = 3 and in-sample calibration.
const GOOD: &str = "a,b,c\n1,2,3.5\n2,1,0.5\n3,5,1.5\n4,4,2.0\n5,7,3.0\n6,3,2.5\n";

fn fit(dir: &Path, file: &str, extra: &[&str]) -> Run {
    let mut args = vec!["fit", "--reference", file, "--out", "p.kprofile"];
    for (flag, default) in [("--k", "3"), ("--holdout", "0")] {
        if !extra.contains(&flag) {
            args.extend([flag, default]);
        }
    }
    args.extend_from_slice(extra);
    kilter(dir, &args)
}

/// Runs `fit` on `content` and expects it refused with every fragment in the message.
fn refused(content: &[u8], extra: &[&str], fragments: &[&str]) {
    let dir = temp_dir();
    std::fs::write(dir.path().join("in.csv"), content).unwrap();
    fit(dir.path(), "in.csv", extra)
        .expect_status(2)
        .expect_stderr(fragments);
    assert_eq!(
        listing(dir.path()),
        vec!["in.csv"],
        "nothing may be written"
    );
}

#[test]
fn bom_crlf_and_quotes_are_accepted() {
    let dir = temp_dir();
    let plain = GOOD.to_string();
    let fancy = format!(
        "\u{feff}{}",
        GOOD.replace('\n', "\r\n")
            .replacen("a,b,c", "\"a\",b,\"c\"", 1)
    )
    .replace("1,2,3.5", "\"1\",2,\" 3.5\"");
    std::fs::write(dir.path().join("plain.csv"), plain).unwrap();
    std::fs::write(dir.path().join("fancy.csv"), fancy).unwrap();
    fit(dir.path(), "plain.csv", &[]).expect_status(0);
    std::fs::rename(
        dir.path().join("p.kprofile"),
        dir.path().join("plain.kprofile"),
    )
    .unwrap();
    fit(dir.path(), "fancy.csv", &[]).expect_status(0);
    // Same numbers and names: the profiles score the same input identically.
    for profile in ["plain.kprofile", "p.kprofile"] {
        let run = kilter(
            dir.path(),
            &["score", "--profile", profile, "--input", "plain.csv"],
        );
        run.expect_status(0);
    }
    let a = kilter(
        dir.path(),
        &[
            "score",
            "--profile",
            "plain.kprofile",
            "--input",
            "fancy.csv",
        ],
    );
    let b = kilter(
        dir.path(),
        &["score", "--profile", "p.kprofile", "--input", "plain.csv"],
    );
    assert_eq!(a.expect_status(0).stdout, b.expect_status(0).stdout);
}

#[test]
fn id_and_label_columns_are_dropped() {
    let dir = temp_dir();
    let with_extra = "id,a,b,c,label\n".to_string()
        + &GOOD
            .lines()
            .skip(1)
            .enumerate()
            .map(|(i, l)| format!("r{i},{l},{}\n", i % 2))
            .collect::<String>();
    std::fs::write(dir.path().join("x.csv"), with_extra).unwrap();
    fit(
        dir.path(),
        "x.csv",
        &["--id-column", "id", "--label-column", "label"],
    )
    .expect_status(0)
    .stdout
    .contains("3 features");
    fit(dir.path(), "x.csv", &["--id-column", "missing"])
        .expect_status(2)
        .expect_stderr(&["no column \"missing\""]);
    // Without dropping them the id column is text: refused at its first cell.
    fit(dir.path(), "x.csv", &[])
        .expect_status(2)
        .expect_stderr(&["row 1", "column \"id\"", "\"r0\" is not a number"]);
}

#[test]
fn bad_cells_name_file_row_and_column() {
    let bad = GOOD.replace("3,5,1.5", "3,five,1.5");
    refused(
        bad.as_bytes(),
        &[],
        &[
            "in.csv",
            "row 3",
            "column \"b\"",
            "\"five\" is not a number",
        ],
    );
    // Missing cells are not refused by fit: it leaves their rows out of the reference and
    // says so (the rule in the README); rows to score must be complete.
    for (text, listed) in [
        (GOOD.replace("4,4,2.0", "4,4,NaN"), "c 1"),
        (GOOD.replace("2,1,0.5", "2,,0.5"), "b 1"),
    ] {
        let dir = temp_dir();
        std::fs::write(dir.path().join("in.csv"), &text).unwrap();
        let run = fit(dir.path(), "in.csv", &[]);
        run.expect_status(0);
        let line = format!("missing cells    1 reference rows left out (missing cells: {listed})");
        assert!(run.stdout.contains(&line), "{}", run.stdout);
        assert!(
            run.stdout.contains("reference rows   5 (5 fitted)"),
            "{}",
            run.stdout
        );
        kilter(
            dir.path(),
            &["score", "--profile", "p.kprofile", "--input", "in.csv"],
        )
        .expect_status(2)
        .expect_stderr(&["in.csv", "must be complete"]);
    }
    let inf = GOOD.replace("5,7,3.0", "5,-inf,3.0");
    refused(
        inf.as_bytes(),
        &[],
        &["row 5", "column \"b\"", "not a finite number"],
    );
}

#[test]
fn malformed_tables_are_refused() {
    refused(b"", &[], &["header row is required"]);
    refused(b"a,b,c\n", &[], &["no data rows"]);
    refused(b"a,b,a\n1,2,3\n", &[], &["column \"a\" twice"]);
    refused(b"a,,c\n1,2,3\n", &[], &["column 2", "empty name"]);
    let ragged = GOOD.replace("3,5,1.5", "3,5");
    refused(
        ragged.as_bytes(),
        &[],
        &["row 3 has 2 cells, the header has 3"],
    );
}

#[test]
fn numpy_files_of_both_widths_and_versions_load_alike() {
    let dir = temp_dir();
    let rows: Vec<[f64; 3]> = GOOD
        .lines()
        .skip(1)
        .map(|l| {
            let v: Vec<f64> = l.split(',').map(|c| c.parse().unwrap()).collect();
            [v[0], v[1], v[2]]
        })
        .collect();
    let f8: Vec<u8> = rows
        .iter()
        .flatten()
        .flat_map(|v| v.to_le_bytes())
        .collect();
    let f4: Vec<u8> = rows
        .iter()
        .flatten()
        .flat_map(|v| (*v as f32).to_le_bytes())
        .collect();
    write_npy(&dir.path().join("v1.npy"), 1, "<f8", &[6, 3], &f8);
    write_npy(&dir.path().join("v2.npy"), 2, "<f4", &[6, 3], &f4);
    std::fs::write(dir.path().join("t.csv"), GOOD).unwrap();
    fit(dir.path(), "t.csv", &[]).expect_status(0);
    let csv = kilter(
        dir.path(),
        &["score", "--profile", "p.kprofile", "--input", "t.csv"],
    );
    let v1 = kilter(
        dir.path(),
        &["score", "--profile", "p.kprofile", "--input", "v1.npy"],
    );
    let v2 = kilter(
        dir.path(),
        &["score", "--profile", "p.kprofile", "--input", "v2.npy"],
    );
    // The table's values are exact in float32, so all three inputs are the same numbers.
    assert_eq!(csv.expect_status(0).stdout, v1.expect_status(0).stdout);
    assert_eq!(csv.stdout, v2.expect_status(0).stdout);
}

#[test]
fn bad_numpy_files_are_refused() {
    let dir = temp_dir();
    let bytes =
        |values: &[f64]| -> Vec<u8> { values.iter().flat_map(|v| v.to_le_bytes()).collect() };
    let one_inf = bytes(&[1.0, 2.0, f64::INFINITY, 4.0]);
    write_npy(&dir.path().join("inf.npy"), 1, "<f8", &[2, 2], &one_inf);
    fit(dir.path(), "inf.npy", &[])
        .expect_status(2)
        .expect_stderr(&["inf.npy", "row 2", "column 1", "not a finite number"]);
    // A NaN is a missing value: fit leaves its row out, score refuses it.
    let nan_dir = temp_dir();
    let one_nan = bytes(&[
        1.0,
        2.0,
        3.0,
        1.0,
        f64::NAN,
        4.0,
        2.0,
        5.0,
        4.0,
        4.0,
        5.0,
        7.0,
    ]);
    write_npy(&nan_dir.path().join("nan.npy"), 1, "<f8", &[6, 2], &one_nan);
    let run = fit(nan_dir.path(), "nan.npy", &[]);
    run.expect_status(0);
    assert!(
        run.stdout
            .contains("missing cells    1 reference rows left out (missing cells: 1 1)"),
        "{}",
        run.stdout
    );
    kilter(
        nan_dir.path(),
        &["score", "--profile", "p.kprofile", "--input", "nan.npy"],
    )
    .expect_status(2)
    .expect_stderr(&["nan.npy", "row 3", "column 1", "not a finite number"]);
    write_npy(&dir.path().join("int.npy"), 1, "<i8", &[2, 2], &[0u8; 32]);
    fit(dir.path(), "int.npy", &[])
        .expect_status(2)
        .expect_stderr(&["dtype", "<f4", "<f8"]);
    write_npy(
        &dir.path().join("cube.npy"),
        1,
        "<f8",
        &[2, 2, 1],
        &[0u8; 32],
    );
    fit(dir.path(), "cube.npy", &[])
        .expect_status(2)
        .expect_stderr(&["3 dimensions"]);
    write_npy(&dir.path().join("short.npy"), 1, "<f8", &[4, 2], &[0u8; 32]);
    fit(dir.path(), "short.npy", &[])
        .expect_status(2)
        .expect_stderr(&["short.npy"]);
    std::fs::write(dir.path().join("text.npy"), "a,b\n1,2\n").unwrap();
    fit(dir.path(), "text.npy", &[])
        .expect_status(2)
        .expect_stderr(&["not a NumPy .npy file"]);
    assert!(!dir.path().join("p.kprofile").exists());
}

#[test]
fn settings_and_data_that_cannot_work_are_explained() {
    // A constant column cannot be standardized; the message names it.
    let constant = "a,b\n1,5\n2,5\n3,5\n4,5\n5,5\n";
    refused(constant.as_bytes(), &[], &["column \"b\" is constant"]);
    // Perfectly collinear columns: the empirical covariance is singular.
    let collinear = "a,b\n1,2\n2,4\n3,6\n4,8\n5,10\n6,12\n";
    refused(
        collinear.as_bytes(),
        &["--covariance", "empirical", "--embed", "none"],
        &["singular", "--covariance ledoit-wolf"],
    );
    refused(GOOD.as_bytes(), &["--k", "6"], &["--k"]);
    refused(
        GOOD.as_bytes(),
        &["--holdout", "1.5"],
        &["--holdout", "[0, 1)"],
    );
    refused(
        GOOD.as_bytes(),
        &["--embed", "pca:9"],
        &["at most 3 components"],
    );
    refused(GOOD.as_bytes(), &["--embed", "whiten"], &["--embed"]);
    refused(
        GOOD.as_bytes(),
        &["--covariance", "shrunk"],
        &["--covariance"],
    );
    let dir = temp_dir();
    fit(dir.path(), "missing.csv", &[])
        .expect_status(2)
        .expect_stderr(&["missing.csv"]);
    std::fs::write(dir.path().join("t.txt"), GOOD).unwrap();
    fit(dir.path(), "t.txt", &[])
        .expect_status(2)
        .expect_stderr(&[".csv or .npy"]);
}

#[test]
fn wrong_flags_are_usage_errors() {
    let dir = temp_dir();
    let run = kilter(dir.path(), &["fit", "--refrence", "x.csv"]);
    run.expect_status(2);
    assert!(run.stderr.contains("--reference"), "{}", run.stderr);
    kilter(dir.path(), &["score"]).expect_status(2);
    kilter(dir.path(), &["no-such-command"]).expect_status(2);
    kilter(dir.path(), &["fit", "--help"]).expect_status(0);
}

/// A file larger than one parallel chunk, with blank lines and a bad cell deep inside:
/// the row number counts data rows as a person does, and the quoted-file reader (used
/// when any quote appears) agrees with the fast unquoted one.
#[test]
fn row_numbers_survive_parallel_parsing() {
    let dir = temp_dir();
    let mut text = String::from("a,b,c\n");
    for i in 1..=300_000usize {
        if i == 250_000 {
            text.push_str("1.5,oops,2\n");
        } else {
            text.push_str(&format!("{}.{:09},{},{}\n", i % 97, i, i % 13, i % 7));
        }
        if i % 50_000 == 0 {
            text.push('\n');
        }
    }
    assert!(text.len() > 5_000_000, "the file must span several chunks");
    std::fs::write(dir.path().join("big.csv"), &text).unwrap();
    std::fs::write(
        dir.path().join("quoted.csv"),
        text.replacen("a,b,c", "\"a\",b,c", 1),
    )
    .unwrap();
    for file in ["big.csv", "quoted.csv"] {
        fit(dir.path(), file, &[]).expect_status(2).expect_stderr(&[
            file,
            "row 250000",
            "column \"b\"",
            "\"oops\" is not a number",
        ]);
    }
}

#[test]
fn extreme_values_score_as_far_from_the_data_as_a_score_can_be() {
    // A cell of 1e20 once slipped through the single-precision candidate pass as distance
    // 0, and 1e300 or 1.7e308 overflowed to a missing Mahalanobis distance with p = 1: the
    // most extreme inputs looked fully typical. By the definition of the conformal p-value,
    // (1 + #{calibration scores >= s}) / (1 + n), an input beyond every calibration score
    // has p = 1 / (1 + n), the smallest there is.
    let dir = temp_dir();
    let wine = std::fs::read_to_string(crate::harness::repo("reference-corpora/wine.csv")).unwrap();
    std::fs::write(dir.path().join("wine.csv"), &wine).unwrap();
    kilter(
        dir.path(),
        &[
            "fit",
            "--reference",
            "wine.csv",
            "--label-column",
            "cultivar",
            "--holdout",
            "0",
            "--out",
            "w.kprofile",
        ],
    )
    .expect_status(0);
    let lines: Vec<&str> = wine.lines().collect();
    let first: Vec<&str> = lines[1].split(',').collect();
    let rows: Vec<String> = ["1e20", "1e300", "1.7e308", "-1.7e308"]
        .iter()
        .map(|v| {
            let mut cells = first.clone();
            cells[0] = v;
            cells.join(",")
        })
        .collect();
    std::fs::write(
        dir.path().join("q.csv"),
        format!("{}\n{}\n", lines[0], rows.join("\n")),
    )
    .unwrap();
    kilter(
        dir.path(),
        &[
            "score",
            "--profile",
            "w.kprofile",
            "--input",
            "q.csv",
            "--label-column",
            "cultivar",
            "--out",
            "s.jsonl",
        ],
    )
    .expect_status(0);
    let records = crate::harness::read_scores(&dir.path().join("s.jsonl"));
    let smallest = 1.0 / 179.0;
    for r in &records {
        assert!(r.knn_kth >= 1e19, "row {}: {}", r.row, r.knn_kth);
        assert!(
            r.mahalanobis_d2 >= 1e38,
            "row {}: {}",
            r.row,
            r.mahalanobis_d2
        );
        assert!((r.p_mahalanobis - smallest).abs() < 1e-12, "row {}", r.row);
        assert!((r.p_knn - smallest).abs() < 1e-12, "row {}", r.row);
    }
}
