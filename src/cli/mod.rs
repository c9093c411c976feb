//! Command-line front end: raw arguments ([`args`]), then one module per command.
//!
//! Nothing past [`args`] sees raw strings: each command turns its arguments into the
//! library's validated settings first, so bad values fail before any file is read.

mod args;
mod audit;
mod baseline;
mod demo;
mod fit;
mod predict;
mod score;

use std::io::{self, IsTerminal, Write};
use std::path::{Path, PathBuf};
use std::process::ExitCode;

use clap::Parser;

use kilter::output::{check_output_path, write_atomically, RecordFormat, RecordWriter};
use kilter::{Error, Result};

/// Runs the command line and returns the process exit status.
pub fn main() -> ExitCode {
    let cli = args::Cli::parse();
    // Ctrl-C or SIGTERM: outputs are written beside and renamed, so removing the unfinished
    // temporary files leaves the directory as it was.
    let _ = ctrlc::set_handler(|| kilter::output::abandon_outputs_and_exit());
    let context = Context {
        quiet: cli.quiet,
        progress: !cli.quiet && io::stderr().is_terminal(),
    };
    let outcome = match cli.command {
        args::Command::Fit(a) => fit::run(a, &context),
        args::Command::Score(a) => score::run(a, &context),
        args::Command::Predict(a) => predict::run(a, &context),
        args::Command::Audit(a) => audit::run(*a, &context),
        args::Command::Baseline(a) => baseline::run(*a, &context),
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
            let message = error.to_string();
            let _ = writeln!(stderr, "kilter: error: {message}");
            let mut source = std::error::Error::source(&error);
            while let Some(cause) = source {
                // An I/O error's text is already part of the message; say it once.
                let text = cause.to_string();
                if !message.contains(&text) {
                    let _ = writeln!(stderr, "  caused by: {text}");
                }
                source = cause.source();
            }
            ExitCode::from(error.exit_status())
        }
    }
}

/// Where records go: JSON Lines on stdout, or a `.jsonl`/`.csv` file written atomically.
pub struct RecordDestination {
    path: Option<PathBuf>,
    format: RecordFormat,
}

impl RecordDestination {
    /// Checks `--out` against the inputs before any work.
    pub fn new(out: Option<&Path>, inputs: &[&Path]) -> Result<Self> {
        match out {
            None => Ok(RecordDestination {
                path: None,
                format: RecordFormat::JsonLines,
            }),
            Some(path) => {
                check_output_path(path, inputs)?;
                Ok(RecordDestination {
                    path: Some(path.to_path_buf()),
                    format: RecordFormat::for_path(path)?,
                })
            }
        }
    }

    /// Runs `produce`, which writes records as it goes. A file appears only if `produce`
    /// succeeds; on stdout, records already written stay written.
    pub fn write(
        &self,
        produce: impl FnOnce(&mut RecordWriter<&mut dyn Write>) -> Result<()>,
    ) -> Result<()> {
        match &self.path {
            None => {
                let stdout = io::stdout();
                let mut lock = io::BufWriter::new(stdout.lock());
                let mut sink: &mut dyn Write = &mut lock;
                let mut writer = RecordWriter::new(&mut sink as &mut dyn Write, self.format);
                produce(&mut writer)?;
                writer.finish().map_err(|e| Error::io("<stdout>", e))?;
                Ok(())
            }
            Some(path) => {
                let mut failure = None;
                let format = self.format;
                let written = write_atomically(path, |file| {
                    let mut sink: &mut dyn Write = file;
                    let mut writer = RecordWriter::new(&mut sink as &mut dyn Write, format);
                    match produce(&mut writer) {
                        Ok(()) => writer.finish().map(|_| ()),
                        Err(e) => {
                            failure = Some(e);
                            Err(io::Error::other("the work failed"))
                        }
                    }
                });
                match (written, failure) {
                    (_, Some(e)) => Err(e),
                    (result, None) => result,
                }
            }
        }
    }
}

/// Checks `--report FILE.html` before any work: an `.html` name, a writable place, not an
/// input, not the records file.
pub fn check_report_path(
    report: Option<&Path>,
    inputs: &[&Path],
    out: Option<&Path>,
) -> Result<()> {
    let Some(path) = report else {
        return Ok(());
    };
    let html = path
        .extension()
        .and_then(|e| e.to_str())
        .is_some_and(|e| e.eq_ignore_ascii_case("html") || e.eq_ignore_ascii_case("htm"));
    if !html {
        return Err(Error::InvalidSetting {
            flag: "--report",
            value: path.display().to_string(),
            expected: "a file name ending in .html".into(),
        });
    }
    let mut all: Vec<&Path> = inputs.to_vec();
    if let Some(out) = out {
        all.push(out);
    }
    check_output_path(path, &all)
}

/// Writes a report file whole or not at all.
pub fn write_report(path: &Path, html: &str) -> Result<()> {
    write_atomically(path, |w| w.write_all(html.as_bytes()))
}

/// The id of the `i`-th row of a block, when the block has ids.
pub fn row_id(ids: Option<&[String]>, i: usize) -> Option<String> {
    ids.and_then(|ids| ids.get(i)).cloned()
}

/// Converts a record-writing failure into an error naming the destination.
pub fn record_io(error: io::Error) -> Error {
    Error::io("<records>", error)
}

/// What every command needs to know about how it was run.
pub struct Context {
    /// `--quiet`: no progress or summaries on stderr.
    pub quiet: bool,
    /// Whether to draw progress (stderr is a terminal and not quiet).
    pub progress: bool,
}

impl Context {
    /// A progress bar over `rows` rows on stderr, hidden unless stderr is a terminal and
    /// `--quiet` is off.
    /// Where a command's finished records go: see [`Emitter`].
    pub fn emitter<R>(&self, rows: Option<usize>, what: &str, keep: bool) -> Emitter<R> {
        Emitter {
            bar: self.rows_bar(rows, what),
            keep,
            kept: Vec::new(),
        }
    }

    fn rows_bar(&self, rows: Option<usize>, what: &str) -> indicatif::ProgressBar {
        if !self.progress {
            return indicatif::ProgressBar::hidden();
        }
        // A CSV input's length is known only at its end: then the bar just counts.
        let (bar, template) = match rows {
            Some(rows) => (
                indicatif::ProgressBar::new(rows as u64),
                "{msg} [{bar:30}] {pos}/{len} rows, {per_sec}, eta {eta}",
            ),
            None => (
                indicatif::ProgressBar::no_length(),
                "{msg} {pos} rows, {per_sec}",
            ),
        };
        if let Ok(style) = indicatif::ProgressStyle::with_template(template) {
            bar.set_style(style.progress_chars("=> "));
        }
        bar.set_message(what.to_string());
        bar
    }
}

/// Each finished record goes to the records file, moves the progress bar on, and is kept
/// in memory when a report will draw it.
pub struct Emitter<R> {
    bar: indicatif::ProgressBar,
    keep: bool,
    /// The records kept for the report.
    pub kept: Vec<R>,
}

impl<R: serde::Serialize> Emitter<R> {
    pub fn emit(&mut self, writer: &mut RecordWriter<&mut dyn Write>, record: R) -> Result<()> {
        writer.write(&record).map_err(record_io)?;
        self.bar.inc(1);
        if self.keep {
            self.kept.push(record);
        }
        Ok(())
    }

    /// Clears the progress bar and hands over the kept records.
    pub fn finish(self) -> Vec<R> {
        self.bar.finish_and_clear();
        self.kept
    }
}
