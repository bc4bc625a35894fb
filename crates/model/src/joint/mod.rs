//! The joint picture–tag model: two pathways and a shared layer, pretrained greedily
//! as RBMs, then unrolled and fine-tuned end to end as a tag predictor.
//!
//! Fine-tuning the route picture → shared → tags with cross-entropy is the main training
//! step and the RBM pretraining only an initialisation: generative fill-in alone ranks tags
//! worse than kNN tag transfer (measured: BENCHMARKS.md, section "What did not help").

mod fine_tune;
mod network;
mod options;
mod tag_layer;

#[cfg(test)]
mod tests;

use ndarray::{concatenate, Array1, Array2, ArrayView2, Axis};
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use serde::{Deserialize, Serialize};

use crate::kernels::sigmoid;
use crate::rbm::standard_normal;
use crate::{
    train, BinaryRbm, EpochReport, GaussianBernoulliRbm, ModelError, RbmTrainingOptions,
    ReplicatedSoftmaxRbm, Trainable,
};
use network::{cross_entropy, Shown};

pub use options::{JointOptions, TagUnits};
pub use tag_layer::TagLayer;

/// Progress of [`JointModel::fit`].
#[derive(Clone, Debug, PartialEq)]
pub enum JointProgress {
    /// After each CD epoch of one pretrained layer ("image", "tags" or "shared").
    Pretraining {
        layer: &'static str,
        report: EpochReport,
    },
    /// After each fine-tuning epoch.
    FineTuning(FineTuneReport),
}

#[derive(Clone, Debug, PartialEq)]
pub struct FineTuneReport {
    /// Counted from 0.
    pub epoch: usize,
    /// Mean loss per picture over the epoch's batches: cross-entropy summed over tags,
    /// plus the alignment term and the weight decay.
    pub train_loss: f32,
    /// The caller's validation score after the epoch (higher is better), if given.
    pub validation_score: Option<f32>,
}

/// How fine-tuning ended.
#[derive(Clone, Debug, PartialEq)]
pub struct JointSummary {
    pub epochs_run: usize,
    /// Fine-tuning epoch whose parameters were kept (best on validation, else the last);
    /// retraining on all rows for `kept_epoch + 1` epochs reproduces the choice.
    pub kept_epoch: usize,
}

/// Image pathway, tag pathway, shared layer and a tag read-out above the shared layer.
///
/// After fine-tuning the RBMs' upward weights and hidden biases are those of the
/// trained network; so is the shared RBM's visible bias, which the mean-field steps
/// use top-down. The pathways' visible biases stay as pretrained.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct JointModel {
    /// Standardised picture features → image hidden units.
    pub image: GaussianBernoulliRbm,
    /// Bag of tags (0/1) → tag hidden units.
    pub tags: TagLayer,
    /// [image hidden ; tag hidden] → shared units.
    pub shared: BinaryRbm,
    /// Shared units → tag logits, `n_shared × n_tags`.
    pub readout_weights: Array2<f32>,
    pub readout_bias: Array1<f32>,
    /// Mean-field steps of fill-in, as fine-tuned. Models saved before the field existed
    /// load with 0, which is how they were trained.
    #[serde(default)]
    pub mean_field_steps: usize,
}

impl JointModel {
    /// Pretrain the three RBMs greedily, then fine-tune the unrolled network.
    ///
    /// `features`: standardised picture features; `tags`: 0/1 matrix, one row per
    /// picture. With a `validation` score (higher is better, e.g. a ranking measure of
    /// [`Self::fill_in_tags`] on held-out rows, or minus [`Self::picture_only_loss`]),
    /// fine-tuning keeps the best-scoring epoch and stops after `patience` epochs without
    /// improvement; without one, it runs `max_epochs`. The score is a callback so the
    /// caller's own measure decides: the loss and the tag ranking can disagree on sets
    /// with a long tail of rare tags (measured: BENCHMARKS.md, section "What did not
    /// help").
    pub fn fit(
        features: ArrayView2<f32>,
        tags: ArrayView2<f32>,
        validation: Option<&mut dyn FnMut(&JointModel) -> f32>,
        opts: &JointOptions,
        progress: &mut dyn FnMut(JointProgress),
    ) -> Result<(Self, JointSummary), ModelError> {
        Self::fit_with_variants(features, &[], tags, validation, opts, progress)
    }

    /// [`Self::fit`] with variants of the training pictures (e.g. mirrored, cropped):
    /// `variants[v]` row `i` is variant `v` of picture `i`, standardised like `features`,
    /// and carries picture `i`'s tags. Fine-tuning uses them as `opts.variant_share` and
    /// `opts.variant_rows` say; pretraining and the validation score see originals only.
    pub fn fit_with_variants(
        features: ArrayView2<f32>,
        variants: &[ArrayView2<f32>],
        tags: ArrayView2<f32>,
        validation: Option<&mut dyn FnMut(&JointModel) -> f32>,
        opts: &JointOptions,
        progress: &mut dyn FnMut(JointProgress),
    ) -> Result<(Self, JointSummary), ModelError> {
        opts.validate()?;
        check_tags("tags", tags)?;
        let mut model = Self::pretrained(features, tags, opts, progress)?;
        for variant in variants {
            if variant.nrows() != features.nrows() {
                return Err(ModelError::RowMismatch {
                    what: "a variant matrix",
                    expected: features.nrows(),
                    got: variant.nrows(),
                });
            }
            model.image.check_rows("training variants", *variant)?;
        }
        let summary = model.fine_tune(features, variants, tags, validation, opts, progress)?;
        Ok((model, summary))
    }

    pub(super) fn pretrained(
        features: ArrayView2<f32>,
        tags: ArrayView2<f32>,
        opts: &JointOptions,
        progress: &mut dyn FnMut(JointProgress),
    ) -> Result<Self, ModelError> {
        if tags.nrows() != features.nrows() {
            return Err(ModelError::RowMismatch {
                what: "the tag matrix",
                expected: features.nrows(),
                got: tags.nrows(),
            });
        }
        let (n_image, n_tag, n_shared) = opts.sizes_for(features.nrows(), tags.ncols());
        let seed = opts.seed;
        // Weights N(0, 1/fan-in): the inputs of every unit start with unit spread, so the
        // stacked sigmoids are neither flat nor saturated. With Hinton's 0.01 the
        // fine-tuning gradient vanished through three layers and the loss sat on a plateau.
        let init = |n_in: usize| 1.0 / (n_in.max(1) as f32).sqrt();
        let mut image =
            GaussianBernoulliRbm::new(features.ncols(), n_image, init(features.ncols()), seed);
        image.check_rows("training features", features)?;
        let mut tag_rbm =
            match opts.tag_units {
                TagUnits::Binary => TagLayer::Binary(BinaryRbm::new(
                    tags.ncols(),
                    n_tag,
                    init(tags.ncols()),
                    seed ^ 1,
                )),
                TagUnits::ReplicatedSoftmax => TagLayer::ReplicatedSoftmax(
                    ReplicatedSoftmaxRbm::new(tags.ncols(), n_tag, init(tags.ncols()), seed ^ 1),
                ),
            };
        tag_rbm.check_rows("training tags", tags)?;
        let mut shared = BinaryRbm::new(n_image + n_tag, n_shared, init(n_image + n_tag), seed ^ 2);
        if opts.pretrain_epochs > 0 {
            // Gaussian visible units need a rate one or two orders below binary ones.
            pretrain(&mut image, features, "image", 0.001, opts, progress)?;
            match &mut tag_rbm {
                TagLayer::Binary(r) => pretrain(r, tags, "tags", 0.05, opts, progress)?,
                TagLayer::ReplicatedSoftmax(r) => pretrain(r, tags, "tags", 0.05, opts, progress)?,
            }
            let joint = concatenate(
                Axis(1),
                &[
                    image.hidden_probabilities(features).view(),
                    tag_rbm.hidden_probabilities(tags).view(),
                ],
            )
            .map_err(|_| ModelError::Empty {
                what: "training rows",
            })?;
            pretrain(&mut shared, joint.view(), "shared", 0.05, opts, progress)?;
        }
        // Read-out starts at "no information": each tag's training log-odds.
        let n = features.nrows().max(1) as f32;
        let readout_bias = tags.sum_axis(Axis(0)).mapv(|c| {
            let p = ((c + 0.5) / (n + 1.0)).clamp(1e-4, 1.0 - 1e-4);
            (p / (1.0 - p)).ln()
        });
        let mut rng = ChaCha8Rng::seed_from_u64(seed ^ 3);
        let readout_weights = Array2::from_shape_simple_fn((n_shared, tags.ncols()), || {
            init(n_shared) * standard_normal(&mut rng)
        });
        Ok(Self {
            image,
            tags: tag_rbm,
            shared,
            readout_weights,
            readout_bias,
            mean_field_steps: opts.mean_field_steps,
        })
    }

    pub fn n_features(&self) -> usize {
        self.image.n_visible()
    }

    pub fn n_tags(&self) -> usize {
        self.tags.n_visible()
    }

    /// Tag probabilities (pictures × tags) from pictures alone. The image pathway runs
    /// bottom-up and the shared layer sees the tag pathway's answer to an empty bag;
    /// then, `mean_field_steps` times, the tag pathway's top is set top-down from the
    /// shared layer (σ(W_s[tag rows]·s + a_s[tag part])) and the shared layer recomputed
    /// with the picture side fixed. The tags are read out from the final shared layer.
    pub fn fill_in_tags(&self, features: ArrayView2<f32>) -> Result<Array2<f32>, ModelError> {
        self.image.check_rows("features", features)?;
        Ok(self
            .forward(features, Shown::Picture, None)
            .logits
            .mapv(sigmoid))
    }

    /// Tag probabilities (pictures × tags) from pictures and tags they are known to
    /// carry (`revealed`: 0/1 rows, one per picture; an all-zero row is picture-only
    /// fill-in). The revealed tags themselves come back near 1; callers rank the others.
    pub fn fill_in_tags_given(
        &self,
        features: ArrayView2<f32>,
        revealed: ArrayView2<f32>,
    ) -> Result<Array2<f32>, ModelError> {
        self.image.check_rows("features", features)?;
        self.tags.check_rows("revealed tags", revealed)?;
        check_tags("revealed tags", revealed)?;
        if revealed.nrows() != features.nrows() {
            return Err(ModelError::RowMismatch {
                what: "the revealed tag matrix",
                expected: features.nrows(),
                got: revealed.nrows(),
            });
        }
        Ok(self
            .forward(features, Shown::Picture, Some(revealed))
            .logits
            .mapv(sigmoid))
    }

    /// Shared-layer probabilities from pictures alone, after the same mean-field steps
    /// as [`Self::fill_in_tags`].
    pub fn shared_code(&self, features: ArrayView2<f32>) -> Result<Array2<f32>, ModelError> {
        self.image.check_rows("features", features)?;
        Ok(self
            .forward(features, Shown::Picture, None)
            .shared
            .pop()
            .unwrap_or_default())
    }

    /// Shared-layer probabilities from 0/1 tag rows alone: the mirror of
    /// [`Self::shared_code`], the image pathway's top filled in top-down.
    pub fn code_from_tags(&self, tags: ArrayView2<f32>) -> Result<Array2<f32>, ModelError> {
        self.tags.check_rows("tags", tags)?;
        check_tags("tags", tags)?;
        Ok(self
            .forward(tags, Shown::Tags, None)
            .shared
            .pop()
            .unwrap_or_default())
    }

    /// Mean cross-entropy per picture (summed over tags) of tags predicted from
    /// pictures alone; `tags` is a 0/1 matrix.
    pub fn picture_only_loss(
        &self,
        features: ArrayView2<f32>,
        tags: ArrayView2<f32>,
    ) -> Result<f32, ModelError> {
        self.image.check_rows("features", features)?;
        self.tags.check_rows("tags", tags)?;
        check_tags("tags", tags)?;
        let pass = self.forward(features, Shown::Picture, None);
        Ok((cross_entropy(pass.logits.view(), tags) / features.nrows().max(1) as f64) as f32)
    }
}

fn pretrain<M: Trainable>(
    rbm: &mut M,
    data: ArrayView2<f32>,
    layer: &'static str,
    learning_rate: f32,
    opts: &JointOptions,
    progress: &mut dyn FnMut(JointProgress),
) -> Result<(), ModelError> {
    let train_opts = RbmTrainingOptions {
        epochs: opts.pretrain_epochs,
        batch_size: opts.batch_size,
        learning_rate,
        seed: opts.seed,
        ..RbmTrainingOptions::default()
    };
    train(rbm, data, None, &train_opts, &mut |report| {
        progress(JointProgress::Pretraining { layer, report })
    })?;
    Ok(())
}

/// Tag rows feed binary units and cross-entropy targets: values must lie in [0, 1].
fn check_tags(what: &'static str, tags: ArrayView2<f32>) -> Result<(), ModelError> {
    match tags.indexed_iter().find(|(_, v)| !(0.0..=1.0).contains(*v)) {
        Some(((row, col), &value)) => Err(ModelError::OutOfUnitRange {
            what,
            row,
            col,
            value,
        }),
        None => Ok(()),
    }
}
