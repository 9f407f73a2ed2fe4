//! Slow, obviously-correct versions of the kernels, for tests and benches only.
//!
//! Each recomputes from scratch at every step what the fast kernel maintains incrementally:
//! MMR rescans every pair, DPP re-factorises the chosen set's Gram matrix with a textbook Cholesky
//! and solves for every candidate's residual, windowed DPP and SSD rebuild the window's basis by
//! Gram–Schmidt and take every residual as the squared norm of the leftover vector, calibration
//! evaluates the divergence of every candidate slate from its definition. They share the fast kernels' tie-breaks, `EPSILON`
//! rule and score fill, so on well-separated inputs the picks must be identical.

use super::by_score;
use super::dpp::EPSILON;
use crate::measures::miscalibration;
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

/// The plain greedy every reference shares: at each step, the choosable candidate with the
/// largest `objective(slate so far, candidate)`, ties to the lower index; relevance (FA*IR under a
/// floor) at `lambda = 0`.
fn greedy(input: &RerankInput, params: &Params, objective: impl Fn(&[usize], usize) -> f64) -> Vec<usize> {
    if params.lambda() == 0.0 {
        return fair_relevance(input, params);
    }
    let m = params.k().min(input.len());
    let mut out: Vec<usize> = Vec::new();
    while out.len() < m {
        let mut best: Option<(usize, f64)> = None;
        for i in choosable(input, &out, m) {
            let obj = objective(&out, i);
            if best.is_none_or(|(_, b)| obj > b) {
                best = Some((i, obj));
            }
        }
        out.push(best.expect("m <= N leaves a candidate").0);
    }
    out
}

/// MMR recomputing `max_{j∈S} cos(i, j)` over the whole slate at every step. O(N·k²·d).
#[must_use]
pub fn mmr(input: &RerankInput, params: &Params) -> Vec<usize> {
    let (lambda, s) = (params.lambda(), input.normalized());
    greedy(input, params, |out, i| {
        let max_sim = out
            .iter()
            .map(|&j| cosine(input, i, j))
            .fold(None, |a: Option<f64>, x| Some(a.map_or(x, |a| a.max(x))));
        (1.0 - lambda) * s[i] - lambda * max_sim.unwrap_or(0.0)
    })
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

/// The unit rows of `input` in f64.
fn unit_row(input: &RerankInput, i: usize) -> Vec<f64> {
    let e = input.embeddings().expect("reference kernels need embeddings");
    let inv = e.inv_norms()[i];
    e.row(i).iter().map(|&x| f64::from(x) * inv).collect()
}

/// `x` minus its projection on the orthonormal rows `q`, twice (modified Gram–Schmidt).
fn leftover(x: &[f64], q: &[Vec<f64>]) -> Vec<f64> {
    let mut r = x.to_vec();
    for _ in 0..2 {
        for b in q {
            let c: f64 = r.iter().zip(b).map(|(a, b)| a * b).sum();
            for (v, bv) in r.iter_mut().zip(b) {
                *v -= c * bv;
            }
        }
    }
    r
}

/// Residual `d_i²` of every candidate against the span of `members`' rows: an orthonormal basis
/// built from scratch in member order (a member whose leftover is under `EPSILON` adds none),
/// then `S_ii − ‖Qu_i‖² = 1 − Σ_q ⟨u_i, q⟩²`, the Schur complement as the DPP reference takes it.
#[must_use]
pub fn window_residuals(input: &RerankInput, members: &[usize]) -> Vec<f64> {
    let mut q: Vec<Vec<f64>> = Vec::new();
    for &j in members {
        let r = leftover(&unit_row(input, j), &q);
        let norm2: f64 = r.iter().map(|v| v * v).sum();
        if norm2 >= EPSILON {
            q.push(r.iter().map(|v| v / norm2.sqrt()).collect());
        }
    }
    (0..input.len())
        .map(|i| {
            let u = unit_row(input, i);
            1.0 - q.iter().map(|b| u.iter().zip(b).map(|(x, y)| x * y).sum::<f64>().powi(2)).sum::<f64>()
        })
        .collect()
}

/// Greedy over the last `window − 1` picks (`None`: all), recomputing every residual from
/// scratch at every step; `log_det` selects windowed DPP's gain (with its `EPSILON` rule and
/// score fallback), otherwise SSD's. O(k·N·w·d).
fn windowed(input: &RerankInput, params: &Params, window: Option<usize>, log_det: bool) -> Vec<usize> {
    let lambda = params.lambda();
    if lambda == 0.0 {
        return fair_relevance(input, params);
    }
    let m = params.k().min(input.len());
    let s = input.normalized();
    let mut out: Vec<usize> = Vec::new();
    while out.len() < m {
        let from = window.map_or(0, |w| out.len().saturating_sub(w - 1));
        let d2 = window_residuals(input, &out[from..]);
        let mut best: Option<(usize, f64)> = None;
        let choices = choosable(input, &out, m);
        for &i in &choices {
            let obj = if log_det {
                if d2[i] < EPSILON {
                    continue;
                }
                (1.0 - lambda) * s[i] + lambda * d2[i].ln()
            } else if d2[i] < EPSILON {
                (1.0 - lambda) * s[i]
            } else {
                (1.0 - lambda) * s[i] + lambda * d2[i].sqrt()
            };
            if best.is_none_or(|(_, b)| obj > b) {
                best = Some((i, obj));
            }
        }
        match best {
            Some((i, _)) => out.push(i),
            None => {
                let mut rest = choices;
                rest.sort_by(|&a, &b| by_score(input.scores(), a, b));
                out.push(rest[0]);
            }
        }
    }
    out
}

/// The candidates a step may choose from: all not in `out`, or, where the fairness floor needs a
/// protected pick (`held < m(t)`) and one remains, the protected ones only.
fn choosable(input: &RerankInput, out: &[usize], m: usize) -> Vec<usize> {
    let rest: Vec<usize> = (0..input.len()).filter(|i| !out.contains(i)).collect();
    let Some(floor) = input.fairness() else { return rest };
    let need = floor.minimums(m)[out.len()];
    let held = out.iter().filter(|&&i| floor.protected()[i]).count();
    let protected: Vec<usize> = rest.iter().copied().filter(|&i| floor.protected()[i]).collect();
    if held < need && !protected.is_empty() {
        protected
    } else {
        rest
    }
}

/// FA*IR (Zehlike et al. 2017, Algorithm 2): at each position the best remaining by score, or
/// the best protected one where the prefix needs it. Without a floor, relevance order.
#[must_use]
pub fn fair_relevance(input: &RerankInput, params: &Params) -> Vec<usize> {
    let m = params.k().min(input.len());
    let mut out = Vec::new();
    while out.len() < m {
        let mut c = choosable(input, &out, m);
        c.sort_by(|&a, &b| by_score(input.scores(), a, b));
        out.push(c[0]);
    }
    out
}

/// Unbounded greedy DPP by the same brute force as the windowed one (no window); with a
/// fairness floor, the reference for `dpp`.
#[must_use]
pub fn dpp_eager(input: &RerankInput, params: &Params) -> Vec<usize> {
    windowed(input, params, None, true)
}

/// Sliding-window DPP (Chen, Zhang & Zhou 2018, the window variant) by brute force.
#[must_use]
pub fn dpp_window(input: &RerankInput, params: &Params, window: usize) -> Vec<usize> {
    windowed(input, params, Some(window), true)
}

/// SSD (Huang et al. 2021) by brute force, with `params.window()`.
#[must_use]
pub fn ssd(input: &RerankInput, params: &Params) -> Vec<usize> {
    windowed(input, params, params.window(), false)
}

/// Calibrated greedy (Steck 2018) evaluating `KL(p ‖ q̃(I ∪ {i}))` of every candidate slate
/// from its definition ([`miscalibration`]). O(k·N·(k + G)).
///
/// # Panics
/// Without a profile.
#[must_use]
pub fn calibrated(input: &RerankInput, params: &Params) -> Vec<usize> {
    let (lambda, s) = (params.lambda(), input.normalized());
    greedy(input, params, |out, i| {
        let with: Vec<usize> = out.iter().copied().chain([i]).collect();
        let kl = miscalibration(input, &with).expect("calibration needs a profile");
        (1.0 - lambda) * s[i] - lambda * kl
    })
}
