//! What the joint model is asked to do: layer sizes, pretraining and fine-tuning settings.

use serde::{Deserialize, Serialize};

use crate::ModelError;

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
    /// Adam step size (default 3e-3: as good as a smaller step in fewer epochs; measured:
    /// BENCHMARKS.md, section "What did not help").
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
    /// and the missing side's pathway top updated in turn (see
    /// [`JointModel::fill_in_tags`](crate::JointModel::fill_in_tags)). Fine-tuning unrolls
    /// the same steps, so training matches use. Default 1: the step count barely moves
    /// the tag ranking, and one step puts the tags-only code nearest its own picture
    /// (measured: BENCHMARKS.md, section "Mean-field fill-in steps").
    pub mean_field_steps: usize,
    /// Weight of the pull of each tags-only example's shared code toward its own
    /// picture's code (squared distance per example; the picture side is held fixed so
    /// picture codes are not dragged toward tags). 0 turns it off (default: with one
    /// mean-field step the pull made the tag ranking and the tags-only recall worse;
    /// measured: BENCHMARKS.md, section "Alignment of the tags-only code").
    pub alignment_weight: f32,
    /// With picture variants given to
    /// [`JointModel::fit_with_variants`](crate::JointModel::fit_with_variants): the chance
    /// that an original shown as a picture is shown through one of its variants (picked at
    /// random) instead, each epoch anew; 0 = originals only (default 0, see
    /// `variant_rows`).
    pub variant_share: f32,
    /// With variants given: every variant also joins each epoch as an example of its
    /// own, always shown as a picture (default false). Off by default because the small
    /// gain in tag ranking came with worse query results (measured: BENCHMARKS.md,
    /// section "Picture variants").
    pub variant_rows: bool,
    /// Chance that a training picture shown as a picture also reveals some of its own
    /// tags as evidence (a random subset of 1 … n − 1 of its n tags, drawn anew each
    /// epoch), while the read-out is still asked for all of them: the model is trained
    /// the way tag completion uses it. 0 = pictures alone (default 0.5; measured:
    /// BENCHMARKS.md, "tag completion").
    pub reveal_share: f32,
}

/// How the tag pathway sees a bag of tags. Binary is the default because it ranks tags
/// no worse (measured: BENCHMARKS.md, section "Tag layer").
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
            variant_share: 0.0,
            variant_rows: false,
            reveal_share: 0.5,
        }
    }
}

impl JointOptions {
    /// (image, tag, shared) hidden sizes for `rows` training pictures and `n_tags` tags.
    /// One image unit per picture (16–512), one tag unit per eight tags (16–128), the
    /// shared layer half their sum (16–256): fewer image units ranked tags worse, more
    /// were no better and slower (measured: BENCHMARKS.md, section "What did not help").
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

    pub(super) fn validate(&self) -> Result<(), ModelError> {
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
        if !(0.0..=1.0).contains(&self.variant_share) {
            return bad(
                "variant_share",
                self.variant_share.to_string(),
                "use a value in [0, 1], e.g. 0.5 (0 = originals only)",
            );
        }
        if !(0.0..=1.0).contains(&self.reveal_share) {
            return bad(
                "reveal_share",
                self.reveal_share.to_string(),
                "use a value in [0, 1], e.g. 0.5 (0 = pictures alone)",
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

#[cfg(test)]
mod tests {
    use super::*;

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
