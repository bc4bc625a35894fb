//! One mini-batch trainer (CD-k or persistent CD) for every visible-unit kind.

mod options;
mod state;

use ndarray::{Array, ArrayView2, Dimension};
use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

use crate::early_stopping::KeepBest;
use crate::ModelError;
use state::State;

pub use options::{LearningRateSchedule, RbmTrainingOptions, Sparsity};

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
    opts: &RbmTrainingOptions,
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

/// Same values, row-major memory (a model may have been built from a transposed matrix).
fn to_standard_layout<D: Dimension>(a: &mut Array<f32, D>) {
    if !a.is_standard_layout() {
        *a = a.as_standard_layout().into_owned();
    }
}

#[cfg(test)]
mod tests;
