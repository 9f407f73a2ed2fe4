//! `relevance`: the score order, unchanged. The baseline every other diversifier is measured from.

use super::{relevance_selection, Diversifier, KernelError, Workspace};
use crate::model::{Params, RerankInput, Selection};

/// Top-k by raw score, ties to the lower input index; `lambda` is ignored.
///
/// # Complexity
/// O(N + k log k) time (selection, then a sort of the k chosen), O(N) extra memory; with a
/// per-category cap, O(N log N).
///
/// # Invariants
/// The output is a prefix of the strict total order (score descending, index ascending), minus
/// candidates of categories already at their cap.
#[derive(Debug, Clone, Copy, Default)]
pub struct Relevance;

impl Diversifier for Relevance {
    fn name(&self) -> &'static str {
        "relevance"
    }

    fn needs_embeddings(&self) -> bool {
        false
    }

    fn select(&self, input: &RerankInput, params: &Params, ws: &mut Workspace) -> Result<Selection, KernelError> {
        Ok(relevance_selection(input, params, ws))
    }
}
