//! An interrupted run (Ctrl-C's SIGINT, or SIGTERM) leaves its directory as it was: no
//! partial output, no temporary file, an earlier output untouched (SPEC: outputs are
//! written whole or not at all). Exit status 130 is common practice for an interrupt.

use std::path::Path;
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use super::harness::{listing, repo};

/// Starts `kilter predict` against a model that takes seconds to answer, waits until its
/// output is being written beside the destination, then sends `signal`.
fn interrupt_predict(dir: &Path, signal: &str) -> (i32, String) {
    std::fs::write(
        dir.join("slow.py"),
        "import json, sys, time\nfor line in sys.stdin:\n    time.sleep(5)\n    rows = json.loads(line)[\"inputs\"]\n    print(json.dumps({\"outputs\": [[0.0] for _ in rows]}), flush=True)\n",
    )
    .unwrap();
    let wine = repo("reference-corpora/wine.csv");
    let child = Command::new(env!("CARGO_BIN_EXE_kilter"))
        .args([
            "--quiet",
            "predict",
            "--model-cmd",
            "python3 slow.py",
            "--input",
            wine.to_str().unwrap(),
            "--label-column",
            "cultivar",
            "--out",
            "out.jsonl",
        ])
        .current_dir(dir)
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .expect("kilter starts");
    let deadline = Instant::now() + Duration::from_secs(20);
    while !listing(dir).iter().any(|name| name.ends_with(".tmp")) {
        assert!(Instant::now() < deadline, "no temporary output appeared");
        std::thread::sleep(Duration::from_millis(20));
    }
    let sent = Command::new("kill")
        .args([signal, &child.id().to_string()])
        .status()
        .expect("kill runs");
    assert!(sent.success());
    let output = child.wait_with_output().expect("kilter ends");
    (
        output.status.code().unwrap_or(-1),
        String::from_utf8_lossy(&output.stderr).into_owned(),
    )
}

#[test]
fn an_interrupted_run_leaves_the_directory_as_it_was() {
    for signal in ["-INT", "-TERM"] {
        let dir = tempfile::tempdir().unwrap();
        std::fs::write(dir.path().join("out.jsonl"), "earlier records\n").unwrap();
        let (status, stderr) = interrupt_predict(dir.path(), signal);
        assert_eq!(status, 130, "{signal}: {stderr}");
        assert!(stderr.contains("interrupted"), "{signal}: {stderr}");
        assert_eq!(
            listing(dir.path()),
            vec!["out.jsonl".to_string(), "slow.py".to_string()],
            "{signal}: files left behind"
        );
        assert_eq!(
            std::fs::read_to_string(dir.path().join("out.jsonl")).unwrap(),
            "earlier records\n",
            "{signal}: the earlier output changed"
        );
    }
}
