//! Integration tests: one binary, one module per concern. Each test runs the real
//! `kilter` binary (or the library, where that is the thing under test) in a temporary
//! directory; JSON output is read back into typed records with unknown fields denied.

mod harness;
mod tolerance;

mod audit;
mod baselines;
mod calibration;
mod declared;
mod demo;
mod determinism;
mod duplicates;
mod encoder;
mod families;
mod golden;
mod groups;
mod hostile;
mod identity;
mod inputs;
mod interrupt;
mod kinds;
mod models;
mod neighbours;
mod onnx;
mod profiles;
mod records;
mod shapley;
