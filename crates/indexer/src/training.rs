//! Training the suggester on a store's tagged pictures, keeping it in the store, and
//! giving every picture its code.

use std::time::Instant;

use ndarray::{Array2, ArrayView2, Axis};
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;
use serde::Serialize;
use tagweave_collection::ItemRecord;
use tagweave_model::{JointOptions, JointProgress};
use tagweave_store::{FeatureTable, Store, StoreError, CODES, EXTRACTOR_BLOB, FEATURES};
use tagweave_suggest::{
    Standardiser, TagColumns, TagSuggester, TrainSet, TrainedModel, TrainingData, TrainingHistory,
    TrainingRun, MODEL_FORMAT,
};
use tagweave_vision::{FeatureExtractor, TRAINING_VARIANTS};

use crate::{IndexError, BATCH};

/// Pictures coded per store write.
const CODE_BATCH: usize = 256;

/// Most tagged pictures the model learns from; above this a seeded random sample is taken
/// (and the report says so). Training time grows with the pictures: 10,000 took 19 min on
/// 2 cores (BENCHMARKS.md, "Many pictures"), so 25,000 keeps a large archive's training
/// within the hour. Every tagged picture still counts for the similar-pictures part of the
/// suggestions, which reads them when questions are asked.
pub const MOST_TRAINING_PICTURES: usize = 25_000;

/// Options of one `train` run over a store: the seed of every random choice and the
/// joint model's own options.
#[derive(Debug, Clone)]
pub struct TrainRunOptions {
    pub seed: u64,
    pub joint: JointOptions,
    /// Learn only from tags a person wrote, leaving out suggestions a person accepted.
    pub person_tags_only: bool,
}

impl Default for TrainRunOptions {
    fn default() -> Self {
        TrainRunOptions {
            seed: 7,
            joint: JointOptions::default(),
            person_tags_only: false,
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
    /// Tagged pictures decoded again so far for their training variants.
    Variants {
        done: usize,
        total: usize,
    },
}

/// What `train` did.
#[derive(Debug, Clone, Serialize)]
pub struct TrainReport {
    /// Tagged pictures the model learned from.
    pub pictures: usize,
    /// Of those, pictures that could not be decoded again for their training variants
    /// (they trained as themselves only); 0 when variants were not used.
    pub without_variants: usize,
    /// Pictures without tags (coded, not learned from).
    pub untagged: usize,
    /// Tagged pictures there were when more than [`MOST_TRAINING_PICTURES`]: the model
    /// learned from a sample of them.
    pub sampled_from: Option<usize>,
    pub tags: usize,
    /// Tags learned from that were suggestions a person accepted (0 with
    /// `person_tags_only`); the rest a person wrote.
    pub accepted_suggestions: usize,
    /// Hidden units: image pathway, tag pathway, shared layer.
    pub layers: [usize; 3],
    pub epochs: usize,
    /// Weights of (the model's read-out, ridge, kNN) for pictures alone.
    pub picture_weights: [f32; 3],
    /// Weights of (model given tags, model read-out, ridge, kNN, tag co-occurrence)
    /// for pictures that carry some tags.
    pub completion_weights: [f32; 5],
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

/// Trains the joint model on every tagged picture with features, stores it, and
/// codes every picture. The previous model and codes are replaced only at the end,
/// model first, so a crash leaves the old model or codes that a scan completes.
pub fn train(
    store: &Store,
    options: &TrainRunOptions,
    progress: &mut dyn FnMut(TrainProgress),
) -> Result<TrainReport, IndexError> {
    let started = Instant::now();
    let mut table = FeatureTable::load_where(store, |item| !item.tags.is_empty())?;
    if options.person_tags_only {
        for item in &mut table.items {
            item.tags = item.person_tags();
            item.accepted.clear();
        }
    }
    let accepted_suggestions = table.items.iter().map(|i| i.accepted.len()).sum();
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
    let columns = TagColumns::from_items(tagged.iter().copied());
    let tagged_in_all = tagged.len();
    let sampled_from = (tagged_in_all > MOST_TRAINING_PICTURES).then_some(tagged_in_all);
    if sampled_from.is_some() {
        table = sample_of_tagged(table, MOST_TRAINING_PICTURES, options.seed);
    }
    let tagged_features: Vec<usize> = (0..table.items.len())
        .filter(|&i| !table.items[i].tags.is_empty())
        .collect();
    let standardiser = Standardiser::fit(table.features.select(Axis(0), &tagged_features).view());
    let data = TrainingData::tagged(
        &table.tags(),
        &table.content_keys(),
        table.features.view(),
        &columns,
        &standardiser,
    );
    let uses_variants = options.joint.variant_share > 0.0 || options.joint.variant_rows;
    let (raw_variants, without_variants) = if uses_variants {
        let items: Vec<ItemRecord> = data.rows.iter().map(|&i| table.items[i].clone()).collect();
        let raw = table.features.select(Axis(0), &data.rows);
        variant_features(store, &items, raw.view(), &mut |done, total| {
            progress(TrainProgress::Variants { done, total })
        })?
    } else {
        (Vec::new(), 0)
    };
    let variants: Vec<Array2<f32>> = raw_variants
        .iter()
        .map(|v| standardiser.apply(v.view()))
        .collect();
    let train_set = TrainSet {
        variants: &variants,
        ..data.train_set(columns.len(), options.seed)
    };

    let mut history = TrainingHistory::default();
    let (suggester, _) = TagSuggester::train(&train_set, &options.joint, &mut |run, p| {
        history.record(run, &p);
        progress(TrainProgress::Model(run, p));
    })?;
    history.pictures = data.rows.len();
    history.seconds = started.elapsed().as_secs_f64();

    let trained = TrainedModel::new(&columns, standardiser, suggester, &data, history)?;
    store.clear_vectors(CODES)?;
    store.put_model(&trained)?;
    let coded = code_missing(store, &trained, &mut |done, total| {
        progress(TrainProgress::Coding { done, total })
    })?;

    let h = &trained.history;
    let m = &trained.suggester.network;
    Ok(TrainReport {
        pictures: data.rows.len(),
        without_variants,
        untagged: store.item_count()?.saturating_sub(tagged_in_all),
        sampled_from,
        accepted_suggestions,
        tags: trained.vocabulary.len(),
        layers: [m.image.n_hidden(), m.tags.n_hidden(), m.shared.n_hidden()],
        epochs: trained.suggester.epochs,
        picture_weights: trained.suggester.picture_weights,
        completion_weights: trained.suggester.completion.weights,
        k: trained.suggester.k,
        calibrated: trained.suggester.calibration.is_some(),
        hash_bits: trained.hash_thresholds.len(),
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

/// The raw feature rows of the training variants of `items` (`features`: their stored
/// rows, same order): `variants[v]` row `i` is variant `v` of `items[i]`, decoded again from
/// the collection folder. A picture that no longer decodes keeps its own features in
/// every variant (so it trains as itself only) and is counted in the second value.
pub fn variant_features(
    store: &Store,
    items: &[ItemRecord],
    features: ArrayView2<f32>,
    progress: &mut dyn FnMut(usize, usize),
) -> Result<(Vec<Array2<f32>>, usize), IndexError> {
    let Some(extractor) = store.blob::<FeatureExtractor>(EXTRACTOR_BLOB)? else {
        return Ok((Vec::new(), 0));
    };
    if items.len() != features.nrows() {
        return Err(StoreError::Inconsistent(format!(
            "{} pictures but {} feature rows given for their variants",
            items.len(),
            features.nrows()
        ))
        .into());
    }
    if extractor.dimension() != features.ncols() {
        return Err(StoreError::Inconsistent(format!(
            "stored features have {} values but the feature extractor makes {}; rebuild \
             features with `tagweave scan FOLDER --relearn`",
            features.ncols(),
            extractor.dimension()
        ))
        .into());
    }
    let root = store.collection_root();
    let mut variants = vec![features.to_owned(); TRAINING_VARIANTS.len()];
    let mut failed = 0;
    let mut done = 0;
    for (chunk_index, chunk) in items.chunks(BATCH).enumerate() {
        let described: Vec<_> = chunk
            .par_iter()
            .map(|item| extractor.training_variants(&root.join(&item.rel_path)).ok())
            .collect();
        for (offset, rows) in described.into_iter().enumerate() {
            let i = chunk_index * BATCH + offset;
            match rows {
                Some(rows) => variants.iter_mut().zip(&rows).for_each(|(variant, row)| {
                    variant
                        .row_mut(i)
                        .assign(&ndarray::ArrayView1::from(row.as_slice()))
                }),
                None => failed += 1,
            }
        }
        done += chunk.len();
        progress(done, items.len());
    }
    Ok((variants, failed))
}

/// `most` of the table's tagged rows, chosen at random (seeded), in their order.
fn sample_of_tagged(table: FeatureTable, most: usize, seed: u64) -> FeatureTable {
    let tagged: Vec<usize> = (0..table.items.len())
        .filter(|&i| !table.items[i].tags.is_empty())
        .collect();
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut keep: Vec<usize> = rand::seq::index::sample(&mut rng, tagged.len(), most)
        .into_iter()
        .map(|j| tagged[j])
        .collect();
    keep.sort_unstable();
    FeatureTable {
        features: table.features.select(Axis(0), &keep),
        items: keep.iter().map(|&i| table.items[i].clone()).collect(),
    }
}

/// The store's model; `None` before the first `tagweave train`.
pub fn load_model(store: &Store) -> Result<Option<TrainedModel>, IndexError> {
    Ok(store.model(MODEL_FORMAT, |m: &TrainedModel| m.format)?)
}

/// Codes every item that has features but no code yet; returns how many were coded.
pub fn code_missing(
    store: &Store,
    trained: &TrainedModel,
    progress: &mut dyn FnMut(usize, usize),
) -> Result<usize, IndexError> {
    let codes = store.vector_reader(CODES)?;
    let features = store.vector_reader(FEATURES)?;
    let mut missing = Vec::new();
    for item in store.items()? {
        if !codes.has(&item.id)? {
            missing.push(item.id);
        }
    }
    let total = missing.len();
    let (mut done, mut coded) = (0, 0);
    // Features are read a batch at a time: a million pictures' would not fit as `f32`.
    for chunk in missing.chunks(CODE_BATCH) {
        let mut ids = Vec::with_capacity(chunk.len());
        let mut flat = Vec::new();
        let mut width = 0;
        for id in chunk {
            if let Some(row) = features.get(id)? {
                width = row.len();
                flat.extend_from_slice(&row);
                ids.push(id);
            }
        }
        if !ids.is_empty() {
            let raw = Array2::from_shape_vec((ids.len(), width), flat)
                .map_err(|e| StoreError::Inconsistent(e.to_string()))?;
            let batch_codes = trained.codes(raw.view())?;
            let rows: Vec<(String, Vec<f32>)> = ids
                .iter()
                .zip(batch_codes.outer_iter())
                .map(|(&id, code)| (id.clone(), code.to_vec()))
                .collect();
            store.put_vectors(CODES, &rows)?;
            coded += rows.len();
        }
        done += chunk.len();
        progress(done, total);
    }
    Ok(coded)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::tests::{quick_options, small_collection};

    #[test]
    fn variants_are_described_again_and_an_unreadable_picture_only_loses_its_variants() {
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
        let (variants, failed) = variant_features(
            &store,
            &table.items,
            table.features.view(),
            &mut |done, total| reported.push((done, total)),
        )
        .unwrap();
        assert_eq!(failed, 1);
        assert_eq!(reported.last(), Some(&(10, 10)));
        assert_eq!(variants.len(), TRAINING_VARIANTS.len());
        for (i, item) in table.items.iter().enumerate() {
            if i == b {
                for variant in &variants {
                    assert_eq!(variant.row(i), table.features.row(i));
                }
                continue;
            }
            let want = extractor
                .training_variants(&temp.path().join(&item.rel_path))
                .unwrap();
            for (variant, row) in variants.iter().zip(&want) {
                assert_eq!(variant.row(i).to_vec(), *row);
                assert_ne!(variant.row(i), table.features.row(i));
            }
        }
        // Training with variants goes on without that picture's variants and says so.
        let options = TrainRunOptions {
            joint: JointOptions {
                max_epochs: 3,
                pretrain_epochs: 1,
                variant_share: 0.5,
                ..JointOptions::default()
            },
            ..TrainRunOptions::default()
        };
        let mut events = Vec::new();
        let report = train(&store, &options, &mut |p| {
            if let TrainProgress::Variants { done, total } = p {
                events.push((done, total));
            }
        })
        .unwrap();
        assert!(report.pictures >= 2, "{report:?}");
        assert_eq!(report.without_variants, 1);
        assert_eq!(events.last(), Some(&(report.pictures, report.pictures)));
    }
}
