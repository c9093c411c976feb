//! Models behind the line protocol: a long-running child process started once through
//! `sh -c`, one JSON request line per batch on its stdin, one JSON answer line on stdout.
//!
//! ```text
//! -> {"inputs": [[x11, x12, ...], ...], "gradients_for": T}      ("gradients_for" optional)
//! <- {"outputs": [[s11, ...], ...], "gradients": [[g11, ...], ...]}  ("gradients" optional)
//! <- {"error": "MESSAGE"}
//! ```
//!
//! The child's stdout is read by a thread that hands complete lines over a channel, so
//! every answer can be awaited with a deadline (`--model-timeout`). Its stderr is drained
//! by another thread that keeps only the last few kilobytes, so a chatty model can neither
//! block on a full pipe nor flood memory, and a failure message can show what it said
//! last. When the model is dropped, stdin is closed and the child is given a moment to
//! exit before it is killed.

use std::collections::VecDeque;
use std::io::{BufRead, BufReader, Read, Write};
use std::process::{Child, ChildStdin, Command, Stdio};
use std::sync::mpsc::{self, Receiver, RecvTimeoutError};
use std::sync::{Arc, Mutex};
use std::thread;
use std::time::{Duration, Instant};

use ndarray::{Array2, ArrayView2, Axis};
use serde::Serialize;
use serde_json::Value;

use super::{check_outputs, Model};
use crate::error::{Error, Result};

/// Bytes of the child's stderr kept for error messages.
const STDERR_TAIL_BYTES: usize = 4096;
/// Longest answer line accepted, so that a runaway child cannot exhaust memory.
const MAX_LINE_BYTES: usize = 1 << 30;
/// How long a child gets to exit after its stdin is closed.
const EXIT_GRACE: Duration = Duration::from_secs(2);

struct Session {
    child: Child,
    stdin: Option<ChildStdin>,
    lines: Receiver<std::io::Result<String>>,
    /// Number of outputs per row, fixed by the first answer.
    outputs: Option<usize>,
    /// Whether the model has answered a gradient request with gradients.
    gives_gradients: Option<bool>,
    /// Set once the session failed; every later call reports the same failure, so that
    /// whichever row's error is shown first names the cause.
    broken: Option<Broken>,
}

/// How a session failed.
enum Broken {
    /// It crashed, closed its output or could not be written to.
    Failed(String),
    /// It did not answer within the timeout and was stopped.
    TimedOut,
    /// It answered `{"error": MESSAGE}`.
    Reported(String),
}

/// A model process speaking the line protocol.
pub struct LineProtocolModel {
    command: String,
    batch_size: usize,
    timeout: Duration,
    session: Mutex<Session>,
    stderr_tail: Arc<Mutex<VecDeque<u8>>>,
}

#[derive(Serialize)]
struct Request<'a> {
    inputs: Vec<&'a [f64]>,
    #[serde(skip_serializing_if = "Option::is_none")]
    gradients_for: Option<usize>,
}

/// A model's answer to one request.
#[derive(Debug)]
pub struct Answer {
    /// One output vector per input row.
    pub outputs: Array2<f64>,
    /// `d score_T / d input` per input row, when asked for and given.
    pub gradients: Option<Array2<f64>>,
}

impl LineProtocolModel {
    /// Starts `sh -c command`.
    pub fn start(command: &str, batch_size: usize, timeout: Duration) -> Result<Self> {
        let mut child = Command::new("sh")
            .arg("-c")
            .arg(command)
            .stdin(Stdio::piped())
            .stdout(Stdio::piped())
            .stderr(Stdio::piped())
            .spawn()
            .map_err(|e| Error::ModelFailed {
                model: describe_command(command),
                detail: format!("could not start it through sh -c: {e}"),
                stderr_tail: String::new(),
            })?;
        let stdin = child.stdin.take();
        let stdout = child.stdout.take().expect("stdout was piped");
        let stderr = child.stderr.take().expect("stderr was piped");

        let (sender, lines) = mpsc::channel();
        thread::spawn(move || {
            let mut reader = BufReader::with_capacity(1 << 16, stdout);
            loop {
                let mut line = String::new();
                let read = (&mut reader)
                    .take(MAX_LINE_BYTES as u64)
                    .read_line(&mut line);
                let done = matches!(read, Ok(0) | Err(_));
                if sender.send(read.map(|_| line)).is_err() || done {
                    break;
                }
            }
        });

        let stderr_tail = Arc::new(Mutex::new(VecDeque::with_capacity(STDERR_TAIL_BYTES)));
        let tail = Arc::clone(&stderr_tail);
        thread::spawn(move || {
            let mut stderr = stderr;
            let mut buffer = [0u8; 8192];
            while let Ok(n) = stderr.read(&mut buffer) {
                if n == 0 {
                    break;
                }
                let mut tail = tail.lock().unwrap_or_else(|p| p.into_inner());
                tail.extend(&buffer[..n]);
                let excess = tail.len().saturating_sub(STDERR_TAIL_BYTES);
                tail.drain(..excess);
            }
        });

        Ok(LineProtocolModel {
            command: command.to_string(),
            batch_size,
            timeout,
            session: Mutex::new(Session {
                child,
                stdin,
                lines,
                outputs: None,
                gives_gradients: None,
                broken: None,
            }),
            stderr_tail,
        })
    }

    fn name(&self) -> String {
        describe_command(&self.command)
    }

    fn stderr_tail(&self) -> String {
        let tail = self.stderr_tail.lock().unwrap_or_else(|p| p.into_inner());
        let bytes: Vec<u8> = tail.iter().copied().collect();
        let text = String::from_utf8_lossy(&bytes).into_owned();
        // Keep the last dozen lines: enough for a traceback's end.
        let lines: Vec<&str> = text.lines().collect();
        lines[lines.len().saturating_sub(12)..].join("\n")
    }

    fn timed_out(&self) -> Error {
        Error::ModelTimeout {
            model: self.name(),
            seconds: self.timeout.as_secs_f64(),
            stderr_tail: self.stderr_tail(),
        }
    }

    fn failed(&self, session: &mut Session, detail: String) -> Error {
        // Give the stderr thread a moment to collect the child's last words.
        wait_for_exit(&mut session.child, Duration::from_millis(300));
        thread::sleep(Duration::from_millis(50));
        let status = match session.child.try_wait() {
            Ok(Some(status)) => format!(" ({status})"),
            _ => String::new(),
        };
        let detail = format!("{detail}{status}");
        session.broken = Some(Broken::Failed(detail.clone()));
        Error::ModelFailed {
            model: self.name(),
            detail,
            stderr_tail: self.stderr_tail(),
        }
    }

    /// One request and its answer.
    fn exchange(
        &self,
        session: &mut Session,
        rows: ArrayView2<'_, f64>,
        gradients_for: Option<usize>,
    ) -> Result<Answer> {
        if let Some(broken) = &session.broken {
            return Err(match broken {
                Broken::Failed(detail) => Error::ModelFailed {
                    model: self.name(),
                    detail: detail.clone(),
                    stderr_tail: self.stderr_tail(),
                },
                Broken::TimedOut => self.timed_out(),
                Broken::Reported(message) => Error::ModelReported {
                    model: self.name(),
                    message: message.clone(),
                },
            });
        }
        let owned = rows.as_standard_layout();
        let request = Request {
            inputs: owned
                .axis_chunks_iter(Axis(0), 1)
                .map(|r| r.to_slice().expect("standard layout"))
                .collect(),
            gradients_for,
        };
        let mut line = serde_json::to_vec(&request).expect("a request serialises");
        line.push(b'\n');
        let written = match session.stdin.as_mut() {
            Some(stdin) => stdin.write_all(&line).and_then(|_| stdin.flush()),
            None => Err(std::io::Error::other("stdin is closed")),
        };
        if let Err(e) = written {
            // A child that exited at once closes its stdin too: say which it was.
            let exited = wait_for_exit(&mut session.child, Duration::from_millis(300));
            let detail = if exited {
                "it exited without answering".to_string()
            } else {
                format!("it stopped reading its input ({e})")
            };
            return Err(self.failed(session, detail));
        }
        let text = match session.lines.recv_timeout(self.timeout) {
            Ok(Ok(text)) if text.is_empty() => {
                return Err(self.failed(session, "it exited without answering".into()))
            }
            Ok(Ok(text)) => text,
            Ok(Err(e)) => {
                return Err(self.failed(session, format!("its output is unreadable: {e}")))
            }
            Err(RecvTimeoutError::Disconnected) => {
                return Err(self.failed(session, "it exited without answering".into()))
            }
            Err(RecvTimeoutError::Timeout) => {
                let _ = session.child.kill();
                session.broken = Some(Broken::TimedOut);
                return Err(self.timed_out());
            }
        };
        self.parse_answer(session, &text, rows.nrows(), rows.ncols(), gradients_for)
    }

    /// Parses an answer line, then holds the session to what the model said before: a
    /// reported error breaks it, and the number of outputs per row is fixed by the first.
    fn parse_answer(
        &self,
        session: &mut Session,
        text: &str,
        rows: usize,
        dim: usize,
        gradients_for: Option<usize>,
    ) -> Result<Answer> {
        let answer = match parse_answer_line(&self.name(), text, rows, dim, gradients_for) {
            Err(Error::ModelReported { model, message }) => {
                session.broken = Some(Broken::Reported(message.clone()));
                return Err(Error::ModelReported { model, message });
            }
            other => other?,
        };
        match session.outputs {
            Some(c) if c != answer.outputs.ncols() => {
                return Err(Error::ModelAnswer {
                    model: self.name(),
                    detail: format!(
                        "it answered {} outputs per row, earlier {c}",
                        answer.outputs.ncols()
                    ),
                })
            }
            _ => session.outputs = Some(answer.outputs.ncols()),
        }
        Ok(answer)
    }

    fn run_batches(
        &self,
        inputs: ArrayView2<'_, f64>,
        gradients_for: Option<usize>,
    ) -> Result<(Array2<f64>, Option<Array2<f64>>)> {
        let mut session = self.session.lock().unwrap_or_else(|p| p.into_inner());
        let mut outputs: Option<Array2<f64>> = None;
        let mut gradients = gradients_for.map(|_| Array2::<f64>::zeros(inputs.raw_dim()));
        for (b, batch) in inputs
            .axis_chunks_iter(Axis(0), self.batch_size)
            .enumerate()
        {
            // Once a model has shown it gives no gradients, stop asking.
            let ask = gradients_for.filter(|_| session.gives_gradients != Some(false));
            let answer = self.exchange(&mut session, batch, ask)?;
            let out = outputs.get_or_insert_with(|| {
                Array2::<f64>::zeros((inputs.nrows(), answer.outputs.ncols()))
            });
            let start = b * self.batch_size;
            out.slice_mut(ndarray::s![start..start + batch.nrows(), ..])
                .assign(&answer.outputs);
            if ask.is_some() {
                session.gives_gradients = Some(answer.gradients.is_some());
            }
            match (&mut gradients, answer.gradients) {
                (Some(all), Some(g)) => all
                    .slice_mut(ndarray::s![start..start + batch.nrows(), ..])
                    .assign(&g),
                (Some(_), None) => gradients = None,
                _ => {}
            }
        }
        let outputs = outputs.unwrap_or_else(|| Array2::zeros((0, session.outputs.unwrap_or(1))));
        Ok((outputs, gradients))
    }
}

impl Model for LineProtocolModel {
    fn input_dim(&self) -> Option<usize> {
        None
    }

    fn predict(&self, inputs: ArrayView2<'_, f64>) -> Result<Array2<f64>> {
        Ok(self.run_batches(inputs, None)?.0)
    }

    fn gradients(&self, inputs: ArrayView2<'_, f64>, target: usize) -> Result<Option<Array2<f64>>> {
        {
            let session = self.session.lock().unwrap_or_else(|p| p.into_inner());
            if session.gives_gradients == Some(false) {
                return Ok(None);
            }
        }
        Ok(self.run_batches(inputs, Some(target))?.1)
    }

    fn preferred_batch(&self) -> usize {
        self.batch_size
    }

    fn precision(&self) -> f64 {
        // The model's arithmetic is unknown; assume it may be single precision.
        f64::from(f32::EPSILON)
    }

    fn describe(&self) -> String {
        self.name()
    }
}

impl Drop for LineProtocolModel {
    fn drop(&mut self) {
        let session = self.session.get_mut().unwrap_or_else(|p| p.into_inner());
        drop(session.stdin.take());
        if wait_for_exit(&mut session.child, EXIT_GRACE) {
            return;
        }
        let _ = session.child.kill();
        let _ = session.child.wait();
    }
}

/// Parses one answer line of the protocol to a request of `rows` inputs of `dim` features.
///
/// An `{"error": ...}` answer is `Error::ModelReported`; anything else that is not
/// `rows` finite output vectors of one length (plus, when `gradients_for` is set and the
/// model gave them, `rows x dim` finite gradients) is `Error::ModelAnswer`. `model` names
/// the model in the errors.
pub fn parse_answer_line(
    model: &str,
    text: &str,
    rows: usize,
    dim: usize,
    gradients_for: Option<usize>,
) -> Result<Answer> {
    let wrong = |detail: String| Error::ModelAnswer {
        model: model.to_string(),
        detail,
    };
    let value: Value = serde_json::from_str(text.trim_end()).map_err(|e| {
        wrong(format!(
            "its answer is not JSON ({e}): {}",
            abbreviate(text.trim_end(), 120)
        ))
    })?;
    let object = value.as_object().ok_or_else(|| {
        wrong(format!(
            "its answer is not a JSON object: {}",
            abbreviate(text.trim_end(), 120)
        ))
    })?;
    if let Some(message) = object.get("error") {
        let message = match message {
            Value::String(s) => s.clone(),
            other => other.to_string(),
        };
        return Err(Error::ModelReported {
            model: model.to_string(),
            message,
        });
    }
    let outputs = object
        .get("outputs")
        .ok_or_else(|| wrong("its answer has no \"outputs\" field".into()))?;
    let outputs = number_matrix(outputs, "outputs").map_err(wrong)?;
    check_outputs(&outputs, rows, model)?;
    let gradients = match (gradients_for, object.get("gradients")) {
        (Some(_), Some(g)) => {
            let g = number_matrix(g, "gradients").map_err(wrong)?;
            if g.dim() != (rows, dim) {
                return Err(wrong(format!(
                    "its gradients are {} x {}, expected {rows} x {dim}",
                    g.nrows(),
                    g.ncols()
                )));
            }
            if g.iter().any(|v| !v.is_finite()) {
                return Err(wrong("its gradients are not all finite".into()));
            }
            Some(g)
        }
        _ => None,
    };
    Ok(Answer { outputs, gradients })
}

/// Waits up to `limit` for the child to exit; whether it did.
fn wait_for_exit(child: &mut Child, limit: Duration) -> bool {
    let deadline = Instant::now() + limit;
    loop {
        match child.try_wait() {
            Ok(Some(_)) => return true,
            Ok(None) if Instant::now() < deadline => thread::sleep(Duration::from_millis(10)),
            _ => return false,
        }
    }
}

fn describe_command(command: &str) -> String {
    format!("`{}`", abbreviate(command, 60))
}

fn abbreviate(text: &str, limit: usize) -> String {
    if text.chars().count() <= limit {
        text.to_string()
    } else {
        let cut: String = text.chars().take(limit).collect();
        format!("{cut}...")
    }
}

/// A JSON list of equal-length lists of numbers as a matrix.
fn number_matrix(value: &Value, field: &str) -> std::result::Result<Array2<f64>, String> {
    let rows = value
        .as_array()
        .ok_or_else(|| format!("\"{field}\" is not a list of lists"))?;
    let width = match rows.first() {
        Some(Value::Array(first)) => first.len(),
        // A regression model may answer plain numbers: one output each.
        Some(Value::Number(_)) => 0,
        Some(_) => return Err(format!("\"{field}\" is not a list of lists of numbers")),
        None => return Ok(Array2::zeros((0, 0))),
    };
    if width == 0 && rows.iter().all(Value::is_number) {
        let column: Vec<f64> = rows.iter().filter_map(Value::as_f64).collect();
        return Ok(Array2::from_shape_vec((column.len(), 1), column).expect("one column"));
    }
    let mut values = Vec::with_capacity(rows.len() * width);
    for (r, row) in rows.iter().enumerate() {
        let row = row
            .as_array()
            .ok_or_else(|| format!("\"{field}\" row {} is not a list", r + 1))?;
        if row.len() != width {
            return Err(format!(
                "\"{field}\" row {} has {} values, row 1 has {width}",
                r + 1,
                row.len()
            ));
        }
        for (c, v) in row.iter().enumerate() {
            values.push(v.as_f64().ok_or_else(|| {
                format!(
                    "\"{field}\" row {}, value {} is {v}, not a number",
                    r + 1,
                    c + 1
                )
            })?);
        }
    }
    Ok(Array2::from_shape_vec((rows.len(), width), values).expect("checked widths"))
}
