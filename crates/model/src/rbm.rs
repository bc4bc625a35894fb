//! The two RBM kinds share one struct; only the visible-unit behaviour differs.

use std::fmt::Debug;
use std::marker::PhantomData;

use ndarray::linalg::general_mat_mul;
use ndarray::{Array1, Array2, ArrayView2, ArrayViewMut2, Axis};
use rand::{Rng, RngCore, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;
use serde::{Deserialize, Serialize};

use crate::train::{sealed, Trainable};
use crate::ModelError;

/// Rows per independently seeded sampling chunk. Fixed (not derived from the thread
/// count) so that the same seed gives the same samples on any machine.
pub const SAMPLE_CHUNK_ROWS: usize = 32;

/// Below this many elements a row pass (sigmoids, draws) runs on the calling thread:
/// waking another thread costs more than it saves (measured on digits-sized batches, 16k
/// values, where even the draws ran faster on one thread).
const PAR_MIN_ELEMENTS: usize = 1 << 15;

/// What kind of value a visible unit takes; the hidden units are always Bernoulli.
pub trait VisibleUnits: Clone + Copy + Debug + Default + PartialEq + Send + Sync + 'static {
    /// Mean of a visible unit given its total input `b_i + Σ_j W_ij h_j`.
    fn mean(input: f32) -> f32;
    /// A draw from the unit's conditional distribution with that mean.
    fn sample(mean: f32, rng: &mut ChaCha8Rng) -> f32;
    /// The visible unit's own term in the energy (and free energy): value `v`, bias `b`.
    fn bias_energy(v: f64, b: f64) -> f64;
    /// `row[i] ← mean(row[i] + bias[i])` for a whole row: the hot loop of every visible
    /// step, so kinds may override it with a vectorised version.
    fn means_in_place(row: &mut [f32], bias: &[f32]) {
        for (x, &b) in row.iter_mut().zip(bias) {
            *x = Self::mean(*x + b);
        }
    }
    /// Replace a row of means by draws, in order (by default [`Self::sample`] on each
    /// entry in turn); kinds may override it with a faster sampler of the same distribution.
    fn sample_in_place(row: &mut [f32], rng: &mut ChaCha8Rng) {
        for x in row {
            *x = Self::sample(*x, rng);
        }
    }
}

/// Binary units: p(v_i = 1 | h) = σ(b_i + Σ_j W_ij h_j).
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct Bernoulli;

/// Real units with **unit variance**: v_i | h ~ N(b_i + Σ_j W_ij h_j, 1).
///
/// Assumes the data were standardised per dimension (zero mean, unit variance), as the
/// feature pipeline does; learning the variances too is much less stable under CD and
/// the fixed σ = 1 is the usual practice for standardised inputs.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct Gaussian;

impl VisibleUnits for Bernoulli {
    #[inline]
    fn mean(input: f32) -> f32 {
        sigmoid(input)
    }
    /// The same rule as the batch sampler (a 16-bit uniform below the mean), one draw of
    /// the generator per call.
    #[inline]
    fn sample(mean: f32, rng: &mut ChaCha8Rng) -> f32 {
        bernoulli_draw(mean, rng.random::<u16>())
    }
    fn bias_energy(v: f64, b: f64) -> f64 {
        -b * v
    }
    fn means_in_place(row: &mut [f32], bias: &[f32]) {
        sigmoid_of_sum(row, bias, 1.0);
    }
    fn sample_in_place(row: &mut [f32], rng: &mut ChaCha8Rng) {
        bernoulli_in_place(row, rng);
    }
}

impl VisibleUnits for Gaussian {
    #[inline]
    fn mean(input: f32) -> f32 {
        input
    }
    fn sample(mean: f32, rng: &mut ChaCha8Rng) -> f32 {
        mean + standard_normal(rng)
    }
    fn bias_energy(v: f64, b: f64) -> f64 {
        0.5 * (v - b) * (v - b)
    }
}

/// A restricted Boltzmann machine with Bernoulli hidden units.
///
/// Energy: `E(v, h) = Σ_i e_V(v_i, b_i) − Σ_j c_j h_j − Σ_ij v_i W_ij h_j`, where
/// `e_V` is [`VisibleUnits::bias_energy`]. All batch methods take one example per row.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(bound = "")]
pub struct Rbm<V: VisibleUnits> {
    /// `n_visible × n_hidden`.
    pub weights: Array2<f32>,
    pub visible_bias: Array1<f32>,
    pub hidden_bias: Array1<f32>,
    #[serde(skip)]
    units: PhantomData<V>,
}

/// Weights drawn N(0, weight_std²) from a generator seeded with `seed`: every RBM kind
/// starts this way.
pub(crate) fn random_weights(
    n_visible: usize,
    n_hidden: usize,
    weight_std: f32,
    seed: u64,
) -> Array2<f32> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    Array2::from_shape_simple_fn((n_visible, n_hidden), || {
        weight_std * standard_normal(&mut rng)
    })
}

/// Panics when the bias lengths do not match the weight matrix (a programming error).
pub(crate) fn assert_shapes(
    weights: &Array2<f32>,
    visible_bias: &Array1<f32>,
    hidden_bias: &Array1<f32>,
) {
    assert_eq!(weights.nrows(), visible_bias.len(), "visible bias length");
    assert_eq!(weights.ncols(), hidden_bias.len(), "hidden bias length");
}

/// Bernoulli visible, Bernoulli hidden: tags and upper layers.
pub type BinaryRbm = Rbm<Bernoulli>;
/// Gaussian (unit-variance) visible, Bernoulli hidden: standardised picture features.
pub type GaussianBernoulliRbm = Rbm<Gaussian>;

impl<V: VisibleUnits> Rbm<V> {
    /// Small random weights N(0, weight_std²) and zero biases (Hinton's guide suggests
    /// weight_std ≈ 0.01 so hidden units start near 0.5 and learn different features).
    pub fn new(n_visible: usize, n_hidden: usize, weight_std: f32, seed: u64) -> Self {
        Self::from_parts(
            random_weights(n_visible, n_hidden, weight_std, seed),
            Array1::zeros(n_visible),
            Array1::zeros(n_hidden),
        )
    }

    /// Assemble a model from known parameters.
    ///
    /// # Panics
    /// If the bias lengths do not match the weight matrix (a programming error).
    pub fn from_parts(
        weights: Array2<f32>,
        visible_bias: Array1<f32>,
        hidden_bias: Array1<f32>,
    ) -> Self {
        assert_shapes(&weights, &visible_bias, &hidden_bias);
        Self {
            weights,
            visible_bias,
            hidden_bias,
            units: PhantomData,
        }
    }

    pub fn n_visible(&self) -> usize {
        self.weights.nrows()
    }

    pub fn n_hidden(&self) -> usize {
        self.weights.ncols()
    }

    /// p(h_j = 1 | v) = σ(c_j + Σ_i v_i W_ij) for each row of `v`.
    /// Panics (inside ndarray's matrix product) if `v` does not have `n_visible` columns.
    pub fn hidden_probabilities(&self, v: ArrayView2<f32>) -> Array2<f32> {
        let mut x = Array2::zeros((v.nrows(), self.n_hidden()));
        par_gemm(1.0, &v, &self.weights.view(), 0.0, &mut x.view_mut());
        hidden_activation(&mut x, &self.hidden_bias, None);
        x
    }

    /// E[v_i | h] (for binary units, the probability that v_i = 1) for each row of `h`.
    pub fn visible_means(&self, h: ArrayView2<f32>) -> Array2<f32> {
        let mut x = Array2::zeros((h.nrows(), self.n_visible()));
        par_gemm(1.0, &h, &self.weights.t(), 0.0, &mut x.view_mut());
        for_each_row(&mut x, |_, row| {
            sealed::Cd::visible_means_row(self, row, 1.0)
        });
        x
    }

    /// A binary draw of the hidden units given each row of `v`.
    pub fn sample_hidden(&self, v: ArrayView2<f32>, rng: &mut impl RngCore) -> Array2<f32> {
        sample_bernoulli(&self.hidden_probabilities(v), rng)
    }

    /// A draw of the visible units given each row of `h`.
    pub fn sample_visible(&self, h: ArrayView2<f32>, rng: &mut impl RngCore) -> Array2<f32> {
        sample_visible_from_means::<V>(&self.visible_means(h), rng)
    }

    /// F(v) = Σ_i e_V(v_i, b_i) − Σ_j softplus(c_j + Σ_i v_i W_ij), so p(v) ∝ exp(−F(v)).
    /// Computed in f64 throughout: exact check values difference it.
    pub fn free_energy(&self, v: ArrayView2<f32>) -> Array1<f64> {
        let w = self.weights.mapv(f64::from);
        let v = v.mapv(f64::from);
        let x = v.dot(&w) + &self.hidden_bias.mapv(f64::from);
        let b = self.visible_bias.mapv(f64::from);
        Array1::from_iter(v.outer_iter().zip(x.outer_iter()).map(|(vr, xr)| {
            let visible: f64 = vr
                .iter()
                .zip(&b)
                .map(|(&vi, &bi)| V::bias_energy(vi, bi))
                .sum();
            visible - xr.iter().map(|&xj| softplus(xj)).sum::<f64>()
        }))
    }

    /// Mean squared error of the mean-field reconstruction v → p(h|v) → E[v|h].
    /// Deterministic, so training and validation figures are comparable.
    pub fn reconstruction_error(&self, v: ArrayView2<f32>) -> f32 {
        let r = self.visible_means(self.hidden_probabilities(v).view());
        squared_error(v, r.view()) / v.len().max(1) as f32
    }

    /// Typed error instead of a panic for rows that come from outside.
    pub(crate) fn check_rows(
        &self,
        what: &'static str,
        v: ArrayView2<f32>,
    ) -> Result<(), ModelError> {
        if v.nrows() == 0 {
            return Err(ModelError::Empty { what });
        }
        if v.ncols() != self.n_visible() {
            return Err(ModelError::WidthMismatch {
                what,
                expected: self.n_visible(),
                got: v.ncols(),
            });
        }
        match v.indexed_iter().find(|(_, x)| !x.is_finite()) {
            Some(((row, col), _)) => Err(ModelError::NonFinite { what, row, col }),
            None => Ok(()),
        }
    }
}

impl<V: VisibleUnits> Trainable for Rbm<V> {}

impl<V: VisibleUnits> sealed::Cd for Rbm<V> {
    fn parameters(&self) -> (&Array2<f32>, &Array1<f32>, &Array1<f32>) {
        (&self.weights, &self.visible_bias, &self.hidden_bias)
    }

    fn parameters_mut(&mut self) -> (&mut Array2<f32>, &mut Array1<f32>, &mut Array1<f32>) {
        (
            &mut self.weights,
            &mut self.visible_bias,
            &mut self.hidden_bias,
        )
    }

    fn check_rows(&self, what: &'static str, v: ArrayView2<f32>) -> Result<(), ModelError> {
        Rbm::check_rows(self, what, v)
    }

    #[inline]
    fn visible_means_row(&self, row: &mut [f32], _scale: f32) {
        let bias = self.visible_bias.as_standard_layout();
        V::means_in_place(row, bias.as_slice().expect("standard layout"));
    }

    #[inline]
    fn sample_visible_row(&self, row: &mut [f32], _scale: f32, rng: &mut ChaCha8Rng) {
        V::sample_in_place(row, rng);
    }

    fn reconstruction_error(&self, v: ArrayView2<f32>) -> f32 {
        Rbm::reconstruction_error(self, v)
    }
}

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
/// Measured on digits-sized steps: AVX-512 here was 3 % slower while the products ran on
/// AVX2 (matrixmultiply), 5 % faster once they run on the AVX-512 kernel below.
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
/// random bits of a 24-bit draw (the generator was a tenth of a digits-sized step), the
/// probabilities rounded up to the next multiple of 2⁻¹⁶ at worst. The bits come 64
/// draws at a time so the comparison loop vectorises.
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
fn bernoulli_from(p: &[f32], out: &mut [f32], rng: &mut ChaCha8Rng) {
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

#[inline(always)]
fn bernoulli_draw(p: f32, u: u16) -> f32 {
    f32::from(f32::from(u) * (1.0 / 65_536.0) < p)
}

/// `dst ← draws with probabilities src` for row-major matrices of `cols` columns, seeded
/// per row chunk exactly like [`for_each_row_seeded`] with [`bernoulli_in_place`] on a copy
/// of `src`, without the copy.
pub(crate) fn bernoulli_rows_from(
    src: &[f32],
    dst: &mut [f32],
    cols: usize,
    rng: &mut impl RngCore,
) {
    let chunk = SAMPLE_CHUNK_ROWS * cols;
    if chunk == 0 {
        return;
    }
    let seeds: Vec<u64> = dst.chunks(chunk).map(|_| rng.next_u64()).collect();
    let run = |((p, out), &seed): ((&[f32], &mut [f32]), &u64)| {
        let mut r = ChaCha8Rng::seed_from_u64(seed);
        for (p, out) in p.chunks_exact(cols).zip(out.chunks_exact_mut(cols)) {
            bernoulli_from(p, out, &mut r);
        }
    };
    if dst.len() >= PAR_MIN_ELEMENTS {
        src.par_chunks(chunk)
            .zip(dst.par_chunks_mut(chunk))
            .zip(seeds.par_iter())
            .for_each(run);
    } else {
        src.chunks(chunk)
            .zip(dst.chunks_mut(chunk))
            .zip(seeds.iter())
            .for_each(run);
    }
}

/// Applies `f(row index, row)` to every row of a standard-layout matrix, over chunks of
/// [`SAMPLE_CHUNK_ROWS`] rows, on rayon threads when the matrix is large enough.
pub(crate) fn for_each_row(x: &mut Array2<f32>, f: impl Fn(usize, &mut [f32]) + Sync) {
    let cols = x.ncols();
    let flat = x
        .as_slice_mut()
        .expect("owned matrices are in standard layout");
    rows_apply(flat, cols, |first, block| {
        for (i, row) in block.chunks_exact_mut(cols).enumerate() {
            f(first + i, row);
        }
    });
}

/// Like [`for_each_row`] on a flat row-major buffer of `cols` columns, with one generator
/// per chunk, seeded from `rng` in chunk order: the draws do not depend on the thread count.
pub(crate) fn for_each_row_seeded(
    flat: &mut [f32],
    cols: usize,
    rng: &mut impl RngCore,
    f: impl Fn(usize, &mut [f32], &mut ChaCha8Rng) + Sync,
) {
    let chunk = SAMPLE_CHUNK_ROWS * cols;
    if chunk == 0 {
        return;
    }
    let seeds: Vec<u64> = flat.chunks(chunk).map(|_| rng.next_u64()).collect();
    rows_apply(flat, cols, |first, block| {
        let mut r = ChaCha8Rng::seed_from_u64(seeds[first / SAMPLE_CHUNK_ROWS]);
        for (i, row) in block.chunks_exact_mut(cols).enumerate() {
            f(first + i, row, &mut r);
        }
    });
}

/// Runs `f(first row, block)` over blocks of [`SAMPLE_CHUNK_ROWS`] rows.
pub(crate) fn rows_apply(flat: &mut [f32], cols: usize, f: impl Fn(usize, &mut [f32]) + Sync) {
    let chunk = SAMPLE_CHUNK_ROWS * cols;
    if chunk == 0 {
        return;
    }
    let run = |(k, block): (usize, &mut [f32])| f(k * SAMPLE_CHUNK_ROWS, block);
    if flat.len() >= PAR_MIN_ELEMENTS {
        flat.par_chunks_mut(chunk).enumerate().for_each(run);
    } else {
        flat.chunks_mut(chunk).enumerate().for_each(run);
    }
}

/// c ← α·a·b + β·c through the trainer's own products (the AVX-512 kernel for small
/// shapes when the CPU has it, else matrixmultiply, split over rayon threads when large).
/// Public so the speed bench can time it beside a plain `dot`.
///
/// # Panics
/// If the shapes do not agree (inside ndarray's product).
pub fn matmul(
    alpha: f32,
    a: ArrayView2<f32>,
    b: ArrayView2<f32>,
    beta: f32,
    mut c: ArrayViewMut2<f32>,
) {
    par_gemm(alpha, &a, &b, beta, &mut c);
}

/// Products smaller than this many multiply–adds run as one call: on digits-sized steps
/// (64 × 64 × 256) splitting measured slower than not.
const PAR_GEMM_MIN_MACS: usize = 1 << 21;

/// c ← α·a·b + β·c, split into column (or row) blocks of c computed on rayon threads.
///
/// matrixmultiply runs on one thread; this lets a product use every core without a second
/// thread pool. The blocks depend only on the shapes, never on the thread count, so the
/// result does not either.
pub(crate) fn par_gemm(
    alpha: f32,
    a: &ArrayView2<f32>,
    b: &ArrayView2<f32>,
    beta: f32,
    c: &mut ArrayViewMut2<f32>,
) {
    let (m, k) = a.dim();
    let n = b.ncols();
    let blocks = (m * n * k / PAR_GEMM_MIN_MACS).min(8);
    if blocks < 2 || m.max(n) < 64 {
        if !small_gemm::try_gemm(alpha, a, b, beta, c) {
            general_mat_mul(alpha, a, b, beta, c);
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
            general_mat_mul(alpha, a, &b, beta, &mut c);
        });
    } else {
        let pieces: Vec<_> = c
            .axis_chunks_iter_mut(Axis(0), width)
            .zip(a.axis_chunks_iter(Axis(0), width))
            .collect();
        pieces.into_par_iter().for_each(|(mut c, a)| {
            general_mat_mul(alpha, &a, b, beta, &mut c);
        });
    }
}

/// An AVX-512 product for the small matrices of a training step (`b` and `c` row-major).
///
/// matrixmultiply's kernels stop at AVX2 and pack both operands on every call; at
/// digits-sized shapes (64 × 64 × 256) this unpacked 6 × 64 register tile measured 1.7–2×
/// faster. Each entry of c is summed over k in order with fused multiply–adds, so the
/// result depends on neither the thread count nor the tiling.
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
        false
    }

    const ROWS: usize = 6;
    const VECS: usize = 4;

    /// 6 rows × 64 columns of c per tile, in 24 of the 32 vector registers; a's entries
    /// are broadcast from any layout, b's rows are loaded 16 at a time, the last column
    /// block masked.
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

/// x ← σ(x + s_r·c) row by row: hidden probabilities from the inputs Σ_i v_i W_ij, with
/// each row's hidden-bias multiplier s_r (1 when `scales` is None).
pub(crate) fn hidden_activation(x: &mut Array2<f32>, bias: &Array1<f32>, scales: Option<&[f32]>) {
    let c = bias.as_standard_layout();
    let c = c.as_slice().expect("standard layout");
    for_each_row(x, |r, row| {
        sigmoid_of_sum(row, c, scales.map_or(1.0, |s| s[r]));
    });
}

/// log(1 + eˣ) without overflow.
pub(crate) fn softplus(x: f64) -> f64 {
    x.max(0.0) + (-x.abs()).exp().ln_1p()
}

pub(crate) fn squared_error(a: ArrayView2<f32>, b: ArrayView2<f32>) -> f32 {
    a.iter().zip(b.iter()).map(|(x, y)| (x - y) * (x - y)).sum()
}

/// Box–Muller; avoids a distribution crate for one formula.
pub(crate) fn standard_normal(rng: &mut impl Rng) -> f32 {
    let u1: f64 = 1.0 - rng.random::<f64>(); // (0, 1]: ln is finite
    let u2: f64 = rng.random();
    ((-2.0 * u1.ln()).sqrt() * (std::f64::consts::TAU * u2).cos()) as f32
}

/// Draw every entry independently; rows are split into fixed chunks, each with its own
/// generator seeded from `rng` in order, so the thread count cannot change the result.
fn par_sample<V: VisibleUnits>(means: &Array2<f32>, rng: &mut impl RngCore) -> Array2<f32> {
    let mut out = means.as_standard_layout().into_owned();
    let cols = out.ncols();
    let flat = out.as_slice_mut().expect("standard layout");
    for_each_row_seeded(flat, cols, rng, |_, row, r| V::sample_in_place(row, r));
    out
}

pub(crate) fn sample_bernoulli(p: &Array2<f32>, rng: &mut impl RngCore) -> Array2<f32> {
    par_sample::<Bernoulli>(p, rng)
}

pub(crate) fn sample_visible_from_means<V: VisibleUnits>(
    means: &Array2<f32>,
    rng: &mut impl RngCore,
) -> Array2<f32> {
    par_sample::<V>(means, rng)
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    /// Hand-built 2 visible × 2 hidden Gaussian–Bernoulli model.
    /// W = [[1, −2], [0.5, 3]], b = [0.1, −0.2], c = [−1, 0.5].
    fn tiny_gaussian() -> GaussianBernoulliRbm {
        Rbm::from_parts(
            array![[1.0, -2.0], [0.5, 3.0]],
            array![0.1, -0.2],
            array![-1.0, 0.5],
        )
    }

    // source: standard Gaussian–Bernoulli RBM conditionals with unit variance (e.g. Hinton
    // 2010, "A Practical Guide to Training RBMs", UTML TR 2010-003, §13.2), from memory.
    // v = (2, −1): input to h1 = −1 + 2·1 + (−1)·0.5 = 0.5  → σ(0.5) = 0.622459331
    //              input to h2 = 0.5 + 2·(−2) + (−1)·3 = −6.5 → σ(−6.5) = 0.001501182
    // v = (0, 0):  σ(−1) = 0.268941421, σ(0.5) = 0.622459331
    #[test]
    fn gaussian_hidden_probabilities_match_hand_values() {
        let p = tiny_gaussian().hidden_probabilities(array![[2.0, -1.0], [0.0, 0.0]].view());
        let want = [[0.622_459_3, 0.001_501_182], [0.268_941_4, 0.622_459_3]];
        for (got, want) in p.iter().zip(want.iter().flatten()) {
            assert!((got - want).abs() < 1e-6, "{got} vs {want}");
        }
    }

    // E[v|h] = b + W h: h = (1, 0) → (0.1 + 1, −0.2 + 0.5) = (1.1, 0.3)
    //                   h = (1, 1) → (0.1 + 1 − 2, −0.2 + 0.5 + 3) = (−0.9, 3.3)
    //                   h = (0, 0) → b = (0.1, −0.2)
    #[test]
    fn gaussian_visible_means_match_hand_values() {
        let m = tiny_gaussian().visible_means(array![[1.0, 0.0], [1.0, 1.0], [0.0, 0.0]].view());
        let want = array![[1.1, 0.3], [-0.9, 3.3], [0.1, -0.2]];
        assert!((m - want).iter().all(|d| d.abs() < 1e-6));
    }

    // F(v) = ½|v − b|² − Σ_j softplus(c_j + vW_j). v = (2, −1):
    // ½(1.9² + 0.8²) = 2.125; softplus(0.5) = 0.974076984, softplus(−6.5) = 0.001502310
    // → F = 2.125 − 0.975579294 = 1.149420706
    #[test]
    fn gaussian_free_energy_matches_hand_value() {
        let f = tiny_gaussian().free_energy(array![[2.0, -1.0]].view());
        assert!((f[0] - 1.149_420_706).abs() < 1e-6, "{}", f[0]);
    }

    #[test]
    fn gaussian_samples_have_unit_variance_around_the_mean() {
        let rbm = tiny_gaussian();
        let h = Array2::from_shape_fn((20_000, 2), |(_, j)| j as f32); // h = (0, 1)
        let v = rbm.sample_visible(h.view(), &mut ChaCha8Rng::seed_from_u64(3));
        // mean b + W h = (0.1 − 2, −0.2 + 3) = (−1.9, 2.8); variance 1.
        // 4 standard errors: 4/√20000 ≈ 0.028 for the mean, ≈ 0.04 for the variance.
        for (j, want) in [-1.9f32, 2.8].into_iter().enumerate() {
            let col = v.column(j);
            let mean = col.mean().unwrap();
            let var = col.mapv(|x| (x - mean) * (x - mean)).mean().unwrap();
            assert!((mean - want).abs() < 0.03, "mean {mean}");
            assert!((var - 1.0).abs() < 0.04, "var {var}");
        }
    }

    #[test]
    fn sampling_is_seeded_and_independent_of_thread_count() {
        let rbm = BinaryRbm::new(10, 7, 1.0, 5);
        let v = Array2::from_shape_fn((100, 10), |(i, j)| ((i * 7 + j) % 3 == 0) as u8 as f32);
        let run = |threads| {
            let pool = rayon::ThreadPoolBuilder::new()
                .num_threads(threads)
                .build()
                .unwrap();
            pool.install(|| rbm.sample_hidden(v.view(), &mut ChaCha8Rng::seed_from_u64(9)))
        };
        let one = run(1);
        assert_eq!(one, run(2));
        assert_ne!(
            one,
            rbm.sample_hidden(v.view(), &mut ChaCha8Rng::seed_from_u64(10))
        );
    }

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
    }

    #[test]
    fn serde_round_trip_keeps_parameters() {
        let rbm = GaussianBernoulliRbm::new(4, 3, 0.1, 1);
        let json = serde_json::to_string(&rbm).unwrap();
        assert_eq!(
            rbm,
            serde_json::from_str::<GaussianBernoulliRbm>(&json).unwrap()
        );
    }

    #[test]
    fn bad_rows_are_reported() {
        let rbm = BinaryRbm::new(3, 2, 0.1, 0);
        let e = rbm
            .check_rows("data", Array2::zeros((2, 4)).view())
            .unwrap_err();
        assert_eq!(
            e,
            ModelError::WidthMismatch {
                what: "data",
                expected: 3,
                got: 4
            }
        );
        let e = rbm
            .check_rows("data", array![[0.0, f32::NAN, 1.0]].view())
            .unwrap_err();
        assert_eq!(
            e,
            ModelError::NonFinite {
                what: "data",
                row: 0,
                col: 1
            }
        );
    }
}
