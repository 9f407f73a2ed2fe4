//! The f64 orthonormal basis of the picked rows, and projections on it, shared by both DPP
//! strategies. See [`super::Dpp`] for why `e_i = ⟨x_i, q_t⟩` is the Cholesky update.

use pulp::Simd;

/// `Σ_t ⟨x, q_t⟩²` over basis vectors `q_from .. q_to`: how much of `d_i²` those picks remove.
/// Four (at the end two) basis vectors share each load of `x`.
#[inline(always)]
pub(super) fn project_out<S: Simd>(simd: S, x: &[f64], basis: &[f64], from: usize, to: usize, d: usize) -> f64 {
    // Counted in basis vectors: `chunks_exact(4 * d)` would divide by a run-time chunk size.
    let mut t = from;
    let mut removed = 0.0;
    while t + 4 <= to {
        let [e0, e1, e2, e3] = dot4(simd, x, &basis[t * d..(t + 4) * d], d);
        removed += e0.mul_add(e0, e1 * e1) + e2.mul_add(e2, e3 * e3);
        t += 4;
    }
    if t + 2 <= to {
        let (e0, e1) = dot2(simd, x, &basis[t * d..(t + 1) * d], &basis[(t + 1) * d..(t + 2) * d]);
        removed += e0.mul_add(e0, e1 * e1);
        t += 2;
    }
    if t < to {
        let e = dot(simd, x, &basis[t * d..(t + 1) * d]);
        removed = e.mul_add(e, removed);
    }
    removed
}

/// `(x·q0, x·q1)`, loading `x` once, with two FMA chains per product.
#[inline(always)]
fn dot2<S: Simd>(simd: S, x: &[f64], q0: &[f64], q1: &[f64]) -> (f64, f64) {
    let (xv, xt) = S::as_simd_f64s(x);
    let (av, at) = S::as_simd_f64s(q0);
    let (bv, bt) = S::as_simd_f64s(q1);
    let zero = simd.splat_f64s(0.0);
    let (mut a0, mut a1, mut b0, mut b1) = (zero, zero, zero, zero);
    let mut xs = xv.chunks_exact(2);
    let mut as_ = av.chunks_exact(2);
    let mut bs = bv.chunks_exact(2);
    for ((px, pa), pb) in (&mut xs).zip(&mut as_).zip(&mut bs) {
        a0 = simd.mul_add_e_f64s(px[0], pa[0], a0);
        b0 = simd.mul_add_e_f64s(px[0], pb[0], b0);
        a1 = simd.mul_add_e_f64s(px[1], pa[1], a1);
        b1 = simd.mul_add_e_f64s(px[1], pb[1], b1);
    }
    for ((&px, &pa), &pb) in xs.remainder().iter().zip(as_.remainder()).zip(bs.remainder()) {
        a0 = simd.mul_add_e_f64s(px, pa, a0);
        b0 = simd.mul_add_e_f64s(px, pb, b0);
    }
    let ta: f64 = xt.iter().zip(at).map(|(x, y)| x * y).sum();
    let tb: f64 = xt.iter().zip(bt).map(|(x, y)| x * y).sum();
    (simd.reduce_sum_f64s(simd.add_f64s(a0, a1)) + ta, simd.reduce_sum_f64s(simd.add_f64s(b0, b1)) + tb)
}

/// Appends `x` orthogonalised against the basis and normalised: classical Gram–Schmidt applied
/// twice (CGS2). Each sweep takes all `t` coefficients `Qᵀr` first, as independent dot products
/// four basis vectors per load of `r`, then subtracts `Q·(Qᵀr)`; O(t·d) per sweep. (Modified
/// Gram–Schmidt would chain every dot product on the one before.)
#[inline(always)]
pub(super) fn push_basis_vector<S: Simd>(simd: S, x: &[f64], basis: &mut Vec<f64>, r: &mut Vec<f64>, d: usize) {
    let t = basis.len() / d;
    // `r` then its t coefficients, in one buffer.
    r.clear();
    r.extend_from_slice(x);
    r.resize(d + t, 0.0);
    let (r, coef) = r.split_at_mut(d);
    // Two sweeps: the second removes what rounding left of the first's projections.
    for _sweep in 0..2 {
        let mut quads = basis.chunks_exact(4 * d);
        let mut c = coef.chunks_exact_mut(4);
        for (q, c) in (&mut quads).zip(&mut c) {
            c.copy_from_slice(&dot4(simd, r, q, d));
        }
        for (q, c) in quads.remainder().chunks_exact(d).zip(c.into_remainder()) {
            *c = dot(simd, r, q);
        }
        for (q, &c) in basis.chunks_exact(d).zip(coef.iter()) {
            for (rv, &qv) in r.iter_mut().zip(q) {
                *rv = (-c).mul_add(qv, *rv);
            }
        }
    }
    let norm = dot(simd, r, r).sqrt();
    debug_assert!(norm > 0.0, "a picked candidate has residual above EPSILON");
    let inv = 1.0 / norm;
    basis.extend(r.iter().map(|&v| v * inv));
}

/// `[⟨x, q_0⟩, …, ⟨x, q_3⟩]` for the four consecutive d-length rows of `q`, loading `x` once per
/// four products; two FMA chains per product, eight in flight, cover the FMA latency.
#[inline(always)]
fn dot4<S: Simd>(simd: S, x: &[f64], q: &[f64], d: usize) -> [f64; 4] {
    let (q0, rest) = q.split_at(d);
    let (q1, rest) = rest.split_at(d);
    let (q2, q3) = rest.split_at(d);
    let (xv, xt) = S::as_simd_f64s(x);
    let (v0, t0) = S::as_simd_f64s(q0);
    let (v1, t1) = S::as_simd_f64s(q1);
    let (v2, t2) = S::as_simd_f64s(q2);
    let (v3, t3) = S::as_simd_f64s(&q3[..d]);
    let zero = simd.splat_f64s(0.0);
    let mut acc = [zero; 8];
    for p in 0..xv.len() / 2 {
        let (a, b) = (2 * p, 2 * p + 1);
        acc[0] = simd.mul_add_e_f64s(xv[a], v0[a], acc[0]);
        acc[1] = simd.mul_add_e_f64s(xv[a], v1[a], acc[1]);
        acc[2] = simd.mul_add_e_f64s(xv[a], v2[a], acc[2]);
        acc[3] = simd.mul_add_e_f64s(xv[a], v3[a], acc[3]);
        acc[4] = simd.mul_add_e_f64s(xv[b], v0[b], acc[4]);
        acc[5] = simd.mul_add_e_f64s(xv[b], v1[b], acc[5]);
        acc[6] = simd.mul_add_e_f64s(xv[b], v2[b], acc[6]);
        acc[7] = simd.mul_add_e_f64s(xv[b], v3[b], acc[7]);
    }
    if xv.len() % 2 == 1 {
        let a = xv.len() - 1;
        acc[0] = simd.mul_add_e_f64s(xv[a], v0[a], acc[0]);
        acc[1] = simd.mul_add_e_f64s(xv[a], v1[a], acc[1]);
        acc[2] = simd.mul_add_e_f64s(xv[a], v2[a], acc[2]);
        acc[3] = simd.mul_add_e_f64s(xv[a], v3[a], acc[3]);
    }
    let tail = |t: &[f64]| -> f64 { xt.iter().zip(t).map(|(x, y)| x * y).sum() };
    [
        simd.reduce_sum_f64s(simd.add_f64s(acc[0], acc[4])) + tail(t0),
        simd.reduce_sum_f64s(simd.add_f64s(acc[1], acc[5])) + tail(t1),
        simd.reduce_sum_f64s(simd.add_f64s(acc[2], acc[6])) + tail(t2),
        simd.reduce_sum_f64s(simd.add_f64s(acc[3], acc[7])) + tail(t3),
    ]
}

/// f64 dot product with four FMA chains: at d = 64 (16 AVX2 vectors) two chains left the loop
/// bound by FMA latency (4 cycles) rather than by the two FMA ports.
#[inline(always)]
pub(super) fn dot<S: Simd>(simd: S, a: &[f64], b: &[f64]) -> f64 {
    let (av, at) = S::as_simd_f64s(a);
    let (bv, bt) = S::as_simd_f64s(b);
    let zero = simd.splat_f64s(0.0);
    let (mut acc0, mut acc1, mut acc2, mut acc3) = (zero, zero, zero, zero);
    let mut quads_a = av.chunks_exact(4);
    let mut quads_b = bv.chunks_exact(4);
    for (qa, qb) in (&mut quads_a).zip(&mut quads_b) {
        acc0 = simd.mul_add_e_f64s(qa[0], qb[0], acc0);
        acc1 = simd.mul_add_e_f64s(qa[1], qb[1], acc1);
        acc2 = simd.mul_add_e_f64s(qa[2], qb[2], acc2);
        acc3 = simd.mul_add_e_f64s(qa[3], qb[3], acc3);
    }
    for (&x, &y) in quads_a.remainder().iter().zip(quads_b.remainder()) {
        acc0 = simd.mul_add_e_f64s(x, y, acc0);
    }
    let tail: f64 = at.iter().zip(bt).map(|(x, y)| x * y).sum();
    simd.reduce_sum_f64s(simd.add_f64s(simd.add_f64s(acc0, acc1), simd.add_f64s(acc2, acc3))) + tail
}


