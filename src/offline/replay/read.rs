//! Reading a logged corpus: one re-rank request plus `"clicked": [ids]` a line, validated once
//! into slates with the same validation as the server, in parallel chunks.

use std::collections::HashMap;
use std::io::BufRead;

use rayon::prelude::*;
use serde::Deserialize;

use crate::api::wire::{self, RerankRequest};
use crate::serve::engine::Engine;
use medley_core::model::RerankInput;

/// One logged line.
#[derive(Debug, Deserialize)]
struct Logged {
    #[serde(flatten)]
    request: RerankRequest,
    #[serde(default)]
    clicked: Vec<String>,
}

/// A validated logged slate.
#[derive(Debug)]
pub struct Slate {
    pub(super) input: RerankInput,
    /// Whether each candidate was clicked.
    pub(super) clicked: Vec<bool>,
    /// Distinct ids the line logs as clicked, among the candidates or not: the relevant set of
    /// the standard nDCG and recall.
    pub(super) relevant: usize,
    /// Global item number of each candidate (for coverage and exposure).
    pub(super) item: Vec<u32>,
}

/// The logged corpus, validated.
#[derive(Debug)]
pub struct Corpus {
    pub(super) slates: Vec<Slate>,
    pub(super) items: usize,
    /// Lines skipped, with the reason of the first few.
    pub skipped: Vec<(u64, String)>,
}

impl Corpus {
    /// Number of slates.
    #[must_use]
    pub fn len(&self) -> usize {
        self.slates.len()
    }

    /// Slates whose line carried no taste profile (calibration cannot replay them).
    #[must_use]
    pub fn without_profile(&self) -> usize {
        self.slates.iter().filter(|s| s.input.profile().is_none()).count()
    }

    /// True when no line was usable.
    #[must_use]
    pub fn is_empty(&self) -> bool {
        self.slates.is_empty()
    }
}

/// Lines parsed and validated together, in parallel; bounds the raw text held at once.
const READ_CHUNK_LINES: usize = 4096;

/// Reads and validates a logged corpus; lines without clicks or that fail validation are
/// skipped and reported. Lines are read in chunks of 4 096 (`READ_CHUNK_LINES`), each chunk parsed and
/// validated on all cores, and item ids numbered in line order afterwards, so the result does
/// not depend on the number of threads.
///
/// # Errors
/// Only I/O errors on `input`.
pub fn read_corpus(engine: &Engine, input: &mut dyn BufRead) -> std::io::Result<Corpus> {
    let mut items: HashMap<String, u32> = HashMap::new();
    let (mut slates, mut skipped) = (Vec::new(), Vec::new());
    let mut number = 0_u64;
    let mut chunk: Vec<(u64, Vec<u8>)> = Vec::with_capacity(READ_CHUNK_LINES);
    loop {
        chunk.clear();
        while chunk.len() < READ_CHUNK_LINES {
            let mut line = Vec::new();
            if input.read_until(b'\n', &mut line)? == 0 {
                break;
            }
            number += 1;
            if !line.trim_ascii().is_empty() {
                chunk.push((number, line));
            }
        }
        if chunk.is_empty() {
            break;
        }
        let parsed: Vec<(u64, Validated)> =
            chunk.par_iter().map(|(n, line)| (*n, validate_line(engine, line))).collect();
        for (n, result) in parsed {
            match result {
                Err(reason) => skipped.push((n, reason)),
                Ok((input, clicked, relevant)) => {
                    let item = input
                        .ids()
                        .iter()
                        .map(|id| {
                            let next = u32::try_from(items.len()).unwrap_or(u32::MAX);
                            *items.entry(id.clone()).or_insert(next)
                        })
                        .collect();
                    slates.push(Slate { input, clicked, relevant, item });
                }
            }
        }
    }
    Ok(Corpus { slates, items: items.len(), skipped })
}

/// A validated slate, its click flags and its number of distinct clicked ids, or why its line
/// is skipped.
type Validated = Result<(RerankInput, Vec<bool>, usize), String>;

/// One logged line into a validated slate and its click flags, or why it is skipped.
fn validate_line(engine: &Engine, line: &[u8]) -> Validated {
    let _ = wire::midpoint_seen();
    let mut logged: Logged = wire::decode_json(line).map_err(|e| e.to_string())?;
    if wire::midpoint_seen() {
        wire::exact_embeddings(&mut logged.request.candidates, line);
    }
    if logged.clicked.is_empty() {
        return Err("no \"clicked\" ids".into());
    }
    // Validate as a DPP request on the default slice of `engine` (which the caller builds
    // unlocked), so every slate has embeddings and every algorithm can run on it.
    let mut request = logged.request;
    request.slice = None;
    request.algorithm = Some("dpp".into());
    request.lambda = None;
    request.k = None;
    let input = engine.prepare(request).map_err(|e| e.to_string())?.input;
    let mut distinct: Vec<&str> = logged.clicked.iter().map(String::as_str).collect();
    distinct.sort_unstable();
    distinct.dedup();
    let clicked = input.ids().iter().map(|id| distinct.binary_search(&id.as_str()).is_ok()).collect();
    Ok((input, clicked, distinct.len()))
}
