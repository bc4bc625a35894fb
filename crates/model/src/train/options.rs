//! What the RBM trainer is asked to do: epochs, step sizes, momentum, penalties.

use crate::ModelError;

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
pub struct RbmTrainingOptions {
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

impl Default for RbmTrainingOptions {
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

impl RbmTrainingOptions {
    pub(super) fn learning_rate_at(&self, epoch: usize) -> f32 {
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

    pub(super) fn validate(&self) -> Result<(), ModelError> {
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
