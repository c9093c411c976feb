//! Fuzz target: the parser of the line protocol's answer lines on arbitrary bytes.
//!
//! The first byte sets the request: 1 to 8 input rows (bits 0-2), 1 to 8 features
//! (bits 3-5) and whether gradients were asked for (bit 6); the rest is the answer line.
//! Parsing must never panic. An accepted answer must be exactly what the protocol
//! promises (SPEC, model line protocol): one finite output vector of one length >= 1 per
//! input row, and gradients only when asked for, `rows x features` and finite.

#![no_main]

use kilter::models::line_protocol::parse_answer_line;
use kilter::Error;
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    let Some((&request, line)) = data.split_first() else {
        return;
    };
    // The reader thread hands over lines as Strings, so only UTF-8 reaches the parser.
    let Ok(text) = std::str::from_utf8(line) else {
        return;
    };
    let rows = usize::from(request & 7) + 1;
    let dim = usize::from((request >> 3) & 7) + 1;
    let gradients_for = (request & 64 != 0).then_some(0);
    match parse_answer_line("`fuzz`", text, rows, dim, gradients_for) {
        Ok(answer) => {
            assert_eq!(answer.outputs.nrows(), rows);
            assert!(answer.outputs.ncols() >= 1);
            assert!(answer.outputs.iter().all(|v| v.is_finite()));
            if let Some(g) = &answer.gradients {
                assert!(gradients_for.is_some(), "gradients nobody asked for");
                assert_eq!(g.dim(), (rows, dim));
                assert!(g.iter().all(|v| v.is_finite()));
            }
        }
        // Both refusals are exit status 1 (SPEC: the model answered wrongly).
        Err(e @ (Error::ModelAnswer { .. } | Error::ModelReported { .. })) => {
            assert_eq!(e.exit_status(), 1);
        }
        Err(other) => panic!("unexpected error kind: {other}"),
    }
});
