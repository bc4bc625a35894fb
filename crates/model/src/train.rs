//! One mini-batch trainer (CD-k or persistent CD) for every visible-unit kind.

use ndarray::{Array, Array1, Array2, ArrayView2, ArrayViewMut2, Axis, Dimension};
use rand::seq::SliceRandom;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;

use crate::rbm::{
    bernoulli_in_place, bernoulli_rows_from, for_each_row_seeded, par_gemm, rows_apply,
    sigmoid_of_sum, simd,
};
use crate::{ModelError, SAMPLE_CHUNK_ROWS};

/// How the learning rate changes over the epochs.
#[derive(Clone, Debug, PartialEq)]
pub enum LearningRateSchedule {
    Constant,
    /// Constant until `from_epoch`, then linear down to `final_fraction × learning_rate`
    /// at the last epoch: large steps to find the region, small ones to settle in it.
    LinearDecay {
        from_epoch: usize,
        final_fraction: f32,
    },
}

/// Push each hidden unit's mean activity towards `target` (Hinton's guide §11).
#[derive(Clone, Debug, PartialEq)]
pub struct Sparsity {
    /// Desired mean probability of a hidden unit being on, e.g. 0.05–0.1.
    pub target: f32,
    /// Weight of the penalty's gradient relative to the likelihood gradient.
    pub cost: f32,
    /// Smoothing of the running estimate of each unit's activity, e.g. 0.9–0.99.
    pub decay: f32,
}

/// Training settings. Defaults follow common practice for binary RBMs (Hinton 2010,
/// "A Practical Guide to Training RBMs", from memory); for Gaussian visible units use a
/// learning rate one or two orders smaller (≈ 0.001–0.005).
#[derive(Clone, Debug, PartialEq)]
pub struct TrainOptions {
    /// Passes over the data (default 20).
    pub epochs: usize,
    /// Rows per gradient step (default 64); also the number of persistent chains.
    pub batch_size: usize,
    /// Step size (default 0.05).
    pub learning_rate: f32,
    /// Default [`LearningRateSchedule::Constant`].
    pub schedule: LearningRateSchedule,
    /// Gibbs steps per update, the k of CD-k (default 1).
    pub gibbs_steps: usize,
    /// Persistent CD: negative chains carry over between updates instead of restarting
    /// at the data, which gives a better likelihood gradient (default false). Pair it with
    /// low momentum (≈ 0.5) and a decaying rate: with 0.9 the chains and weights oscillate.
    pub persistent: bool,
    /// Momentum for the first `momentum_switch_epoch` epochs (default 0.5) ...
    pub initial_momentum: f32,
    /// ... and after them (default 0.9): small while the parameters move a lot.
    pub final_momentum: f32,
    /// Default 5.
    pub momentum_switch_epoch: usize,
    /// L2 penalty on the weights, not the biases (default 1e-4).
    pub weight_decay: f32,
    /// Default none.
    pub sparsity: Option<Sparsity>,
    /// With validation rows: stop after this many epochs without a better validation
    /// reconstruction error and keep the best model (default 5).
    pub patience: usize,
    /// Seeds shuffling, persistent chains and all sampling (default 0).
    pub seed: u64,
}

impl Default for TrainOptions {
    fn default() -> Self {
        Self {
            epochs: 20,
            batch_size: 64,
            learning_rate: 0.05,
            schedule: LearningRateSchedule::Constant,
            gibbs_steps: 1,
            persistent: false,
            initial_momentum: 0.5,
            final_momentum: 0.9,
            momentum_switch_epoch: 5,
            weight_decay: 1e-4,
            sparsity: None,
            patience: 5,
            seed: 0,
        }
    }
}

impl TrainOptions {
    fn learning_rate_at(&self, epoch: usize) -> f32 {
        match self.schedule {
            LearningRateSchedule::Constant => self.learning_rate,
            LearningRateSchedule::LinearDecay {
                from_epoch,
                final_fraction,
            } => {
                let span = self
                    .epochs
                    .saturating_sub(1)
                    .saturating_sub(from_epoch)
                    .max(1);
                let t = (epoch.saturating_sub(from_epoch) as f32 / span as f32).min(1.0);
                self.learning_rate * (1.0 - (1.0 - final_fraction) * t)
            }
        }
    }

    fn validate(&self) -> Result<(), ModelError> {
        let bad = |name, value: String, fix| Err(ModelError::InvalidOption { name, value, fix });
        if self.batch_size == 0 {
            return bad(
                "batch_size",
                "0".into(),
                "use at least 1 (typically 32–128)",
            );
        }
        if self.gibbs_steps == 0 {
            return bad("gibbs_steps", "0".into(), "use at least 1");
        }
        if !(self.learning_rate > 0.0 && self.learning_rate.is_finite()) {
            return bad(
                "learning_rate",
                self.learning_rate.to_string(),
                "use a positive number",
            );
        }
        if let Some(s) = &self.sparsity {
            if !(s.target > 0.0 && s.target < 1.0) {
                return bad(
                    "sparsity.target",
                    s.target.to_string(),
                    "use a value in (0, 1)",
                );
            }
        }
        Ok(())
    }
}

/// Progress after each epoch.
#[derive(Clone, Debug, PartialEq)]
pub struct EpochReport {
    /// Counted from 0.
    pub epoch: usize,
    pub learning_rate: f32,
    /// Mean squared error of the mean-field reconstruction over the epoch's batches,
    /// measured before each batch's update.
    pub reconstruction_error: f32,
    /// Same measure on the validation rows after the epoch, when they were given.
    pub validation_error: Option<f32>,
}

/// How training ended.
#[derive(Clone, Debug, PartialEq)]
pub struct TrainSummary {
    pub epochs_run: usize,
    /// Epoch whose parameters were kept (the best on validation, else the last).
    pub kept_epoch: usize,
    pub stopped_early: bool,
}

/// A model [`train`] can fit: Bernoulli hidden units, an `n_visible × n_hidden` weight
/// matrix and two bias vectors; the visible-unit kind decides the rest. Implemented by
/// [`Rbm`](crate::Rbm) (binary and Gaussian visible units) and
/// [`ReplicatedSoftmaxRbm`](crate::ReplicatedSoftmaxRbm) (word counts);
/// sealed, because the trainer relies on the exact meaning of its hooks.
pub trait Trainable: Clone + Send + Sync + sealed::Cd {}

/// The hooks the trainer needs. Public only inside this crate's private module, so that
/// nothing outside can implement or call them.
pub(crate) mod sealed {
    use ndarray::{Array1, Array2, ArrayView2};
    use rand_chacha::ChaCha8Rng;

    use crate::ModelError;

    pub trait Cd {
        /// `(W, b, c)`: weights (n_visible × n_hidden), visible bias, hidden bias.
        fn parameters(&self) -> (&Array2<f32>, &Array1<f32>, &Array1<f32>);
        fn parameters_mut(&mut self) -> (&mut Array2<f32>, &mut Array1<f32>, &mut Array1<f32>);
        /// Typed error for rows the model cannot take.
        fn check_rows(&self, what: &'static str, v: ArrayView2<f32>) -> Result<(), ModelError>;
        /// The multiplier of the hidden bias in the hidden input of visible row `row`:
        /// 1 for ordinary RBMs, the row's word count D for the replicated softmax. A chain
        /// keeps its rows' multipliers from its first visible state on.
        fn hidden_bias_scale(&self, _row: &[f32]) -> f32 {
            1.0
        }
        /// `row` holds Σ_j W_ij h_j; turn it into E[v | h] (the visible bias is added here).
        fn visible_means_row(&self, row: &mut [f32], scale: f32);
        /// Replace a row of visible means by a draw from the visible conditional.
        fn sample_visible_row(&self, row: &mut [f32], scale: f32, rng: &mut ChaCha8Rng);
        /// Mean squared error of the mean-field reconstruction (validation measure).
        fn reconstruction_error(&self, v: ArrayView2<f32>) -> f32;
    }
}

/// Train `rbm` in place on the rows of `data`.
///
/// With `validation` rows, the model with the lowest validation reconstruction error is
/// kept, and training stops after `opts.patience` epochs without improvement.
pub fn train<M: Trainable>(
    rbm: &mut M,
    data: ArrayView2<f32>,
    validation: Option<ArrayView2<f32>>,
    opts: &TrainOptions,
    progress: &mut dyn FnMut(EpochReport),
) -> Result<TrainSummary, ModelError> {
    opts.validate()?;
    rbm.check_rows("training data", data)?;
    if let Some(val) = validation {
        rbm.check_rows("validation data", val)?;
    }
    // The step works on the parameters as flat row-major slices.
    let (w, b, c) = rbm.parameters_mut();
    to_standard_layout(w);
    to_standard_layout(b);
    to_standard_layout(c);
    let mut rng = ChaCha8Rng::seed_from_u64(opts.seed);
    let mut state = State::new(rbm, data, opts, &mut rng);
    let mut order: Vec<usize> = (0..data.nrows()).collect();
    let mut best = KeepBest::new(opts.patience);
    let mut epochs_run = 0;
    for epoch in 0..opts.epochs {
        let lr = opts.learning_rate_at(epoch);
        let momentum = if epoch < opts.momentum_switch_epoch {
            opts.initial_momentum
        } else {
            opts.final_momentum
        };
        order.shuffle(&mut rng);
        let sq = on_pool_thread(|| {
            let mut sq = 0.0f64;
            for rows in order.chunks(opts.batch_size) {
                sq += f64::from(state.step(rbm, data, rows, opts, lr, momentum, &mut rng));
            }
            sq
        });
        epochs_run = epoch + 1;
        let reconstruction_error = (sq / data.len() as f64) as f32;
        if !reconstruction_error.is_finite() {
            return Err(ModelError::Diverged { epoch });
        }
        let validation_error = validation.map(|val| rbm.reconstruction_error(val));
        progress(EpochReport {
            epoch,
            learning_rate: lr,
            reconstruction_error,
            validation_error,
        });
        // Lower error is better; KeepBest keeps the highest score.
        if validation_error.is_some_and(|err| best.should_stop(-err, epoch, rbm)) {
            break;
        }
    }
    let kept_epoch = best.restore(rbm, epochs_run);
    Ok(TrainSummary {
        epochs_run,
        kept_epoch,
        stopped_early: epochs_run < opts.epochs,
    })
}

/// Runs `f` on a rayon worker thread. A step makes several parallel calls; from a thread
/// outside the pool each one is a round trip of wake-ups (≈ 10–50 µs), from a worker it is
/// a push onto its own queue. The progress callback stays on the caller's thread.
fn on_pool_thread<R: Send>(f: impl FnOnce() -> R + Send) -> R {
    if rayon::current_thread_index().is_some() {
        f()
    } else {
        rayon::scope(|_| f())
    }
}

/// Velocities, persistent chains, the sparsity running average, and the step's buffers.
///
/// The buffers stack the positive and the negative phase: rows `..n` hold the batch, rows
/// `n..n + nk` the negative chains. Stacked, the reconstruction the error is measured on
/// and the chains' first visible step are one matrix product, and the weight gradient
/// ⟨v hᵀ⟩_data − ⟨v hᵀ⟩_model is one product [v₀; v_k]ᵀ·[h₀/n; −h_k/nk] accumulated
/// straight into the velocity.
struct State {
    vel_w: Array2<f32>,
    vel_b: Array1<f32>,
    vel_c: Array1<f32>,
    chains: Option<Chains>,
    activity: Array1<f32>,
    /// Visible rows: batch, then the negative chains (n + nk) × n_visible.
    vv: Array2<f32>,
    /// Hidden rows, same stacking: (n + nk) × n_hidden.
    hh: Array2<f32>,
    /// Visible means of `hh`: (n + nk) × n_visible.
    means: Array2<f32>,
    /// Each stacked row's hidden-bias multiplier.
    scales: Vec<f32>,
    /// Wᵀ in row-major order, refreshed after every update, for models of at most
    /// [`TRANSPOSED_COPY_MAX`] weights: the small-product kernel needs its right operand
    /// row-major. At digits size the copy takes 7 % of a step and the step still came out
    /// 11 % faster (CPU time) than with matrixmultiply on the transposed view.
    wt: Option<Array2<f32>>,
    /// The step's bias gradients and the batch means, reused from step to step.
    grad_b: Array1<f32>,
    grad_c: Array1<f32>,
    mean_v0: Array1<f32>,
    mean_h0: Array1<f32>,
}

/// Largest weight matrix (entries) the trainer keeps a transposed copy of.
const TRANSPOSED_COPY_MAX: usize = 1 << 16;

/// Persistent chains kept as their hidden sample, as scikit-learn's BernoulliRBM does:
/// the next step starts from it with a visible draw, so the chains' hidden probabilities
/// need no product of their own (Tieleman 2008 keeps the visible state; one Gibbs half-step
/// apart, the same Markov chain).
struct Chains {
    /// nk × n_hidden binary sample.
    hidden: Array2<f32>,
    /// Each chain's hidden-bias multiplier, fixed by its first visible state.
    scales: Vec<f32>,
}

impl State {
    fn new<M: Trainable>(
        rbm: &M,
        data: ArrayView2<f32>,
        opts: &TrainOptions,
        rng: &mut ChaCha8Rng,
    ) -> Self {
        let (w, _, c) = rbm.parameters();
        let (nv, nh) = w.dim();
        // Chains start from random training rows: already near the model's modes later on.
        let chains = opts.persistent.then(|| {
            let rows: Vec<usize> = (0..opts.batch_size)
                .map(|_| rng.random_range(0..data.nrows()))
                .collect();
            let v = data.select(Axis(0), &rows);
            let scales: Vec<f32> = v
                .rows()
                .into_iter()
                .map(|row| rbm.hidden_bias_scale(row.as_slice().expect("owned rows")))
                .collect();
            let mut hidden = Array2::zeros((rows.len(), nh));
            hidden_probabilities_into(v.view(), w, c, &scales, hidden.view_mut());
            let flat = hidden.as_slice_mut().expect("owned matrix");
            for_each_row_seeded(flat, nh, rng, |_, row, g| bernoulli_in_place(row, g));
            Chains { hidden, scales }
        });
        let target = opts.sparsity.as_ref().map_or(0.0, |s| s.target);
        // Room for the largest batch and its negative chains.
        let batch = opts.batch_size.min(data.nrows());
        let rows = batch
            + if opts.persistent {
                opts.batch_size
            } else {
                batch
            };
        Self {
            vel_w: Array2::zeros((nv, nh)),
            vel_b: Array1::zeros(nv),
            vel_c: Array1::zeros(nh),
            chains,
            activity: Array1::from_elem(nh, target),
            vv: Array2::zeros((rows, nv)),
            hh: Array2::zeros((rows, nh)),
            means: Array2::zeros((rows, nv)),
            scales: vec![1.0; rows],
            wt: (nv * nh <= TRANSPOSED_COPY_MAX).then(|| w.t().as_standard_layout().into_owned()),
            grad_b: Array1::zeros(nv),
            grad_c: Array1::zeros(nh),
            mean_v0: Array1::zeros(nv),
            mean_h0: Array1::zeros(nh),
        }
    }

    /// One gradient step on the batch `rows` of `data`; returns its summed squared
    /// reconstruction error.
    #[allow(clippy::too_many_arguments)]
    fn step<M: Trainable>(
        &mut self,
        rbm: &mut M,
        data: ArrayView2<f32>,
        rows: &[usize],
        opts: &TrainOptions,
        lr: f32,
        momentum: f32,
        rng: &mut ChaCha8Rng,
    ) -> f32 {
        let n = rows.len();
        let nk = self.chains.as_ref().map_or(n, |c| c.hidden.nrows());
        let m = n + nk;
        let (nv, nh) = (self.vel_w.nrows(), self.vel_w.ncols());
        // The first m rows of each buffer, as flat row-major slices.
        let vv = &mut self.vv.as_slice_mut().expect("owned buffer")[..m * nv];
        let hh = &mut self.hh.as_slice_mut().expect("owned buffer")[..m * nh];
        let means = &mut self.means.as_slice_mut().expect("owned buffer")[..m * nv];
        let scales = &mut self.scales[..m];
        for ((dst, s), &r) in vv.chunks_exact_mut(nv).zip(scales.iter_mut()).zip(rows) {
            match data.row(r).as_slice() {
                Some(src) => dst.copy_from_slice(src),
                None => {
                    for (d, &x) in dst.iter_mut().zip(data.row(r)) {
                        *d = x;
                    }
                }
            }
            *s = rbm.hidden_bias_scale(dst);
        }
        match &self.chains {
            Some(chains) => scales[n..].copy_from_slice(&chains.scales),
            None => scales.copy_within(..n, n),
        }
        let scales = &self.scales[..m];
        let (w, _, c) = rbm.parameters();

        // Positive phase: h₀ = p(h | v₀) in rows ..n.
        hidden_probabilities_into(
            rows_view(&vv[..n * nv], nv),
            w,
            c,
            &scales[..n],
            rows_view_mut(&mut hh[..n * nh], nh),
        );
        // Negative phase. CD starts from a draw of h₀; PCD continues its chains from their
        // kept hidden sample. CD's last visible step uses means (less sampling noise,
        // Hinton's guide §3); PCD keeps samples so the chains stay proper Markov chains.
        {
            let (h0, neg) = hh.split_at_mut(n * nh);
            match &self.chains {
                Some(chains) => {
                    neg.copy_from_slice(chains.hidden.as_slice().expect("owned matrix"))
                }
                None => bernoulli_rows_from(h0, neg, nh, rng),
            }
        }
        let mut sq = 0.0;
        for step in 0..opts.gibbs_steps {
            let last = step + 1 == opts.gibbs_steps;
            // The first step also maps h₀ back: the mean-field reconstruction of the batch,
            // whose error is the figure reported.
            let lo = if step == 0 { 0 } else { n };
            let (w, _, _) = rbm.parameters();
            visible_means_into(
                rbm,
                self.wt.as_ref().map_or_else(|| w.t(), |wt| wt.view()),
                rows_view(&hh[lo * nh..], nh),
                &scales[lo..],
                rows_view_mut(&mut means[lo * nv..], nv),
            );
            if step == 0 {
                sq = squared_error_flat(&vv[..n * nv], &means[..n * nv]);
            }
            let vk = &mut vv[n * nv..];
            vk.copy_from_slice(&means[n * nv..]);
            if self.chains.is_some() || !last {
                for_each_row_seeded(vk, nv, rng, |r, row, g| {
                    rbm.sample_visible_row(row, scales[n + r], g)
                });
            }
            let (w, _, c) = rbm.parameters();
            hidden_probabilities_into(
                rows_view(&vv[n * nv..], nv),
                w,
                c,
                &scales[n..],
                rows_view_mut(&mut hh[n * nh..], nh),
            );
            if !last {
                for_each_row_seeded(&mut hh[n * nh..], nh, rng, |_, row, g| {
                    bernoulli_in_place(row, g)
                });
            }
        }
        if let Some(chains) = &mut self.chains {
            let kept = chains.hidden.as_slice_mut().expect("owned matrix");
            bernoulli_rows_from(&hh[n * nh..], kept, nh, rng);
        }

        // Bias gradients and the means the sparsity penalty needs.
        let (inv0, invk) = (1.0 / n as f32, 1.0 / nk as f32);
        let mean_v0 = self.mean_v0.as_slice_mut().expect("owned");
        let grad_b = self.grad_b.as_slice_mut().expect("owned");
        let mean_h0 = self.mean_h0.as_slice_mut().expect("owned");
        let grad_c = self.grad_c.as_slice_mut().expect("owned");
        simd(
            #[inline(always)]
            || {
                mean_v0.fill(0.0);
                grad_b.fill(0.0);
                for (r, row) in vv.chunks_exact(nv).enumerate() {
                    let (acc, weight) = if r < n {
                        (&mut *mean_v0, inv0)
                    } else {
                        (&mut *grad_b, -invk)
                    };
                    for (a, &x) in acc.iter_mut().zip(row) {
                        *a += weight * x;
                    }
                }
                for (g, &x) in grad_b.iter_mut().zip(mean_v0.iter()) {
                    *g += x;
                }
                mean_h0.fill(0.0);
                grad_c.fill(0.0);
                for (r, row) in hh.chunks_exact_mut(nh).enumerate() {
                    let weight = if r < n { inv0 } else { -invk };
                    if r < n {
                        for (a, &x) in mean_h0.iter_mut().zip(row.iter()) {
                            *a += inv0 * x;
                        }
                    }
                    // The hidden bias enters row r's input multiplied by scales[r]; the
                    // row is scaled in place for the weight-gradient product below.
                    let bias_weight = weight * scales[r];
                    for (g, x) in grad_c.iter_mut().zip(row.iter_mut()) {
                        *g += bias_weight * *x;
                        *x *= weight;
                    }
                }
            },
        );
        let mut push = None;
        if let Some(s) = &opts.sparsity {
            // Cross-entropy penalty between target and running activity q: its derivative
            // with respect to a hidden unit's input is (q − target).
            self.activity = &self.activity * s.decay + &self.mean_h0 * (1.0 - s.decay);
            let p = self.activity.mapv(|q| s.cost * (q - s.target));
            // Row r's input holds the hidden bias scales[r] times.
            let mean_s0 = scales[..n].iter().sum::<f32>() / n as f32;
            self.grad_c.scaled_add(-mean_s0, &p);
            push = Some(p);
        }

        // vel_W ← momentum·vel_W + lr·(⟨v hᵀ⟩₀ − ⟨v hᵀ⟩_k) in one product, then the
        // penalties, then W ← W + vel_W in one pass.
        par_gemm(
            lr,
            &rows_view(vv, nv).t(),
            &rows_view(hh, nh),
            momentum,
            &mut self.vel_w.view_mut(),
        );
        let (w, vb, hb) = rbm.parameters_mut();
        let decay = opts.weight_decay;
        let mv0 = self.mean_v0.as_slice().expect("owned");
        let push = push.as_ref().map(|p| p.as_slice().expect("owned"));
        let vel = self
            .vel_w
            .as_slice_mut()
            .expect("owned velocity is row-major");
        let w_flat = w.as_slice_mut().expect("model weights are row-major");
        let update = |i: usize, vel_row: &mut [f32], w_row: &mut [f32]| {
            simd(
                #[inline(always)]
                || match push {
                    Some(p) => {
                        for ((v, w), &pj) in vel_row.iter_mut().zip(w_row.iter_mut()).zip(p) {
                            *v -= lr * (decay * *w + mv0[i] * pj);
                            *w += *v;
                        }
                    }
                    None => {
                        for (v, w) in vel_row.iter_mut().zip(w_row.iter_mut()) {
                            *v -= lr * decay * *w;
                            *w += *v;
                        }
                    }
                },
            )
        };
        let chunk = SAMPLE_CHUNK_ROWS * nh;
        if chunk > 0 && vel.len() >= (1 << 15) {
            vel.par_chunks_mut(chunk)
                .zip(w_flat.par_chunks_mut(chunk))
                .enumerate()
                .for_each(|(k, (vb, wb))| {
                    for (i, (vr, wr)) in vb.chunks_mut(nh).zip(wb.chunks_mut(nh)).enumerate() {
                        update(k * SAMPLE_CHUNK_ROWS + i, vr, wr);
                    }
                });
        } else if nh > 0 {
            for (i, (vr, wr)) in vel.chunks_mut(nh).zip(w_flat.chunks_mut(nh)).enumerate() {
                update(i, vr, wr);
            }
        }
        if let Some(wt) = &mut self.wt {
            transpose_into(w_flat, nh, wt.as_slice_mut().expect("owned matrix"));
        }
        momentum_step(&mut self.vel_b, &self.grad_b, vb, momentum, lr);
        momentum_step(&mut self.vel_c, &self.grad_c, hb, momentum, lr);
        sq
    }
}

/// out ← σ(s_r·c + v W) row by row, into a preallocated buffer.
fn hidden_probabilities_into(
    v: ArrayView2<f32>,
    w: &Array2<f32>,
    c: &Array1<f32>,
    scales: &[f32],
    mut out: ArrayViewMut2<f32>,
) {
    par_gemm(1.0, &v, &w.view(), 0.0, &mut out);
    let nh = out.ncols();
    let c = c.as_slice().expect("owned bias is contiguous");
    let flat = out.as_slice_mut().expect("row-major buffer");
    rows_apply(flat, nh, |first, block| {
        for (i, row) in block.chunks_exact_mut(nh).enumerate() {
            sigmoid_of_sum(row, c, scales[first + i]);
        }
    });
}

/// out ← E[v | h] row by row, into a preallocated buffer.
/// `wt` is Wᵀ: the state's row-major copy when it keeps one, else a view of W.
fn visible_means_into<M: Trainable>(
    rbm: &M,
    wt: ArrayView2<f32>,
    h: ArrayView2<f32>,
    scales: &[f32],
    mut out: ArrayViewMut2<f32>,
) {
    par_gemm(1.0, &h, &wt, 0.0, &mut out);
    let nv = out.ncols();
    let flat = out.as_slice_mut().expect("row-major buffer");
    rows_apply(flat, nv, |first, block| {
        for (i, row) in block.chunks_exact_mut(nv).enumerate() {
            rbm.visible_means_row(row, scales[first + i]);
        }
    });
}

/// `out ← aᵀ` for a row-major matrix `a` of `cols` columns, in 16 × 16 tiles: element by
/// element, the scattered writes took 6 times as long.
fn transpose_into(a: &[f32], cols: usize, out: &mut [f32]) {
    const TILE: usize = 16;
    let rows = a.len() / cols.max(1);
    for i0 in (0..rows).step_by(TILE) {
        for j0 in (0..cols).step_by(TILE) {
            for i in i0..(i0 + TILE).min(rows) {
                for j in j0..(j0 + TILE).min(cols) {
                    out[j * rows + i] = a[i * cols + j];
                }
            }
        }
    }
}

/// A flat row-major buffer of `cols` columns as a matrix.
fn rows_view(flat: &[f32], cols: usize) -> ArrayView2<'_, f32> {
    ArrayView2::from_shape((flat.len() / cols.max(1), cols), flat).expect("whole rows")
}

fn rows_view_mut(flat: &mut [f32], cols: usize) -> ArrayViewMut2<'_, f32> {
    ArrayViewMut2::from_shape((flat.len() / cols.max(1), cols), flat).expect("whole rows")
}

/// Σ (a − b)² over two equal-length slices, in 16 running sums so the loop vectorises.
fn squared_error_flat(a: &[f32], b: &[f32]) -> f32 {
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

/// Same values, row-major memory (a model may have been built from a transposed matrix).
fn to_standard_layout<D: Dimension>(a: &mut Array<f32, D>) {
    if !a.is_standard_layout() {
        *a = a.as_standard_layout().into_owned();
    }
}

fn momentum_step(
    velocity: &mut Array1<f32>,
    gradient: &Array1<f32>,
    param: &mut Array1<f32>,
    momentum: f32,
    lr: f32,
) {
    *velocity *= momentum;
    velocity.scaled_add(lr, gradient);
    *param += &*velocity;
}

/// Early stopping shared by every trainer: remembers the best-scoring model (higher is
/// better; NaN never counts as better) and says when `patience` epochs passed without one.
pub(crate) struct KeepBest<T> {
    best: Option<(f32, usize, T)>,
    patience: usize,
}

impl<T: Clone> KeepBest<T> {
    pub(crate) fn new(patience: usize) -> Self {
        KeepBest {
            best: None,
            patience,
        }
    }

    /// Records epoch `epoch`'s score for `model`; true when training should stop.
    pub(crate) fn should_stop(&mut self, score: f32, epoch: usize, model: &T) -> bool {
        match &self.best {
            Some((best, best_epoch, _)) if score.is_nan() || score <= *best => {
                epoch - best_epoch >= self.patience
            }
            _ => {
                self.best = Some((score, epoch, model.clone()));
                false
            }
        }
    }

    /// Puts the best model back (if any was scored) and returns the epoch it came from.
    pub(crate) fn restore(self, model: &mut T, epochs_run: usize) -> usize {
        match self.best {
            Some((_, epoch, best)) => {
                *model = best;
                epoch
            }
            None => epochs_run.saturating_sub(1),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::{log_likelihood_exact, BinaryRbm, GaussianBernoulliRbm};

    /// `rows` noisy copies of three 16-bit prototypes, each bit flipped with probability 5%.
    fn prototype_data(rows: usize, seed: u64) -> Array2<f32> {
        let prototypes = [
            0b1111_0000_1111_0000u16,
            0b0000_1111_0000_1111,
            0b1100_1100_0011_0011,
        ];
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let mut data = Array2::zeros((rows, 16));
        for mut row in data.rows_mut() {
            let p = prototypes[rng.random_range(0..3)];
            for (i, x) in row.iter_mut().enumerate() {
                let bit = p >> i & 1 == 1;
                *x = f32::from(bit ^ (rng.random::<f32>() < 0.05));
            }
        }
        data
    }

    fn fit(rbm: &mut BinaryRbm, data: &Array2<f32>, opts: &TrainOptions) -> Vec<EpochReport> {
        let mut reports = Vec::new();
        train(rbm, data.view(), None, opts, &mut |r| reports.push(r)).unwrap();
        reports
    }

    // Prototype data's own entropy is 16·H(0.05) + ln 3 ≈ 3.18 + 1.10 = 4.28 nats per row
    // (by hand), so a good model's mean log-likelihood approaches −4.3.
    // Measured (these seeds): CD-1 reconstruction error 0.227 → 0.043, log-likelihood
    // −11.09 → −4.86; PCD 0.234 → 0.051, −11.09 → −4.73.
    #[test]
    fn cd1_and_pcd_learn_prototype_structure() {
        let data = prototype_data(300, 1);
        let init = BinaryRbm::new(16, 8, 0.01, 2);
        let ll_init = log_likelihood_exact(&init, data.view()).unwrap();
        let cd1 = TrainOptions {
            epochs: 30,
            batch_size: 20,
            learning_rate: 0.1,
            ..TrainOptions::default()
        };
        // PCD with momentum 0.9 oscillated here (log-likelihood −21 after 30 epochs): keep
        // momentum low and let the rate decay.
        let pcd = TrainOptions {
            persistent: true,
            learning_rate: 0.05,
            final_momentum: 0.5,
            schedule: LearningRateSchedule::LinearDecay {
                from_epoch: 10,
                final_fraction: 0.05,
            },
            ..cd1.clone()
        };
        for opts in [cd1, pcd] {
            let mut rbm = init.clone();
            let reports = fit(&mut rbm, &data, &opts);
            let (first, last) = (
                reports[0].reconstruction_error,
                reports[29].reconstruction_error,
            );
            assert!(last < 0.5 * first, "{opts:?}: {first} → {last}");
            let ll = log_likelihood_exact(&rbm, data.view()).unwrap();
            assert!(
                ll > -5.0 && ll > ll_init + 5.0,
                "{opts:?}: {ll_init} → {ll}"
            );
        }
    }

    #[test]
    fn same_seed_same_weights_on_one_or_two_threads() {
        let data = prototype_data(200, 3);
        let opts = TrainOptions {
            epochs: 3,
            gibbs_steps: 2,
            sparsity: Some(Sparsity {
                target: 0.1,
                cost: 0.01,
                decay: 0.9,
            }),
            ..TrainOptions::default()
        };
        let run = |threads, seed| {
            let pool = rayon::ThreadPoolBuilder::new()
                .num_threads(threads)
                .build()
                .unwrap();
            let mut rbm = BinaryRbm::new(16, 10, 0.01, 4);
            pool.install(|| {
                fit(
                    &mut rbm,
                    &data,
                    &TrainOptions {
                        seed,
                        ..opts.clone()
                    },
                )
            });
            rbm
        };
        let one = run(1, 7);
        assert_eq!(one, run(2, 7));
        assert_ne!(one, run(2, 8));
    }

    #[test]
    fn models_built_from_transposed_weights_train() {
        let data = prototype_data(50, 9);
        // 16 × 8 weights stored column-major.
        let w = BinaryRbm::new(8, 16, 0.01, 1).weights.reversed_axes();
        let mut rbm = BinaryRbm::from_parts(w, Array1::zeros(16), Array1::zeros(8));
        let before = rbm.hidden_probabilities(data.view());
        let opts = TrainOptions {
            epochs: 2,
            ..TrainOptions::default()
        };
        fit(&mut rbm, &data, &opts);
        assert!(rbm.weights.is_standard_layout());
        assert_ne!(rbm.hidden_probabilities(data.view()), before);
    }

    #[test]
    fn early_stopping_keeps_the_best_validation_model() {
        // Validation rows from other patterns: fitting the training prototypes harder
        // makes their reconstruction worse after a while.
        let data = prototype_data(200, 5);
        let validation = prototype_data(50, 6).mapv(|x| 1.0 - x);
        let opts = TrainOptions {
            epochs: 200,
            patience: 3,
            learning_rate: 0.1,
            ..TrainOptions::default()
        };
        let mut rbm = BinaryRbm::new(16, 8, 0.01, 2);
        let mut reports = Vec::new();
        let summary = train(
            &mut rbm,
            data.view(),
            Some(validation.view()),
            &opts,
            &mut |r| reports.push(r),
        )
        .unwrap();
        assert!(summary.stopped_early, "{summary:?}");
        assert_eq!(summary.epochs_run, reports.len());
        let errors: Vec<f32> = reports
            .iter()
            .map(|r| r.validation_error.unwrap())
            .collect();
        let best = errors.iter().copied().fold(f32::INFINITY, f32::min);
        assert_eq!(errors[summary.kept_epoch], best);
        assert_eq!(rbm.reconstruction_error(validation.view()), best);
        assert_eq!(summary.epochs_run, summary.kept_epoch + opts.patience + 1);
    }

    #[test]
    fn gaussian_rbm_learns_cluster_structure() {
        // Standardised 10-dimensional data from three well separated cluster centres.
        let mut rng = ChaCha8Rng::seed_from_u64(8);
        let centres =
            Array2::from_shape_simple_fn((3, 10), || 1.3 * crate::rbm::standard_normal(&mut rng));
        let data = Array2::from_shape_fn((300, 10), |(r, d)| {
            centres[[r % 3, d]] + 0.3 * crate::rbm::standard_normal(&mut rng)
        });
        let opts = TrainOptions {
            epochs: 30,
            batch_size: 30,
            learning_rate: 0.005,
            ..TrainOptions::default()
        };
        let mut rbm = GaussianBernoulliRbm::new(10, 12, 0.01, 1);
        let mut reports = Vec::new();
        train(&mut rbm, data.view(), None, &opts, &mut |r| reports.push(r)).unwrap();
        let (first, last) = (
            reports[0].reconstruction_error,
            reports[29].reconstruction_error,
        );
        // Measured: 1.53 → 0.11.
        assert!(last < 0.3 * first, "{first} → {last}");
    }

    // lr 1.0 decaying from epoch 2 to 0.1 at epoch 11 (the last of 12): by hand,
    // epoch e ≥ 2 gets 1 − 0.9 · (e − 2)/9, so epoch 5 → 0.7, epoch 11 → 0.1.
    #[test]
    fn linear_decay_schedule() {
        let opts = TrainOptions {
            epochs: 12,
            learning_rate: 1.0,
            schedule: LearningRateSchedule::LinearDecay {
                from_epoch: 2,
                final_fraction: 0.1,
            },
            ..TrainOptions::default()
        };
        let got: Vec<f32> = [0, 2, 5, 11]
            .iter()
            .map(|&e| opts.learning_rate_at(e))
            .collect();
        for (g, w) in got.iter().zip([1.0, 1.0, 0.7, 0.1]) {
            assert!((g - w).abs() < 1e-6, "{got:?}");
        }
    }

    #[test]
    fn bad_options_and_divergence_are_errors() {
        let data = prototype_data(10, 0);
        let mut rbm = BinaryRbm::new(16, 4, 0.01, 0);
        let opts = TrainOptions {
            batch_size: 0,
            ..TrainOptions::default()
        };
        let e = train(&mut rbm, data.view(), None, &opts, &mut |_| {}).unwrap_err();
        assert!(matches!(
            e,
            ModelError::InvalidOption {
                name: "batch_size",
                ..
            }
        ));
        let mut g = GaussianBernoulliRbm::new(16, 4, 0.01, 0);
        let opts = TrainOptions {
            learning_rate: 1e3,
            ..TrainOptions::default()
        };
        let e = train(&mut g, (data * 100.0).view(), None, &opts, &mut |_| {}).unwrap_err();
        assert!(matches!(e, ModelError::Diverged { .. }), "{e:?}");
    }
}

#[cfg(test)]
mod digits_tests {
    use super::*;
    use crate::BinaryRbm;

    /// The 1,797 UCI optical digits (8×8, values 0–16) scaled to [0, 1]; see testdata/README.md.
    fn digits() -> Array2<f32> {
        let text = include_str!("../testdata/digits.csv");
        let rows: Vec<f32> = text
            .lines()
            .skip(1)
            .flat_map(|line| {
                line.split(',')
                    .take(64)
                    .map(|x| x.parse::<f32>().unwrap() / 16.0)
            })
            .collect();
        Array2::from_shape_vec((rows.len() / 64, 64), rows).unwrap()
    }

    // source: scikit-learn 1.9.1 (numpy 2.4.6) on the same rows, run for this test:
    //   X = load_digits().data / 16; train = X[:1500], held out = X[1500:]
    //   BernoulliRBM(n_components=64, learning_rate=0.06, n_iter=10, random_state=0).fit(train)
    //   held-out MSE of the mean-field reconstruction σ(σ(x Wᵀ + c) W + b): 0.0439
    //   (0.0434 with n_components=100); predicting each pixel's training mean: 0.0739.
    // BernoulliRBM is PCD-1, batch 10, no momentum, no weight decay; the same settings here
    // measured 0.0428. Our CD-1 with momentum (lr 0.1, batch 32, 10 epochs) measured 0.0158.
    #[test]
    fn digits_reconstruction_matches_reference_and_bound() {
        let data = digits();
        assert_eq!(data.dim(), (1797, 64));
        let (train_rows, held_out) = data.view().split_at(Axis(0), 1500);
        let like_reference = TrainOptions {
            epochs: 10,
            batch_size: 10,
            learning_rate: 0.06,
            persistent: true,
            initial_momentum: 0.0,
            final_momentum: 0.0,
            weight_decay: 0.0,
            ..TrainOptions::default()
        };
        let cd1 = TrainOptions {
            epochs: 10,
            batch_size: 32,
            learning_rate: 0.1,
            ..TrainOptions::default()
        };
        let mut errors = Vec::new();
        for opts in [like_reference, cd1] {
            let mut rbm = BinaryRbm::new(64, 64, 0.01, 0);
            train(&mut rbm, train_rows, None, &opts, &mut |_| {}).unwrap();
            errors.push(rbm.reconstruction_error(held_out));
        }
        assert!(
            (errors[0] - 0.0439).abs() < 0.004,
            "PCD like the reference: {}",
            errors[0]
        );
        assert!(errors[1] < 0.018, "CD-1 with momentum: {}", errors[1]);
    }
}
