//! Inner loops shared by the embedding-based kernels: one similarity row `S_{·,j}` and the
//! incremental Cholesky row update.
//!
//! Both are written as fixed-width blocks over plain arrays so LLVM vectorises them, and both run
//! under [`pulp::Arch::dispatch`], which recompiles the same safe code with AVX2/FMA (x86-64-v3)
//! when the CPU has it and falls back to the baseline target otherwise. Neither uses fused
//! multiply-add explicitly and the accumulation order is fixed by the source, so every dispatch
//! path returns bit-identical results; the tests check that against [`pulp::Scalar`].
//!
//! Embeddings are stored as f32 (memory traffic is what bounds these loops); products and sums are
//! taken in f64. f64 accumulation is what lets the DPP kernel see a residual of ~1e-15 rather than
//! ~1e-7 when the kernel is exhausted, so the `EPSILON` cut-off in `dpp.rs` is meaningful.

use pulp::{Arch, Simd, WithSimd};

/// Rows processed together by [`sims_into`], sharing each load of the query vector.
const ROW_BLOCK: usize = 4;
/// Lanes per accumulator array: two 256-bit f64 vectors.
const LANES: usize = 8;
/// Candidates per block of [`cholesky_row_into`]: 32 f64 accumulators fit in AVX2's 16 registers.
const ITEM_BLOCK: usize = 32;

/// `out[i] = (Σ_t rows[i·d + t] · x[t]) · scale[i] · x_scale` for every row of the row-major
/// `n × d` matrix `rows`: with inverse norms as scales, the cosine row `S_{·,j}` for `x = row_j`.
///
/// # Complexity
/// O(n·d) time, no allocation.
///
/// # Panics
/// If `x.len() != d`, `rows.len() != out.len() · d`, `scale.len() != out.len()` or `d == 0`.
pub(crate) fn sims_into(rows: &[f32], x: &[f64], scale: &[f64], x_scale: f64, out: &mut [f64]) {
    Arch::new().dispatch(Sims { rows, x, scale, x_scale, out });
}

/// [`sims_into`] on a chosen SIMD back end (tests use this to pin the scalar path).
pub(crate) struct Sims<'a> {
    pub(crate) rows: &'a [f32],
    pub(crate) x: &'a [f64],
    pub(crate) scale: &'a [f64],
    pub(crate) x_scale: f64,
    pub(crate) out: &'a mut [f64],
}

impl WithSimd for Sims<'_> {
    type Output = ();

    #[inline(always)]
    fn with_simd<S: Simd>(self, _simd: S) {
        let d = self.x.len();
        let n = self.out.len();
        assert!(d > 0 && self.rows.len() == n * d && self.scale.len() == n, "sims_into: shape mismatch");
        let mut row_blocks = self.rows.chunks_exact(d * ROW_BLOCK);
        let mut out_blocks = self.out.chunks_exact_mut(ROW_BLOCK);
        let mut scale_blocks = self.scale.chunks_exact(ROW_BLOCK);
        for ((block, out), scale) in (&mut row_blocks).zip(&mut out_blocks).zip(&mut scale_blocks) {
            let r: [&[f32]; ROW_BLOCK] = std::array::from_fn(|b| &block[b * d..(b + 1) * d]);
            let mut acc = [[0.0_f64; LANES]; ROW_BLOCK];
            let mut tail = [0.0_f64; ROW_BLOCK];
            let full = d - d % LANES;
            for c in (0..full).step_by(LANES) {
                let xc = &self.x[c..c + LANES];
                for b in 0..ROW_BLOCK {
                    let rc = &r[b][c..c + LANES];
                    for l in 0..LANES {
                        acc[b][l] += f64::from(rc[l]) * xc[l];
                    }
                }
            }
            for t in full..d {
                for b in 0..ROW_BLOCK {
                    tail[b] += f64::from(r[b][t]) * self.x[t];
                }
            }
            for b in 0..ROW_BLOCK {
                out[b] = (reduce(&acc[b]) + tail[b]) * scale[b] * self.x_scale;
            }
        }
        let rest = row_blocks.remainder().chunks_exact(d).zip(out_blocks.into_remainder());
        for ((row, o), &sc) in rest.zip(scale_blocks.remainder()) {
            *o = dot_one(row, self.x) * sc * self.x_scale;
        }
    }
}

/// One dot product with the same summation order as a row of a [`Sims`] block.
#[inline(always)]
fn dot_one(row: &[f32], x: &[f64]) -> f64 {
    let d = x.len();
    let full = d - d % LANES;
    let mut acc = [0.0_f64; LANES];
    for c in (0..full).step_by(LANES) {
        for l in 0..LANES {
            acc[l] += f64::from(row[c + l]) * x[c + l];
        }
    }
    let mut tail = 0.0;
    for t in full..d {
        tail += f64::from(row[t]) * x[t];
    }
    reduce(&acc) + tail
}

/// Pairwise sum of one accumulator array.
#[inline(always)]
fn reduce(a: &[f64; LANES]) -> f64 {
    ((a[0] + a[4]) + (a[1] + a[5])) + ((a[2] + a[6]) + (a[3] + a[7]))
}

/// One step of the incremental Cholesky update of Chen et al. (2018), Algorithm 1, lines 6–7.
///
/// `c` holds the factor rows computed so far, one row of `n` entries per earlier pick
/// (`c[t·n + i]` is `c_i[t]`); `sims[i] = S_{i,j}` for the item `j` just picked, whose residual is
/// `d_j² = dj2 > 0`. Writes `e_i = (S_{i,j} − ⟨c_j, c_i⟩) / d_j` into `e_out[i]` (the next row of
/// `c`) and subtracts `e_i²` from `residual[i]`.
///
/// # Complexity
/// O(n·t) time for `t` earlier rows, no allocation.
///
/// # Panics
/// If the slices' lengths disagree with `n` or `j >= n`.
pub(crate) fn cholesky_row_into(
    c: &[f64],
    n: usize,
    j: usize,
    dj2: f64,
    sims: &[f64],
    e_out: &mut [f64],
    residual: &mut [f64],
) {
    Arch::new().dispatch(CholeskyRow { c, n, j, dj2, sims, e_out, residual });
}

/// [`cholesky_row_into`] on a chosen SIMD back end.
pub(crate) struct CholeskyRow<'a> {
    pub(crate) c: &'a [f64],
    pub(crate) n: usize,
    pub(crate) j: usize,
    pub(crate) dj2: f64,
    pub(crate) sims: &'a [f64],
    pub(crate) e_out: &'a mut [f64],
    pub(crate) residual: &'a mut [f64],
}

impl WithSimd for CholeskyRow<'_> {
    type Output = ();

    #[inline(always)]
    fn with_simd<S: Simd>(self, _simd: S) {
        let Self { c, n, j, dj2, sims, e_out, residual } = self;
        assert!(
            j < n && c.len() % n == 0 && sims.len() == n && e_out.len() == n && residual.len() == n,
            "cholesky_row_into: shape mismatch"
        );
        debug_assert!(dj2 > 0.0, "pivot residual must be positive");
        let rows = c.len() / n;
        let inv_dj = 1.0 / dj2.sqrt();
        let mut i0 = 0;
        while i0 + ITEM_BLOCK <= n {
            let mut acc = [0.0_f64; ITEM_BLOCK];
            for t in 0..rows {
                let row = &c[t * n..(t + 1) * n];
                let a = row[j];
                let block = &row[i0..i0 + ITEM_BLOCK];
                for b in 0..ITEM_BLOCK {
                    acc[b] += a * block[b];
                }
            }
            for b in 0..ITEM_BLOCK {
                let i = i0 + b;
                let e = (sims[i] - acc[b]) * inv_dj;
                e_out[i] = e;
                residual[i] -= e * e;
            }
            i0 += ITEM_BLOCK;
        }
        for i in i0..n {
            let mut acc = 0.0;
            for t in 0..rows {
                acc += c[t * n + j] * c[t * n + i];
            }
            let e = (sims[i] - acc) * inv_dj;
            e_out[i] = e;
            residual[i] -= e * e;
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
    fn sims_match_naive_and_scalar_path_bit_for_bit() {
        let mut seed = 7;
        for &(n, d) in &[(1, 1), (3, 5), (4, 8), (9, 17), (33, 64), (7, 130)] {
            let rows: Vec<f32> = (0..n * d).map(|_| lcg(&mut seed)).collect();
            let x: Vec<f64> = (0..d).map(|_| f64::from(lcg(&mut seed))).collect();
            let scale: Vec<f64> = (0..n).map(|i| 1.0 + i as f64 / 8.0).collect();
            let mut fast = vec![0.0; n];
            let mut scalar = vec![0.0; n];
            sims_into(&rows, &x, &scale, 0.5, &mut fast);
            Sims { rows: &rows, x: &x, scale: &scale, x_scale: 0.5, out: &mut scalar }
                .with_simd(Scalar::new());
            for i in 0..n {
                let naive = (0..d).map(|t| f64::from(rows[i * d + t]) * x[t]).sum::<f64>() * scale[i] * 0.5;
                assert!((fast[i] - naive).abs() < 1e-12, "n={n} d={d} i={i}");
                assert_eq!(fast[i].to_bits(), scalar[i].to_bits(), "dispatch paths differ");
            }
        }
    }

    #[test]
    fn cholesky_row_matches_naive_and_scalar_path() {
        let mut seed = 11;
        for &(n, rows) in &[(1, 0), (5, 2), (32, 3), (70, 9)] {
            let c: Vec<f64> = (0..n * rows).map(|_| f64::from(lcg(&mut seed))).collect();
            let sims: Vec<f64> = (0..n).map(|_| f64::from(lcg(&mut seed))).collect();
            let j = n / 2;
            let (mut e1, mut r1) = (vec![0.0; n], vec![1.0; n]);
            let (mut e2, mut r2) = (vec![0.0; n], vec![1.0; n]);
            cholesky_row_into(&c, n, j, 0.7, &sims, &mut e1, &mut r1);
            CholeskyRow { c: &c, n, j, dj2: 0.7, sims: &sims, e_out: &mut e2, residual: &mut r2 }
                .with_simd(Scalar::new());
            for i in 0..n {
                let dot: f64 = (0..rows).map(|t| c[t * n + j] * c[t * n + i]).sum();
                let e = (sims[i] - dot) / 0.7_f64.sqrt();
                assert!((e1[i] - e).abs() < 1e-12);
                assert!((r1[i] - (1.0 - e * e)).abs() < 1e-12);
                assert_eq!(e1[i].to_bits(), e2[i].to_bits());
                assert_eq!(r1[i].to_bits(), r2[i].to_bits());
            }
        }
    }
}
