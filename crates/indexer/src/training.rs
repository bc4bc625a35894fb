//! Training the joint model on a store's tagged pictures, keeping it in the store, and
//! giving every picture its code.
//!
//! The trained model travels with its own vocabulary and feature scaling, so a later
//! scan (new pictures, changed tags) never changes what the model's inputs mean.

use std::time::Instant;

use ndarray::{Array2, ArrayView2, Axis};
use rayon::prelude::*;
use serde::{Deserialize, Serialize};
use tagweave_collection::ItemRecord;
use tagweave_model::{JointOptions, JointProgress};
use tagweave_store::Store;
use tagweave_suggest::{
    group_ids, KnnScorer, Standardiser, SuggestError, TagColumns, TagSuggester, TrainSet,
    TrainingRun,
};
use tagweave_vision::{FeatureExtractor, TRAINING_VIEWS};

use crate::{FeatureTable, IndexError, BATCH, EXTRACTOR_BLOB, FEATURES};

/// Store blob holding the [`TrainedModel`].
pub const MODEL_BLOB: &str = "tag_model";
/// Vector kind of each picture's code (shared-layer probabilities).
pub const CODES: &str = "code";
/// Bumped when [`TrainedModel`] changes shape; an older model is retrained, not guessed at.
pub const MODEL_FORMAT: u32 = 2;

/// Pictures coded per store write.
const CODE_BATCH: usize = 256;

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

#[derive(Debug, Clone)]
pub struct TrainOptions {
    pub seed: u64,
    pub joint: JointOptions,
}

impl Default for TrainOptions {
    fn default() -> Self {
        TrainOptions {
            seed: 7,
            joint: JointOptions::default(),
        }
    }
}

/// Where training is, for the caller to render.
#[derive(Debug, Clone)]
pub enum TrainProgress {
    Model(TrainingRun, JointProgress),
    /// Pictures coded so far.
    Coding {
        done: usize,
        total: usize,
    },
    /// Tagged pictures decoded again so far for their training views.
    Views {
        done: usize,
        total: usize,
    },
}

/// What `train` did.
#[derive(Debug, Clone, Serialize)]
pub struct TrainReport {
    /// Tagged pictures the model learned from.
    pub pictures: usize,
    /// Of those, pictures that could not be decoded again for their training views
    /// (they trained as themselves only); 0 when views were not used.
    pub without_views: usize,
    /// Pictures without tags (coded, not learned from).
    pub untagged: usize,
    pub tags: usize,
    /// Hidden units: image pathway, tag pathway, shared layer.
    pub layers: [usize; 3],
    pub epochs: usize,
    pub readout_weight: f32,
    pub k: usize,
    pub calibrated: bool,
    pub hash_bits: usize,
    pub coded: usize,
    /// Reconstruction error of each pretrained layer after its last epoch.
    pub final_reconstruction: Vec<(String, f32)>,
    pub final_loss: Option<f32>,
    pub best_validation_lrap: Option<f32>,
    pub seconds: f64,
}

/// The store's tagged pictures in model columns, with features scaled for the model.
pub struct TrainingData {
    pub items: Vec<ItemRecord>,
    /// Row of each item in the [`FeatureTable`] it was picked from.
    pub table_rows: Vec<usize>,
    /// Standardised features, one row per item.
    pub features: Array2<f32>,
    pub tags: Vec<Vec<usize>>,
    pub groups: Vec<usize>,
}

impl TrainingData {
    pub fn train_set(&self, n_tags: usize, seed: u64) -> TrainSet<'_> {
        TrainSet {
            features: self.features.view(),
            tags: &self.tags,
            n_tags,
            groups: &self.groups,
            seed,
            views: &[],
        }
    }
}

/// Picks the tagged rows of `table`, encodes their tags with `vocabulary` (rows
/// left with no known tag are dropped) and scales their features.
fn tagged_rows(
    table: &FeatureTable,
    vocabulary: &TagColumns,
    standardiser: &Standardiser,
) -> TrainingData {
    let mut rows = Vec::new();
    let mut tags = Vec::new();
    for (i, item) in table.items.iter().enumerate() {
        let known = vocabulary.encode(&item.tags);
        if !known.is_empty() {
            rows.push(i);
            tags.push(known);
        }
    }
    let items: Vec<ItemRecord> = rows.iter().map(|&i| table.items[i].clone()).collect();
    let keys: Vec<String> = items.iter().map(|i| i.content_hash.clone()).collect();
    TrainingData {
        features: standardiser.apply(table.features.select(Axis(0), &rows).view()),
        groups: group_ids(&keys),
        items,
        table_rows: rows,
        tags,
    }
}

/// Trains the joint model on every tagged picture with features, stores it, and
/// codes every picture. The previous model and codes are replaced only at the end,
/// model first, so a crash leaves the old model or codes that a scan completes.
pub fn train(
    store: &Store,
    options: &TrainOptions,
    progress: &mut dyn FnMut(TrainProgress),
) -> Result<TrainReport, IndexError> {
    let started = Instant::now();
    let table = FeatureTable::load(store)?;
    let tagged: Vec<&[String]> = table
        .items
        .iter()
        .map(|i| i.tags.as_slice())
        .filter(|t| !t.is_empty())
        .collect();
    if tagged.len() < 2 {
        return Err(IndexError::NotEnoughTags {
            tagged: tagged.len(),
        });
    }
    let vocabulary = TagColumns::from_items(tagged.iter().copied());
    let tagged_features: Vec<usize> = (0..table.items.len())
        .filter(|&i| !table.items[i].tags.is_empty())
        .collect();
    let standardiser = Standardiser::fit(table.features.select(Axis(0), &tagged_features).view());
    let data = tagged_rows(&table, &vocabulary, &standardiser);
    let uses_views = options.joint.view_share > 0.0 || options.joint.view_rows;
    let (raw_views, without_views) = if uses_views {
        let raw = table.features.select(Axis(0), &data.table_rows);
        view_features(store, &data.items, raw.view(), &mut |done, total| {
            progress(TrainProgress::Views { done, total })
        })?
    } else {
        (Vec::new(), 0)
    };
    let views: Vec<Array2<f32>> = raw_views
        .iter()
        .map(|v| standardiser.apply(v.view()))
        .collect();
    let train_set = TrainSet {
        views: &views,
        ..data.train_set(vocabulary.len(), options.seed)
    };

    let mut history = TrainingHistory::default();
    let (suggester, _) = TagSuggester::train(&train_set, &options.joint, &mut |run, p| {
        record(&mut history, run, &p);
        progress(TrainProgress::Model(run, p));
    })?;
    history.pictures = data.items.len();
    history.seconds = started.elapsed().as_secs_f64();

    let codes = suggester
        .network
        .shared_code(data.features.view())
        .map_err(SuggestError::from)?;
    let model = TrainedModel {
        format: MODEL_FORMAT,
        vocabulary: vocabulary.tags().to_vec(),
        standardiser,
        hash_thresholds: column_medians(codes.view()),
        tag_centroids: centroids(codes.view(), &data.tags, vocabulary.len()),
        suggester,
        history,
    };
    store.clear_vectors(CODES)?;
    store.put_blob(MODEL_BLOB, &model)?;
    let coded = code_missing(store, &model, &mut |done, total| {
        progress(TrainProgress::Coding { done, total })
    })?;

    let h = &model.history;
    let m = &model.suggester.network;
    Ok(TrainReport {
        pictures: data.items.len(),
        without_views,
        untagged: table.items.len() - data.items.len(),
        tags: model.vocabulary.len(),
        layers: [m.image.n_hidden(), m.tags.n_hidden(), m.shared.n_hidden()],
        epochs: model.suggester.epochs,
        readout_weight: model.suggester.readout_weight,
        k: model.suggester.k,
        calibrated: model.suggester.calibration.is_some(),
        hash_bits: model.hash_thresholds.len(),
        coded,
        final_reconstruction: h
            .pretraining
            .iter()
            .filter_map(|(layer, errors)| errors.last().map(|e| (layer.clone(), *e)))
            .collect(),
        final_loss: h.final_loss.last().copied(),
        best_validation_lrap: h.validation_lrap.iter().copied().reduce(f32::max),
        seconds: started.elapsed().as_secs_f64(),
    })
}

/// The raw feature rows of the training views of `items` (`features`: their stored
/// rows, same order): `views[v]` row `i` is view `v` of `items[i]`, decoded again from
/// the collection folder. A picture that no longer decodes keeps its own features in
/// every view (so it trains as itself only) and is counted in the second value.
pub fn view_features(
    store: &Store,
    items: &[ItemRecord],
    features: ArrayView2<f32>,
    progress: &mut dyn FnMut(usize, usize),
) -> Result<(Vec<Array2<f32>>, usize), IndexError> {
    let Some(extractor) = store.blob::<FeatureExtractor>(EXTRACTOR_BLOB)? else {
        return Ok((Vec::new(), 0));
    };
    if items.len() != features.nrows() {
        return Err(IndexError::Inconsistent(format!(
            "{} pictures but {} feature rows given for their views",
            items.len(),
            features.nrows()
        )));
    }
    if extractor.dimension() != features.ncols() {
        return Err(IndexError::Inconsistent(format!(
            "stored features have {} values but the feature extractor makes {}; rebuild \
             features with `tagweave scan FOLDER --relearn`",
            features.ncols(),
            extractor.dimension()
        )));
    }
    let root = store.collection_root();
    let mut views = vec![features.to_owned(); TRAINING_VIEWS.len()];
    let mut failed = 0;
    let mut done = 0;
    for (chunk_index, chunk) in items.chunks(BATCH).enumerate() {
        let described: Vec<_> = chunk
            .par_iter()
            .map(|item| extractor.training_views(&root.join(&item.rel_path)).ok())
            .collect();
        for (offset, rows) in described.into_iter().enumerate() {
            let i = chunk_index * BATCH + offset;
            match rows {
                Some(rows) => views.iter_mut().zip(&rows).for_each(|(view, row)| {
                    view.row_mut(i)
                        .assign(&ndarray::ArrayView1::from(row.as_slice()))
                }),
                None => failed += 1,
            }
        }
        done += chunk.len();
        progress(done, items.len());
    }
    Ok((views, failed))
}

fn record(history: &mut TrainingHistory, run: TrainingRun, p: &JointProgress) {
    match (run, p) {
        (TrainingRun::Final, JointProgress::Pretraining { layer, report }) => {
            match history.pretraining.iter_mut().find(|(l, _)| l == layer) {
                Some((_, errors)) => errors.push(report.reconstruction_error),
                None => history
                    .pretraining
                    .push((layer.to_string(), vec![report.reconstruction_error])),
            }
        }
        (TrainingRun::Choosing, JointProgress::FineTuning(r)) => {
            history.choosing_loss.push(r.train_loss);
            if let Some(score) = r.validation_score {
                history.validation_lrap.push(score);
            }
        }
        (TrainingRun::Final, JointProgress::FineTuning(r)) => history.final_loss.push(r.train_loss),
        (TrainingRun::Choosing, JointProgress::Pretraining { .. }) => {}
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

impl TrainedModel {
    /// The store's model; `None` before the first `tagweave train`.
    ///
    /// Read once; only when that fails is the format number read on its own, so that
    /// a model of another shape is reported as "train again", not as damage.
    pub fn load(store: &Store) -> Result<Option<TrainedModel>, IndexError> {
        #[derive(Deserialize)]
        struct FormatOnly {
            format: u32,
        }
        let outdated = |found| IndexError::ModelFormat {
            found,
            expected: MODEL_FORMAT,
        };
        match store.blob::<TrainedModel>(MODEL_BLOB) {
            Ok(Some(model)) if model.format != MODEL_FORMAT => Err(outdated(model.format)),
            Ok(model) => Ok(model),
            Err(error) => match store.blob::<FormatOnly>(MODEL_BLOB) {
                Ok(Some(header)) if header.format != MODEL_FORMAT => Err(outdated(header.format)),
                _ => Err(error.into()),
            },
        }
    }

    /// Raw feature rows (as stored) scaled for the model.
    pub fn scale(&self, raw: ArrayView2<f32>) -> Result<Array2<f32>, IndexError> {
        if raw.ncols() != self.standardiser.width() {
            return Err(IndexError::Inconsistent(format!(
                "pictures have {} features but the model was trained on {}; run `tagweave train` again",
                raw.ncols(),
                self.standardiser.width()
            )));
        }
        Ok(self.standardiser.apply(raw))
    }

    /// Codes (shared-layer probabilities) of raw feature rows.
    pub fn codes(&self, raw: ArrayView2<f32>) -> Result<Array2<f32>, IndexError> {
        Ok(self
            .suggester
            .network
            .shared_code(self.scale(raw)?.view())
            .map_err(SuggestError::from)?)
    }

    /// The kNN part of the suggestions, on the store's tagged pictures as they are
    /// now (tags accepted since training count at once), plus those pictures.
    pub fn neighbours(&self, table: &FeatureTable) -> Result<(KnnScorer, Vec<String>), IndexError> {
        let vocabulary = TagColumns::from_items([self.vocabulary.as_slice()]);
        let data = tagged_rows(table, &vocabulary, &self.standardiser);
        let knn = self
            .suggester
            .neighbours(&data.train_set(self.vocabulary.len(), 0));
        Ok((knn, data.items.into_iter().map(|i| i.id).collect()))
    }
}

/// Codes every item that has features but no code yet; returns how many were coded.
pub fn code_missing(
    store: &Store,
    model: &TrainedModel,
    progress: &mut dyn FnMut(usize, usize),
) -> Result<usize, IndexError> {
    let mut missing = Vec::new();
    for item in store.items()? {
        if store.vector(CODES, &item.id)?.is_none() {
            if let Some(row) = store.vector(FEATURES, &item.id)? {
                missing.push((item.id, row));
            }
        }
    }
    let total = missing.len();
    let mut done = 0;
    for chunk in missing.chunks(CODE_BATCH) {
        let width = chunk[0].1.len();
        let flat: Vec<f32> = chunk.iter().flat_map(|(_, r)| r.iter().copied()).collect();
        let raw = Array2::from_shape_vec((chunk.len(), width), flat)
            .map_err(|e| IndexError::Inconsistent(e.to_string()))?;
        let codes = model.codes(raw.view())?;
        let rows: Vec<(String, Vec<f32>)> = chunk
            .iter()
            .zip(codes.outer_iter())
            .map(|((id, _), code)| (id.clone(), code.to_vec()))
            .collect();
        store.put_vectors(CODES, &rows)?;
        done += chunk.len();
        progress(done, total);
    }
    Ok(total)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::tests::{quick_options, small_collection};

    #[test]
    fn views_are_described_again_and_an_unreadable_picture_only_loses_its_views() {
        let temp = tempfile::tempdir().unwrap();
        small_collection(temp.path(), 10);
        let store = Store::open_or_create(&temp.path().join(".tagweave"), temp.path()).unwrap();
        crate::scan(&store, &quick_options(), &|_| {}).unwrap();
        let table = FeatureTable::load(&store).unwrap();
        assert_eq!(table.items.len(), 10);
        let extractor: FeatureExtractor = store.blob(EXTRACTOR_BLOB).unwrap().unwrap();
        // Damage one tagged picture after the scan: it keeps its stored features.
        let b = table.items.iter().position(|i| !i.tags.is_empty()).unwrap();
        let broken = &table.items[b];
        std::fs::write(temp.path().join(&broken.rel_path), b"no longer a picture").unwrap();
        let mut reported = Vec::new();
        let (views, failed) = view_features(
            &store,
            &table.items,
            table.features.view(),
            &mut |done, total| reported.push((done, total)),
        )
        .unwrap();
        assert_eq!(failed, 1);
        assert_eq!(reported.last(), Some(&(10, 10)));
        assert_eq!(views.len(), TRAINING_VIEWS.len());
        for (i, item) in table.items.iter().enumerate() {
            if i == b {
                for view in &views {
                    assert_eq!(view.row(i), table.features.row(i));
                }
                continue;
            }
            let want = extractor
                .training_views(&temp.path().join(&item.rel_path))
                .unwrap();
            for (view, row) in views.iter().zip(&want) {
                assert_eq!(view.row(i).to_vec(), *row);
                assert_ne!(view.row(i), table.features.row(i));
            }
        }
        // Training with views goes on without that picture's views and says so.
        let options = TrainOptions {
            joint: JointOptions {
                max_epochs: 3,
                pretrain_epochs: 1,
                view_share: 0.5,
                ..JointOptions::default()
            },
            ..TrainOptions::default()
        };
        let mut events = Vec::new();
        let report = train(&store, &options, &mut |p| {
            if let TrainProgress::Views { done, total } = p {
                events.push((done, total));
            }
        })
        .unwrap();
        assert!(report.pictures >= 2, "{report:?}");
        assert_eq!(report.without_views, 1);
        assert_eq!(events.last(), Some(&(report.pictures, report.pictures)));
    }

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
}
