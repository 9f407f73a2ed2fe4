//! The wire contract shared by every front end: the JSON request and response types and their
//! decoding ([`wire`]), and the error codes and paths ([`RequestError`]).
//!
//! This layer may import `medley-core` only: the serving layer (`serve`), the front ends
//! (`http`) and the offline tools (`offline`) build on it, never the other way round.

mod error;
pub mod wire;

pub use error::{RequestError, Sent};
