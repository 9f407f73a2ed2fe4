//! The lazy DPP kernel: a max-heap of stale f64 values, refreshed one candidate at a time.
//!
//! A max-heap holds each candidate's last computed objective, an upper bound on its current one
//! (see [`super::Dpp`]). Only the candidate on top is brought up to date, by projecting its row
//! on the basis vectors it has not seen, and put back in place; it is taken once it is on top
//! with a fresh value. The picks are exactly those of the eager algorithm (same objective, same
//! tie rule: heap order is value, then lower index). Works on every slate.
//!
//! # Complexity
//! Worst case O(N·k·d + k²·d) time plus O(log N) per heap operation; extra memory an f64 copy of
//! the unit rows (N·d) and the basis (k·d).

use std::collections::binary_heap::PeekMut;

use pulp::Simd;

use super::{project_out, push_basis_vector, EPSILON};
use crate::diversify::{allowed, by_score, eligible, fill_by_score, passes, take, Bound, Workspace};
use crate::model::{Params, RerankInput, Selection};

/// Runs the lazy greedy. The caller has checked `lambda > 0`, `N > 0` and embeddings present.
///
/// Under a fairness floor the protected candidates keep a heap of their own: a step the floor
/// restricts searches it only, any other step both tops (bounds stay valid whichever steps were
/// restricted). A pass that finds no candidate above `EPSILON` takes the best remaining one of
/// that pass by score, as the eager loop does; such a pick adds no basis vector (it is in the
/// span already to working precision).
#[inline(always)]
pub(super) fn select<S: Simd>(simd: S, input: &RerankInput, params: &Params, ws: &mut Workspace) -> Selection {
    let emb = input.embeddings().expect("select checked for embeddings");
    let d = emb.dim();
    let n = input.len();
    let m = params.k().min(n);
    let s = input.normalized();
    ws.reset_for(input, m);
    // Unit rows in f64, once per call: refreshes touch rows in heap order, not streaming order.
    ws.wide.clear();
    ws.wide.reserve(n * d);
    for (row, &inv) in emb.as_slice().chunks_exact(d).zip(emb.inv_norms()) {
        ws.wide.extend(row.iter().map(|&x| f64::from(x) * inv));
    }
    // Basis vector t is basis[t·d ..][..d]; at most m − 1 are ever needed. `filled[i]` counts
    // the basis vectors candidate i's residual has seen.
    ws.basis.clear();
    ws.basis.reserve(m.saturating_sub(1) * d);
    ws.filled.clear();
    ws.filled.resize(n, 0);
    ws.running.clear();
    ws.running.resize(n, 1.0);
    let lambda = params.lambda();
    let protected = input.fairness().map(|f| f.protected());
    ws.heap.clear();
    ws.heap_protected.clear();
    for i in 0..n {
        let bound = Bound { value: (1.0 - lambda) * s[i], index: i };
        if protected.is_some_and(|p| p[i]) {
            ws.heap_protected.push(bound);
        } else {
            ws.heap.push(bound);
        }
    }
    let mut sel = Selection { indices: Vec::with_capacity(m), gains: Vec::with_capacity(m), exhausted_at: None };

    while sel.indices.len() < m {
        if ws.cancelled() {
            break;
        }
        let step = sel.indices.len();
        let mut pick = None;
        for r in passes(ws.must_protect(step)) {
            pick = best(simd, input, params, ws, r);
            if pick.is_some() {
                break;
            }
            if protected.is_none() {
                // Residuals only shrink: once none is above EPSILON, none will be again.
                sel.exhausted_at = Some(step);
                fill_by_score(input, params, ws, m, &mut sel);
                return sel;
            }
            // Every eligible candidate of this pass is under EPSILON: the best by score.
            let fallback = (0..n).filter(|&i| eligible(input, params, ws, i, r)).min_by(|&a, &b| by_score(input.scores(), a, b));
            if let Some(i) = fallback {
                sel.exhausted_at.get_or_insert(step);
                let nb = ws.basis.len() / d;
                ws.running[i] -= project_out(simd, &ws.wide[i * d..(i + 1) * d], &ws.basis, ws.filled[i], nb, d);
                ws.filled[i] = nb;
                pick = Some(i);
                break;
            }
        }
        let Some(i) = pick else { break };
        let d2 = ws.running[i];
        take(input, ws, &mut sel, i, d2);
        if sel.indices.len() < m && d2 >= EPSILON {
            let Workspace { wide, basis, scratch, .. } = &mut *ws;
            push_basis_vector(simd, &wide[i * d..(i + 1) * d], basis, scratch, d);
        }
    }
    sel
}

/// The lazy search of one step over the protected heap (`restrict`) or both heaps: the candidate
/// whose fresh value no searched top beats, or `None` when the searched heaps run out.
///
/// The larger top is examined in place: over its cap, or with its residual under `EPSILON`, it
/// is dropped for good (caps only tighten, residuals only shrink); stale, it is brought up to
/// date and sifted down (one sift, where a pop and a push would cost two); exact and still the
/// larger top, it is the greedy pick.
#[inline(always)]
fn best<S: Simd>(simd: S, input: &RerankInput, params: &Params, ws: &mut Workspace, restrict: bool) -> Option<usize> {
    let d = input.embeddings().expect("select checked for embeddings").dim();
    let lambda = params.lambda();
    let s = input.normalized();
    let nb = ws.basis.len() / d;
    loop {
        let from_protected = ws.protected_top_first(restrict)?;
        let Workspace { heap, heap_protected, wide, basis, filled, running, group_taken, .. } = &mut *ws;
        let heap = if from_protected { heap_protected } else { heap };
        let mut top = heap.peek_mut().expect("peeked");
        let i = top.index;
        if !allowed(input, params, group_taken, i) {
            PeekMut::pop(top);
            continue;
        }
        if filled[i] == nb {
            // On the larger top and exact for this step (refreshed, or an initial bound before
            // the first basis vector).
            PeekMut::pop(top);
            return Some(i);
        }
        let d2 = running[i] - project_out(simd, &wide[i * d..(i + 1) * d], basis, filled[i], nb, d);
        running[i] = d2;
        filled[i] = nb;
        if d2 < EPSILON {
            PeekMut::pop(top);
            continue;
        }
        let fresh = (1.0 - lambda) * s[i] + lambda * d2.ln();
        debug_assert!(fresh <= top.value + 1e-9, "lazy bound grew: residuals must not increase");
        top.value = fresh;
    }
}
