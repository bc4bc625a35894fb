//! Matrix products: c ← α·a·b + β·c, on the `gemm` crate (its AVX-512, AVX2+FMA or NEON
//! kernels, chosen at run time), split over rayon threads when large; small products run on
//! an AVX-512 register-tiled kernel of this crate when the CPU has AVX-512F.

use gemm::Parallelism;
use ndarray::{ArrayView2, ArrayViewMut2, Axis};
use rayon::prelude::*;

/// c ← α·a·b + β·c through the trainer's own products (the AVX-512 kernel for small
/// shapes when the CPU has it, else the `gemm` crate, split over rayon threads when large).
/// Public so the speed bench can time it beside a plain `dot`.
///
/// # Panics
/// If the shapes do not agree.
pub fn matmul(
    alpha: f32,
    a: ArrayView2<f32>,
    b: ArrayView2<f32>,
    beta: f32,
    mut c: ArrayViewMut2<f32>,
) {
    par_gemm(alpha, &a, &b, beta, &mut c);
}

/// Products smaller than two blocks of this many multiply–adds run as one call: splitting
/// small products costs more than it saves (measured: BENCHMARKS.md, section "How fast is
/// training?").
const PAR_GEMM_MIN_MACS: usize = 1 << 21;

/// c ← α·a·b + β·c, split into column (or row) blocks of c computed on rayon threads.
///
/// Each block is one single-threaded `gemm` call, and the blocks depend only on the shapes,
/// never on the thread count, so the result does not either.
///
/// # Panics
/// If the shapes do not agree.
pub(crate) fn par_gemm(
    alpha: f32,
    a: &ArrayView2<f32>,
    b: &ArrayView2<f32>,
    beta: f32,
    c: &mut ArrayViewMut2<f32>,
) {
    let (m, k) = a.dim();
    let n = b.ncols();
    assert!(
        b.nrows() == k && c.dim() == (m, n),
        "product of {m}×{k} and {}×{n} into {:?}",
        b.nrows(),
        c.dim()
    );
    let blocks = (m * n * k / PAR_GEMM_MIN_MACS).min(8);
    if blocks < 2 || m.max(n) < 64 {
        if !small_gemm::try_gemm(alpha, a, b, beta, c) {
            library_gemm(alpha, a, b, beta, c);
        }
        return;
    }
    // Split the longer side of c; blocks a multiple of 32 wide so the kernels' tiles fit.
    let (axis, len) = if n >= m { (Axis(1), n) } else { (Axis(0), m) };
    let width = len.div_ceil(blocks).div_ceil(32) * 32;
    if axis == Axis(1) {
        let pieces: Vec<_> = c
            .axis_chunks_iter_mut(Axis(1), width)
            .zip(b.axis_chunks_iter(Axis(1), width))
            .collect();
        pieces.into_par_iter().for_each(|(mut c, b)| {
            library_gemm(alpha, a, &b, beta, &mut c);
        });
    } else {
        let pieces: Vec<_> = c
            .axis_chunks_iter_mut(Axis(0), width)
            .zip(a.axis_chunks_iter(Axis(0), width))
            .collect();
        pieces.into_par_iter().for_each(|(mut c, a)| {
            library_gemm(alpha, &a, b, beta, &mut c);
        });
    }
}

/// c ← α·a·b + β·c on the calling thread through the `gemm` crate, any strides. With β = 0
/// c is only written (whatever it held, NaN included, is gone), as ndarray's product does.
fn library_gemm(
    alpha: f32,
    a: &ArrayView2<f32>,
    b: &ArrayView2<f32>,
    beta: f32,
    c: &mut ArrayViewMut2<f32>,
) {
    let ((m, k), n) = (a.dim(), b.ncols());
    if m == 0 || n == 0 {
        return;
    }
    if k == 0 {
        if beta == 0.0 {
            c.fill(0.0);
        } else {
            *c *= beta;
        }
        return;
    }
    let [ars, acs] = [a.strides()[0], a.strides()[1]];
    let [brs, bcs] = [b.strides()[0], b.strides()[1]];
    let [crs, ccs] = [c.strides()[0], c.strides()[1]];
    // SAFETY: pointers and element strides come from views of shapes m×k, k×n and m×n
    // (checked by the caller), so every element the product reads or writes is in a view;
    // c is a unique borrow. The crate computes dst ← α'·dst + β'·lhs·rhs, reading dst only
    // when asked: α' = our β, β' = our α.
    unsafe {
        gemm::gemm(
            m,
            n,
            k,
            c.as_mut_ptr(),
            ccs,
            crs,
            beta != 0.0,
            a.as_ptr(),
            acs,
            ars,
            b.as_ptr(),
            bcs,
            brs,
            beta,
            alpha,
            false,
            false,
            false,
            Parallelism::None,
        );
    }
}

/// An AVX-512 product for the small matrices of a training step (`b` and `c` row-major).
///
/// This unpacked 6 × 64 register tile is a little faster than the `gemm` crate's AVX-512
/// kernels at a training step's small shapes, which the crate packs on every call
/// (measured: BENCHMARKS.md, section "How fast is training?"). Each entry of c is summed over k in
/// order with fused multiply–adds, so the result depends on neither the thread count nor
/// the tiling.
mod small_gemm {
    use ndarray::{ArrayView2, ArrayViewMut2};

    /// c ← α·a·b + β·c when the CPU has AVX-512F and the layouts fit (non-negative strides,
    /// `b` and `c` with unit column stride); false, with c untouched, otherwise.
    pub(super) fn try_gemm(
        alpha: f32,
        a: &ArrayView2<f32>,
        b: &ArrayView2<f32>,
        beta: f32,
        c: &mut ArrayViewMut2<f32>,
    ) -> bool {
        #[cfg(target_arch = "x86_64")]
        {
            let (m, k) = a.dim();
            let n = b.ncols();
            let [ars, acs] = [a.strides()[0], a.strides()[1]];
            let [brs, bcs] = [b.strides()[0], b.strides()[1]];
            let [crs, ccs] = [c.strides()[0], c.strides()[1]];
            let fits = m > 0
                && n > 0
                && k > 0
                && ars >= 0
                && acs >= 0
                && brs >= 0
                && crs >= 0
                && (bcs == 1 || n == 1)
                && (ccs == 1 || n == 1)
                && c.dim() == (m, n)
                && b.nrows() == k;
            if fits && std::arch::is_x86_feature_detected!("avx512f") {
                let ars = ars as usize;
                let acs = acs as usize;
                let (brs, crs) = (brs as usize, crs as usize);
                // SAFETY: AVX-512F is present (checked above); the pointers come from
                // views of the stated shapes and non-negative strides, so every index the
                // kernel forms (rows < m or k, columns < n, masked beyond) is in bounds.
                unsafe {
                    kernel(
                        m,
                        n,
                        k,
                        alpha,
                        (a.as_ptr(), ars, acs),
                        (b.as_ptr(), brs),
                        beta,
                        (c.as_mut_ptr(), crs),
                    );
                }
                return true;
            }
        }
        #[cfg(not(target_arch = "x86_64"))]
        let _ = (alpha, a, b, beta, c);
        false
    }

    #[cfg(target_arch = "x86_64")]
    const ROWS: usize = 6;
    #[cfg(target_arch = "x86_64")]
    const VECS: usize = 4;

    /// 6 rows × 64 columns of c per tile, in 24 of the 32 vector registers; a's entries
    /// are broadcast from any layout, b's rows are loaded 16 at a time, the last column
    /// block masked.
    ///
    /// # Safety
    /// The CPU has AVX-512F; `a` holds m rows (stride `ars`) of k entries (stride `acs`),
    /// `b` k rows (stride `brs`) and `c` m rows (stride `crs`) of n contiguous entries.
    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx512f")]
    #[allow(clippy::too_many_arguments)]
    unsafe fn kernel(
        m: usize,
        n: usize,
        k: usize,
        alpha: f32,
        (a, ars, acs): (*const f32, usize, usize),
        (b, brs): (*const f32, usize),
        beta: f32,
        (c, crs): (*mut f32, usize),
    ) {
        use std::arch::x86_64::*;
        let (alpha_v, beta_v) = (_mm512_set1_ps(alpha), _mm512_set1_ps(beta));
        for j in (0..n).step_by(16 * VECS) {
            let masks: [__mmask16; VECS] = std::array::from_fn(|q| {
                let left = n.saturating_sub(j + 16 * q).min(16);
                ((1u32 << left) - 1) as __mmask16
            });
            for i in (0..m).step_by(ROWS) {
                // Rows past the end repeat the last one; their results are not stored.
                let a_rows: [*const f32; ROWS] =
                    std::array::from_fn(|r| a.add((i + r).min(m - 1) * ars));
                let mut acc = [[_mm512_setzero_ps(); VECS]; ROWS];
                for p in 0..k {
                    let b_row = b.add(p * brs + j);
                    let bv: [__m512; VECS] = std::array::from_fn(|q| {
                        _mm512_maskz_loadu_ps(masks[q], b_row.wrapping_add(16 * q))
                    });
                    for r in 0..ROWS {
                        let av = _mm512_set1_ps(*a_rows[r].add(p * acs));
                        for q in 0..VECS {
                            acc[r][q] = _mm512_fmadd_ps(av, bv[q], acc[r][q]);
                        }
                    }
                }
                for (r, acc) in acc.iter().enumerate().take(m - i) {
                    let c_row = c.add((i + r) * crs + j);
                    for q in 0..VECS {
                        // Wrapping: a fully masked vector may point past the row.
                        let ptr = c_row.wrapping_add(16 * q);
                        let mut out = _mm512_mul_ps(alpha_v, acc[q]);
                        if beta != 0.0 {
                            let old = _mm512_maskz_loadu_ps(masks[q], ptr);
                            out = _mm512_fmadd_ps(beta_v, old, out);
                        }
                        _mm512_mask_storeu_ps(ptr, masks[q], out);
                    }
                }
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::linalg::general_mat_mul;
    use ndarray::Array2;
    use rand::SeedableRng;
    use rand_chacha::ChaCha8Rng;

    use crate::rbm::standard_normal;

    // source: ndarray 0.17's general_mat_mul (matrixmultiply 0.3) as the reference product.
    #[test]
    fn small_products_match_the_reference_product() {
        let mut rng = ChaCha8Rng::seed_from_u64(1);
        let mut random = |r, c| Array2::from_shape_simple_fn((r, c), || standard_normal(&mut rng));
        for (m, k, n) in [
            (1, 1, 1),
            (5, 64, 256),
            (7, 3, 17),
            (13, 9, 70),
            (64, 128, 256),
            // split over threads, 8 blocks of rows or of columns
            (300, 200, 500),
            (500, 200, 300),
        ] {
            for transposed_a in [false, true] {
                let a_owned = if transposed_a {
                    random(k, m)
                } else {
                    random(m, k)
                };
                let a = if transposed_a {
                    a_owned.t()
                } else {
                    a_owned.view()
                };
                let b = random(k, n);
                let start = random(m, n);
                for (alpha, beta) in [(1.0, 0.0), (0.05, 0.9)] {
                    let mut want = start.clone();
                    general_mat_mul(alpha, &a, &b.view(), beta, &mut want);
                    let mut got = start.clone();
                    par_gemm(alpha, &a, &b.view(), beta, &mut got.view_mut());
                    let worst = (&got - &want).iter().fold(0f32, |w, d| w.max(d.abs()));
                    assert!(
                        worst < 1e-4,
                        "{m}×{k}×{n}, αβ {alpha} {beta}: off by {worst}"
                    );
                }
            }
        }
        // B given transposed (not row-major) takes the reference path, with the same result.
        let (a, b) = (random(6, 8), random(5, 8));
        let mut got = Array2::zeros((6, 5));
        par_gemm(1.0, &a.view(), &b.t(), 0.0, &mut got.view_mut());
        assert!((got - a.dot(&b.t())).iter().all(|d| d.abs() < 1e-5));
        // c written through a transposed view, and an empty inner dimension.
        let mut got = Array2::zeros((5, 6));
        par_gemm(
            1.0,
            &a.view(),
            &b.t(),
            0.0,
            &mut got.view_mut().reversed_axes(),
        );
        assert!((got.t().to_owned() - a.dot(&b.t()))
            .iter()
            .all(|d| d.abs() < 1e-5));
        let mut scaled = Array2::from_elem((6, 5), 2.0f32);
        let (empty_a, empty_b) = (Array2::zeros((6, 0)), Array2::zeros((0, 5)));
        par_gemm(
            1.0,
            &empty_a.view(),
            &empty_b.view(),
            0.5,
            &mut scaled.view_mut(),
        );
        assert!(scaled.iter().all(|&x| x == 1.0));
    }

    #[test]
    fn split_products_do_not_depend_on_the_thread_count() {
        let mut rng = ChaCha8Rng::seed_from_u64(2);
        let mut random = |r, c| Array2::from_shape_simple_fn((r, c), || standard_normal(&mut rng));
        let (a, b) = (random(300, 700), random(700, 400));
        let run = |threads| {
            let pool = rayon::ThreadPoolBuilder::new()
                .num_threads(threads)
                .build()
                .unwrap();
            let mut c = Array2::zeros((300, 400));
            pool.install(|| par_gemm(1.0, &a.view(), &b.view(), 0.0, &mut c.view_mut()));
            c
        };
        let one = run(1);
        assert_eq!(one, run(2));
        assert_eq!(one, run(3));
    }
}
