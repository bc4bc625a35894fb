//! Early stopping on a validation score, for the RBM trainer and the joint model's
//! fine-tuning alike.

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
