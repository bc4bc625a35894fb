//! Fine-tuning: the unrolled network trained end to end with Adam, each example shown
//! through one side (modality dropout), with early stopping on the caller's score.

use ndarray::{Array2, ArrayView2, Axis};
use rand::seq::SliceRandom;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

use super::network::{Group, Shown};
use super::{FineTuneReport, JointModel, JointOptions, JointProgress, JointSummary};
use crate::early_stopping::KeepBest;
use crate::optimiser::Adam;
use crate::ModelError;

impl JointModel {
    /// Trains the unrolled network in place from its pretrained start, `opts.max_epochs`
    /// at most; `variants` are used as [`JointModel::fit_with_variants`] says.
    pub(super) fn fine_tune(
        &mut self,
        features: ArrayView2<f32>,
        variants: &[ArrayView2<f32>],
        tags: ArrayView2<f32>,
        mut validation: Option<&mut dyn FnMut(&JointModel) -> f32>,
        opts: &JointOptions,
        progress: &mut dyn FnMut(JointProgress),
    ) -> Result<JointSummary, ModelError> {
        let mut rng = ChaCha8Rng::seed_from_u64(opts.seed ^ 0x6a6f_696e);
        let mut adam = Adam::new(self.parameters_mut());
        let n = features.nrows();
        // Examples: (source, row), source 0 = the original picture, v + 1 = variant v.
        let mut order: Vec<(usize, usize)> = (0..n).map(|i| (0, i)).collect();
        if opts.variant_rows {
            order.extend((1..=variants.len()).flat_map(|v| (0..n).map(move |i| (v, i))));
        }
        let swap = opts.variant_share > 0.0 && !variants.is_empty();
        let mut best = KeepBest::new(opts.patience);
        let mut epochs_run = 0;
        for epoch in 0..opts.max_epochs {
            order.shuffle(&mut rng);
            let mut total = 0.0f64;
            for batch in order.chunks(opts.batch_size) {
                // Modality dropout: each original is seen through one side only; variants
                // are always shown as pictures (as tags they would repeat the original).
                let mut tags_only = Vec::new();
                let mut pictures_only = Vec::new();
                for &(source, row) in batch {
                    if source == 0 && rng.random::<f32>() < opts.tags_only_fraction {
                        tags_only.push(row);
                    } else if source == 0 && swap && rng.random::<f32>() < opts.variant_share {
                        pictures_only.push((rng.random_range(1..=variants.len()), row));
                    } else {
                        pictures_only.push((source, row));
                    }
                }
                let x = picture_rows(features, variants, &pictures_only);
                let picture_tags: Vec<usize> = pictures_only.iter().map(|&(_, i)| i).collect();
                let x_target = tags.select(Axis(0), &picture_tags);
                let revealed = (opts.reveal_share > 0.0)
                    .then(|| reveal_some(x_target.view(), opts.reveal_share, &mut rng))
                    .flatten();
                let t = tags.select(Axis(0), &tags_only);
                // Where the tags-only codes are pulled: their pictures' own codes, as
                // constants (no gradient flows into the picture side).
                let pull = (opts.alignment_weight > 0.0 && !tags_only.is_empty()).then(|| {
                    self.forward(
                        features.select(Axis(0), &tags_only).view(),
                        Shown::Picture,
                        None,
                    )
                    .shared
                    .pop()
                    .unwrap_or_default()
                });
                let groups = [
                    Group {
                        input: x.view(),
                        target: x_target.view(),
                        shown: Shown::Picture,
                        revealed: revealed.as_ref().map(|r| r.view()),
                        align: None,
                    },
                    Group {
                        input: t.view(),
                        target: t.view(),
                        shown: Shown::Tags,
                        revealed: None,
                        align: pull.as_ref().map(|p| (opts.alignment_weight, p.view())),
                    },
                ];
                let (loss, grads) = self.gradients(&groups, opts.weight_decay);
                total += loss * batch.len() as f64;
                adam.step(self.parameters_mut(), &grads, opts.learning_rate);
            }
            epochs_run = epoch + 1;
            let train_loss = (total / order.len().max(1) as f64) as f32;
            if !train_loss.is_finite() {
                return Err(ModelError::Diverged { epoch });
            }
            let validation_score = validation.as_mut().map(|score| score(self));
            progress(JointProgress::FineTuning(FineTuneReport {
                epoch,
                train_loss,
                validation_score,
            }));
            if validation_score.is_some_and(|score| best.should_stop(score, epoch, self)) {
                break;
            }
        }
        let kept_epoch = best.restore(self, epochs_run);
        Ok(JointSummary {
            epochs_run,
            kept_epoch,
        })
    }
}

/// For each row of `tags` with at least two tags, with chance `share`, a random
/// subset of 1 … n − 1 of its n tags (size uniform, then the tags uniform); other rows
/// reveal nothing. `None` when no row reveals anything.
fn reveal_some(tags: ArrayView2<f32>, share: f32, rng: &mut ChaCha8Rng) -> Option<Array2<f32>> {
    let mut revealed = Array2::<f32>::zeros(tags.raw_dim());
    let mut any = false;
    for (row, mut out) in tags.outer_iter().zip(revealed.outer_iter_mut()) {
        let mut carried: Vec<usize> = (0..row.len()).filter(|&j| row[j] > 0.5).collect();
        if carried.len() < 2 || rng.random::<f32>() >= share {
            continue;
        }
        let k = rng.random_range(1..carried.len());
        carried.shuffle(rng);
        carried[..k].iter().for_each(|&j| out[j] = 1.0);
        any = true;
    }
    any.then_some(revealed)
}

/// Feature rows of `(source, row)` examples: source 0 is `features`, v + 1 is `variants[v]`.
fn picture_rows(
    features: ArrayView2<f32>,
    variants: &[ArrayView2<f32>],
    examples: &[(usize, usize)],
) -> Array2<f32> {
    let mut x = Array2::zeros((examples.len(), features.ncols()));
    for (mut out, &(source, row)) in x.outer_iter_mut().zip(examples) {
        let from = if source == 0 {
            features
        } else {
            variants[source - 1]
        };
        out.assign(&from.row(row));
    }
    x
}
