use super::{eligible, passes, relevance_selection, take, Diversifier, KernelError, Workspace};
use crate::measures::CALIBRATION_ALPHA;
use crate::model::{Params, RerankInput, Selection};

/// Calibrated: each step picks `argmax_i (1 − λ)·s_i − λ·KL(p ‖ q̃(I ∪ {i}))`, so the slate's
/// category mix follows the user's profile `p`.
///
/// Legend: `s_i` normalised score; `I` the picks so far; `q(g | I)` the share of group `g` in `I`
/// (candidates without a category form one group); `q̃ = 0.99·q + 0.01·p`;
/// `KL(p ‖ q̃) = Σ_g p_g·ln(p_g / q̃_g)` in nats, terms with `p_g = 0` counting 0.
///
/// # Reference
/// H. Steck, "Calibrated Recommendations", RecSys 2018: Eq. (1) for `q`, Eq. (2) for `KL` with
/// `q̃`, and the greedy maximisation of Eq. (3), `(1 − λ)·s(I) − λ·C_KL(p, q(I))`, whose marginal
/// gain for adding `i` is the step above (the constant `s(I)` of the picks so far drops out).
/// Deviations: relevance is the normalised score `s_i` (the paper sums predicted scores), and the
/// profile arrives with the request instead of being estimated from the user's history.
///
/// # Complexity
/// O(N + G_p) per step (G_p: groups the profile weights), O(k·(N + G_p)) in all: the divergence
/// after adding one item of group `g` differs from the current one in `g`'s term and in the
/// common denominator only, so one O(G_p) sum per step serves every candidate. Extra memory
/// O(G).
///
/// # Invariants
/// Output has no duplicates and at most `min(k, N)` items; ties go to the lower index; `λ = 0`
/// is relevance order.
///
/// # Numerical notes
/// f64; `q̃_g ≥ 0.01·p_g > 0` wherever `p_g > 0`, so every logarithm is finite.
#[derive(Debug, Clone, Copy, Default)]
pub struct Calibrated;

impl Diversifier for Calibrated {
    fn name(&self) -> &'static str {
        "calibrated"
    }

    fn needs_embeddings(&self) -> bool {
        false
    }

    fn needs_profile(&self) -> bool {
        true
    }

    /// `N·k`: every candidate scored at every step.
    fn work(&self, n: usize, _d: usize, k: usize) -> u64 {
        (n as u64).saturating_mul(k.min(n) as u64)
    }

    fn select(&self, input: &RerankInput, params: &Params, ws: &mut Workspace) -> Result<Selection, KernelError> {
        let lambda = params.lambda();
        if input.is_empty() {
            return Ok(relevance_selection(input, params, ws));
        }
        let Some(profile) = input.profile() else {
            return Err(KernelError::ProfileRequired { algorithm: self.name() });
        };
        if lambda == 0.0 {
            return Ok(relevance_selection(input, params, ws));
        }
        let (n, groups) = (input.len(), input.group_count());
        let m = params.k().min(n);
        let s = input.normalized();
        let p = profile.by_group();
        ws.reset_for(input, m);
        // The profile's own groups; the others only share the denominator.
        let weighted: Vec<usize> = (0..groups).filter(|&g| p[g] > 0.0).collect();
        // Σ p·ln p over the whole profile, absent categories included: KL = that − Σ p·ln q̃.
        let p_ln_p: f64 = p.iter().chain(profile.absent()).filter(|&&x| x > 0.0).map(|&x| x * x.ln()).sum();
        // Absent categories have q = 0 forever: q̃ = α·p, a constant term.
        let absent: f64 =
            profile.absent().iter().filter(|&&x| x > 0.0).map(|&x| x * (CALIBRATION_ALPHA * x).ln()).sum();
        let mut kl_if = vec![0.0_f64; groups];
        let mut sel = Selection { indices: Vec::with_capacity(m), gains: Vec::with_capacity(m), exhausted_at: None };
        while sel.indices.len() < m {
            if ws.cancelled() {
                break;
            }
            let total = (sel.indices.len() + 1) as f64;
            let q_tilde = |count: usize, pg: f64| (1.0 - CALIBRATION_ALPHA) * (count as f64 / total) + CALIBRATION_ALPHA * pg;
            // Σ_g p_g·ln q̃_g with no group incremented, then each group's own correction.
            let base: f64 = weighted.iter().map(|&g| p[g] * q_tilde(ws.group_taken[g], p[g]).ln()).sum();
            for g in 0..groups {
                let with_g = if p[g] > 0.0 {
                    base - p[g] * q_tilde(ws.group_taken[g], p[g]).ln()
                        + p[g] * q_tilde(ws.group_taken[g] + 1, p[g]).ln()
                } else {
                    base
                };
                kl_if[g] = p_ln_p - with_g - absent;
            }
            // Protected candidates only where the fairness floor needs one, and while any remain.
            let restrict = ws.must_protect(sel.indices.len());
            let mut best: Option<(f64, usize)> = None;
            for r in passes(restrict) {
                for i in 0..n {
                    if !eligible(input, params, ws, i, r) {
                        continue;
                    }
                    let value = (1.0 - lambda) * s[i] - lambda * kl_if[input.groups()[i] as usize];
                    if best.is_none_or(|(b, _)| value > b) {
                        best = Some((value, i));
                    }
                }
                if best.is_some() {
                    break;
                }
            }
            let Some((value, i)) = best else { break };
            take(input, ws, &mut sel, i, value);
        }
        ws.check_cancelled()?;
        Ok(sel)
    }
}
