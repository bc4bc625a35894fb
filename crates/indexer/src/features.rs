//! The feature stage of a scan: learn the extractor once per collection, then describe
//! every picture that has no feature vector yet, in flushed batches.

use std::path::Path;

use rayon::prelude::*;
use serde::Serialize;
use tagweave_collection::{ItemRecord, SkipReason, Skipped};
use tagweave_store::{Store, CODES, EXTRACTOR_BLOB, FEATURES, MODEL_BLOB};
use tagweave_vision::FeatureExtractor;

use crate::{IndexError, ScanOptions, ScanProgress, BATCH};

/// What the feature stage did.
#[derive(Debug, Clone, Default, Serialize)]
pub struct FeatureSummary {
    /// Whether the extractor was learned (or relearned) in this run.
    pub learned: bool,
    /// Pictures described in this run.
    pub encoded: usize,
    /// Length of every feature vector.
    pub dimension: usize,
}

/// Pictures that could not be decoded, by id, with the reason for the summary.
pub(crate) type Failures = Vec<(String, Skipped)>;

pub(crate) fn update(
    store: &Store,
    items: &[ItemRecord],
    options: &ScanOptions,
    progress: &(dyn Fn(ScanProgress) + Sync),
) -> Result<(FeatureSummary, Failures), IndexError> {
    let root = store.collection_root().to_path_buf();
    if items.is_empty() {
        return Ok((FeatureSummary::default(), Vec::new()));
    }
    let stored: Option<FeatureExtractor> = if options.relearn {
        None
    } else {
        store.blob(EXTRACTOR_BLOB)?
    };
    let learned = stored.is_none();
    let extractor = match stored {
        Some(extractor) => extractor,
        None => {
            let mut by_path: Vec<&ItemRecord> = items.iter().collect();
            by_path.sort_by(|a, b| a.rel_path.cmp(&b.rel_path));
            let paths: Vec<_> = by_path.iter().map(|i| root.join(&i.rel_path)).collect();
            let extractor = FeatureExtractor::learn(
                &paths,
                &options.features,
                options.seed,
                &|done, total| progress(ScanProgress::Learning { done, total }),
            )?;
            // Old vectors were made by another extractor: drop them (and the model trained
            // on them, and its codes) before the new one is stored, so a crash in between
            // never pairs vectors with the wrong extractor.
            store.remove_blob(MODEL_BLOB)?;
            store.clear_vectors(CODES)?;
            store.clear_vectors(FEATURES)?;
            store.put_blob(EXTRACTOR_BLOB, &extractor)?;
            extractor
        }
    };

    let described = store.vector_reader(FEATURES)?;
    let mut missing = Vec::new();
    for item in items {
        if described.get(&item.id)?.is_none() {
            missing.push(item);
        }
    }
    let mut failures = Vec::new();
    let mut done = 0;
    for chunk in missing.chunks(BATCH) {
        let results: Vec<_> = chunk
            .par_iter()
            .map(|item| describe(&extractor, &root, item))
            .collect();
        let mut rows = Vec::with_capacity(results.len());
        for result in results {
            match result {
                Ok(row) => rows.push(row),
                Err(failure) => failures.push(failure),
            }
        }
        store.put_vectors(FEATURES, &rows)?;
        done += chunk.len();
        progress(ScanProgress::Encoding {
            done,
            total: missing.len(),
        });
    }
    Ok((
        FeatureSummary {
            learned,
            encoded: missing.len() - failures.len(),
            dimension: extractor.dimension(),
        },
        failures,
    ))
}

pub(crate) fn describe(
    extractor: &FeatureExtractor,
    root: &Path,
    item: &ItemRecord,
) -> Result<(String, Vec<f32>), (String, Skipped)> {
    let path = root.join(&item.rel_path);
    extractor
        .features(&path)
        .map(|row| (item.id.clone(), row))
        .map_err(|error| {
            let reason = match &error {
                // Deleted or moved since the crawl: say so, rather than call it damaged.
                tagweave_vision::VisionError::Io { source, .. }
                    if source.kind() == std::io::ErrorKind::NotFound =>
                {
                    SkipReason::Vanished
                }
                // Refused by the size guard: not damaged, and worth counting apart.
                tagweave_vision::VisionError::TooLarge { .. } => {
                    SkipReason::TooLarge(error.to_string())
                }
                _ => SkipReason::BadPicture(error.to_string()),
            };
            (item.id.clone(), Skipped { path, reason })
        })
}
