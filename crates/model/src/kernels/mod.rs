//! The crate's inner loops, with the CPU instructions chosen at run time.
//!
//! Why run time: the default x86-64 target stops at SSE2 and the project does not pin a
//! target CPU, so a plain build would run these loops 4 wide. [`simd`] runs a loop inside a
//! function compiled for AVX-512 or AVX2 when the CPU has it; the products in [`gemm`] use
//! an AVX-512 kernel for small shapes and the `gemm` crate (AVX-512, AVX2+FMA or NEON)
//! otherwise. Every path computes the same bits (Rust never fuses
//! or reorders float operations), so results never depend on the CPU.

mod gemm;

use rand::Rng;
use rand_chacha::ChaCha8Rng;

pub use gemm::matmul;
pub(crate) use gemm::par_gemm;

/// e^x in plain f32 arithmetic: Cody–Waite reduction x = n·ln 2 + r and the degree-5
/// polynomial of the Cephes `expf` (about 1 ulp), with x clamped to [−87, 87] so results
/// stay normal. Unlike a libm call, loops over it vectorise, and they give the same bits at
/// any vector width, so results do not depend on the machine's SIMD level.
#[inline(always)]
pub(crate) fn exp_approx(x: f32) -> f32 {
    // Adding 1.5·2²³ rounds to an integer, which lands in the low mantissa bits.
    const SHIFT: f32 = 12_582_912.0;
    let x = x.clamp(-87.0, 87.0);
    let t = x * std::f32::consts::LOG2_E + SHIFT;
    let n = t - SHIFT;
    let r = x - n * 0.693_359_4 - n * -2.121_944_4e-4;
    let p = ((((1.987_569_1e-4 * r + 1.398_199_9e-3) * r + 8.333_452e-3) * r + 4.166_579_6e-2) * r
        + 1.666_666_5e-1)
        * r
        + 0.5;
    let e_r = p * (r * r) + r + 1.0;
    // 2ⁿ built from the exponent bits: n sits in t's mantissa, offset by SHIFT's bits.
    let n_bits = t.to_bits().wrapping_sub(SHIFT.to_bits());
    e_r * f32::from_bits(n_bits.wrapping_add(127) << 23)
}

#[inline(always)]
pub(crate) fn sigmoid(x: f32) -> f32 {
    1.0 / (1.0 + exp_approx(-x))
}

/// Runs `f` inside a function compiled for AVX-512 (or AVX2) when the CPU has it, so that
/// the loops inlined into it vectorise 16 (or 8) wide instead of SSE2's 4. The arithmetic
/// is the same (Rust never fuses or reorders float operations), so the bits are too.
/// AVX-512 is preferred because the products run on the AVX-512 kernel of [`gemm`] too
/// (measured: BENCHMARKS.md, section "How fast is training?").
#[inline(always)]
pub(crate) fn simd<R>(f: impl FnOnce() -> R) -> R {
    #[cfg(target_arch = "x86_64")]
    {
        if std::arch::is_x86_feature_detected!("avx512f") {
            #[target_feature(enable = "avx512f")]
            fn run512<R>(f: impl FnOnce() -> R) -> R {
                f()
            }
            // SAFETY: the CPU supports AVX-512F, checked just above.
            return unsafe { run512(f) };
        }
        if std::arch::is_x86_feature_detected!("avx2") {
            #[target_feature(enable = "avx2")]
            fn run<R>(f: impl FnOnce() -> R) -> R {
                f()
            }
            // SAFETY: the CPU supports AVX2, checked just above.
            return unsafe { run(f) };
        }
    }
    f()
}

/// `row[i] ← σ(row[i] + scale·bias[i])`, vectorised by [`simd`].
pub(crate) fn sigmoid_of_sum(row: &mut [f32], bias: &[f32], scale: f32) {
    simd(
        #[inline(always)]
        || {
            for (x, &c) in row.iter_mut().zip(bias) {
                *x = sigmoid(*x + scale * c);
            }
        },
    )
}

/// Replace probabilities by 0/1 draws, u < p with u a 16-bit uniform (k·2⁻¹⁶): half the
/// random bits of a 24-bit draw, because the generator is a large share of a training step
/// (measured: BENCHMARKS.md, section "How fast is training?"); the probabilities are
/// rounded up to the next multiple of 2⁻¹⁶ at worst. The bits come 64 draws at a time so
/// the comparison loop vectorises.
pub(crate) fn bernoulli_in_place(row: &mut [f32], rng: &mut ChaCha8Rng) {
    let mut bits = [0u16; 64];
    for piece in row.chunks_mut(64) {
        let bits = &mut bits[..piece.len()];
        rng.fill(bits);
        simd(
            #[inline(always)]
            || {
                for (x, &u) in piece.iter_mut().zip(bits.iter()) {
                    *x = bernoulli_draw(*x, u);
                }
            },
        );
    }
}

/// [`bernoulli_in_place`] reading the probabilities from `p` and writing the draws to `out`.
pub(crate) fn bernoulli_from(p: &[f32], out: &mut [f32], rng: &mut ChaCha8Rng) {
    let mut bits = [0u16; 64];
    for (p, out) in p.chunks(64).zip(out.chunks_mut(64)) {
        let bits = &mut bits[..p.len()];
        rng.fill(bits);
        simd(
            #[inline(always)]
            || {
                for ((x, &p), &u) in out.iter_mut().zip(p).zip(bits.iter()) {
                    *x = bernoulli_draw(p, u);
                }
            },
        );
    }
}

/// One 0/1 draw with probability `p` from the 16-bit uniform `u`.
#[inline(always)]
pub(crate) fn bernoulli_draw(p: f32, u: u16) -> f32 {
    f32::from(f32::from(u) * (1.0 / 65_536.0) < p)
}

/// Σ (a − b)² over two equal-length slices, in 16 running sums so the loop vectorises.
pub(crate) fn squared_error_flat(a: &[f32], b: &[f32]) -> f32 {
    simd(
        #[inline(always)]
        || {
            let mut acc = [0.0f32; 16];
            let (a16, b16) = (a.chunks_exact(16), b.chunks_exact(16));
            let tail: f32 = a16
                .remainder()
                .iter()
                .zip(b16.remainder())
                .map(|(x, y)| (x - y) * (x - y))
                .sum();
            for (x, y) in a16.zip(b16) {
                for ((s, x), y) in acc.iter_mut().zip(x).zip(y) {
                    *s += (x - y) * (x - y);
                }
            }
            acc.iter().sum::<f32>() + tail
        },
    )
}
