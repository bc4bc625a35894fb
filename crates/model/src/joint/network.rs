//! The unrolled network: the forward pass with mean-field fill-in of the missing side, and
//! its backward pass through every step.

use std::ops::Range;

use ndarray::{
    s, Array, Array1, Array2, ArrayD, ArrayView1, ArrayView2, ArrayViewMutD, Axis, Dimension, IxDyn,
};

use super::JointModel;
use crate::kernels::sigmoid;
use crate::rbm::softplus;

/// The side of an example the network is shown; the other side is zeroed and
/// filled in by mean-field.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(super) enum Shown {
    Picture,
    Tags,
}

/// Activations of one forward pass, kept for the backward pass.
pub(super) struct Pass {
    /// Pathway tops, bottom-up (the missing side's from its zero input).
    image: Array2<f32>,
    tags: Array2<f32>,
    /// s⁰ … sᵏ: the shared layer bottom-up, then after each mean-field step.
    pub(super) shared: Vec<Array2<f32>>,
    /// h¹ … hᵏ: the missing side's pathway top, top-down from the previous s.
    filled: Vec<Array2<f32>>,
    pub(super) logits: Array2<f32>,
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
pub(super) struct Group<'a> {
    pub(super) input: ArrayView2<'a, f32>,
    pub(super) target: ArrayView2<'a, f32>,
    pub(super) shown: Shown,
    /// With the picture shown: 0/1 tags it reveals as evidence (rows like `input`).
    pub(super) revealed: Option<ArrayView2<'a, f32>>,
    /// Alignment weight and the codes (held fixed) the examples' codes are pulled toward.
    pub(super) align: Option<(f32, ArrayView2<'a, f32>)>,
}

/// Positions in [`JointModel::parameters_mut`] and the gradient list.
pub(super) const IMAGE_W: usize = 0;
pub(super) const IMAGE_B: usize = 1;
pub(super) const TAG_W: usize = 2;
pub(super) const TAG_B: usize = 3;
pub(super) const SHARED_W: usize = 4;
pub(super) const SHARED_B: usize = 5;
pub(super) const READOUT_W: usize = 6;
pub(super) const READOUT_B: usize = 7;
pub(super) const SHARED_VISIBLE_B: usize = 8;

impl JointModel {
    /// `input`: features when `shown` is the picture, 0/1 tags when it is the tags.
    ///
    /// `revealed` (picture shown only): tags the pictures are known to carry. They enter
    /// the tag pathway bottom-up, and every mean-field step adds their bottom-up input
    /// to the top-down one, as in mean-field inference of a multimodal deep Boltzmann
    /// machine, where a hidden layer hears the layers below and above it (source:
    /// Srivastava & Salakhutdinov, "Multimodal Learning with Deep Boltzmann Machines",
    /// JMLR 15, 2014, section 4). Without revealed tags this is picture-only fill-in.
    pub(super) fn forward(
        &self,
        input: ArrayView2<f32>,
        shown: Shown,
        revealed: Option<ArrayView2<f32>>,
    ) -> Pass {
        let rows = input.nrows();
        // The missing side's pathway sees an all-zero input: one row, repeated.
        let (image, tags) = match shown {
            Shown::Picture => (
                self.image.hidden_probabilities(input),
                match revealed {
                    Some(r) => self.tags.hidden_probabilities(r),
                    None => repeat_row(
                        self.tags
                            .hidden_probabilities(Array2::zeros((1, self.n_tags())).view()),
                        rows,
                    ),
                },
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
        let evidence = revealed
            .filter(|_| shown == Shown::Picture)
            .map(|r| r.dot(self.tags.weights()));
        let mut filled = Vec::with_capacity(self.mean_field_steps);
        for _ in 0..self.mean_field_steps {
            let last = &shared[shared.len() - 1];
            let mut pre = last.dot(&w_missing.t()) + a_missing;
            if let Some(u) = &evidence {
                pre += u;
            }
            let h = pre.mapv(sigmoid);
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
    pub(super) fn parameters_mut(&mut self) -> [ArrayViewMutD<'_, f32>; 9] {
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
    pub(super) fn gradients(&self, groups: &[Group], decay: f32) -> (f64, Vec<ArrayD<f32>>) {
        let tag_weights = self.tags.weights();
        let shapes = [
            self.image.weights.raw_dim().into_dyn(),
            self.image.hidden_bias.raw_dim().into_dyn(),
            tag_weights.raw_dim().into_dyn(),
            IxDyn(&[tag_weights.ncols()]),
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
        let pass = self.forward(group.input, group.shown, group.revealed);
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
        // Gradient at the revealed tags' bottom-up input, summed over the steps.
        let mut d_evidence = Array2::<f32>::zeros((code.nrows(), w_missing.nrows()));
        for t in (1..pass.shared.len()).rev() {
            let d_pre = g * sigmoid_slope(&pass.shared[t]);
            d_fixed += &d_pre;
            let h = &pass.filled[t - 1];
            d_w_missing += &h.t().dot(&d_pre);
            let d_h = d_pre.dot(&w_missing.t()) * sigmoid_slope(h);
            d_w_missing += &d_h.t().dot(&pass.shared[t - 1]);
            d_a_missing += &d_h.sum_axis(Axis(0));
            d_evidence += &d_h;
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
                match group.revealed {
                    Some(r) => {
                        add(grads, TAG_W, r.t().dot(&(d_tags.clone() + &d_evidence)));
                        add(grads, TAG_B, self.tags.bias_scales(r).dot(&d_tags));
                    }
                    None => {
                        // The tag input is zero: no weight gradient; the hidden bias
                        // enters scaled by the tag count (0 for the replicated softmax).
                        let zero = Array2::zeros((1, self.n_tags()));
                        let scale = self.tags.bias_scales(zero.view())[0];
                        add(grads, TAG_B, d_tags.sum_axis(Axis(0)) * scale);
                    }
                }
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
}

/// Σ over entries of −[y log σ(l) + (1 − y) log(1 − σ(l))] = softplus(l) − y·l.
pub(super) fn cross_entropy(logits: ArrayView2<f32>, target: ArrayView2<f32>) -> f64 {
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

/// `grads[k] += delta`.
fn add<D: Dimension>(grads: &mut [ArrayD<f32>], k: usize, delta: Array<f32, D>) {
    grads[k] += &delta.into_dyn();
}

/// σ'(a) expressed through the activation p = σ(a).
fn sigmoid_slope(p: &Array2<f32>) -> Array2<f32> {
    p.mapv(|p| p * (1.0 - p))
}
