//! The trainer's state between steps and one gradient step, phase by phase.

use ndarray::{Array1, Array2, ArrayView2, ArrayViewMut2, Axis};
use rand::Rng;
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;

use super::{RbmTrainingOptions, Sparsity, Trainable};
use crate::kernels::{bernoulli_in_place, par_gemm, sigmoid_of_sum, simd, squared_error_flat};
use crate::rows::{
    bernoulli_rows_from, for_each_row_seeded, rows_apply, PAR_MIN_ELEMENTS, SAMPLE_CHUNK_ROWS,
};

/// Velocities, persistent chains, the sparsity running average, and the step's buffers.
///
/// The buffers stack the positive and the negative phase: rows `..n` hold the batch, rows
/// `n..n + nk` the negative chains. Stacked, the reconstruction the error is measured on
/// and the chains' first visible step are one matrix product, and the weight gradient
/// ⟨v hᵀ⟩_data − ⟨v hᵀ⟩_model is one product [v₀; v_k]ᵀ·[h₀/n; −h_k/nk] accumulated
/// straight into the velocity.
pub(super) struct State {
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
    /// row-major, and the step is faster with the copy than without it (measured:
    /// BENCHMARKS.md, section "How fast is training?").
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

/// The sizes of one step: `n` batch rows stacked over `nk` negative chains, of `nv`
/// visible and `nh` hidden units.
#[derive(Clone, Copy)]
struct StepShape {
    n: usize,
    nk: usize,
    nv: usize,
    nh: usize,
}

impl StepShape {
    /// Stacked rows in use this step.
    fn rows(&self) -> usize {
        self.n + self.nk
    }
}

impl State {
    pub(super) fn new<M: Trainable>(
        rbm: &M,
        data: ArrayView2<f32>,
        opts: &RbmTrainingOptions,
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
    pub(super) fn step<M: Trainable>(
        &mut self,
        rbm: &mut M,
        data: ArrayView2<f32>,
        rows: &[usize],
        opts: &RbmTrainingOptions,
        lr: f32,
        momentum: f32,
        rng: &mut ChaCha8Rng,
    ) -> f32 {
        let n = rows.len();
        let shape = StepShape {
            n,
            nk: self.chains.as_ref().map_or(n, |c| c.hidden.nrows()),
            nv: self.vel_w.nrows(),
            nh: self.vel_w.ncols(),
        };
        self.load_batch(rbm, data, rows, shape);
        self.positive_phase(rbm, shape);
        self.start_negative_chains(shape, rng);
        let sq = self.gibbs_steps(rbm, shape, opts.gibbs_steps, rng);
        self.keep_chains(shape, rng);
        self.bias_gradients(shape);
        let push = self.sparsity_push(opts.sparsity.as_ref(), shape);
        self.update_weights(rbm, shape, opts.weight_decay, push.as_ref(), lr, momentum);
        self.update_biases(rbm, lr, momentum);
        sq
    }

    /// Copies the batch into the first `n` visible rows and sets every stacked row's
    /// hidden-bias multiplier: the batch's from its rows, the negative rows' from the
    /// persistent chains (fixed by their first visible state) or, for CD, from the batch
    /// rows they start at.
    fn load_batch<M: Trainable>(
        &mut self,
        rbm: &M,
        data: ArrayView2<f32>,
        rows: &[usize],
        s: StepShape,
    ) {
        let vv = head_mut(&mut self.vv, s.rows() * s.nv);
        let scales = &mut self.scales[..s.rows()];
        for ((dst, sc), &r) in vv.chunks_exact_mut(s.nv).zip(scales.iter_mut()).zip(rows) {
            match data.row(r).as_slice() {
                Some(src) => dst.copy_from_slice(src),
                None => {
                    for (d, &x) in dst.iter_mut().zip(data.row(r)) {
                        *d = x;
                    }
                }
            }
            *sc = rbm.hidden_bias_scale(dst);
        }
        match &self.chains {
            Some(chains) => scales[s.n..].copy_from_slice(&chains.scales),
            None => scales.copy_within(..s.n, s.n),
        }
    }

    /// Positive phase: h₀ = p(h | v₀) in rows `..n`, the data's side of the gradient.
    fn positive_phase<M: Trainable>(&mut self, rbm: &M, s: StepShape) {
        let (w, _, c) = rbm.parameters();
        hidden_probabilities_into(
            rows_view(&head(&self.vv, s.rows() * s.nv)[..s.n * s.nv], s.nv),
            w,
            c,
            &self.scales[..s.n],
            rows_view_mut(
                &mut head_mut(&mut self.hh, s.rows() * s.nh)[..s.n * s.nh],
                s.nh,
            ),
        );
    }

    /// Hidden rows `n..` where the negative phase starts: CD from a draw of h₀, so the
    /// chains begin at the data; PCD from the chains' kept hidden sample, so they carry on.
    fn start_negative_chains(&mut self, s: StepShape, rng: &mut ChaCha8Rng) {
        let hh = head_mut(&mut self.hh, s.rows() * s.nh);
        let (h0, neg) = hh.split_at_mut(s.n * s.nh);
        match &self.chains {
            Some(chains) => neg.copy_from_slice(chains.hidden.as_slice().expect("owned matrix")),
            None => bernoulli_rows_from(h0, neg, s.nh, rng),
        }
    }

    /// The k Gibbs steps of the negative phase on rows `n..`; returns the batch's summed
    /// squared reconstruction error. The first step also maps h₀ back, since the
    /// mean-field reconstruction of the batch (whose error is the figure reported) is then
    /// the same product. CD's last visible step uses means (less sampling noise, Hinton's
    /// guide §3); PCD keeps samples so the chains stay proper Markov chains.
    fn gibbs_steps<M: Trainable>(
        &mut self,
        rbm: &M,
        s: StepShape,
        steps: usize,
        rng: &mut ChaCha8Rng,
    ) -> f32 {
        let StepShape { n, nv, nh, .. } = s;
        let vv = head_mut(&mut self.vv, s.rows() * nv);
        let hh = head_mut(&mut self.hh, s.rows() * nh);
        let means = head_mut(&mut self.means, s.rows() * nv);
        let scales = &self.scales[..s.rows()];
        let mut sq = 0.0;
        for step in 0..steps {
            let last = step + 1 == steps;
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
        sq
    }

    /// PCD: the chains keep a binary draw of their last hidden probabilities, where the
    /// next step starts.
    fn keep_chains(&mut self, s: StepShape, rng: &mut ChaCha8Rng) {
        if let Some(chains) = &mut self.chains {
            let kept = chains.hidden.as_slice_mut().expect("owned matrix");
            let hh = head(&self.hh, s.rows() * s.nh);
            bernoulli_rows_from(&hh[s.n * s.nh..], kept, s.nh, rng);
        }
    }

    /// Bias gradients ⟨·⟩_data − ⟨·⟩_model and the batch means the sparsity penalty and
    /// the weight update need, in one vectorised pass. The hidden rows are scaled in place
    /// by 1/n (batch) or −1/nk (chains), so that the weight gradient is then one product.
    fn bias_gradients(&mut self, s: StepShape) {
        let StepShape { n, nk, nv, nh } = s;
        let vv = head(&self.vv, s.rows() * nv);
        let hh = head_mut(&mut self.hh, s.rows() * nh);
        let scales = &self.scales[..s.rows()];
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
    }

    /// With a sparsity target: updates the running activity and adds the penalty to the
    /// hidden-bias gradient; returns each hidden unit's push, which the weights get too.
    fn sparsity_push(&mut self, sparsity: Option<&Sparsity>, s: StepShape) -> Option<Array1<f32>> {
        let sp = sparsity?;
        // Cross-entropy penalty between target and running activity q: its derivative
        // with respect to a hidden unit's input is (q − target).
        self.activity = &self.activity * sp.decay + &self.mean_h0 * (1.0 - sp.decay);
        let p = self.activity.mapv(|q| sp.cost * (q - sp.target));
        // Row r's input holds the hidden bias scales[r] times.
        let mean_s0 = self.scales[..s.n].iter().sum::<f32>() / s.n as f32;
        self.grad_c.scaled_add(-mean_s0, &p);
        Some(p)
    }

    /// vel_W ← momentum·vel_W + lr·(⟨v hᵀ⟩₀ − ⟨v hᵀ⟩_k) in one product, then the
    /// penalties, then W ← W + vel_W in one pass; the transposed copy follows W.
    fn update_weights<M: Trainable>(
        &mut self,
        rbm: &mut M,
        s: StepShape,
        decay: f32,
        push: Option<&Array1<f32>>,
        lr: f32,
        momentum: f32,
    ) {
        let nh = s.nh;
        par_gemm(
            lr,
            &rows_view(head(&self.vv, s.rows() * s.nv), s.nv).t(),
            &rows_view(head(&self.hh, s.rows() * nh), nh),
            momentum,
            &mut self.vel_w.view_mut(),
        );
        let (w, _, _) = rbm.parameters_mut();
        let mv0 = self.mean_v0.as_slice().expect("owned");
        let push = push.map(|p| p.as_slice().expect("owned"));
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
        if chunk > 0 && vel.len() >= PAR_MIN_ELEMENTS {
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
    }

    /// Momentum steps of the two bias vectors from the gradients of [`Self::bias_gradients`].
    fn update_biases<M: Trainable>(&mut self, rbm: &mut M, lr: f32, momentum: f32) {
        let (_, vb, hb) = rbm.parameters_mut();
        momentum_step(&mut self.vel_b, &self.grad_b, vb, momentum, lr);
        momentum_step(&mut self.vel_c, &self.grad_c, hb, momentum, lr);
    }
}

/// The first `len` entries of a row-major buffer.
fn head(a: &Array2<f32>, len: usize) -> &[f32] {
    &a.as_slice().expect("owned buffer")[..len]
}

fn head_mut(a: &mut Array2<f32>, len: usize) -> &mut [f32] {
    &mut a.as_slice_mut().expect("owned buffer")[..len]
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

/// `out ← aᵀ` for a row-major matrix `a` of `cols` columns, in 16 × 16 tiles, which keeps
/// the scattered writes cache-friendly (measured: BENCHMARKS.md, section "How fast is
/// training?").
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
