//! Command-line front end: raw arguments ([`args`]), then one module per command.
//!
//! Nothing past [`args`] sees raw strings: each command turns its arguments into the
//! library's validated settings first, so bad values fail before any file is read.

mod args;
mod demo;
mod fit;
mod score;

use std::io::{self, IsTerminal, Write};
use std::process::ExitCode;

use clap::Parser;

use kilter::Error;

/// Runs the command line and returns the process exit status.
pub fn main() -> ExitCode {
    let cli = args::Cli::parse();
    let context = Context {
        quiet: cli.quiet,
        progress: !cli.quiet && io::stderr().is_terminal(),
    };
    let outcome = match cli.command {
        args::Command::Fit(a) => fit::run(a, &context),
        args::Command::Score(a) => score::run(a, &context),
        args::Command::Demo(a) => demo::run(a, &context),
    };
    match outcome {
        Ok(()) => ExitCode::SUCCESS,
        Err(Error::Io { source, .. }) if source.kind() == io::ErrorKind::BrokenPipe => {
            // The reader of our stdout went away (for example `| head`): not a failure.
            ExitCode::SUCCESS
        }
        Err(error) => {
            let mut stderr = io::stderr().lock();
            let _ = writeln!(stderr, "kilter: error: {error}");
            let mut source = std::error::Error::source(&error);
            while let Some(cause) = source {
                let _ = writeln!(stderr, "  caused by: {cause}");
                source = cause.source();
            }
            ExitCode::from(error.exit_status())
        }
    }
}

/// What every command needs to know about how it was run.
pub struct Context {
    /// `--quiet`: no progress or summaries on stderr.
    pub quiet: bool,
    /// Whether to draw progress (stderr is a terminal and not quiet).
    #[allow(dead_code)]
    pub progress: bool,
}
