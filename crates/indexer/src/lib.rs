//! Keeps a store in step with its folder: crawl, read what changed, drop what is gone.
//!
//! A scan has two stages: items (pictures and their sidecar tags) and features (learned
//! once per collection, then one vector per picture). Work is written in batches, each flushed before the next starts, so a run stopped at
//! any moment leaves a store that a rerun simply completes.

use std::collections::{BTreeMap, HashMap, HashSet};
use std::time::Instant;

use rayon::prelude::*;
use serde::Serialize;
use tagweave_collection::{
    crawl, is_unchanged, read_item, CrawlOptions, ItemRecord, Note, Skipped, Vocabulary,
};
use tagweave_store::{Store, StoreError};
use tagweave_vision::{FeatureOptions, VisionError};

mod features;
pub mod shards;
mod training;
pub use features::FeatureSummary;
pub use training::{
    code_missing, load_model, train, variant_features, TrainProgress, TrainReport, TrainRunOptions,
};

/// How many pictures are read between two flushes of the store.
const BATCH: usize = 64;

#[derive(Debug, thiserror::Error)]
pub enum IndexError {
    #[error(transparent)]
    Collection(#[from] tagweave_collection::CollectionError),
    #[error(transparent)]
    Store(#[from] StoreError),
    #[error(transparent)]
    Vision(#[from] VisionError),
    #[error(transparent)]
    Suggest(#[from] tagweave_suggest::SuggestError),
    #[error(
        "only {tagged} tagged picture(s) with features: the model needs at least 2 to learn \
         from; tag a few pictures (a text sidecar beside each, one tag per line) and scan again"
    )]
    NotEnoughTags { tagged: usize },
    #[error(
        "`{0}` is not a part: write K/N, the K-th of N parts, with 1 ≤ K ≤ N (for example 2/8)"
    )]
    BadPart(String),
    #[error("no pictures found in {0}; give the photo folder")]
    NoPictures(std::path::PathBuf),
    #[error("{path}: {problem}")]
    ShardFile {
        path: std::path::PathBuf,
        problem: String,
    },
    #[error("{path}: {source}")]
    Io {
        path: std::path::PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error(
        "{path} was described with another feature extractor ({made_with:.12}…) than \
         {source_name} ({expected:.12}…); describe its part again with that extractor's file, \
         or merge into a new store"
    )]
    OtherExtractor {
        path: std::path::PathBuf,
        made_with: String,
        expected: String,
        source_name: String,
    },
    #[error(
        "{path} holds feature vectors, but the store has no feature extractor yet; pass the \
         extractor file its parts were described with (`--extractor FILE`)"
    )]
    NoExtractor { path: std::path::PathBuf },
    #[error(
        "{path} holds codes, but the store has no trained model; run `tagweave train` first, \
         then code the parts with the model file it gives"
    )]
    NoModel { path: std::path::PathBuf },
    #[error(
        "{path} was coded with another model ({made_with:.12}…) than the store's \
         ({expected:.12}…); write the store's model to a file (`tagweave shard model`) and \
         code that part again"
    )]
    OtherModel {
        path: std::path::PathBuf,
        made_with: String,
        expected: String,
    },
}

#[derive(Debug, Clone)]
pub struct ScanOptions {
    pub follow_symlinks: bool,
    /// Learn the feature extractor again even when the store has one.
    pub relearn: bool,
    /// Used only when the extractor is (re)learned; a stored one keeps its own.
    pub features: FeatureOptions,
    /// Seeds every random choice of learning.
    pub seed: u64,
}

impl Default for ScanOptions {
    fn default() -> Self {
        ScanOptions {
            follow_symlinks: false,
            relearn: false,
            features: FeatureOptions::default(),
            seed: 7,
        }
    }
}

/// Where a scan is, for the caller to render.
#[derive(Debug, Clone, Copy)]
pub enum ScanProgress {
    /// The folder walk is done: this many pictures found, this many need reading.
    Crawled { pictures: usize, to_read: usize },
    /// Pictures read so far out of those that needed reading.
    Read { done: usize, total: usize },
    /// Learning the feature extractor: pictures decoded, then k-means rounds.
    Learning { done: usize, total: usize },
    /// Pictures described so far out of those without features.
    Encoding { done: usize, total: usize },
    /// Pictures given a code by the stored model, out of those without one.
    Coding { done: usize, total: usize },
}

/// What a scan did and what the collection now holds.
#[derive(Debug, Clone, Serialize)]
pub struct ScanReport {
    pub items: usize,
    pub tagged: usize,
    pub untagged: usize,
    /// Tags on pictures that were suggestions a person accepted (marked so in the
    /// sidecars); the rest a person wrote.
    pub accepted_suggestions: usize,
    /// Of `tagged`, pictures whose every tag is an accepted suggestion.
    pub tagged_only_by_suggestions: usize,
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
    pub features: FeatureSummary,
    /// Pictures given a code by the stored model in this run.
    pub coded: usize,
    pub seconds: f64,
    /// Every skipped file with its reason, for the detailed listing.
    #[serde(skip)]
    pub skipped_files: Vec<Skipped>,
    /// Things worth knowing that are not problems (merged sidecars, odd extensions).
    #[serde(skip)]
    pub notes: Vec<Note>,
}

/// Reads again the records of `pictures` (relative paths) after their sidecars were
/// written — by the review page — so the next query sees the new tags without a scan.
/// Only the tags and sidecar list can change this way: a picture whose bytes changed too,
/// or that is not indexed, is left for the next scan (its features would be stale).
/// Returns how many records were refreshed.
pub fn refresh_records(store: &Store, pictures: &[String]) -> Result<usize, IndexError> {
    let wanted: HashSet<&str> = pictures.iter().map(String::as_str).collect();
    let root = store.collection_root().to_path_buf();
    let found = crawl(
        &root,
        &CrawlOptions {
            skip_dirs: vec![store.dir().to_path_buf()],
            ..CrawlOptions::default()
        },
    )?;
    let mut fresh = Vec::new();
    for candidate in found
        .candidates
        .iter()
        .filter(|c| wanted.contains(c.rel_path.as_str()))
    {
        let Some(known) = store.item(&tagweave_collection::item_id(&candidate.rel_path))? else {
            continue;
        };
        if let Ok(read) = read_item(&root, candidate) {
            if read.item.content_hash == known.content_hash {
                fresh.push(read.item);
            }
        }
    }
    store.update_items(&fresh, &[])?;
    Ok(fresh.len())
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
    let to_read: Vec<_> = found
        .candidates
        .iter()
        .filter(|c| {
            !previous
                .get(&c.rel_path)
                .is_some_and(|p| is_unchanged(p, c))
        })
        .collect();
    progress(ScanProgress::Crawled {
        pictures: found.candidates.len(),
        to_read: to_read.len(),
    });

    let mut read: HashSet<String> = HashSet::new();
    let mut done = 0;
    for chunk in to_read.chunks(BATCH) {
        let results: Vec<_> = chunk.par_iter().map(|c| read_item(&root, c)).collect();
        let mut batch = Vec::with_capacity(results.len());
        for result in results {
            match result {
                Ok(item) => {
                    read.insert(item.item.rel_path.clone());
                    notes.extend(item.notes);
                    batch.push(item.item);
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

    // A known picture that needed reading but could not be read this time (its sidecar
    // broke, say) leaves the store too: stale tags must not outlive their sidecar.
    let needed_reading: HashSet<&str> = to_read.iter().map(|c| c.rel_path.as_str()).collect();
    let present: HashSet<&str> = found
        .candidates
        .iter()
        .map(|c| c.rel_path.as_str())
        .collect();
    let gone: Vec<String> = previous
        .values()
        .filter(|item| {
            !present.contains(item.rel_path.as_str())
                || (needed_reading.contains(item.rel_path.as_str())
                    && !read.contains(&item.rel_path))
        })
        .map(|item| item.id.clone())
        .collect();
    store.update_items(&[], &gone)?;

    let items = store.items()?;
    let (feature_summary, failures) = features::update(store, &items, options, progress)?;
    // A picture that cannot be decoded is not kept: the next scan tries it again.
    let undecodable: Vec<String> = failures.iter().map(|(id, _)| id.clone()).collect();
    store.update_items(&[], &undecodable)?;
    skipped_files.extend(failures.into_iter().map(|(_, skip)| skip));
    // Pictures new since the last training get their codes from the stored model.
    let coded = match load_model(store) {
        Ok(Some(trained)) => code_missing(store, &trained, &mut |done, total| {
            progress(ScanProgress::Coding { done, total })
        })?,
        Ok(None) => 0,
        // A model from another tagweave version cannot code; the scan itself is fine.
        Err(IndexError::Store(error @ StoreError::ModelFormat { .. })) => {
            notes.push(Note {
                path: store.dir().to_path_buf(),
                message: error.to_string(),
            });
            0
        }
        Err(error) => return Err(error),
    };

    let items = store.items()?;
    let now: HashSet<&str> = items.iter().map(|i| i.rel_path.as_str()).collect();
    let was = |rel: &str| previous.contains_key(rel);
    let tagged = items.iter().filter(|item| !item.tags.is_empty()).count();
    let mut skipped = BTreeMap::new();
    for skip in &skipped_files {
        *skipped.entry(skip.reason.label()).or_insert(0) += 1;
    }
    Ok(ScanReport {
        items: items.len(),
        tagged,
        untagged: items.len() - tagged,
        accepted_suggestions: items.iter().map(|item| item.accepted.len()).sum(),
        tagged_only_by_suggestions: items
            .iter()
            .filter(|item| !item.tags.is_empty() && item.accepted.len() == item.tags.len())
            .count(),
        tags: Vocabulary::from_tag_lists(items.iter().map(|item| item.tags.as_slice())).len(),
        added: now.iter().filter(|rel| !was(rel)).count(),
        refreshed: now
            .iter()
            .filter(|rel| was(rel) && read.contains(**rel))
            .count(),
        unchanged: now
            .iter()
            .filter(|rel| was(rel) && !read.contains(**rel))
            .count(),
        removed: previous
            .keys()
            .filter(|rel| !now.contains(rel.as_str()))
            .count(),
        other_files: found.other_files.len(),
        skipped,
        features: feature_summary,
        coded,
        seconds: started.elapsed().as_secs_f64(),
        skipped_files,
        notes,
    })
}

#[cfg(test)]
pub(crate) mod tests {
    use super::*;
    use std::path::Path;

    /// A small real collection: the first pictures of the bundled demo archive.
    pub(crate) fn small_collection(dir: &Path, count: usize) {
        let demo = Path::new(env!("CARGO_MANIFEST_DIR")).join("../../demo-collection/1970s");
        let mut pictures: Vec<_> = std::fs::read_dir(&demo)
            .unwrap()
            .map(|e| e.unwrap().path())
            .filter(|p| p.extension().is_some_and(|e| e == "jpg" || e == "png"))
            .collect();
        pictures.sort();
        for picture in pictures.iter().take(count) {
            std::fs::copy(picture, dir.join(picture.file_name().unwrap())).unwrap();
            let sidecar = picture.with_extension("txt");
            if sidecar.exists() {
                std::fs::copy(&sidecar, dir.join(sidecar.file_name().unwrap())).unwrap();
            }
        }
    }

    pub(crate) fn quick_options() -> ScanOptions {
        let mut options = ScanOptions::default();
        options.features.learn_images = 8;
        options
    }

    #[test]
    fn a_scan_stopped_before_the_feature_stage_is_completed_by_the_next() {
        let temp = tempfile::tempdir().unwrap();
        small_collection(temp.path(), 10);
        let store = Store::open_or_create(&temp.path().join(".tagweave"), temp.path()).unwrap();
        let first = scan(&store, &quick_options(), &|_| {}).unwrap();
        assert_eq!((first.items, first.features.encoded), (10, 10));
        assert!(first.features.learned);

        // As if the process died after the items were written but before any feature was.
        store.clear_vectors(tagweave_store::FEATURES).unwrap();
        let second = scan(&store, &quick_options(), &|_| {}).unwrap();
        assert_eq!(second.unchanged, 10);
        assert_eq!(second.features.encoded, 10, "missing features are made");
        assert!(!second.features.learned, "the stored extractor is reused");
        let table = tagweave_store::FeatureTable::load(&store).unwrap();
        assert_eq!(table.features.dim(), (10, second.features.dimension));
    }

    #[test]
    fn refreshed_records_carry_new_sidecar_tags_and_keep_their_features() {
        let temp = tempfile::tempdir().unwrap();
        small_collection(temp.path(), 4);
        let store = Store::open_or_create(&temp.path().join(".tagweave"), temp.path()).unwrap();
        scan(&store, &quick_options(), &|_| {}).unwrap();
        let mut items = store.items().unwrap();
        items.sort_by(|a, b| a.rel_path.cmp(&b.rel_path));
        let (first, second) = (&items[0], &items[1]);
        let features_before = store.vector(tagweave_store::FEATURES, &first.id).unwrap();
        // A sidecar edited (as the review page writes one) and a picture whose bytes changed.
        let sidecar = temp.path().join(&first.rel_path).with_extension("txt");
        let mut text = std::fs::read_to_string(&sidecar).unwrap_or_default();
        text.push_str("gull # accepted suggestion\n");
        std::fs::write(&sidecar, text).unwrap();
        let changed = temp.path().join(&second.rel_path);
        let mut bytes = std::fs::read(&changed).unwrap();
        bytes.push(0);
        std::fs::write(&changed, bytes).unwrap();

        let names = [
            first.rel_path.clone(),
            second.rel_path.clone(),
            "gone.png".into(),
        ];
        assert_eq!(refresh_records(&store, &names).unwrap(), 1);
        let now = store.item(&first.id).unwrap().unwrap();
        assert!(now.tags.contains(&"gull".to_string()), "{:?}", now.tags);
        assert_eq!(now.accepted, ["gull"]);
        assert_eq!(
            store.vector(tagweave_store::FEATURES, &first.id).unwrap(),
            features_before,
            "same bytes, same features"
        );
        assert_eq!(
            store.item(&second.id).unwrap().unwrap(),
            *second,
            "a picture whose bytes changed waits for the scan"
        );
    }

    #[test]
    fn an_unchanged_folder_is_not_read_again() {
        let temp = tempfile::tempdir().unwrap();
        small_collection(temp.path(), 6);
        let store = Store::open_or_create(&temp.path().join(".tagweave"), temp.path()).unwrap();
        scan(&store, &quick_options(), &|_| {}).unwrap();
        let events = std::sync::Mutex::new(Vec::new());
        let again = scan(&store, &quick_options(), &|e| {
            events.lock().unwrap().push(format!("{e:?}"))
        })
        .unwrap();
        assert_eq!((again.unchanged, again.features.encoded), (6, 0));
        let events = events.into_inner().unwrap();
        assert!(
            events
                .iter()
                .all(|e| !e.starts_with("Read") && !e.starts_with("Encoding")),
            "{events:?}"
        );
    }
}
