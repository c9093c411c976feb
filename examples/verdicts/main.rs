//! The verdict benchmark: audits explanations whose truth is known by construction and
//! scores kilter's verdicts against it (see README.md in this directory).
//!
//!     cargo run --release --example verdicts -- [--seeds tune|held-out|ci] [--cases N]
//!         [--out FILE.jsonl] [--quiet]
//!
//! Exit status 0 when all five targets are met, 1 when one is not, 2 on bad usage or a
//! failed case.

mod bench;

use std::io::Write;
use std::process::ExitCode;
use std::time::Instant;

use bench::SeedSet;

const USAGE: &str =
    "usage: verdicts [--seeds tune|held-out|ci] [--cases N] [--out FILE.jsonl] [--quiet]";

struct Args {
    seeds: SeedSet,
    cases: Option<usize>,
    out: Option<std::path::PathBuf>,
    quiet: bool,
}

fn parse_args() -> Result<Args, String> {
    let mut args = Args {
        seeds: SeedSet::Tune,
        cases: None,
        out: None,
        quiet: false,
    };
    let mut it = std::env::args().skip(1);
    while let Some(flag) = it.next() {
        let mut value = |name: &str| {
            it.next()
                .ok_or_else(|| format!("{name} needs a value\n{USAGE}"))
        };
        match flag.as_str() {
            "--seeds" => {
                let v = value("--seeds")?;
                args.seeds = SeedSet::parse(&v)
                    .ok_or_else(|| format!("--seeds {v}: expected tune, held-out or ci"))?;
            }
            "--cases" => {
                let v = value("--cases")?;
                let n: usize = v
                    .parse()
                    .ok()
                    .filter(|&n| n > 0)
                    .ok_or_else(|| format!("--cases {v}: expected a positive whole number"))?;
                args.cases = Some(n);
            }
            "--out" => args.out = Some(value("--out")?.into()),
            "--quiet" => args.quiet = true,
            "--help" | "-h" => return Err(USAGE.into()),
            other => return Err(format!("unknown argument {other}\n{USAGE}")),
        }
    }
    Ok(args)
}

fn main() -> ExitCode {
    let args = match parse_args() {
        Ok(a) => a,
        Err(message) => {
            eprintln!("{message}");
            return ExitCode::from(2);
        }
    };
    let started = Instant::now();
    let quiet = args.quiet;
    let progress = move |done: usize, total: usize| {
        if !quiet && (done.is_multiple_of(10) || done == total) {
            eprintln!("  {done} / {total} configurations");
        }
    };
    let results = match bench::run(args.seeds, args.cases, &progress) {
        Ok(r) => r,
        Err(message) => {
            eprintln!("verdicts: error: {message}");
            return ExitCode::from(2);
        }
    };
    let elapsed = started.elapsed();
    if let Some(path) = &args.out {
        let mut text = String::new();
        for case in &results {
            text.push_str(&serde_json::to_string(case).expect("serialisable"));
            text.push('\n');
        }
        if let Err(e) = std::fs::File::create(path).and_then(|mut f| f.write_all(text.as_bytes())) {
            eprintln!("verdicts: error: cannot write {}: {e}", path.display());
            return ExitCode::from(2);
        }
    }
    print!("{}", bench::report(args.seeds, &results));
    println!(
        "\n  {} cases in {:.1} s on {} threads",
        results.len(),
        elapsed.as_secs_f64(),
        rayon::current_num_threads()
    );
    if bench::summarize(&results).all_met() {
        ExitCode::SUCCESS
    } else {
        ExitCode::from(1)
    }
}
