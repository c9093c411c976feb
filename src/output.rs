//! Output: records as JSON Lines or CSV, files written whole or not at all.
//!
//! Every output goes to a temporary file in the destination's directory and is renamed
//! over the destination only when complete, so a crash or Ctrl-C never leaves a partial
//! or clobbered file. Paths are checked before any work starts: the directory must exist
//! and the output must not be one of the inputs.

use std::fs::File;
use std::io::{self, BufWriter, Write};
use std::path::{Path, PathBuf};
use std::sync::Mutex;

use serde::Serialize;
use serde_json::{Map, Value};

use crate::error::{Error, Result};

/// Temporary files being written. An interrupted run (Ctrl-C, SIGTERM) removes them, so it
/// leaves neither a partial output nor a stray temporary file behind.
static IN_FLIGHT: Mutex<Vec<PathBuf>> = Mutex::new(Vec::new());

/// Removes every temporary output still being written and ends the process with status
/// 130 (128 + SIGINT, common practice for an interrupted command). For the interrupt
/// handler: the lock is held to the end, so no output is renamed into place meanwhile.
pub fn abandon_outputs_and_exit() -> ! {
    let in_flight = IN_FLIGHT.lock();
    if let Ok(paths) = &in_flight {
        for path in paths.iter() {
            let _ = std::fs::remove_file(path);
        }
    }
    eprintln!("kilter: interrupted; no output file was written");
    std::process::exit(130)
}

fn track(path: &Path, in_flight: bool) {
    if let Ok(mut paths) = IN_FLIGHT.lock() {
        if in_flight {
            paths.push(path.to_path_buf());
        } else {
            paths.retain(|p| p != path);
        }
    }
}

/// Writes `path` through `fill`, atomically.
pub fn write_atomically(
    path: &Path,
    fill: impl FnOnce(&mut BufWriter<&mut File>) -> io::Result<()>,
) -> Result<()> {
    let dir = parent_dir(path);
    let temp = tempfile::Builder::new()
        .prefix(".kilter-")
        .suffix(".tmp")
        .tempfile_in(&dir)
        .map_err(|e| Error::io(path, e))?;
    let temp_path = temp.path().to_path_buf();
    track(&temp_path, true);
    let result = finish_temp(temp, path, fill);
    track(&temp_path, false);
    result
}

fn finish_temp(
    mut temp: tempfile::NamedTempFile,
    path: &Path,
    fill: impl FnOnce(&mut BufWriter<&mut File>) -> io::Result<()>,
) -> Result<()> {
    {
        let mut writer = BufWriter::new(temp.as_file_mut());
        fill(&mut writer).map_err(|e| Error::io(path, e))?;
        writer.flush().map_err(|e| Error::io(path, e))?;
    }
    temp.as_file().sync_all().map_err(|e| Error::io(path, e))?;
    // Temporary files are created private; the result should read like any other output.
    #[cfg(unix)]
    {
        use std::os::unix::fs::PermissionsExt;
        let mode = match std::fs::metadata(path) {
            Ok(existing) => existing.permissions().mode(),
            Err(_) => 0o644,
        };
        std::fs::set_permissions(temp.path(), std::fs::Permissions::from_mode(mode))
            .map_err(|e| Error::io(path, e))?;
    }
    temp.persist(path).map_err(|e| Error::io(path, e.error))?;
    Ok(())
}

fn parent_dir(path: &Path) -> PathBuf {
    match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ => PathBuf::from("."),
    }
}

/// Checks an output path before any work: its directory exists, it is not a directory,
/// and it is none of the inputs.
pub fn check_output_path(output: &Path, inputs: &[&Path]) -> Result<()> {
    let dir = parent_dir(output);
    if !dir.is_dir() {
        return Err(Error::Output {
            path: output.to_path_buf(),
            detail: format!("the directory {} does not exist", dir.display()),
        });
    }
    if output.is_dir() {
        return Err(Error::Output {
            path: output.to_path_buf(),
            detail: "is a directory; give a file name".into(),
        });
    }
    // "out.jsonl/" would only fail at the final rename, after all the work.
    if output
        .as_os_str()
        .to_string_lossy()
        .ends_with(std::path::is_separator)
    {
        return Err(Error::Output {
            path: output.to_path_buf(),
            detail: "names a directory (it ends in a separator); give a file name".into(),
        });
    }
    let resolved = resolve(output);
    for input in inputs {
        if resolve(input) == resolved {
            return Err(Error::Output {
                path: output.to_path_buf(),
                detail: "is also an input; writing it would destroy the input".into(),
            });
        }
    }
    Ok(())
}

/// A path made absolute with its directory's symlinks resolved, for comparison.
fn resolve(path: &Path) -> PathBuf {
    if let Ok(p) = path.canonicalize() {
        return p;
    }
    let dir = parent_dir(path);
    let dir = dir.canonicalize().unwrap_or(dir);
    match path.file_name() {
        Some(name) => dir.join(name),
        None => dir,
    }
}

/// The record formats SPEC defines.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum RecordFormat {
    /// One JSON object per line.
    JsonLines,
    /// A header row and one row per record, nested fields flattened with `.`.
    Csv,
}

impl RecordFormat {
    /// JSON Lines for `.jsonl` (and stdout), CSV for `.csv`; anything else is refused so
    /// that a typo does not silently produce the wrong format.
    pub fn for_path(path: &Path) -> Result<Self> {
        match path
            .extension()
            .and_then(|e| e.to_str())
            .map(str::to_ascii_lowercase)
        {
            Some(e) if e == "jsonl" => Ok(RecordFormat::JsonLines),
            Some(e) if e == "csv" => Ok(RecordFormat::Csv),
            _ => Err(Error::Output {
                path: path.to_path_buf(),
                detail: "record files end in .jsonl (JSON Lines) or .csv".into(),
            }),
        }
    }
}

/// Writes records one at a time in one of the SPEC formats.
pub struct RecordWriter<W: Write> {
    out: W,
    format: RecordFormat,
    csv_columns: Option<Vec<String>>,
}

impl<W: Write> RecordWriter<W> {
    /// A writer over `out`.
    pub fn new(out: W, format: RecordFormat) -> Self {
        RecordWriter {
            out,
            format,
            csv_columns: None,
        }
    }

    /// Writes one record.
    pub fn write<T: Serialize>(&mut self, record: &T) -> io::Result<()> {
        match self.format {
            RecordFormat::JsonLines => {
                serde_json::to_writer(&mut self.out, record)?;
                self.out.write_all(b"\n")
            }
            RecordFormat::Csv => {
                let value = serde_json::to_value(record).map_err(io::Error::other)?;
                let mut flat = Vec::new();
                let groups: Option<Vec<String>> = value.get("groups").and_then(|g| {
                    g.as_array()?
                        .iter()
                        .map(|n| n.as_str().map(str::to_string))
                        .collect()
                });
                flatten("", &value, groups.as_deref(), &mut flat);
                if self.csv_columns.is_none() {
                    let names: Vec<String> = flat.iter().map(|(k, _)| k.clone()).collect();
                    write_csv_line(&mut self.out, names.iter().map(String::as_str))?;
                    self.csv_columns = Some(names);
                }
                let columns = self.csv_columns.as_ref().expect("set above");
                let lookup: Map<String, Value> = flat.into_iter().collect();
                let cells: Vec<String> = columns
                    .iter()
                    .map(|c| lookup.get(c).map(csv_cell).unwrap_or_default())
                    .collect();
                write_csv_line(&mut self.out, cells.iter().map(String::as_str))
            }
        }
    }

    /// Flushes and returns the inner writer.
    pub fn finish(mut self) -> io::Result<W> {
        self.out.flush()?;
        Ok(self.out)
    }
}

/// Per-group lists: in a record with `groups`, their cells are named by group.
const PER_GROUP: [&str; 2] = ["attribution", "standard_errors"];

/// Flattens nested fields into `a.b.c` columns. A record's `groups` (its group names)
/// name the cells of its per-group lists, so that `families.deletion.attribution.age`
/// means the same group in every row whatever the order of groups.
fn flatten(prefix: &str, value: &Value, groups: Option<&[String]>, out: &mut Vec<(String, Value)>) {
    match value {
        Value::Object(map) => {
            for (k, v) in map {
                let key = if prefix.is_empty() {
                    k.clone()
                } else {
                    format!("{prefix}.{k}")
                };
                flatten(&key, v, groups, out);
            }
        }
        Value::Array(items) if items.iter().all(Value::is_string) => {
            // A list of sentences (reasons) varies in length from record to record, and
            // CSV columns are fixed by the first record: one cell, sentences joined.
            let joined: Vec<&str> = items.iter().filter_map(Value::as_str).collect();
            out.push((prefix.to_string(), Value::String(joined.join(" | "))));
        }
        Value::Array(items) if items.iter().all(|v| !v.is_object() && !v.is_array()) => {
            // A list of scalars (an attribution vector) becomes one cell per element,
            // named by group where it is a per-group list.
            let last = prefix.rsplit('.').next().unwrap_or(prefix);
            let names = groups.filter(|g| g.len() == items.len() && PER_GROUP.contains(&last));
            for (i, v) in items.iter().enumerate() {
                let key = match names {
                    Some(names) => format!("{prefix}.{}", names[i]),
                    None => format!("{prefix}.{i}"),
                };
                out.push((key, v.clone()));
            }
        }
        Value::Array(items) => {
            for (i, v) in items.iter().enumerate() {
                flatten(&format!("{prefix}.{i}"), v, groups, out);
            }
        }
        other => out.push((prefix.to_string(), other.clone())),
    }
}

fn csv_cell(value: &Value) -> String {
    match value {
        Value::String(s) => s.clone(),
        Value::Null => String::new(),
        other => other.to_string(),
    }
}

fn write_csv_line<'a, W: Write>(
    out: &mut W,
    cells: impl Iterator<Item = &'a str>,
) -> io::Result<()> {
    let mut first = true;
    for cell in cells {
        if !first {
            out.write_all(b",")?;
        }
        first = false;
        if cell.contains([',', '"', '\n', '\r']) {
            out.write_all(b"\"")?;
            out.write_all(cell.replace('"', "\"\"").as_bytes())?;
            out.write_all(b"\"")?;
        } else {
            out.write_all(cell.as_bytes())?;
        }
    }
    out.write_all(b"\n")
}

#[cfg(test)]
mod tests {
    use super::*;
    use serde_json::json;

    #[test]
    fn csv_flattens_nested_fields_with_dots() {
        let mut w = RecordWriter::new(Vec::new(), RecordFormat::Csv);
        w.write(&json!({"row": 0, "families": {"deletion": {"rate": 0.5}}, "reasons": "a, b"}))
            .unwrap();
        w.write(&json!({"row": 1, "families": {"deletion": {"rate": 1.0}}, "reasons": ""}))
            .unwrap();
        let text = String::from_utf8(w.finish().unwrap()).unwrap();
        assert_eq!(
            text,
            "row,families.deletion.rate,reasons\n0,0.5,\"a, b\"\n1,1.0,\n"
        );
    }

    #[test]
    fn csv_names_per_group_cells_by_group() {
        let mut w = RecordWriter::new(Vec::new(), RecordFormat::Csv);
        w.write(&json!({
            "groups": ["age", "b,c"],
            "f": {"attribution": [1.0, 2.0], "standard_errors": [0.5, 0.25], "p_histogram": [3, 4]}
        }))
        .unwrap();
        let text = String::from_utf8(w.finish().unwrap()).unwrap();
        assert_eq!(
            text.lines().next().unwrap(),
            "groups,f.attribution.age,\"f.attribution.b,c\",f.standard_errors.age,\
             \"f.standard_errors.b,c\",f.p_histogram.0,f.p_histogram.1"
        );
    }
}
