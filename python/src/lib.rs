//! `medley._native`: the Python face of `medley-core`. The same kernels, measures and replay
//! accumulators the service runs, called on numpy arrays and Arrow record batches.
//!
//! - [`rerank`]: one slate, `medley.rerank(scores, embeddings, categories, *, algorithm, lam,
//!   k, ...)`, with the GIL released while the kernel runs.
//! - [`rerank::measures`]: the diversity of a slate.
//! - [`replay::Replay`]: the replay grid's accumulators over Arrow batches of logged slates,
//!   serialisable and mergeable, so partitions (Spark's `mapInArrow`) add up to the same table
//!   as one pass.
//!
//! Errors are `medley.RerankError` (a `ValueError`) carrying the service's snake_case `code`
//! and the `path` of the argument at fault ([`error`]).

mod error;
mod replay;
mod rerank;

use pyo3::prelude::*;

/// The native module; `medley/__init__.py` re-exports it.
#[pymodule]
fn _native(m: &Bound<'_, PyModule>) -> PyResult<()> {
    m.add("RerankError", m.py().get_type::<error::RerankError>())?;
    m.add_function(wrap_pyfunction!(rerank::rerank, m)?)?;
    m.add_function(wrap_pyfunction!(rerank::measures, m)?)?;
    m.add_function(wrap_pyfunction!(rerank::algorithms, m)?)?;
    m.add_class::<replay::Replay>()?;
    m.add("REPORT_COLUMNS", medley_core::replay::REPORT_COLUMNS.to_vec())?;
    Ok(())
}
