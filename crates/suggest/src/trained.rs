//! The trained suggester as the store keeps it: with its own tag columns and feature
//! scaling, so a later scan (new pictures, changed tags) never changes what its inputs
//! mean, and with what codes need (hash thresholds, tag centroids).

use ndarray::{Array2, ArrayView2, Axis};
use serde::{Deserialize, Serialize};
use tagweave_model::JointProgress;

use crate::{
    group_ids, KnnScorer, Standardiser, SuggestError, TagColumns, TagSuggester, TrainSet,
    TrainingRun,
};

/// Bumped when [`TrainedModel`] changes shape; an older model is retrained, not guessed at.
pub const MODEL_FORMAT: u32 = 3;

/// A model as kept in the store: everything needed to suggest tags for, and code,
/// any picture described by the store's feature extractor.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct TrainedModel {
    pub format: u32,
    /// Tag of each model column, sorted.
    pub vocabulary: Vec<String>,
    /// Scaling of raw features fitted on the training pictures.
    pub standardiser: Standardiser,
    pub suggester: TagSuggester,
    /// Per shared unit, its median over the training pictures' codes: bit j of a
    /// picture's hash is `code[j] > threshold[j]`, so every bit splits the
    /// collection about in half (the most informative a bit can be).
    pub hash_thresholds: Vec<f32>,
    /// Per tag (model column), the mean code of the training pictures carrying it: the
    /// tag's place among picture codes, for finding pictures by tags and for moving a
    /// picture's code from one tag toward another.
    pub tag_centroids: Vec<Vec<f32>>,
    pub history: TrainingHistory,
}

/// What training went through, for the summary and the loss-curve picture.
#[derive(Debug, Clone, Default, Serialize, Deserialize)]
pub struct TrainingHistory {
    /// Per pretrained layer ("image", "tags", "shared"): reconstruction error per
    /// epoch of the final run.
    pub pretraining: Vec<(String, Vec<f32>)>,
    /// Fine-tuning loss per epoch while choosing the length (validation run).
    pub choosing_loss: Vec<f32>,
    /// Validation LRAP per epoch of that run.
    pub validation_lrap: Vec<f32>,
    /// Fine-tuning loss per epoch of the final run.
    pub final_loss: Vec<f32>,
    pub pictures: usize,
    pub seconds: f64,
}

impl TrainingHistory {
    /// Keeps what one progress report of [`TagSuggester::train`] says.
    pub fn record(&mut self, run: TrainingRun, p: &JointProgress) {
        match (run, p) {
            (TrainingRun::Final, JointProgress::Pretraining { layer, report }) => {
                match self.pretraining.iter_mut().find(|(l, _)| l == layer) {
                    Some((_, errors)) => errors.push(report.reconstruction_error),
                    None => self
                        .pretraining
                        .push((layer.to_string(), vec![report.reconstruction_error])),
                }
            }
            (TrainingRun::Choosing, JointProgress::FineTuning(r)) => {
                self.choosing_loss.push(r.train_loss);
                if let Some(score) = r.validation_score {
                    self.validation_lrap.push(score);
                }
            }
            (TrainingRun::Final, JointProgress::FineTuning(r)) => {
                self.final_loss.push(r.train_loss)
            }
            (TrainingRun::Choosing, JointProgress::Pretraining { .. }) => {}
        }
    }
}

/// The tagged pictures of a collection in model columns, with features scaled for the model.
pub struct TrainingData {
    /// Row of each picture among the rows it was picked from.
    pub rows: Vec<usize>,
    /// Standardised features, one row per picture.
    pub features: Array2<f32>,
    pub tags: Vec<Vec<usize>>,
    pub groups: Vec<usize>,
}

impl TrainingData {
    /// Picks the rows whose tags include one known to `columns` (rows left with no known
    /// tag are dropped), encodes their tags and scales their features. `tags[i]` and
    /// `content_keys[i]` belong to feature row `i` (raw, as stored).
    pub fn tagged(
        tags: &[&[String]],
        content_keys: &[&str],
        features: ArrayView2<f32>,
        columns: &TagColumns,
        standardiser: &Standardiser,
    ) -> TrainingData {
        let mut rows = Vec::new();
        let mut encoded = Vec::new();
        for (i, carried) in tags.iter().enumerate() {
            let known = columns.encode(carried);
            if !known.is_empty() {
                rows.push(i);
                encoded.push(known);
            }
        }
        let keys: Vec<&str> = rows.iter().map(|&i| content_keys[i]).collect();
        TrainingData {
            features: standardiser.apply(features.select(Axis(0), &rows).view()),
            groups: group_ids(&keys),
            rows,
            tags: encoded,
        }
    }

    pub fn train_set(&self, n_tags: usize, seed: u64) -> TrainSet<'_> {
        TrainSet {
            features: self.features.view(),
            tags: &self.tags,
            n_tags,
            groups: &self.groups,
            seed,
            variants: &[],
        }
    }
}

impl TrainedModel {
    /// The model to store after `suggester` was trained on `data` (tags in `columns`,
    /// features scaled by `standardiser`): the codes of the training pictures give the
    /// hash thresholds and the tag centroids.
    pub fn new(
        columns: &TagColumns,
        standardiser: Standardiser,
        suggester: TagSuggester,
        data: &TrainingData,
        history: TrainingHistory,
    ) -> Result<TrainedModel, SuggestError> {
        let codes = suggester.codes(data.features.view())?;
        Ok(TrainedModel {
            format: MODEL_FORMAT,
            vocabulary: columns.tags().to_vec(),
            standardiser,
            hash_thresholds: column_medians(codes.view()),
            tag_centroids: centroids(codes.view(), &data.tags, columns.len()),
            suggester,
            history,
        })
    }

    /// The model's tag columns.
    pub fn columns(&self) -> TagColumns {
        TagColumns::from_items([self.vocabulary.as_slice()])
    }

    /// Raw feature rows (as stored) scaled for the model.
    pub fn scale(&self, raw: ArrayView2<f32>) -> Result<Array2<f32>, SuggestError> {
        if raw.ncols() != self.standardiser.width() {
            return Err(SuggestError::FeatureWidth {
                got: raw.ncols(),
                expected: self.standardiser.width(),
            });
        }
        Ok(self.standardiser.apply(raw))
    }

    /// Values in a raw feature row this model reads.
    pub fn feature_width(&self) -> usize {
        self.standardiser.width()
    }

    /// Codes (shared-layer probabilities) of raw feature rows.
    pub fn codes(&self, raw: ArrayView2<f32>) -> Result<Array2<f32>, SuggestError> {
        self.suggester.codes(self.scale(raw)?.view())
    }

    /// The kNN part of the suggestions with no pictures yet: the caller adds the
    /// collection's tagged pictures as they are now, a batch at a time (tags accepted since
    /// training count at once).
    pub fn empty_neighbours(&self) -> KnnScorer {
        KnnScorer::empty(self.suggester.k, self.vocabulary.len())
    }
}

fn centroids(codes: ArrayView2<f32>, tags: &[Vec<usize>], n_tags: usize) -> Vec<Vec<f32>> {
    let mut sums = vec![vec![0.0f64; codes.ncols()]; n_tags];
    let mut counts = vec![0usize; n_tags];
    for (code, carried) in codes.outer_iter().zip(tags) {
        for &t in carried {
            counts[t] += 1;
            sums[t]
                .iter_mut()
                .zip(code)
                .for_each(|(s, &c)| *s += f64::from(c));
        }
    }
    sums.into_iter()
        .zip(counts)
        .map(|(sum, n)| {
            sum.into_iter()
                .map(|s| (s / n.max(1) as f64) as f32)
                .collect()
        })
        .collect()
}

fn column_medians(codes: ArrayView2<f32>) -> Vec<f32> {
    codes
        .columns()
        .into_iter()
        .map(|c| {
            let mut v = c.to_vec();
            v.sort_by(f32::total_cmp);
            match v.len() {
                0 => 0.5,
                n if n % 2 == 1 => v[n / 2],
                n => 0.5 * (v[n / 2 - 1] + v[n / 2]),
            }
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    // by hand: tag 0 on rows 0 and 2 → mean of [1, 0] and [3, 2] = [2, 1]; tag 1 on row 1 only.
    #[test]
    fn tag_centroids_are_mean_codes_of_carriers() {
        let codes = ndarray::array![[1.0f32, 0.0], [5.0, 5.0], [3.0, 2.0]];
        let c = centroids(codes.view(), &[vec![0], vec![1], vec![0]], 3);
        assert_eq!(c, vec![vec![2.0, 1.0], vec![5.0, 5.0], vec![0.0, 0.0]]);
    }

    // by hand: medians of [3, 1, 2] = 2 and of [0.1, 0.4, 0.2, 0.3] = 0.25.
    #[test]
    fn hash_thresholds_are_column_medians() {
        let odd = ndarray::array![[3.0f32], [1.0], [2.0]];
        assert_eq!(column_medians(odd.view()), vec![2.0]);
        let even = ndarray::array![[0.1f32], [0.4], [0.2], [0.3]];
        assert!((column_medians(even.view())[0] - 0.25).abs() < 1e-7);
    }

    // by hand: columns {boat, sea}; row 1 carries only "fog" (unknown) and is dropped; rows
    // 0 and 2 share a content key, so one group. Scaling by mean 2 and std 1 on the only
    // column: raw [1, 9, 3] → picked [1, 3] → [-1, 1].
    #[test]
    fn training_data_keeps_rows_with_a_known_tag() {
        let strings = |v: &[&str]| v.iter().map(|s| s.to_string()).collect::<Vec<_>>();
        let carried = [
            strings(&["sea"]),
            strings(&["fog"]),
            strings(&["boat", "sea"]),
        ];
        let tags: Vec<&[String]> = carried.iter().map(Vec::as_slice).collect();
        let columns = TagColumns::from_items([strings(&["boat", "sea"]).as_slice()]);
        let raw = ndarray::array![[1.0f32], [9.0], [3.0]];
        let standardiser = Standardiser::fit(ndarray::array![[1.0f32], [3.0]].view());
        let data = TrainingData::tagged(
            &tags,
            &["k1", "k2", "k1"],
            raw.view(),
            &columns,
            &standardiser,
        );
        assert_eq!(data.rows, vec![0, 2]);
        assert_eq!(data.tags, vec![vec![1], vec![0, 1]]);
        assert_eq!(data.groups, vec![0, 0]);
        assert_eq!(data.features, ndarray::array![[-1.0f32], [1.0]]);
    }

    #[test]
    fn a_trained_model_codes_raw_rows_and_refuses_other_widths() {
        let standardiser = Standardiser::fit(ndarray::array![[1.0f32, 2.0], [3.0, 4.0]].view());
        let model = standardiser_model(standardiser);
        let shared = model.suggester.network.shared.n_hidden();
        assert_eq!(model.format, MODEL_FORMAT);
        assert_eq!(model.hash_thresholds.len(), shared);
        assert_eq!(model.tag_centroids.len(), 2);
        assert!(model.tag_centroids.iter().all(|c| c.len() == shared));
        assert_eq!(model.columns().tags(), ["a".to_string(), "b".to_string()]);
        let codes = model.codes(ndarray::array![[2.0f32, 3.0]].view()).unwrap();
        assert_eq!(codes.dim(), (1, shared));
        let e = model
            .scale(ndarray::Array2::zeros((1, 3)).view())
            .unwrap_err();
        assert!(
            matches!(
                e,
                SuggestError::FeatureWidth {
                    got: 3,
                    expected: 2
                }
            ),
            "{e}"
        );
    }

    /// A stored model around `standardiser` whose suggester was trained on a tiny task.
    fn standardiser_model(standardiser: Standardiser) -> TrainedModel {
        let features = ndarray::array![[1.0f32, 0.0], [0.0, 1.0], [1.0, 0.1], [0.1, 1.0]];
        let tags = vec![vec![0], vec![1], vec![0], vec![1]];
        let data = TrainingData {
            rows: vec![0, 1, 2, 3],
            features,
            tags,
            groups: vec![0, 1, 2, 3],
        };
        let options = tagweave_model::JointOptions {
            max_epochs: 2,
            pretrain_epochs: 1,
            ..tagweave_model::JointOptions::default()
        };
        let (suggester, _) =
            TagSuggester::train(&data.train_set(2, 1), &options, &mut |_, _| {}).unwrap();
        let columns = TagColumns::from_items([["a".to_string(), "b".to_string()].as_slice()]);
        TrainedModel::new(
            &columns,
            standardiser,
            suggester,
            &data,
            TrainingHistory::default(),
        )
        .unwrap()
    }
}
