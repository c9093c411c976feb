//! `--groups FILE`: JSON lists of feature indices or names, every feature in one group
//! at most (SPEC: Groups).

use kilter::groups::Groups;

use crate::harness::temp_dir;

fn names() -> Vec<String> {
    ["age", "income", "debt", "tenure"]
        .iter()
        .map(|s| s.to_string())
        .collect()
}

fn read(json: &str) -> kilter::Result<Groups> {
    let dir = temp_dir();
    let path = dir.path().join("groups.json");
    std::fs::write(&path, json).unwrap();
    Groups::from_json_file(&path, &names())
}

#[test]
fn groups_by_index_or_name() {
    let by_index = read("[[0, 2], [1]]").unwrap();
    let by_name = read(r#"[["age", "debt"], ["income"]]"#).unwrap();
    assert_eq!(by_index, by_name);
    assert_eq!(by_index.len(), 2);
    assert_eq!(by_index.members(0), &[0, 2]);
    assert_eq!(
        by_index.names(),
        &["age+debt".to_string(), "income".to_string()]
    );
    assert_eq!(by_index.sum_within(&[1.0, 2.0, 3.0, 4.0]), vec![4.0, 2.0]);
}

#[test]
fn bad_groups_are_explained() {
    for (json, fragment) in [
        ("{}", "list of lists"),
        ("[[0], []]", "group 2 is empty"),
        ("[[0, 4]]", "4 is not a feature index (0 to 3)"),
        (r#"[["age", "wealth"]]"#, "no feature \"wealth\""),
        ("[[0, 1], [1]]", "feature 1 is in group 1 and in group 2"),
        ("[[true]]", "neither a feature index nor a name"),
        ("[[0], 1]", "group 2 is not a list"),
        ("not json", "not valid JSON"),
    ] {
        let err = read(json).unwrap_err().to_string();
        assert!(err.contains(fragment), "{json}: {err}");
        assert!(err.contains("groups.json"), "{err}");
    }
}
