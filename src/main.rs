//! The `kilter` command: a thin layer over the library that parses arguments, runs one
//! command and maps its outcome to the exit status SPEC fixes.

mod cli;

use std::process::ExitCode;

fn main() -> ExitCode {
    cli::main()
}
