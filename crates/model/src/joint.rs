//! The joint picture–tag model: two pathways and a shared layer, pretrained greedily
//! as RBMs, then unrolled and fine-tuned end to end as a tag predictor.
//!
//! Generative fill-in alone ranked tags clearly worse than kNN tag transfer in the
//! prototype; fine-tuning the route picture → shared → tags with cross-entropy is what
//! made the stack competitive, so fine-tuning is the main training step and the RBM
//! pretraining only an initialisation.

use std::ops::Range;

use ndarray::{
    concatenate, s, Array1, Array2, ArrayD, ArrayView1, ArrayView2, ArrayViewMutD, Axis, Dimension,
};
use rand::seq::SliceRandom;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde::{Deserialize, Serialize};

use crate::rbm::{sigmoid, softplus};
use crate::train::sealed::Cd;
use crate::train::KeepBest;
use crate::{
    train, BinaryRbm, EpochReport, GaussianBernoulliRbm, ModelError, ReplicatedSoftmaxRbm,
    TrainOptions, Trainable,
};

/// Layer sizes; `None` picks a size from the data (see [`JointOptions::sizes_for`]).
#[derive(Clone, Debug, PartialEq)]
pub struct JointOptions {
    pub image_hidden: Option<usize>,
    pub tag_hidden: Option<usize>,
    pub shared_hidden: Option<usize>,
    /// CD-1 epochs per pretrained layer (default 5); 0 = random initialisation.
    pub pretrain_epochs: usize,
    /// Most fine-tuning epochs (default 100).
    pub max_epochs: usize,
    /// Rows per Adam step (default 32).
    pub batch_size: usize,
    /// Adam step size (default 3e-3: on the shared sets as good as 1e-3 in half the
    /// epochs).
    pub learning_rate: f32,
    /// L2 penalty on the weight matrices, not the biases (default 1e-4).
    pub weight_decay: f32,
    /// Share of fine-tuning examples shown as tags only (picture zeroed) so that
    /// tags → shared code is trained too; all others are shown as pictures only
    /// (tags zeroed), the way the model is used to suggest tags (default 0.1).
    pub tags_only_fraction: f32,
    /// Epochs without a better validation score before fine-tuning stops (default 8).
    pub patience: usize,
    /// Seeds initialisation, pretraining, shuffles and modality dropout (default 0).
    pub seed: u64,
    /// Units of the tag pathway's visible layer (default binary; see [`TagUnits`]).
    pub tag_units: TagUnits,
    /// Mean-field steps when one side is filled in from the other: the shared layer
    /// and the missing side's pathway top updated in turn (see [`JointModel::fill_in_tags`]).
    /// Fine-tuning unrolls the same steps, so training matches use. Default 1: over the
    /// three sets and seeds 7 and 1, 0/1/2/5 steps gave the same mean LRAP (±0.002),
    /// and 1 put the tags-only code nearest its own picture (recall@10 0.23–0.77
    /// against 0.17–0.23 with 0; 5 steps fell back to 0.06–0.18).
    pub mean_field_steps: usize,
    /// Weight of the pull of each tags-only example's shared code toward its own
    /// picture's code (squared distance per example; the picture side is held fixed so
    /// picture codes are not dragged toward tags). 0 turns it off (default: with one
    /// mean-field step, weights 1 and 5 lowered the demo's LRAP by 0.017–0.049 and its
    /// tags-only recall@10 from 0.77 to 0.36–0.62).
    pub alignment_weight: f32,
    /// With views given to [`JointModel::fit_with_views`]: the chance that an original
    /// shown as a picture is shown through one of its views (picked at random) instead,
    /// each epoch anew; 0 = originals only (default 0, see `view_rows`).
    pub view_share: f32,
    /// With views given: every view also joins each epoch as an example of its own,
    /// always shown as a picture (default false). Measured (mirror + 90 % crop,
    /// `tagweave eval` seeds 7/1/2 on emoji, stamps, demo): mean joint LRAP 0.596
    /// without views, 0.604 with share 0.5 or with rows, 0.609 with both; but on the
    /// demo's query test share 0.5 brought back 27 instead of 32 of 35 removed tags and
    /// rows + share 0.5 dropped `find` precision@10 from 0.75 to 0.57, so both stay off.
    pub view_rows: bool,
}

/// How the tag pathway sees a bag of tags.
///
/// Measured (seed 7, `tagweave eval`, LRAP emoji / stamps / demo): see BENCHMARKS.md,
/// "Tag layer". Binary stays the default because it measured no worse.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Serialize, Deserialize)]
pub enum TagUnits {
    /// One logistic unit per tag.
    #[default]
    Binary,
    /// Replicated softmax: the tags as draws from one softmax over the vocabulary,
    /// hidden biases scaled by the number of tags.
    ReplicatedSoftmax,
}

impl Default for JointOptions {
    fn default() -> Self {
        Self {
            image_hidden: None,
            tag_hidden: None,
            shared_hidden: None,
            pretrain_epochs: 5,
            max_epochs: 100,
            batch_size: 32,
            learning_rate: 3e-3,
            weight_decay: 1e-4,
            tags_only_fraction: 0.1,
            patience: 8,
            seed: 0,
            tag_units: TagUnits::Binary,
            mean_field_steps: 1,
            alignment_weight: 0.0,
            view_share: 0.0,
            view_rows: false,
        }
    }
}

impl JointOptions {
    /// (image, tag, shared) hidden sizes for `rows` training pictures and `n_tags` tags.
    /// One image unit per picture (16–512), one tag unit per eight tags (16–128), the
    /// shared layer half their sum (16–256). Measured on the shared eval sets (seed 7):
    /// one image unit per two pictures ranked tags 0.01–0.05 LRAP worse; two per
    /// picture (up to 1024) was no better and took 2.5× as long.
    pub fn sizes_for(&self, rows: usize, n_tags: usize) -> (usize, usize, usize) {
        let round16 = |x: usize| x.div_ceil(16) * 16;
        let image = self
            .image_hidden
            .unwrap_or_else(|| round16(rows).clamp(16, 512));
        let tag = self
            .tag_hidden
            .unwrap_or_else(|| round16(n_tags / 8).clamp(16, 128));
        let shared = self
            .shared_hidden
            .unwrap_or_else(|| round16((image + tag) / 2).clamp(16, 256));
        (image, tag, shared)
    }

    fn validate(&self) -> Result<(), ModelError> {
        let bad = |name, value: String, fix| Err(ModelError::InvalidOption { name, value, fix });
        if self.batch_size == 0 {
            return bad("batch_size", "0".into(), "use at least 1 (typically 32)");
        }
        if !(self.learning_rate > 0.0 && self.learning_rate.is_finite()) {
            return bad(
                "learning_rate",
                self.learning_rate.to_string(),
                "use a positive number such as 0.001",
            );
        }
        if !(0.0..1.0).contains(&self.tags_only_fraction) {
            return bad(
                "tags_only_fraction",
                self.tags_only_fraction.to_string(),
                "use a value in [0, 1), e.g. 0.1",
            );
        }
        if !(0.0..=1.0).contains(&self.view_share) {
            return bad(
                "view_share",
                self.view_share.to_string(),
                "use a value in [0, 1], e.g. 0.5 (0 = originals only)",
            );
        }
        if !(self.alignment_weight >= 0.0 && self.alignment_weight.is_finite()) {
            return bad(
                "alignment_weight",
                self.alignment_weight.to_string(),
                "use 0 (off) or a positive number such as 1",
            );
        }
        Ok(())
    }
}

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

/// The tag pathway's first layer, of either kind of [`TagUnits`].
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub enum TagLayer {
    Binary(BinaryRbm),
    ReplicatedSoftmax(ReplicatedSoftmaxRbm),
}

impl TagLayer {
    pub fn n_visible(&self) -> usize {
        self.weights().nrows()
    }

    pub fn n_hidden(&self) -> usize {
        self.weights().ncols()
    }

    pub fn weights(&self) -> &Array2<f32> {
        match self {
            TagLayer::Binary(r) => &r.weights,
            TagLayer::ReplicatedSoftmax(r) => &r.weights,
        }
    }

    pub fn hidden_probabilities(&self, v: ArrayView2<f32>) -> Array2<f32> {
        match self {
            TagLayer::Binary(r) => r.hidden_probabilities(v),
            TagLayer::ReplicatedSoftmax(r) => r.hidden_probabilities(v),
        }
    }

    fn check_rows(&self, what: &'static str, v: ArrayView2<f32>) -> Result<(), ModelError> {
        match self {
            TagLayer::Binary(r) => Cd::check_rows(r, what, v),
            TagLayer::ReplicatedSoftmax(r) => Cd::check_rows(r, what, v),
        }
    }

    /// Per row, the multiplier of the hidden bias in the hidden input.
    fn bias_scales(&self, v: ArrayView2<f32>) -> Array1<f32> {
        match self {
            TagLayer::Binary(_) => Array1::ones(v.nrows()),
            TagLayer::ReplicatedSoftmax(_) => v.sum_axis(Axis(1)),
        }
    }

    fn parameters_mut(&mut self) -> (ArrayViewMutD<'_, f32>, ArrayViewMutD<'_, f32>) {
        match self {
            TagLayer::Binary(r) => (
                r.weights.view_mut().into_dyn(),
                r.hidden_bias.view_mut().into_dyn(),
            ),
            TagLayer::ReplicatedSoftmax(r) => (
                r.weights.view_mut().into_dyn(),
                r.hidden_bias.view_mut().into_dyn(),
            ),
        }
    }
}

/// The side of an example the network is shown; the other side is zeroed and
/// filled in by mean-field.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum Shown {
    Picture,
    Tags,
}

/// Activations of one forward pass, kept for the backward pass.
struct Pass {
    /// Pathway tops, bottom-up (the missing side's from its zero input).
    image: Array2<f32>,
    tags: Array2<f32>,
    /// s⁰ … sᵏ: the shared layer bottom-up, then after each mean-field step.
    shared: Vec<Array2<f32>>,
    /// h¹ … hᵏ: the missing side's pathway top, top-down from the previous s.
    filled: Vec<Array2<f32>>,
    logits: Array2<f32>,
}

impl Pass {
    /// The final shared code, the one read out.
    fn code(&self) -> &Array2<f32> {
        self.shared
            .last()
            .unwrap_or_else(|| unreachable!("a pass holds at least the bottom-up code"))
    }
}

/// Examples of a batch shown the same side: `input` holds their features (pictures
/// shown) or their 0/1 tags (tags shown).
struct Group<'a> {
    input: ArrayView2<'a, f32>,
    target: ArrayView2<'a, f32>,
    shown: Shown,
    /// Alignment weight and the codes (held fixed) the examples' codes are pulled toward.
    align: Option<(f32, ArrayView2<'a, f32>)>,
}

/// Positions in [`JointModel::parameters_mut`] and the gradient list.
const IMAGE_W: usize = 0;
const IMAGE_B: usize = 1;
const TAG_W: usize = 2;
const TAG_B: usize = 3;
const SHARED_W: usize = 4;
const SHARED_B: usize = 5;
const READOUT_W: usize = 6;
const READOUT_B: usize = 7;
const SHARED_VISIBLE_B: usize = 8;

impl JointModel {
    /// Pretrain the three RBMs greedily, then fine-tune the unrolled network.
    ///
    /// `features`: standardised picture features; `tags`: 0/1 matrix, one row per
    /// picture. With a `validation` score (higher is better, e.g. a ranking measure of
    /// [`Self::fill_in_tags`] on held-out rows, or minus [`Self::picture_only_loss`]),
    /// fine-tuning keeps the best-scoring epoch and stops after `patience` epochs without
    /// improvement; without one, it runs `max_epochs`. The score is a callback so the
    /// caller's own measure decides: on sets with a long tail of rare tags, the loss kept
    /// rising while the tag ranking still improved.
    pub fn fit(
        features: ArrayView2<f32>,
        tags: ArrayView2<f32>,
        validation: Option<&mut dyn FnMut(&JointModel) -> f32>,
        opts: &JointOptions,
        progress: &mut dyn FnMut(JointProgress),
    ) -> Result<(Self, JointSummary), ModelError> {
        Self::fit_with_views(features, &[], tags, validation, opts, progress)
    }

    /// [`Self::fit`] with views of the training pictures (e.g. mirrored, cropped):
    /// `views[v]` row `i` is view `v` of picture `i`, standardised like `features`, and
    /// carries picture `i`'s tags. Fine-tuning uses them as `opts.view_share` and
    /// `opts.view_rows` say; pretraining and the validation score see originals only.
    pub fn fit_with_views(
        features: ArrayView2<f32>,
        views: &[ArrayView2<f32>],
        tags: ArrayView2<f32>,
        validation: Option<&mut dyn FnMut(&JointModel) -> f32>,
        opts: &JointOptions,
        progress: &mut dyn FnMut(JointProgress),
    ) -> Result<(Self, JointSummary), ModelError> {
        opts.validate()?;
        check_tags("tags", tags)?;
        let mut model = Self::pretrained(features, tags, opts, progress)?;
        for view in views {
            if view.nrows() != features.nrows() {
                return Err(ModelError::RowMismatch {
                    what: "a view matrix",
                    expected: features.nrows(),
                    got: view.nrows(),
                });
            }
            model.image.check_rows("training views", *view)?;
        }
        let summary = model.fine_tune(features, views, tags, validation, opts, progress)?;
        Ok((model, summary))
    }

    fn pretrained(
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
            init(n_shared) * crate::rbm::standard_normal(&mut rng)
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
        Ok(self.forward(features, Shown::Picture).logits.mapv(sigmoid))
    }

    /// Shared-layer probabilities from pictures alone, after the same mean-field steps
    /// as [`Self::fill_in_tags`].
    pub fn shared_code(&self, features: ArrayView2<f32>) -> Result<Array2<f32>, ModelError> {
        self.image.check_rows("features", features)?;
        Ok(self
            .forward(features, Shown::Picture)
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
            .forward(tags, Shown::Tags)
            .shared
            .pop()
            .unwrap_or_default())
    }

    /// `input`: features when `shown` is the picture, 0/1 tags when it is the tags.
    fn forward(&self, input: ArrayView2<f32>, shown: Shown) -> Pass {
        let rows = input.nrows();
        // The missing side's pathway sees an all-zero input: one row, repeated.
        let (image, tags) = match shown {
            Shown::Picture => (
                self.image.hidden_probabilities(input),
                repeat_row(
                    self.tags
                        .hidden_probabilities(Array2::zeros((1, self.n_tags())).view()),
                    rows,
                ),
            ),
            Shown::Tags => (
                repeat_row(
                    self.image
                        .hidden_probabilities(Array2::zeros((1, self.n_features())).view()),
                    rows,
                ),
                self.tags.hidden_probabilities(input),
            ),
        };
        let (kept, missing) = match shown {
            Shown::Picture => (&image, &tags),
            Shown::Tags => (&tags, &image),
        };
        let (w_kept, w_missing, a_missing) = self.shared_sides(shown);
        let fixed = kept.dot(&w_kept) + &self.shared.hidden_bias;
        let mut shared = vec![(&fixed + &missing.dot(&w_missing)).mapv(sigmoid)];
        let mut filled = Vec::with_capacity(self.mean_field_steps);
        for _ in 0..self.mean_field_steps {
            let last = &shared[shared.len() - 1];
            let h = (last.dot(&w_missing.t()) + a_missing).mapv(sigmoid);
            shared.push((&fixed + &h.dot(&w_missing)).mapv(sigmoid));
            filled.push(h);
        }
        let logits = shared[shared.len() - 1].dot(&self.readout_weights) + &self.readout_bias;
        Pass {
            image,
            tags,
            shared,
            filled,
            logits,
        }
    }

    /// The shared weights' rows of the shown side and of the missing side, and the
    /// shared visible bias of the missing side.
    fn shared_sides(
        &self,
        shown: Shown,
    ) -> (
        ArrayView2<'_, f32>,
        ArrayView2<'_, f32>,
        ArrayView1<'_, f32>,
    ) {
        let (kept, missing) = self.side_rows(shown);
        let w = &self.shared.weights;
        (
            w.slice(s![kept, ..]),
            w.slice(s![missing.clone(), ..]),
            self.shared.visible_bias.slice(s![missing]),
        )
    }

    /// The shared layer's visible rows of the shown side and of the missing side.
    fn side_rows(&self, shown: Shown) -> (Range<usize>, Range<usize>) {
        let (n_image, n_joint) = (self.image.n_hidden(), self.shared.n_visible());
        match shown {
            Shown::Picture => (0..n_image, n_image..n_joint),
            Shown::Tags => (n_image..n_joint, 0..n_image),
        }
    }

    /// Parameters the network trains, in a fixed order shared with [`Self::gradients`].
    fn parameters_mut(&mut self) -> [ArrayViewMutD<'_, f32>; 9] {
        let (tag_weights, tag_bias) = self.tags.parameters_mut();
        [
            self.image.weights.view_mut().into_dyn(),
            self.image.hidden_bias.view_mut().into_dyn(),
            tag_weights,
            tag_bias,
            self.shared.weights.view_mut().into_dyn(),
            self.shared.hidden_bias.view_mut().into_dyn(),
            self.readout_weights.view_mut().into_dyn(),
            self.readout_bias.view_mut().into_dyn(),
            self.shared.visible_bias.view_mut().into_dyn(),
        ]
    }

    /// Over the rows of all groups: mean of the summed sigmoid cross-entropy plus the
    /// alignment term weight·‖s − target code‖², plus ½·decay·‖W‖² over the four weight
    /// matrices; and its gradient (same order as `parameters_mut`). Backprop runs
    /// through the unrolled mean-field steps; tied weights collect a gradient from
    /// every use.
    fn gradients(&self, groups: &[Group], decay: f32) -> (f64, Vec<ArrayD<f32>>) {
        let tag_weights = self.tags.weights();
        let shapes = [
            self.image.weights.raw_dim().into_dyn(),
            self.image.hidden_bias.raw_dim().into_dyn(),
            tag_weights.raw_dim().into_dyn(),
            ndarray::IxDyn(&[tag_weights.ncols()]),
            self.shared.weights.raw_dim().into_dyn(),
            self.shared.hidden_bias.raw_dim().into_dyn(),
            self.readout_weights.raw_dim().into_dyn(),
            self.readout_bias.raw_dim().into_dyn(),
            self.shared.visible_bias.raw_dim().into_dyn(),
        ];
        let mut grads: Vec<ArrayD<f32>> = shapes.into_iter().map(ArrayD::zeros).collect();
        let n = groups.iter().map(|g| g.input.nrows()).sum::<usize>().max(1) as f32;
        let mut loss = groups
            .iter()
            .map(|g| self.group_gradients(g, n, &mut grads))
            .sum::<f64>();
        let weights = [
            (IMAGE_W, &self.image.weights),
            (TAG_W, self.tags.weights()),
            (SHARED_W, &self.shared.weights),
            (READOUT_W, &self.readout_weights),
        ];
        for (k, w) in weights {
            loss += 0.5 * f64::from(decay) * f64::from(w.iter().map(|x| x * x).sum::<f32>());
            grads[k].scaled_add(decay, &w.view().into_dyn());
        }
        (loss, grads)
    }

    /// Adds one group's gradient (its loss divided by `n`, the batch's rows) to `grads`
    /// and returns that loss.
    fn group_gradients(&self, group: &Group, n: f32, grads: &mut [ArrayD<f32>]) -> f64 {
        let pass = self.forward(group.input, group.shown);
        let code = pass.code();
        let mut loss = cross_entropy(pass.logits.view(), group.target) / f64::from(n);
        let d_logits = (pass.logits.mapv(sigmoid) - group.target) / n;
        add(grads, READOUT_W, code.t().dot(&d_logits));
        add(grads, READOUT_B, d_logits.sum_axis(Axis(0)));
        // g: the gradient reaching the shared layer's current step.
        let mut g = d_logits.dot(&self.readout_weights.t());
        if let Some((weight, to)) = group.align {
            let gap = code - &to;
            loss += f64::from(weight) * f64::from(gap.iter().map(|x| x * x).sum::<f32>())
                / f64::from(n);
            g.scaled_add(2.0 * weight / n, &gap);
        }
        let (w_kept, w_missing, _) = self.shared_sides(group.shown);
        let mut d_fixed = Array2::<f32>::zeros(code.raw_dim());
        let mut d_w_missing = Array2::<f32>::zeros(w_missing.raw_dim());
        let mut d_a_missing = Array1::<f32>::zeros(w_missing.nrows());
        for t in (1..pass.shared.len()).rev() {
            let d_pre = g * sigmoid_slope(&pass.shared[t]);
            d_fixed += &d_pre;
            let h = &pass.filled[t - 1];
            d_w_missing += &h.t().dot(&d_pre);
            let d_h = d_pre.dot(&w_missing.t()) * sigmoid_slope(h);
            d_w_missing += &d_h.t().dot(&pass.shared[t - 1]);
            d_a_missing += &d_h.sum_axis(Axis(0));
            g = d_h.dot(&w_missing);
        }
        let d_pre = g * sigmoid_slope(&pass.shared[0]);
        d_fixed += &d_pre;
        let (kept, missing) = match group.shown {
            Shown::Picture => (&pass.image, &pass.tags),
            Shown::Tags => (&pass.tags, &pass.image),
        };
        d_w_missing += &missing.t().dot(&d_pre);
        let d_missing_top = d_pre.dot(&w_missing.t());
        let d_w_kept = kept.t().dot(&d_fixed);
        let d_kept_top = d_fixed.dot(&w_kept.t());
        add(grads, SHARED_B, d_fixed.sum_axis(Axis(0)));
        let (kept_rows, missing_rows) = self.side_rows(group.shown);
        let mut d_shared_w = Array2::<f32>::zeros(self.shared.weights.raw_dim());
        d_shared_w.slice_mut(s![kept_rows, ..]).assign(&d_w_kept);
        d_shared_w
            .slice_mut(s![missing_rows.clone(), ..])
            .assign(&d_w_missing);
        add(grads, SHARED_W, d_shared_w);
        let mut d_shared_a = Array1::<f32>::zeros(self.shared.visible_bias.raw_dim());
        d_shared_a.slice_mut(s![missing_rows]).assign(&d_a_missing);
        add(grads, SHARED_VISIBLE_B, d_shared_a);
        let (d_image_top, d_tags_top) = match group.shown {
            Shown::Picture => (d_kept_top, d_missing_top),
            Shown::Tags => (d_missing_top, d_kept_top),
        };
        let d_image = d_image_top * sigmoid_slope(&pass.image);
        let d_tags = d_tags_top * sigmoid_slope(&pass.tags);
        add(grads, IMAGE_B, d_image.sum_axis(Axis(0)));
        match group.shown {
            Shown::Picture => {
                add(grads, IMAGE_W, group.input.t().dot(&d_image));
                // The tag input is zero: no weight gradient; the hidden bias enters
                // scaled by the tag count (0 for the replicated softmax).
                let zero = Array2::zeros((1, self.n_tags()));
                let scale = self.tags.bias_scales(zero.view())[0];
                add(grads, TAG_B, d_tags.sum_axis(Axis(0)) * scale);
            }
            Shown::Tags => {
                add(grads, TAG_W, group.input.t().dot(&d_tags));
                // The hidden bias enters each row's input scaled (by its tag count for
                // the replicated softmax), so its gradient is scaled alike.
                add(
                    grads,
                    TAG_B,
                    self.tags.bias_scales(group.input).dot(&d_tags),
                );
            }
        }
        loss
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
        let pass = self.forward(features, Shown::Picture);
        Ok((cross_entropy(pass.logits.view(), tags) / features.nrows().max(1) as f64) as f32)
    }

    fn fine_tune(
        &mut self,
        features: ArrayView2<f32>,
        views: &[ArrayView2<f32>],
        tags: ArrayView2<f32>,
        mut validation: Option<&mut dyn FnMut(&JointModel) -> f32>,
        opts: &JointOptions,
        progress: &mut dyn FnMut(JointProgress),
    ) -> Result<JointSummary, ModelError> {
        let mut rng = ChaCha8Rng::seed_from_u64(opts.seed ^ 0x6a6f_696e);
        let mut adam = Adam::new(self.parameters_mut());
        let n = features.nrows();
        // Examples: (source, row), source 0 = the original picture, v + 1 = view v.
        let mut order: Vec<(usize, usize)> = (0..n).map(|i| (0, i)).collect();
        if opts.view_rows {
            order.extend((1..=views.len()).flat_map(|v| (0..n).map(move |i| (v, i))));
        }
        let swap = opts.view_share > 0.0 && !views.is_empty();
        let mut best = KeepBest::new(opts.patience);
        let mut epochs_run = 0;
        for epoch in 0..opts.max_epochs {
            order.shuffle(&mut rng);
            let mut total = 0.0f64;
            for batch in order.chunks(opts.batch_size) {
                // Modality dropout: each original is seen through one side only; views
                // are always shown as pictures (as tags they would repeat the original).
                let mut tags_only = Vec::new();
                let mut pictures_only = Vec::new();
                for &(source, row) in batch {
                    if source == 0 && rng.random::<f32>() < opts.tags_only_fraction {
                        tags_only.push(row);
                    } else if source == 0 && swap && rng.random::<f32>() < opts.view_share {
                        pictures_only.push((rng.random_range(1..=views.len()), row));
                    } else {
                        pictures_only.push((source, row));
                    }
                }
                let x = picture_rows(features, views, &pictures_only);
                let picture_tags: Vec<usize> = pictures_only.iter().map(|&(_, i)| i).collect();
                let x_target = tags.select(Axis(0), &picture_tags);
                let t = tags.select(Axis(0), &tags_only);
                // Where the tags-only codes are pulled: their pictures' own codes, as
                // constants (no gradient flows into the picture side).
                let pull = (opts.alignment_weight > 0.0 && !tags_only.is_empty()).then(|| {
                    self.forward(features.select(Axis(0), &tags_only).view(), Shown::Picture)
                        .shared
                        .pop()
                        .unwrap_or_default()
                });
                let groups = [
                    Group {
                        input: x.view(),
                        target: x_target.view(),
                        shown: Shown::Picture,
                        align: None,
                    },
                    Group {
                        input: t.view(),
                        target: t.view(),
                        shown: Shown::Tags,
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

fn pretrain<M: Trainable>(
    rbm: &mut M,
    data: ArrayView2<f32>,
    layer: &'static str,
    learning_rate: f32,
    opts: &JointOptions,
    progress: &mut dyn FnMut(JointProgress),
) -> Result<(), ModelError> {
    let train_opts = TrainOptions {
        epochs: opts.pretrain_epochs,
        batch_size: opts.batch_size,
        learning_rate,
        seed: opts.seed,
        ..TrainOptions::default()
    };
    train(rbm, data, None, &train_opts, &mut |report| {
        progress(JointProgress::Pretraining { layer, report })
    })?;
    Ok(())
}

/// Feature rows of `(source, row)` examples: source 0 is `features`, v + 1 is `views[v]`.
fn picture_rows(
    features: ArrayView2<f32>,
    views: &[ArrayView2<f32>],
    examples: &[(usize, usize)],
) -> Array2<f32> {
    let mut x = Array2::zeros((examples.len(), features.ncols()));
    for (mut out, &(source, row)) in x.outer_iter_mut().zip(examples) {
        let from = if source == 0 {
            features
        } else {
            views[source - 1]
        };
        out.assign(&from.row(row));
    }
    x
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

/// Σ over entries of −[y log σ(l) + (1 − y) log(1 − σ(l))] = softplus(l) − y·l.
fn cross_entropy(logits: ArrayView2<f32>, target: ArrayView2<f32>) -> f64 {
    logits
        .iter()
        .zip(target.iter())
        .map(|(&l, &y)| softplus(f64::from(l)) - f64::from(y) * f64::from(l))
        .sum()
}

/// `row` (one row) repeated `rows` times.
fn repeat_row(row: Array2<f32>, rows: usize) -> Array2<f32> {
    row.broadcast((rows, row.ncols()))
        .unwrap_or_else(|| unreachable!("a one-row matrix broadcasts to any row count"))
        .to_owned()
}

/// grads[k] += delta.
fn add<D: ndarray::Dimension>(grads: &mut [ArrayD<f32>], k: usize, delta: ndarray::Array<f32, D>) {
    grads[k] += &delta.into_dyn();
}

/// σ'(a) expressed through the activation p = σ(a).
fn sigmoid_slope(p: &Array2<f32>) -> Array2<f32> {
    p.mapv(|p| p * (1.0 - p))
}

/// Adam (Kingma & Ba 2015) with β1 = 0.9, β2 = 0.999, ε = 1e-8.
struct Adam {
    first: Vec<ArrayD<f32>>,
    second: Vec<ArrayD<f32>>,
    steps: i32,
}

impl Adam {
    fn new<const N: usize>(params: [ArrayViewMutD<f32>; N]) -> Self {
        let zeros: Vec<ArrayD<f32>> = params.iter().map(|p| ArrayD::zeros(p.raw_dim())).collect();
        Self {
            first: zeros.clone(),
            second: zeros,
            steps: 0,
        }
    }

    fn step<const N: usize>(
        &mut self,
        params: [ArrayViewMutD<f32>; N],
        grads: &[ArrayD<f32>],
        lr: f32,
    ) {
        const B1: f32 = 0.9;
        const B2: f32 = 0.999;
        self.steps += 1;
        let c1 = 1.0 - B1.powi(self.steps);
        let c2 = 1.0 - B2.powi(self.steps);
        for (((mut p, g), m), v) in params
            .into_iter()
            .zip(grads)
            .zip(&mut self.first)
            .zip(&mut self.second)
        {
            ndarray::Zip::from(&mut p)
                .and(g)
                .and(m)
                .and(v)
                .for_each(|p, &g, m, v| {
                    *m = B1 * *m + (1.0 - B1) * g;
                    *v = B2 * *v + (1.0 - B2) * g * g;
                    *p -= lr * (*m / c1) / ((*v / c2).sqrt() + 1e-8);
                });
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::rbm::standard_normal;

    /// Pictures = noisy projections of their tags; each picture carries 1–3 of `n_tags`.
    fn synthetic(n: usize, n_tags: usize, dims: usize, seed: u64) -> (Array2<f32>, Array2<f32>) {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let mixing = Array2::from_shape_simple_fn((n_tags, dims), || standard_normal(&mut rng));
        let mut tags = Array2::zeros((n, n_tags));
        for mut row in tags.rows_mut() {
            for _ in 0..rng.random_range(1..=3) {
                row[rng.random_range(0..n_tags)] = 1.0;
            }
        }
        let noise = Array2::from_shape_simple_fn((n, dims), || standard_normal(&mut rng));
        let x = tags.dot(&mixing) + noise * 0.8;
        // standardise per column as the feature pipeline does
        let mean = x.mean_axis(Axis(0)).unwrap();
        let std = x.std_axis(Axis(0), 0.0).mapv(|s| s.max(1e-6));
        ((x - &mean) / &std, tags)
    }

    fn small_opts(seed: u64) -> JointOptions {
        JointOptions {
            image_hidden: Some(24),
            tag_hidden: Some(16),
            shared_hidden: Some(16),
            pretrain_epochs: 3,
            max_epochs: 200,
            learning_rate: 0.01,
            seed,
            ..JointOptions::default()
        }
    }

    /// Mean over rows of the share of a row's true tags ranked above its best false tag:
    /// a crude ranking check, enough to separate learning from guessing.
    fn mean_top_hit(scores: &Array2<f32>, tags: &Array2<f32>) -> f32 {
        let hits: usize = scores
            .outer_iter()
            .zip(tags.outer_iter())
            .filter(|(s, t)| {
                let best = s
                    .iter()
                    .enumerate()
                    .max_by(|a, b| a.1.total_cmp(b.1))
                    .map(|(i, _)| i)
                    .unwrap();
                t[best] == 1.0
            })
            .count();
        hits as f32 / scores.nrows() as f32
    }

    // Central differences of the loss against the hand-written backward pass, on a
    // tiny network with random (not pretrained) weights large enough to be non-linear:
    // 0, 1 and 2 mean-field steps, pictures-only rows and tags-only rows pulled toward
    // fixed codes.
    #[test]
    fn backprop_matches_finite_differences() {
        for steps in [0, 1, 2] {
            backprop_check(TagUnits::Binary, steps);
            backprop_check(TagUnits::ReplicatedSoftmax, steps);
        }
    }

    fn backprop_check(tag_units: TagUnits, steps: usize) {
        let (x, t) = synthetic(5, 4, 6, 1);
        let opts = JointOptions {
            image_hidden: Some(3),
            tag_hidden: Some(2),
            shared_hidden: Some(3),
            pretrain_epochs: 0,
            tag_units,
            mean_field_steps: steps,
            ..JointOptions::default()
        };
        let mut model = JointModel::pretrained(x.view(), t.view(), &opts, &mut |_| {}).unwrap();
        assert_eq!(model.mean_field_steps, steps);
        let mut rng = ChaCha8Rng::seed_from_u64(4);
        for mut p in model.parameters_mut() {
            p.mapv_inplace(|_| 0.7 * standard_normal(&mut rng));
        }
        // rows 0, 2, 3 shown as pictures; rows 1 and 4 as tags, pulled toward fixed codes
        let pictures = x.select(Axis(0), &[0, 2, 3]);
        let picture_tags = t.select(Axis(0), &[0, 2, 3]);
        let tag_rows = t.select(Axis(0), &[1, 4]);
        let pull = Array2::from_shape_fn((2, 3), |_| rng.random::<f32>());
        let groups = [
            Group {
                input: pictures.view(),
                target: picture_tags.view(),
                shown: Shown::Picture,
                align: None,
            },
            Group {
                input: tag_rows.view(),
                target: tag_rows.view(),
                shown: Shown::Tags,
                align: Some((0.8, pull.view())),
            },
        ];
        let decay = 0.05;
        let (_, grads) = model.gradients(&groups, decay);
        let eps = 1e-2f32;
        let mut checked = 0;
        for (k, grad) in grads.iter().enumerate() {
            for idx in 0..grad.len() {
                let shift = |m: &mut JointModel, d: f32| {
                    let mut params = m.parameters_mut();
                    let p = &mut params[k];
                    let slot = p.iter_mut().nth(idx).unwrap();
                    *slot += d;
                };
                let mut plus = model.clone();
                shift(&mut plus, eps);
                let mut minus = model.clone();
                shift(&mut minus, -eps);
                let lp = plus.gradients(&groups, decay).0;
                let lm = minus.gradients(&groups, decay).0;
                let numeric = ((lp - lm) / (2.0 * f64::from(eps))) as f32;
                let analytic = grad.iter().nth(idx).copied().unwrap();
                assert!(
                    (numeric - analytic).abs() < 2e-3 + 0.02 * analytic.abs(),
                    "{tag_units:?}, {steps} steps: parameter block {k}, entry {idx}: numeric {numeric}, backprop {analytic}"
                );
                checked += 1;
            }
        }
        // 6·3+3 + 4·2+2 + 5·3+3 + 3·4+4 + 5 (the shared visible bias)
        assert_eq!(checked, 21 + 10 + 18 + 16 + 5);
        // Without mean-field steps the shared visible bias is unused; with them it trains.
        let visible = grads[SHARED_VISIBLE_B].iter().map(|g| g.abs()).sum::<f32>();
        assert_eq!(visible > 0.0, steps > 0, "{visible}");
    }

    /// A hand-built model: 2 features → 2 image units, 3 tags → 2 tag units,
    /// 4 joint → 2 shared units, 2 shared → 3 tag logits.
    fn tiny_model(steps: usize) -> JointModel {
        let mut image = GaussianBernoulliRbm::new(2, 2, 0.0, 0);
        image.weights = ndarray::array![[0.5, -1.0], [1.5, 0.25]];
        image.hidden_bias = ndarray::array![0.1, -0.2];
        let mut tags = BinaryRbm::new(3, 2, 0.0, 0);
        tags.weights = ndarray::array![[1.0, -0.5], [-2.0, 0.75], [0.3, 1.2]];
        tags.hidden_bias = ndarray::array![-0.4, 0.6];
        let mut shared = BinaryRbm::new(4, 2, 0.0, 0);
        shared.weights = ndarray::array![[0.8, -0.6], [-1.1, 0.9], [0.4, 1.3], [-0.7, -0.2]];
        shared.hidden_bias = ndarray::array![0.05, -0.15];
        shared.visible_bias = ndarray::array![0.2, -0.3, 0.35, -0.45];
        JointModel {
            image,
            tags: TagLayer::Binary(tags),
            shared,
            readout_weights: ndarray::array![[1.0, -1.5, 0.5], [-0.25, 2.0, 0.75]],
            readout_bias: ndarray::array![0.1, 0.0, -0.1],
            mean_field_steps: steps,
        }
    }

    fn sig(a: f64) -> f64 {
        1.0 / (1.0 + (-a).exp())
    }

    /// σ(bias_j + Σ_i v_i W_ij), written out entry by entry.
    fn layer(v: &[f64], w: &[&[f64]], bias: &[f64]) -> Vec<f64> {
        (0..bias.len())
            .map(|j| sig(bias[j] + v.iter().zip(w).map(|(vi, row)| vi * row[j]).sum::<f64>()))
            .collect()
    }

    // The mean-field recursion of the doc comments, unrolled by hand in f64 with scalar
    // loops, for 0–3 steps and both directions. (source: the procedure of tagweave issue
    // 5, "Fill-in"; mean-field updates of a deep Boltzmann machine, Salakhutdinov &
    // Hinton 2009, with the pathways' tops as the visible layer of the shared RBM)
    #[test]
    fn mean_field_matches_a_hand_unrolled_computation() {
        let x = [0.7, -1.2];
        let t = [1.0, 0.0, 1.0];
        let w_img: [&[f64]; 2] = [&[0.5, -1.0], &[1.5, 0.25]];
        let w_tag: [&[f64]; 3] = [&[1.0, -0.5], &[-2.0, 0.75], &[0.3, 1.2]];
        let w_s: [[f64; 2]; 4] = [[0.8, -0.6], [-1.1, 0.9], [0.4, 1.3], [-0.7, -0.2]];
        let (c_s, a_s) = ([0.05, -0.15], [0.2, -0.3, 0.35, -0.45]);
        let shared_of = |joint: &[f64]| {
            let rows: Vec<&[f64]> = w_s.iter().map(|r| r.as_slice()).collect();
            layer(joint, &rows, &c_s)
        };
        // top-down to joint units `range` from the shared layer
        let down = |s: &[f64], range: std::ops::Range<usize>| -> Vec<f64> {
            range
                .map(|i| sig(a_s[i] + s[0] * w_s[i][0] + s[1] * w_s[i][1]))
                .collect()
        };
        for steps in 0..=3 {
            let model = tiny_model(steps);
            // pictures shown: the tag pathway sees an empty bag first
            let h_img = layer(&x, &w_img, &[0.1, -0.2]);
            let mut h_tag = layer(&[0.0; 3], &w_tag, &[-0.4, 0.6]);
            let mut s = shared_of(&[h_img.clone(), h_tag.clone()].concat());
            for _ in 0..steps {
                h_tag = down(&s, 2..4);
                s = shared_of(&[h_img.clone(), h_tag.clone()].concat());
            }
            let want: Vec<f64> = (0..3)
                .map(|k| {
                    let r = [[1.0, -1.5, 0.5], [-0.25, 2.0, 0.75]];
                    sig([0.1, 0.0, -0.1][k] + s[0] * r[0][k] + s[1] * r[1][k])
                })
                .collect();
            let features = Array2::from_shape_vec((1, 2), x.map(|v| v as f32).to_vec()).unwrap();
            let got = model.fill_in_tags(features.view()).unwrap();
            let code = model.shared_code(features.view()).unwrap();
            for (g, w) in got.iter().zip(&want).chain(code.iter().zip(&s)) {
                assert!(
                    (f64::from(*g) - w).abs() < 1e-6,
                    "{steps} steps: {g} vs {w}"
                );
            }
            // tags shown: the image pathway sees an all-zero picture first
            let h_tag = layer(&t, &w_tag, &[-0.4, 0.6]);
            let mut h_img = layer(&[0.0; 2], &w_img, &[0.1, -0.2]);
            let mut s = shared_of(&[h_img.clone(), h_tag.clone()].concat());
            for _ in 0..steps {
                h_img = down(&s, 0..2);
                s = shared_of(&[h_img.clone(), h_tag.clone()].concat());
            }
            let tags = Array2::from_shape_vec((1, 3), t.map(|v| v as f32).to_vec()).unwrap();
            let code = model.code_from_tags(tags.view()).unwrap();
            for (g, w) in code.iter().zip(&s) {
                assert!(
                    (f64::from(*g) - w).abs() < 1e-6,
                    "{steps} steps: {g} vs {w}"
                );
            }
        }
        // The steps change the answer (else the test above would check nothing).
        let features = ndarray::array![[0.7f32, -1.2]];
        assert_ne!(
            tiny_model(0).fill_in_tags(features.view()).unwrap(),
            tiny_model(2).fill_in_tags(features.view()).unwrap()
        );
    }

    // Models saved before mean-field steps existed were trained and used without them.
    #[test]
    fn models_saved_without_the_steps_load_with_none() {
        let json = serde_json::to_value(tiny_model(2)).unwrap();
        let mut old = json.clone();
        old.as_object_mut().unwrap().remove("mean_field_steps");
        let loaded: JointModel = serde_json::from_value(old).unwrap();
        assert_eq!(loaded, tiny_model(0));
        assert_eq!(
            serde_json::from_value::<JointModel>(json).unwrap(),
            tiny_model(2)
        );
    }

    /// Mean over rows of the rank (1 = first) of row i's own picture among all
    /// pictures, ordered by cosine of the tag code to the picture codes.
    fn mean_own_rank(from_tags: &Array2<f32>, pictures: &Array2<f32>) -> f32 {
        let unit = |m: &Array2<f32>| {
            let norms = m.map_axis(Axis(1), |r| r.dot(&r).sqrt().max(1e-12));
            m / &norms.insert_axis(Axis(1))
        };
        let sim = unit(from_tags).dot(&unit(pictures).t());
        let total: usize = sim
            .outer_iter()
            .enumerate()
            .map(|(i, row)| 1 + row.iter().filter(|&&v| v > row[i]).count())
            .sum();
        total as f32 / sim.nrows() as f32
    }

    // Without mean-field steps the tags-only code lands furthest from the pictures'
    // codes, so that is where the pull shows most clearly on this easy synthetic task
    // (with 1–2 steps it measured within ±10 % here, see the report).
    #[test]
    fn alignment_brings_tag_codes_near_their_pictures() {
        let (x, t) = synthetic(300, 30, 30, 8);
        let (train_x, test_x) = x.view().split_at(Axis(0), 200);
        let (train_t, test_t) = t.view().split_at(Axis(0), 200);
        let rank = |alignment_weight: f32| {
            let opts = JointOptions {
                max_epochs: 60,
                tags_only_fraction: 0.3,
                mean_field_steps: 0,
                alignment_weight,
                ..small_opts(11)
            };
            let (m, _) = JointModel::fit(train_x, train_t, None, &opts, &mut |_| {}).unwrap();
            let pictures = m.shared_code(test_x).unwrap();
            mean_own_rank(&m.code_from_tags(test_t).unwrap(), &pictures)
        };
        let (off, on) = (rank(0.0), rank(5.0));
        // Measured: mean rank of the own picture among 100 test pictures 5.30 without,
        // 3.41 with the pull.
        assert!(
            on < 0.8 * off,
            "mean rank with alignment {on}, without {off}"
        );
    }

    #[test]
    fn fine_tuning_learns_to_suggest_tags_from_pictures() {
        let (x, t) = synthetic(400, 10, 30, 2);
        let (train_x, test_x) = x.view().split_at(Axis(0), 300);
        let (train_t, test_t) = t.view().split_at(Axis(0), 300);
        let (fit_x, val_x) = train_x.split_at(Axis(0), 250);
        let (fit_t, val_t) = train_t.split_at(Axis(0), 250);
        let mut reports = Vec::new();
        let (model, summary) = JointModel::fit(
            fit_x,
            fit_t,
            Some(&mut |m: &JointModel| -m.picture_only_loss(val_x, val_t).unwrap()),
            &small_opts(3),
            &mut |p| reports.push(p),
        )
        .unwrap();
        let losses: Vec<f32> = reports
            .iter()
            .filter_map(|r| match r {
                JointProgress::FineTuning(f) => f.validation_score.map(|s| -s),
                JointProgress::Pretraining { .. } => None,
            })
            .collect();
        assert_eq!(losses.len(), summary.epochs_run);
        // Measured: validation loss 4.77 → 0.58 (kept epoch 182 of 191); top tag right
        // for 100 % of test pictures; tags read back 100 %.
        assert!(losses[summary.kept_epoch] < 0.7 * losses[0], "{losses:?}");
        assert!(
            reports.iter().any(|r| matches!(
                r,
                JointProgress::Pretraining {
                    layer: "shared",
                    ..
                }
            )),
            "all three layers are pretrained"
        );
        // Guessing picks a true tag for about 2/10 of the rows; the tags are linear in the
        // features, so a trained predictor should get the top tag right most of the time.
        let scores = model.fill_in_tags(test_x).unwrap();
        assert_eq!(scores.dim(), (100, 10));
        let hit = mean_top_hit(&scores, &test_t.to_owned());
        assert!(hit > 0.8, "top tag right for {hit} of the test pictures");
        // The tags-only examples train tags → shared code → tags: it must read back its input.
        let code = model.code_from_tags(test_t).unwrap();
        let read_back = code.dot(&model.readout_weights) + &model.readout_bias;
        let hit = mean_top_hit(&read_back, &test_t.to_owned());
        assert!(
            hit > 0.9,
            "top tag read back for {hit} of the test tag rows; {summary:?}"
        );
    }

    // The originals are noise; only the views show the tags. A model that learns to
    // suggest tags for informative test pictures can only have learned from the views.
    #[test]
    fn fine_tuning_learns_from_views_when_asked() {
        let (x, t) = synthetic(400, 10, 30, 2);
        let (train_x, test_x) = x.view().split_at(Axis(0), 300);
        let (train_t, test_t) = t.view().split_at(Axis(0), 300);
        let mut rng = ChaCha8Rng::seed_from_u64(5);
        let noise = Array2::from_shape_simple_fn((300, 30), || standard_normal(&mut rng));
        let hit = |views: &[ArrayView2<f32>], view_share: f32, view_rows: bool| {
            let opts = JointOptions {
                max_epochs: 60,
                view_share,
                view_rows,
                ..small_opts(3)
            };
            let (m, _) =
                JointModel::fit_with_views(noise.view(), views, train_t, None, &opts, &mut |_| {})
                    .unwrap();
            mean_top_hit(&m.fill_in_tags(test_x).unwrap(), &test_t.to_owned())
        };
        let views = [train_x, train_x];
        let without = hit(&[], 1.0, true);
        let ignored = hit(&views, 0.0, false);
        let swapped = hit(&views, 1.0, false);
        let rows = hit(&views, 0.0, true);
        // Measured: top tag right for 0.19 / 0.19 of the test pictures without views or
        // with views switched off, 0.99 swapped in, 0.98 as extra rows.
        assert_eq!(without, ignored);
        assert!(without < 0.4, "noise alone: {without}");
        assert!(swapped > 0.8, "views swapped in: {swapped}");
        assert!(rows > 0.7, "views as extra rows: {rows}");
    }

    #[test]
    fn without_views_fit_is_unchanged_and_bad_views_are_reported() {
        let (x, t) = synthetic(60, 4, 6, 1);
        let opts = JointOptions {
            max_epochs: 3,
            view_share: 0.5,
            view_rows: true,
            ..small_opts(0)
        };
        let plain = JointOptions {
            view_share: 0.0,
            view_rows: false,
            ..opts.clone()
        };
        let (a, _) = JointModel::fit(x.view(), t.view(), None, &opts, &mut |_| {}).unwrap();
        let (b, _) = JointModel::fit(x.view(), t.view(), None, &plain, &mut |_| {}).unwrap();
        assert_eq!(a, b, "with no views the view options change nothing");
        let (c, _) =
            JointModel::fit_with_views(x.view(), &[x.view()], t.view(), None, &opts, &mut |_| {})
                .unwrap();
        assert_ne!(a, c, "views change the training");
        let short = x.slice(ndarray::s![..10, ..]);
        let e = JointModel::fit_with_views(x.view(), &[short], t.view(), None, &opts, &mut |_| {})
            .unwrap_err();
        assert!(
            matches!(e, ModelError::RowMismatch { got: 10, .. }),
            "{e:?}"
        );
        let narrow = x.slice(ndarray::s![.., ..5]);
        let e = JointModel::fit_with_views(x.view(), &[narrow], t.view(), None, &opts, &mut |_| {})
            .unwrap_err();
        assert!(matches!(e, ModelError::WidthMismatch { .. }), "{e:?}");
        let e = JointModel::fit(
            x.view(),
            t.view(),
            None,
            &JointOptions {
                view_share: 1.5,
                ..opts
            },
            &mut |_| {},
        )
        .unwrap_err();
        assert!(matches!(e, ModelError::InvalidOption { .. }), "{e:?}");
    }

    #[test]
    fn same_seed_same_model_and_serde_round_trip() {
        let (x, t) = synthetic(120, 6, 12, 5);
        let opts = JointOptions {
            max_epochs: 5,
            ..small_opts(9)
        };
        let run = |threads, opts: &JointOptions| {
            let pool = rayon::ThreadPoolBuilder::new()
                .num_threads(threads)
                .build()
                .unwrap();
            pool.install(|| {
                let (m, _) = JointModel::fit(x.view(), t.view(), None, opts, &mut |_| {}).unwrap();
                m
            })
        };
        let a = run(1, &opts);
        let b = run(2, &opts);
        assert_eq!(
            a.fill_in_tags(x.view()).unwrap(),
            b.fill_in_tags(x.view()).unwrap()
        );
        assert_eq!(a, b);
        let other = run(2, &JointOptions { seed: 10, ..opts });
        assert_ne!(a, other);
        let json = serde_json::to_string(&a).unwrap();
        assert_eq!(a, serde_json::from_str::<JointModel>(&json).unwrap());
    }

    #[test]
    fn bad_inputs_are_reported() {
        let (x, t) = synthetic(20, 4, 6, 1);
        let fit = |x: ArrayView2<f32>, t: ArrayView2<f32>, opts: &JointOptions| {
            JointModel::fit(x, t, None, opts, &mut |_| {}).map(|_| ())
        };
        let opts = JointOptions {
            max_epochs: 1,
            ..small_opts(0)
        };
        let e = fit(x.view(), (t.clone() * 2.0).view(), &opts).unwrap_err();
        assert!(matches!(e, ModelError::OutOfUnitRange { .. }), "{e:?}");
        let e = fit(x.view(), t.slice(ndarray::s![..5, ..]), &opts).unwrap_err();
        assert!(matches!(e, ModelError::RowMismatch { got: 5, .. }), "{e:?}");
        let e = fit(
            x.view(),
            t.view(),
            &JointOptions {
                tags_only_fraction: 1.0,
                ..opts.clone()
            },
        )
        .unwrap_err();
        assert!(matches!(e, ModelError::InvalidOption { .. }), "{e:?}");
        let (model, _) = JointModel::fit(x.view(), t.view(), None, &opts, &mut |_| {}).unwrap();
        let e = model
            .fill_in_tags(Array2::zeros((2, 7)).view())
            .unwrap_err();
        assert!(
            matches!(e, ModelError::WidthMismatch { got: 7, .. }),
            "{e:?}"
        );
    }

    // By hand: 478 rows → 480 image units; 1700 tags → 212 → 224 → capped at 128;
    // shared (480 + 128)/2 = 304 → capped at 256. 10 rows, 3 tags → all at the floor 16.
    // 5000 rows → capped at 512; 10 tags → 16; shared (512 + 16)/2 = 264 → 256.
    #[test]
    fn layer_sizes_scale_with_the_data() {
        let o = JointOptions::default();
        assert_eq!(o.sizes_for(478, 1700), (480, 128, 256));
        assert_eq!(o.sizes_for(10, 3), (16, 16, 16));
        assert_eq!(o.sizes_for(5000, 10), (512, 16, 256));
    }
}
