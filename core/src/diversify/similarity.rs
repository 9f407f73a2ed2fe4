//! The inner loop of MMR: dot products of one f32 vector with every row of a row-major f32
//! matrix, i.e. one similarity row `S_{·,j}`.
//!
//! Written with pulp's portable SIMD vocabulary ([`pulp::Simd`]) and entered through
//! [`pulp::Arch::dispatch`], which picks AVX2 + FMA (x86-64-v3) at run time when the CPU has it and
//! the scalar back end otherwise: no `unsafe`, no `-C target-cpu`. Four rows are processed together
//! so each load of the vector feeds four independent FMA chains.
//!
//! Measured on the dev machine: LLVM's auto-vectorisation of plain blocked loops reached 2–6
//! GMAC/s here (it transposed across rows or spilled the accumulators); this body ran at 76–94 %
//! of a tuned library GEMV of the same shape when MMR still computed one row per pick. Lazy MMR
//! now computes one full row per call and refreshes candidates one at a time.
//!
//! Precision: MMR ranks by `score − max cos` and tolerates f32 sums (error ~1e-7). DPP, whose
//! `EPSILON = 1e-9` cut-off f32 noise would swamp, keeps its own f64 loops in `dpp.rs`.

use pulp::{Arch, Simd, WithSimd};

/// Rows per block: four FMA chains per vector load.
const ROW_BLOCK: usize = 4;

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
