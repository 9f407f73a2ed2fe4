//! Slow, obviously-correct versions of the kernels, for tests and benches only.
//!
//! Each recomputes from scratch at every step what the fast kernel maintains incrementally:
//! MMR rescans every pair, DPP re-factorises the chosen set's Gram matrix with a textbook Cholesky
//! and solves for every candidate's residual. They share the fast kernels' tie-breaks, `EPSILON`
//! rule and score fill, so on well-separated inputs the picks must be identical.

use super::by_score;
use super::dpp::EPSILON;
use crate::model::{Params, RerankInput};

/// `cos(i, j)` of the stored unit rows, in f64.
fn cosine(input: &RerankInput, i: usize, j: usize) -> f64 {
    input.embeddings().expect("reference kernels need embeddings").cosine(i, j)
}

/// Relevance order restricted to candidates not in `taken`, as a fill.
fn fill(input: &RerankInput, m: usize, out: &mut Vec<usize>) {
    let mut rest: Vec<usize> = (0..input.len()).filter(|i| !out.contains(i)).collect();
    rest.sort_by(|&a, &b| by_score(input.scores(), a, b));
    out.extend(rest.into_iter().take(m.saturating_sub(out.len())));
}

/// Relevance order, by a full sort.
#[must_use]
pub fn relevance(input: &RerankInput, params: &Params) -> Vec<usize> {
    let mut out = Vec::new();
    fill(input, params.k().min(input.len()), &mut out);
    out
}

/// MMR recomputing `max_{j∈S} cos(i, j)` over the whole slate at every step. O(N·k²·d).
#[must_use]
pub fn mmr(input: &RerankInput, params: &Params) -> Vec<usize> {
    let lambda = params.lambda();
    if lambda == 0.0 {
        return relevance(input, params);
    }
    let m = params.k().min(input.len());
    let s = input.normalized();
    let mut out: Vec<usize> = Vec::new();
    while out.len() < m {
        let mut best: Option<(usize, f64)> = None;
        for i in (0..input.len()).filter(|i| !out.contains(i)) {
            let max_sim = out
                .iter()
                .map(|&j| cosine(input, i, j))
                .fold(None, |a: Option<f64>, x| Some(a.map_or(x, |a| a.max(x))));
            let obj = (1.0 - lambda) * s[i] - lambda * max_sim.unwrap_or(0.0);
            if best.is_none_or(|(_, b)| obj > b) {
                best = Some((i, obj));
            }
        }
        out.push(best.expect("m <= N leaves a candidate").0);
    }
    out
}

/// Lower Cholesky factor of a dense SPD matrix (row-major `n × n`), or `None` if a pivot is not
/// positive. Textbook Cholesky–Banachiewicz, O(n³).
#[must_use]
pub fn cholesky(a: &[f64], n: usize) -> Option<Vec<f64>> {
    let mut l = vec![0.0; n * n];
    for i in 0..n {
        for j in 0..=i {
            let dot: f64 = (0..j).map(|t| l[i * n + t] * l[j * n + t]).sum();
            if i == j {
                let p = a[i * n + i] - dot;
                if p <= 0.0 {
                    return None;
                }
                l[i * n + i] = p.sqrt();
            } else {
                l[i * n + j] = (a[i * n + j] - dot) / l[j * n + j];
            }
        }
    }
    Some(l)
}

/// Greedy DPP MAP re-factorising the chosen set at every step; returns picks and their `d²`.
/// O(k·(k³ + N·k²) + N·k·d).
#[must_use]
pub fn dpp(input: &RerankInput, params: &Params) -> (Vec<usize>, Vec<f64>) {
    let lambda = params.lambda();
    if lambda == 0.0 {
        return (relevance(input, params), Vec::new());
    }
    let m = params.k().min(input.len());
    let s = input.normalized();
    let mut out: Vec<usize> = Vec::new();
    let mut gains = Vec::new();
    while out.len() < m {
        let t = out.len();
        let gram: Vec<f64> = (0..t * t).map(|x| cosine(input, out[x / t], out[x % t])).collect();
        let l = cholesky(&gram, t).expect("chosen set stays positive-definite");
        let mut best: Option<(usize, f64, f64)> = None;
        for i in (0..input.len()).filter(|i| !out.contains(i)) {
            // Forward-solve L c = S_{Y,i}; then d_i² = S_ii − ‖c‖².
            let mut c = vec![0.0; t];
            for r in 0..t {
                let acc: f64 = (0..r).map(|q| l[r * t + q] * c[q]).sum();
                c[r] = (cosine(input, out[r], i) - acc) / l[r * t + r];
            }
            let d2 = 1.0 - c.iter().map(|x| x * x).sum::<f64>();
            if d2 < EPSILON {
                continue;
            }
            let obj = (1.0 - lambda) * s[i] + lambda * d2.ln();
            if best.is_none_or(|(_, b, _)| obj > b) {
                best = Some((i, obj, d2));
            }
        }
        match best {
            Some((i, _, d2)) => {
                out.push(i);
                gains.push(d2);
            }
            None => {
                fill(input, m, &mut out);
                break;
            }
        }
    }
    (out, gains)
}
