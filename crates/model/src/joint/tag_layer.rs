//! The tag pathway's first layer: binary units or a replicated softmax.

use ndarray::{Array1, Array2, ArrayView2, ArrayViewMutD, Axis};
use serde::{Deserialize, Serialize};

use crate::train::sealed::Cd;
use crate::{BinaryRbm, ModelError, ReplicatedSoftmaxRbm};

/// The tag pathway's first layer, of either kind of [`TagUnits`](super::TagUnits).
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

    pub(super) fn check_rows(
        &self,
        what: &'static str,
        v: ArrayView2<f32>,
    ) -> Result<(), ModelError> {
        match self {
            TagLayer::Binary(r) => Cd::check_rows(r, what, v),
            TagLayer::ReplicatedSoftmax(r) => Cd::check_rows(r, what, v),
        }
    }

    /// Per row, the multiplier of the hidden bias in the hidden input.
    pub(super) fn bias_scales(&self, v: ArrayView2<f32>) -> Array1<f32> {
        match self {
            TagLayer::Binary(_) => Array1::ones(v.nrows()),
            TagLayer::ReplicatedSoftmax(_) => v.sum_axis(Axis(1)),
        }
    }

    pub(super) fn parameters_mut(&mut self) -> (ArrayViewMutD<'_, f32>, ArrayViewMutD<'_, f32>) {
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
