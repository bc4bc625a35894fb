//! The two RBM kinds share one struct; only the visible-unit behaviour differs.

use std::fmt::Debug;
use std::marker::PhantomData;

use ndarray::{Array1, Array2, ArrayView2};
use rand::{Rng, RngCore, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde::{Deserialize, Serialize};

use crate::kernels::{bernoulli_draw, bernoulli_in_place, par_gemm, sigmoid, sigmoid_of_sum};
use crate::rows::{for_each_row, for_each_row_seeded};
use crate::train::{sealed, Trainable};
use crate::ModelError;

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
