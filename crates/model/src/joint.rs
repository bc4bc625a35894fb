//! The joint picture–tag model: two pathways and a shared layer, pretrained greedily
//! as RBMs, then unrolled and fine-tuned end to end as a tag predictor.
//!
//! Generative fill-in alone ranked tags clearly worse than kNN tag transfer in the
//! prototype; fine-tuning the route picture → shared → tags with cross-entropy is what
//! made the stack competitive, so fine-tuning is the main training step and the RBM
//! pretraining only an initialisation.

use ndarray::{concatenate, Array1, Array2, ArrayD, ArrayView2, ArrayViewMutD, Axis};
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
    /// Mean cross-entropy per picture (summed over tags) over the epoch's batches.
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
/// trained network; their visible biases stay as pretrained.
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

/// Activations of one forward pass, kept for the backward pass.
struct Pass {
    image: Array2<f32>,
    tags: Array2<f32>,
    joint: Array2<f32>,
    shared: Array2<f32>,
    logits: Array2<f32>,
}

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
        opts.validate()?;
        check_tags("tags", tags)?;
        let mut model = Self::pretrained(features, tags, opts, progress)?;
        let summary = model.fine_tune(features, tags, validation, opts, progress)?;
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
        })
    }

    pub fn n_features(&self) -> usize {
        self.image.n_visible()
    }

    pub fn n_tags(&self) -> usize {
        self.tags.n_visible()
    }

    /// Tag probabilities (pictures × tags) from pictures alone: the tag input is always
    /// zeroed, as for the examples fine-tuning showed without tags.
    pub fn fill_in_tags(&self, features: ArrayView2<f32>) -> Result<Array2<f32>, ModelError> {
        self.image.check_rows("features", features)?;
        let pass = self.forward(
            features,
            Array2::zeros((features.nrows(), self.n_tags())).view(),
        );
        Ok(pass.logits.mapv(sigmoid))
    }

    /// Shared-layer probabilities from pictures alone (tag input zeroed).
    pub fn shared_code(&self, features: ArrayView2<f32>) -> Result<Array2<f32>, ModelError> {
        self.image.check_rows("features", features)?;
        let zeros = Array2::zeros((features.nrows(), self.n_tags()));
        Ok(self.forward(features, zeros.view()).shared)
    }

    /// Shared-layer probabilities from 0/1 tag rows alone (picture input zeroed).
    pub fn code_from_tags(&self, tags: ArrayView2<f32>) -> Result<Array2<f32>, ModelError> {
        self.tags.check_rows("tags", tags)?;
        check_tags("tags", tags)?;
        let zeros = Array2::zeros((tags.nrows(), self.n_features()));
        Ok(self.forward(zeros.view(), tags).shared)
    }

    fn forward(&self, features: ArrayView2<f32>, tags: ArrayView2<f32>) -> Pass {
        let image = self.image.hidden_probabilities(features);
        let tag_hidden = self.tags.hidden_probabilities(tags);
        let joint = concatenate(Axis(1), &[image.view(), tag_hidden.view()])
            .unwrap_or_else(|_| unreachable!("both pathways have one row per picture"));
        let shared = self.shared.hidden_probabilities(joint.view());
        let logits = shared.dot(&self.readout_weights) + &self.readout_bias;
        Pass {
            image,
            tags: tag_hidden,
            joint,
            shared,
            logits,
        }
    }

    /// Parameters the network trains, in a fixed order shared with [`Self::gradients`].
    fn parameters_mut(&mut self) -> [ArrayViewMutD<'_, f32>; 8] {
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
        ]
    }

    /// Mean over rows of the summed sigmoid cross-entropy plus ½·decay·‖W‖² over the
    /// four weight matrices, and its gradient (same order as `parameters_mut`).
    fn gradients(
        &self,
        features: ArrayView2<f32>,
        tag_input: ArrayView2<f32>,
        target: ArrayView2<f32>,
        decay: f32,
    ) -> (f64, Vec<ArrayD<f32>>) {
        let pass = self.forward(features, tag_input);
        let n = features.nrows().max(1) as f32;
        let mut loss = cross_entropy(pass.logits.view(), target) / f64::from(n);
        let weights = [
            &self.image.weights,
            self.tags.weights(),
            &self.shared.weights,
            &self.readout_weights,
        ];
        loss += 0.5
            * f64::from(decay)
            * weights
                .iter()
                .map(|w| f64::from(w.iter().map(|x| x * x).sum::<f32>()))
                .sum::<f64>();

        let d_logits = (pass.logits.mapv(sigmoid) - target) / n;
        let d_readout = pass.shared.t().dot(&d_logits) + &self.readout_weights * decay;
        let d_shared = d_logits.dot(&self.readout_weights.t()) * sigmoid_slope(&pass.shared);
        let d_shared_w = pass.joint.t().dot(&d_shared) + &self.shared.weights * decay;
        let d_joint = d_shared.dot(&self.shared.weights.t());
        let n_image = pass.image.ncols();
        let d_image = &d_joint.slice(ndarray::s![.., ..n_image]) * &sigmoid_slope(&pass.image);
        let d_tags = &d_joint.slice(ndarray::s![.., n_image..]) * &sigmoid_slope(&pass.tags);
        let d_image_w = features.t().dot(&d_image) + &self.image.weights * decay;
        let d_tags_w = tag_input.t().dot(&d_tags) + self.tags.weights() * decay;
        // The hidden bias enters each row's input scaled (by its tag count for the
        // replicated softmax), so its gradient is scaled alike.
        let d_tags_bias = self.tags.bias_scales(tag_input).dot(&d_tags);
        let grads = vec![
            d_image_w.into_dyn(),
            d_image.sum_axis(Axis(0)).into_dyn(),
            d_tags_w.into_dyn(),
            d_tags_bias.into_dyn(),
            d_shared_w.into_dyn(),
            d_shared.sum_axis(Axis(0)).into_dyn(),
            d_readout.into_dyn(),
            d_logits.sum_axis(Axis(0)).into_dyn(),
        ];
        (loss, grads)
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
        let zeros = Array2::zeros(tags.raw_dim());
        let pass = self.forward(features, zeros.view());
        Ok((cross_entropy(pass.logits.view(), tags) / features.nrows().max(1) as f64) as f32)
    }

    fn fine_tune(
        &mut self,
        features: ArrayView2<f32>,
        tags: ArrayView2<f32>,
        mut validation: Option<&mut dyn FnMut(&JointModel) -> f32>,
        opts: &JointOptions,
        progress: &mut dyn FnMut(JointProgress),
    ) -> Result<JointSummary, ModelError> {
        let mut rng = ChaCha8Rng::seed_from_u64(opts.seed ^ 0x6a6f_696e);
        let mut adam = Adam::new(self.parameters_mut());
        let mut order: Vec<usize> = (0..features.nrows()).collect();
        let mut best = KeepBest::new(opts.patience);
        let mut epochs_run = 0;
        for epoch in 0..opts.max_epochs {
            order.shuffle(&mut rng);
            let mut total = 0.0f64;
            for rows in order.chunks(opts.batch_size) {
                let mut x = features.select(Axis(0), rows);
                let target = tags.select(Axis(0), rows);
                let mut tag_input = target.clone();
                // Modality dropout: each example is seen through one side only.
                for i in 0..rows.len() {
                    if rng.random::<f32>() < opts.tags_only_fraction {
                        x.row_mut(i).fill(0.0);
                    } else {
                        tag_input.row_mut(i).fill(0.0);
                    }
                }
                let (loss, grads) =
                    self.gradients(x.view(), tag_input.view(), target.view(), opts.weight_decay);
                total += loss * rows.len() as f64;
                adam.step(self.parameters_mut(), &grads, opts.learning_rate);
            }
            epochs_run = epoch + 1;
            let train_loss = (total / features.nrows().max(1) as f64) as f32;
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
    // tiny network with random (not pretrained) weights large enough to be non-linear.
    #[test]
    fn backprop_matches_finite_differences() {
        backprop_check(TagUnits::Binary);
        backprop_check(TagUnits::ReplicatedSoftmax);
    }

    fn backprop_check(tag_units: TagUnits) {
        let (x, t) = synthetic(5, 4, 6, 1);
        let opts = JointOptions {
            image_hidden: Some(3),
            tag_hidden: Some(2),
            shared_hidden: Some(3),
            pretrain_epochs: 0,
            tag_units,
            ..JointOptions::default()
        };
        let mut model = JointModel::pretrained(x.view(), t.view(), &opts, &mut |_| {}).unwrap();
        let mut rng = ChaCha8Rng::seed_from_u64(4);
        for mut p in model.parameters_mut() {
            p.mapv_inplace(|_| 0.7 * standard_normal(&mut rng));
        }
        // tag input shown for two rows, zeroed for the others
        let mut tag_input = t.clone();
        tag_input.row_mut(0).fill(0.0);
        tag_input.row_mut(2).fill(0.0);
        tag_input.row_mut(3).fill(0.0);
        let decay = 0.05;
        let (_, grads) = model.gradients(x.view(), tag_input.view(), t.view(), decay);
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
                let lp = plus
                    .gradients(x.view(), tag_input.view(), t.view(), decay)
                    .0;
                let lm = minus
                    .gradients(x.view(), tag_input.view(), t.view(), decay)
                    .0;
                let numeric = ((lp - lm) / (2.0 * f64::from(eps))) as f32;
                let analytic = grad.iter().nth(idx).copied().unwrap();
                assert!(
                    (numeric - analytic).abs() < 2e-3 + 0.02 * analytic.abs(),
                    "{tag_units:?}: parameter block {k}, entry {idx}: numeric {numeric}, backprop {analytic}"
                );
                checked += 1;
            }
        }
        // 6·3+3 + 4·2+2 + 5·3+3 + 3·4+4
        assert_eq!(checked, 21 + 10 + 18 + 16);
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
