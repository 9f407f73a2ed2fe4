//! The offline tools, one subcommand each: [`batch`] (`medley rerank`: JSONL in, JSONL out),
//! [`sample`] (`medley sample`: the demo corpus of an invented outdoor-gear shop) and [`replay`]
//! (`medley replay`: logged requests and clicks re-ranked over a grid, the accuracy–diversity
//! frontier and a pick).
//!
//! May import `serve` (the engine and the pool, so offline answers equal served ones), `api` and
//! `medley-core`; nothing imports it but the binary.

pub mod batch;
pub mod replay;
pub mod sample;
