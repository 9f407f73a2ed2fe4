//! Inner loops shared by the embedding-based kernels: batched dot products of one vector with
//! every row of a row-major matrix.
//!
//! - [`row_dots_f32`] (MMR): f32 rows, f32 sums.
//! - [`sims_into`] (DPP similarity row): f32 rows widened to f64 on load, f64 sums.
//! - [`row_dots_f64`] (DPP factor rows): f64 rows, f64 sums.
//!
//! The first and last use pulp's portable SIMD vocabulary ([`pulp::Simd`]) through
//! [`pulp::Arch::dispatch`], which picks AVX2 + FMA (x86-64-v3) at run time when the CPU has it and
//! the scalar back end otherwise; no `unsafe`, no `-C target-cpu`. pulp's portable vocabulary has no
//! f32→f64 widening, so [`sims_into`] has an explicit x86-64-v3 body (pulp's safe intrinsic
//! wrappers) and a portable body for other CPUs. Four rows are processed together so each load of
//! the vector feeds several independent FMA chains.
//!
//! Measured on the dev machine (see README): LLVM's auto-vectorisation of plain blocked loops
//! reached 2–6 GMAC/s (it transposes across rows or spills accumulators); these bodies are bound
//! by L2 bandwidth instead, which is why DPP widens f32 rows on load (half the bytes of f64 rows:
//! ~7.5 vs ~4.5 GMAC/s).
//!
//! Precision: MMR ranks by `score − max cos` and tolerates f32 sums (error ~1e-7). DPP compares
//! residuals with `EPSILON = 1e-9`, which f32 noise would swamp, so it sums in f64 throughout.

use pulp::{Arch, Simd, WithSimd};

/// Rows per block: four FMA chains per vector load.
const ROW_BLOCK: usize = 4;

/// `out[i] = (Σ_{q<len} m[i·stride + q] · x[q]) · scale(i)` for `i < out.len()`, in f64,
/// where `len = x.len()` and `scale(i)` is `scale[i] · x_scale` (or 1 when `scale` is empty).
///
/// # Complexity
/// O(out.len() · len) time, no allocation.
///
/// # Panics
/// If `stride < x.len()`, `m` is shorter than `(out.len() − 1)·stride + x.len()`, or `scale`
/// is neither empty nor `out.len()` long.
pub(crate) fn row_dots_f64(
    m: &[f64],
    stride: usize,
    x: &[f64],
    scale: &[f64],
    x_scale: f64,
    out: &mut [f64],
) {
    Arch::new().dispatch(RowDotsF64 { m, stride, x, scale, x_scale, out });
}

/// [`row_dots_f64`] on a chosen back end (tests pin the scalar one).
pub(crate) struct RowDotsF64<'a> {
    pub(crate) m: &'a [f64],
    pub(crate) stride: usize,
    pub(crate) x: &'a [f64],
    pub(crate) scale: &'a [f64],
    pub(crate) x_scale: f64,
    pub(crate) out: &'a mut [f64],
}

impl WithSimd for RowDotsF64<'_> {
    type Output = ();

    #[inline(always)]
    fn with_simd<S: Simd>(self, simd: S) {
        let Self { m, stride, x, scale, x_scale, out } = self;
        let (n, len) = (out.len(), x.len());
        assert!(stride >= len, "row_dots_f64: stride shorter than the vector");
        assert!(n == 0 || m.len() >= (n - 1) * stride + len, "row_dots_f64: matrix too short");
        assert!(scale.is_empty() || scale.len() == n, "row_dots_f64: scale length");
        let (xv, xt) = S::as_simd_f64s(x);
        let row = |i: usize| &m[i * stride..i * stride + len];
        let zero = simd.splat_f64s(0.0);
        let blocks = n / ROW_BLOCK;
        for blk in 0..blocks {
            let base = blk * ROW_BLOCK;
            let r: [&[S::f64s]; ROW_BLOCK] = std::array::from_fn(|b| S::as_simd_f64s(row(base + b)).0);
            let mut acc = [zero; ROW_BLOCK];
            for (c, &xc) in xv.iter().enumerate() {
                for b in 0..ROW_BLOCK {
                    acc[b] = simd.mul_add_e_f64s(r[b][c], xc, acc[b]);
                }
            }
            for b in 0..ROW_BLOCK {
                let tail: f64 = S::as_simd_f64s(row(base + b)).1.iter().zip(xt).map(|(a, b)| a * b).sum();
                let s = if scale.is_empty() { 1.0 } else { scale[base + b] * x_scale };
                out[base + b] = (simd.reduce_sum_f64s(acc[b]) + tail) * s;
            }
        }
        for i in blocks * ROW_BLOCK..n {
            let (rv, rt) = S::as_simd_f64s(row(i));
            let mut acc = zero;
            for (&a, &b) in rv.iter().zip(xv) {
                acc = simd.mul_add_e_f64s(a, b, acc);
            }
            let tail: f64 = rt.iter().zip(xt).map(|(a, b)| a * b).sum();
            let s = if scale.is_empty() { 1.0 } else { scale[i] * x_scale };
            out[i] = (simd.reduce_sum_f64s(acc) + tail) * s;
        }
    }
}

/// Lanes per accumulator array of the portable [`sims_into`] body.
const LANES: usize = 8;

/// `out[i] = (Σ_t rows[i·d + t] · x[t]) · scale[i] · x_scale` in f64 for every row of the
/// row-major `n × d` f32 matrix `rows` (`d = x.len()`): with inverse norms as scales and
/// `x = row_j`, the cosine row `S_{·,j}`.
///
/// # Complexity
/// O(n·d) time, no allocation.
///
/// # Panics
/// If `d == 0`, `rows.len() != out.len() · d` or `scale.len() != out.len()`.
pub(crate) fn sims_into(rows: &[f32], x: &[f64], scale: &[f64], x_scale: f64, out: &mut [f64]) {
    #[cfg(target_arch = "x86_64")]
    if let Some(v3) = pulp::x86::V3::try_new() {
        return Simd::vectorize(v3, v3::Sims { v3, rows, x, scale, x_scale, out });
    }
    Arch::new().dispatch(SimsPortable { rows, x, scale, x_scale, out });
}

/// Portable body of [`sims_into`]: fixed-width blocks that any target vectorises somewhat.
pub(crate) struct SimsPortable<'a> {
    pub(crate) rows: &'a [f32],
    pub(crate) x: &'a [f64],
    pub(crate) scale: &'a [f64],
    pub(crate) x_scale: f64,
    pub(crate) out: &'a mut [f64],
}

impl WithSimd for SimsPortable<'_> {
    type Output = ();

    #[inline(always)]
    fn with_simd<S: Simd>(self, _simd: S) {
        let Self { rows, x, scale, x_scale, out } = self;
        let d = x.len();
        assert!(
            d > 0 && rows.len() == out.len() * d && scale.len() == out.len(),
            "sims_into: shape mismatch"
        );
        for ((row, o), &sc) in rows.chunks_exact(d).zip(out.iter_mut()).zip(scale) {
            *o = dot_widened(row, x) * sc * x_scale;
        }
    }
}

/// `Σ_t f64(row[t]) · x[t]` with eight lanes, then a pairwise sum.
#[inline(always)]
fn dot_widened(row: &[f32], x: &[f64]) -> f64 {
    let d = x.len();
    let full = d - d % LANES;
    let mut acc = [0.0_f64; LANES];
    for (rc, xc) in row[..full].chunks_exact(LANES).zip(x[..full].chunks_exact(LANES)) {
        for l in 0..LANES {
            acc[l] += f64::from(rc[l]) * xc[l];
        }
    }
    let tail: f64 = (full..d).map(|t| f64::from(row[t]) * x[t]).sum();
    ((acc[0] + acc[4]) + (acc[1] + acc[5])) + ((acc[2] + acc[6]) + (acc[3] + acc[7])) + tail
}

/// Explicit AVX2 + FMA body of [`sims_into`] (x86-64-v3), entered only after pulp checked the CPU.
#[cfg(target_arch = "x86_64")]
mod v3 {
    use super::{dot_widened, ROW_BLOCK};
    use pulp::bytemuck::cast;
    use pulp::x86::V3;
    use pulp::{f32x4, f64x4, Simd, WithSimd};

    /// Lanes per inner iteration: one f32x8 load, widened to two f64x4.
    const W: usize = 8;

    pub(super) struct Sims<'a> {
        pub(super) v3: V3,
        pub(super) rows: &'a [f32],
        pub(super) x: &'a [f64],
        pub(super) scale: &'a [f64],
        pub(super) x_scale: f64,
        pub(super) out: &'a mut [f64],
    }

    impl WithSimd for Sims<'_> {
        type Output = ();

        #[inline(always)]
        fn with_simd<S: Simd>(self, _simd: S) {
            let Self { v3: v, rows, x, scale, x_scale, out } = self;
            let (d, n) = (x.len(), out.len());
            assert!(d > 0 && rows.len() == n * d && scale.len() == n, "sims_into: shape mismatch");
            let full = d - d % W;
            let xs: &[[f64; W]] = x[..full].as_chunks::<W>().0;
            let zero = v.splat_f64x4(0.0);
            let blocks = n / ROW_BLOCK;
            for blk in 0..blocks {
                let base = blk * ROW_BLOCK;
                let r: [&[[f32; W]]; ROW_BLOCK] =
                    std::array::from_fn(|b| rows[(base + b) * d..(base + b) * d + full].as_chunks::<W>().0);
                // Eight independent FMA chains (4 rows × 2 halves) hide the FMA latency.
                let mut acc = [[zero; 2]; ROW_BLOCK];
                for (c, xc) in xs.iter().enumerate() {
                    let [x0, x1]: [f64x4; 2] = cast(*xc);
                    for b in 0..ROW_BLOCK {
                        let [lo, hi]: [f32x4; 2] = cast(r[b][c]);
                        acc[b][0] = v.mul_add_f64x4(v.convert_f32x4_to_f64x4(lo), x0, acc[b][0]);
                        acc[b][1] = v.mul_add_f64x4(v.convert_f32x4_to_f64x4(hi), x1, acc[b][1]);
                    }
                }
                for b in 0..ROW_BLOCK {
                    let row = &rows[(base + b) * d..(base + b + 1) * d];
                    let tail: f64 = (full..d).map(|t| f64::from(row[t]) * x[t]).sum();
                    let s: [f64; 4] = cast(v.add_f64x4(acc[b][0], acc[b][1]));
                    out[base + b] = ((s[0] + s[1]) + (s[2] + s[3]) + tail) * scale[base + b] * x_scale;
                }
            }
            for i in blocks * ROW_BLOCK..n {
                out[i] = dot_widened(&rows[i * d..(i + 1) * d], x) * scale[i] * x_scale;
            }
        }
    }
}

/// `out[i] = f64(Σ_t rows[i·d + t] · x[t]) · scale[i] · x_scale` with f32 products and sums, for
/// every row of the row-major `n × d` f32 matrix `rows` (`d = x.len()`).
///
/// # Complexity
/// O(n·d) time, no allocation.
///
/// # Panics
/// If `d == 0`, `rows.len() != out.len() · d` or `scale.len() != out.len()`.
pub(crate) fn row_dots_f32(rows: &[f32], x: &[f32], scale: &[f64], x_scale: f64, out: &mut [f64]) {
    Arch::new().dispatch(RowDotsF32 { rows, x, scale, x_scale, out });
}

/// [`row_dots_f32`] on a chosen back end.
pub(crate) struct RowDotsF32<'a> {
    pub(crate) rows: &'a [f32],
    pub(crate) x: &'a [f32],
    pub(crate) scale: &'a [f64],
    pub(crate) x_scale: f64,
    pub(crate) out: &'a mut [f64],
}

impl WithSimd for RowDotsF32<'_> {
    type Output = ();

    #[inline(always)]
    fn with_simd<S: Simd>(self, simd: S) {
        let Self { rows, x, scale, x_scale, out } = self;
        let (n, d) = (out.len(), x.len());
        assert!(d > 0 && rows.len() == n * d && scale.len() == n, "row_dots_f32: shape mismatch");
        let (xv, xt) = S::as_simd_f32s(x);
        let zero = simd.splat_f32s(0.0);
        let blocks = n / ROW_BLOCK;
        for blk in 0..blocks {
            let base = blk * ROW_BLOCK;
            let r: [&[f32]; ROW_BLOCK] = std::array::from_fn(|b| &rows[(base + b) * d..(base + b + 1) * d]);
            let rv: [&[S::f32s]; ROW_BLOCK] = std::array::from_fn(|b| S::as_simd_f32s(r[b]).0);
            let mut acc = [zero; ROW_BLOCK];
            for (c, &xc) in xv.iter().enumerate() {
                for b in 0..ROW_BLOCK {
                    acc[b] = simd.mul_add_e_f32s(rv[b][c], xc, acc[b]);
                }
            }
            for b in 0..ROW_BLOCK {
                let tail: f32 = S::as_simd_f32s(r[b]).1.iter().zip(xt).map(|(a, b)| a * b).sum();
                out[base + b] = f64::from(simd.reduce_sum_f32s(acc[b]) + tail) * scale[base + b] * x_scale;
            }
        }
        for i in blocks * ROW_BLOCK..n {
            let (rv, rt) = S::as_simd_f32s(&rows[i * d..(i + 1) * d]);
            let mut acc = zero;
            for (&a, &b) in rv.iter().zip(xv) {
                acc = simd.mul_add_e_f32s(a, b, acc);
            }
            let tail: f32 = rt.iter().zip(xt).map(|(a, b)| a * b).sum();
            out[i] = f64::from(simd.reduce_sum_f32s(acc) + tail) * scale[i] * x_scale;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use pulp::Scalar;

    fn lcg(seed: &mut u64) -> f32 {
        *seed = seed.wrapping_mul(6364136223846793005).wrapping_add(1442695040888963407);
        ((*seed >> 40) as f32 / (1u64 << 24) as f32) - 0.5
    }

    #[test]
    fn f64_dots_match_naive_on_both_back_ends() {
        let mut seed = 7;
        for &(n, len, stride) in
            &[(0, 3, 3), (1, 1, 1), (3, 5, 7), (4, 8, 8), (9, 17, 20), (33, 64, 64), (7, 130, 131)]
        {
            let m: Vec<f64> = (0..n * stride + len).map(|_| f64::from(lcg(&mut seed))).collect();
            let x: Vec<f64> = (0..len).map(|_| f64::from(lcg(&mut seed))).collect();
            let scale: Vec<f64> = (0..n).map(|i| 1.0 + i as f64 / 8.0).collect();
            let (mut fast, mut scalar) = (vec![0.0; n], vec![0.0; n]);
            row_dots_f64(&m, stride, &x, &scale, 0.5, &mut fast);
            RowDotsF64 { m: &m, stride, x: &x, scale: &scale, x_scale: 0.5, out: &mut scalar }
                .with_simd(Scalar::new());
            for i in 0..n {
                let naive = (0..len).map(|t| m[i * stride + t] * x[t]).sum::<f64>() * scale[i] * 0.5;
                assert!((fast[i] - naive).abs() < 1e-12, "n={n} len={len} i={i}");
                assert!((scalar[i] - naive).abs() < 1e-12, "scalar back end, n={n} len={len} i={i}");
            }
        }
    }

    #[test]
    fn widened_sims_match_naive_on_both_bodies() {
        let mut seed = 3;
        for &(n, d) in &[(1, 1), (3, 5), (4, 8), (9, 17), (33, 64), (7, 130)] {
            let rows: Vec<f32> = (0..n * d).map(|_| lcg(&mut seed)).collect();
            let x: Vec<f64> = (0..d).map(|_| f64::from(lcg(&mut seed))).collect();
            let scale: Vec<f64> = (0..n).map(|i| 1.0 + i as f64 / 8.0).collect();
            let (mut fast, mut portable) = (vec![0.0; n], vec![0.0; n]);
            sims_into(&rows, &x, &scale, 0.5, &mut fast);
            SimsPortable { rows: &rows, x: &x, scale: &scale, x_scale: 0.5, out: &mut portable }
                .with_simd(Scalar::new());
            for i in 0..n {
                let naive = (0..d).map(|t| f64::from(rows[i * d + t]) * x[t]).sum::<f64>() * scale[i] * 0.5;
                assert!(
                    (fast[i] - naive).abs() < 1e-12 && (portable[i] - naive).abs() < 1e-12,
                    "n={n} d={d}"
                );
            }
        }
    }

    #[test]
    fn f32_dots_match_naive_on_both_back_ends() {
        let mut seed = 11;
        for &(n, d) in &[(1, 1), (3, 5), (4, 8), (9, 17), (33, 64), (7, 130)] {
            let rows: Vec<f32> = (0..n * d).map(|_| lcg(&mut seed)).collect();
            let x: Vec<f32> = (0..d).map(|_| lcg(&mut seed)).collect();
            let scale = vec![2.0; n];
            let (mut fast, mut scalar) = (vec![0.0; n], vec![0.0; n]);
            row_dots_f32(&rows, &x, &scale, 1.0, &mut fast);
            RowDotsF32 { rows: &rows, x: &x, scale: &scale, x_scale: 1.0, out: &mut scalar }
                .with_simd(Scalar::new());
            for i in 0..n {
                let naive = 2.0 * (0..d).map(|t| f64::from(rows[i * d + t]) * f64::from(x[t])).sum::<f64>();
                // f32 sums of d products of magnitude < 0.25: well inside 1e-5.
                assert!((fast[i] - naive).abs() < 1e-5 && (scalar[i] - naive).abs() < 1e-5, "n={n} d={d}");
            }
        }
    }
}
