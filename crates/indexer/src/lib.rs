//! Keeps a store in step with its folder: crawl, read what changed, drop what is gone.
//!
//! Work is written in batches, each flushed before the next starts, so a run stopped at
//! any moment leaves a store that a rerun simply completes.

use std::collections::{BTreeMap, HashMap, HashSet};
use std::time::Instant;

use rayon::prelude::*;
use serde::Serialize;
use tagweave_collection::{
    crawl, is_unchanged, read_item, CrawlOptions, ItemRecord, Note, Skipped, Vocabulary,
};
use tagweave_store::{Store, StoreError};

/// How many pictures are read between two flushes of the store.
const BATCH: usize = 64;

#[derive(Debug, thiserror::Error)]
pub enum IndexError {
    #[error(transparent)]
    Collection(#[from] tagweave_collection::CollectionError),
    #[error(transparent)]
    Store(#[from] StoreError),
}

#[derive(Debug, Clone, Default)]
pub struct ScanOptions {
    pub follow_symlinks: bool,
}

/// Where a scan is, for the caller to render.
#[derive(Debug, Clone, Copy)]
pub enum ScanProgress {
    /// The folder walk is done: this many pictures found, this many need reading.
    Crawled { pictures: usize, to_read: usize },
    /// Pictures read so far out of those that needed reading.
    Read { done: usize, total: usize },
}

/// What a scan did and what the collection now holds.
#[derive(Debug, Clone, Serialize)]
pub struct ScanReport {
    pub items: usize,
    pub tagged: usize,
    pub untagged: usize,
    /// Distinct tags over all items.
    pub tags: usize,
    pub added: usize,
    pub refreshed: usize,
    pub unchanged: usize,
    pub removed: usize,
    /// Files that are neither pictures nor sidecars (notes, spreadsheets), left alone.
    pub other_files: usize,
    /// Files passed over, grouped by reason.
    pub skipped: BTreeMap<&'static str, usize>,
    pub seconds: f64,
    /// Every skipped file with its reason, for the detailed listing.
    #[serde(skip)]
    pub skipped_files: Vec<Skipped>,
    /// Things worth knowing that are not problems (merged sidecars, odd extensions).
    #[serde(skip)]
    pub notes: Vec<Note>,
}

/// Brings the store up to date with the folder it indexes.
pub fn scan(
    store: &Store,
    options: &ScanOptions,
    progress: &(dyn Fn(ScanProgress) + Sync),
) -> Result<ScanReport, IndexError> {
    let started = Instant::now();
    let root = store.collection_root().to_path_buf();
    let crawl_options = CrawlOptions {
        follow_symlinks: options.follow_symlinks,
        skip_dirs: vec![store.dir().to_path_buf()],
    };
    let found = crawl(&root, &crawl_options)?;
    let mut skipped_files = found.skipped;
    let mut notes = found.notes;

    let previous: HashMap<String, ItemRecord> = store
        .items()?
        .into_iter()
        .map(|item| (item.rel_path.clone(), item))
        .collect();
    let (unchanged, to_read): (Vec<_>, Vec<_>) = found.candidates.iter().partition(|c| {
        previous
            .get(&c.rel_path)
            .is_some_and(|p| is_unchanged(p, c))
    });
    progress(ScanProgress::Crawled {
        pictures: found.candidates.len(),
        to_read: to_read.len(),
    });

    let mut kept: HashSet<String> = unchanged.iter().map(|c| c.rel_path.clone()).collect();
    let (mut added, mut refreshed, mut done) = (0, 0, 0);
    for chunk in to_read.chunks(BATCH) {
        let results: Vec<_> = chunk.par_iter().map(|c| read_item(&root, c)).collect();
        let mut batch = Vec::with_capacity(results.len());
        for result in results {
            match result {
                Ok(read) => {
                    if previous.contains_key(&read.item.rel_path) {
                        refreshed += 1;
                    } else {
                        added += 1;
                    }
                    kept.insert(read.item.rel_path.clone());
                    notes.extend(read.notes);
                    batch.push(read.item);
                }
                Err(skip) => skipped_files.push(skip),
            }
        }
        store.update_items(&batch, &[])?;
        done += chunk.len();
        progress(ScanProgress::Read {
            done,
            total: to_read.len(),
        });
    }

    let removals: Vec<String> = previous
        .values()
        .filter(|item| !kept.contains(&item.rel_path))
        .map(|item| item.id.clone())
        .collect();
    store.update_items(&[], &removals)?;

    let items = store.items()?;
    let tagged = items.iter().filter(|item| !item.tags.is_empty()).count();
    let mut skipped = BTreeMap::new();
    for skip in &skipped_files {
        *skipped.entry(skip.reason.label()).or_insert(0) += 1;
    }
    Ok(ScanReport {
        items: items.len(),
        tagged,
        untagged: items.len() - tagged,
        tags: Vocabulary::from_tag_lists(items.iter().map(|item| item.tags.as_slice())).len(),
        added,
        refreshed,
        unchanged: unchanged.len(),
        removed: removals.len(),
        other_files: found.other_files.len(),
        skipped,
        seconds: started.elapsed().as_secs_f64(),
        skipped_files,
        notes,
    })
}
