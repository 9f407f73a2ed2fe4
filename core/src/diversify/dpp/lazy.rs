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
use crate::diversify::{allowed, fill_by_score, take, Bound, Workspace};
use crate::model::{Params, RerankInput, Selection};

/// Runs the lazy greedy. The caller has checked `lambda > 0`, `N > 0` and embeddings present.
#[inline(always)]
pub(super) fn select<S: Simd>(simd: S, input: &RerankInput, params: &Params, ws: &mut Workspace) -> Selection {
    let emb = input.embeddings().expect("select checked for embeddings");
    let d = emb.dim();
    let lambda = params.lambda();
    let n = input.len();
    let m = params.k().min(n);
    let s = input.normalized();
    ws.reset(n, input.group_count());
    // Unit rows in f64, once per call: refreshes touch rows in heap order, not streaming order.
    ws.wide.clear();
    ws.wide.reserve(n * d);
    for (row, &inv) in emb.as_slice().chunks_exact(d).zip(emb.inv_norms()) {
        ws.wide.extend(row.iter().map(|&x| f64::from(x) * inv));
    }
    // Basis vector t is basis[t·d ..][..d]; at most m − 1 are ever needed.
    ws.basis.clear();
    ws.basis.reserve(m.saturating_sub(1) * d);
    ws.filled.clear();
    ws.filled.resize(n, 0);
    ws.running.clear();
    ws.running.resize(n, 1.0);
    ws.heap.clear();
    ws.heap.extend((0..n).map(|i| Bound { value: (1.0 - lambda) * s[i], index: i }));
    let mut sel = Selection { indices: Vec::with_capacity(m), gains: Vec::with_capacity(m), exhausted_at: None };

    while sel.indices.len() < m {
        if ws.cancelled() {
            break;
        }
        let step = sel.indices.len();
        let Some(mut top) = ws.heap.peek_mut() else {
            sel.exhausted_at = Some(step);
            fill_by_score(input, params, ws, m, &mut sel);
            break;
        };
        let i = top.index;
        // Caps only tighten and residuals only shrink, so a candidate dropped here is out for good.
        if !allowed(input, params, &ws.group_taken, i) {
            PeekMut::pop(top);
            continue;
        }
        if ws.filled[i] < step {
            // A stale bound on top: bring it up to date and put it back in place (one sift
            // down, where a pop and a push would cost two). If it is still on top next time
            // round, it is exact and no other bound beats it: the greedy pick.
            let removed = project_out(simd, &ws.wide[i * d..(i + 1) * d], &ws.basis, ws.filled[i], step, d);
            let d2 = ws.running[i] - removed;
            ws.running[i] = d2;
            ws.filled[i] = step;
            if d2 < EPSILON {
                PeekMut::pop(top);
                continue;
            }
            let fresh = (1.0 - lambda) * s[i] + lambda * d2.ln();
            debug_assert!(fresh <= top.value + 1e-9, "lazy bound grew: residuals must not increase");
            top.value = fresh;
            continue;
        }
        // On top and exact for this step (refreshed, or an initial bound at step 0).
        PeekMut::pop(top);
        let d2 = ws.running[i];
        take(input, ws, &mut sel, i, d2);
        if sel.indices.len() < m {
            let Workspace { wide, basis, scratch, .. } = &mut *ws;
            push_basis_vector(simd, &wide[i * d..(i + 1) * d], basis, scratch, d);
        }
    }
    sel
}
