//! `medley rerank`: JSONL requests in, JSONL responses out, through the same engine as the
//! server, on every core.
//!
//! Lines are read in chunks of [`CHUNK_LINES`], served in parallel on the kernel pool, and written
//! in input order, so memory stays bounded by one chunk however long the input is. A line that
//! fails becomes an error object with its 1-based `"line"` (the same shape as on
//! `/v1/rerank/stream`) and the run goes on; blank lines are skipped, as on the stream endpoint.
//! Only I/O failures stop the run.

use std::io::{BufRead, Write};
use std::time::{Duration, Instant};

use anyhow::Context as _;
use rayon::prelude::*;

use crate::api::wire::{decode_request, ErrorBody};
use crate::serve::engine::Engine;
use crate::serve::pool::{run_here, Pool};

/// Lines served per parallel chunk.
pub const CHUNK_LINES: usize = 2048;

/// What a batch run did.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Summary {
    /// Non-blank lines read.
    pub lines: u64,
    /// Lines answered with an error object.
    pub errors: u64,
    /// Wall time.
    pub elapsed: Duration,
}

impl std::fmt::Display for Summary {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        let secs = self.elapsed.as_secs_f64();
        let rate = if secs > 0.0 { self.lines as f64 / secs } else { 0.0 };
        write!(
            f,
            "medley rerank: {} lines, {} errors, {:.3} s ({:.0} lines/s)",
            self.lines, self.errors, secs, rate
        )
    }
}

/// Serves one line; returns the output line (without newline) and whether it is an error.
fn serve_line(engine: &Engine, number: u64, line: &[u8]) -> (Vec<u8>, bool) {
    let limit = engine.config().server.max_body_bytes;
    if line.len() > limit {
        let message =
            format!("line is {} bytes, over the limit of {limit} (server.max_body_bytes)", line.len());
        return (ErrorBody::new("body_too_large", message, None).at_line(number).to_json(), true);
    }
    let outcome = run_here(|ws| {
        let prepared = engine.prepare(decode_request(line)?)?;
        let reranked = prepared.run(ws)?;
        Ok::<_, crate::api::RequestError>(reranked.to_response())
    });
    match outcome {
        Ok(Ok(response)) => match serde_json::to_vec(&response) {
            Ok(bytes) => (bytes, false),
            Err(e) => (ErrorBody::new("internal", e.to_string(), None).at_line(number).to_json(), true),
        },
        Ok(Err(e)) => (ErrorBody::from_request_error(&e).at_line(number).to_json(), true),
        Err(panic) => (ErrorBody::new("internal", panic.to_string(), None).at_line(number).to_json(), true),
    }
}

/// Reads JSONL from `input`, writes one response line per non-blank input line to `output`.
///
/// # Errors
/// Only I/O errors on `input` or `output`.
pub fn run(
    engine: &Engine,
    pool: &Pool,
    input: &mut dyn BufRead,
    output: &mut dyn Write,
) -> anyhow::Result<Summary> {
    let started = Instant::now();
    let (mut lines, mut errors, mut number) = (0_u64, 0_u64, 0_u64);
    let mut chunk: Vec<(u64, Vec<u8>)> = Vec::with_capacity(CHUNK_LINES);
    let mut eof = false;
    while !eof {
        chunk.clear();
        while chunk.len() < CHUNK_LINES {
            let mut line = Vec::new();
            if input.read_until(b'\n', &mut line).context("reading the input")? == 0 {
                eof = true;
                break;
            }
            number += 1;
            if !line.trim_ascii().is_empty() {
                chunk.push((number, line));
            }
        }
        let served: Vec<(Vec<u8>, bool)> =
            pool.install(|| chunk.par_iter().map(|(n, line)| serve_line(engine, *n, line)).collect());
        for (bytes, is_error) in served {
            lines += 1;
            errors += u64::from(is_error);
            output.write_all(&bytes).context("writing the output")?;
            output.write_all(b"\n").context("writing the output")?;
        }
    }
    output.flush().context("writing the output")?;
    Ok(Summary { lines, errors, elapsed: started.elapsed() })
}
