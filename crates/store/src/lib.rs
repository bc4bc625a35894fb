//! The embedded index beside a collection: items, tags, learned blobs and per-item vectors.
//!
//! The store is a cache. Everything in it can be rebuilt from the pictures and their
//! sidecars, so a format change or a damaged store is answered with "rebuild", never with
//! a guess. One process at a time holds a store; the lock dies with the process.

mod database;
mod derived;
mod error;
mod facts;
mod item_list;
mod items;
mod layout;
mod location_table;
mod lock;
mod packing;
mod reader;
mod search;
mod table;
mod vector_log;

use std::path::{Path, PathBuf};
use std::sync::Arc;

use database::{Database, LazyDatabase};
use rayon::prelude::*;
use serde::{de::DeserializeOwned, Serialize};
use tagweave_collection::{ItemRecord, Vocabulary};

pub use derived::KeptAnswers;
pub use error::StoreError;
pub use items::Items;
pub use layout::{CODES, EXTRACTOR_BLOB, FEATURES, MODEL_BLOB};
use location_table::LocationTable;
use lock::StoreLock;
pub use reader::{HeldVectors, PackedVector, VectorReader};
pub use search::{CodeIndex, CodeIndexBuilder, Hit, SearchMode, DEFAULT_CANDIDATES, MAX_DIM};
pub use table::FeatureTable;
use vector_log::{Location, VectorFiles};

/// `values` as a vector of `kind` reads back from the store (its packing applied), for work
/// done outside the store that must match work done on what the store holds.
pub fn as_stored(kind: &str, values: &[f32]) -> Vec<f32> {
    packing::unpack(&packing::pack(kind, values)).unwrap_or_else(|_| values.to_vec())
}

/// Bumped whenever the on-disk layout changes in a way older code cannot read.
/// 2: one tree per vector kind, vectors packed (`packing`: codes as bytes, features in
/// 8-bit blocks). 3: the packed vectors in files beside the database (`vector_log`), the
/// trees holding where each lies.
pub const FORMAT_VERSION: u32 = 3;

/// The database's folder, and the folders of a compaction (see [`Store::compact_if_grown`]).
const DB_DIR: &str = "db";
const COMPACT_DIR: &str = "db.compact";
const OLD_DIR: &str = "db.old";
/// The database file's size after its last compaction (u64, big-endian).
const META_COMPACTED_SIZE: &str = "compacted_size";
/// First bytes of a model kept in binary (postcard, see [`Store::put_model`]); a model
/// without them is JSON (as stores trained before kept it).
const BINARY_MODEL: &[u8; 8] = b"twmodel1";
/// The folder of blob files ([`Store::blob_file`]).
const BLOB_DIR: &str = "blobs";
/// Files of kept answers ([`Store::kept_answers`]) are named this, then their name.
const KEPT_ANSWERS_PREFIX: &str = "answers-";
/// A database file smaller than this is never compacted.
const COMPACT_FROM_BYTES: u64 = 64 << 20;

/// How long a command waits for a process that holds the store only for a moment (the
/// review page writing one decision) before it says the store is in use.
pub const PATIENCE: std::time::Duration = std::time::Duration::from_secs(5);

/// Name of the store folder placed inside a collection by default.
pub const DEFAULT_DIR_NAME: &str = ".tagweave";

const META_FORMAT: &str = "format_version";
/// Where the vectors of kind K lie is kept in the tree `vectors/K`.
const VECTOR_TREE_PREFIX: &str = "vectors/";
/// Bytes of live vectors of kind K, under `live_bytes/K` in the meta tree: how much of
/// the vector files is not garbage, to know when to compact them.
const META_LIVE_PREFIX: &str = "live_bytes/";
const META_ROOT: &str = "collection_root";
/// Root recorded as this when the store sits directly inside the collection, so the
/// collection can be moved or renamed with its store.
const ROOT_IS_PARENT: &str = "..";

pub type Result<T> = std::result::Result<T, StoreError>;

/// An open store; holds the process lock for as long as it lives.
pub struct Store {
    dir: PathBuf,
    collection_root: PathBuf,
    /// Opened when first needed (shared with the store's vector readers).
    database: Arc<LazyDatabase>,
    /// Counts changes, so a derived file (the item list, a saved code index) read before
    /// a change is never written after it.
    changes: derived::Changes,
    _lock: StoreLock,
}

impl Store {
    /// Opens the store at `dir` for the collection at `collection_root`, creating it when
    /// the folder does not exist yet.
    pub fn open_or_create(dir: &Path, collection_root: &Path) -> Result<Store> {
        let fresh = !has_database(dir);
        std::fs::create_dir_all(dir).map_err(|source| io_error(dir, dir, source))?;
        let mut store = Store::open_locked(dir, false)?;
        if fresh {
            let facts = facts::path_in(dir);
            derived::remove_if_there(&facts).map_err(|source| io_error(dir, &facts, source))?;
        } else if store.open_by_facts()? {
            return Ok(store);
        }
        if fresh || store.is_unfinished()? {
            let root_value = if is_default_location(dir, collection_root) {
                ROOT_IS_PARENT.to_string()
            } else {
                absolute(collection_root)?.to_string_lossy().into_owned()
            };
            // The version goes last: a store that has one was created completely.
            store.put_meta(META_ROOT, root_value.as_bytes())?;
            store.put_meta(META_FORMAT, &FORMAT_VERSION.to_be_bytes())?;
            store.flush()?;
        }
        store.check_format_and_root()?;
        Ok(store)
    }

    /// Opens an existing store; a missing one is an error that says how to make it.
    pub fn open(dir: &Path) -> Result<Store> {
        Store::open_as(dir, false)
    }

    fn open_as(dir: &Path, brief: bool) -> Result<Store> {
        if !has_database(dir) {
            return Err(StoreError::NotAStore {
                dir: dir.to_path_buf(),
            });
        }
        let mut store = Store::open_locked(dir, brief)?;
        if store.open_by_facts()? {
            return Ok(store);
        }
        if store.is_unfinished()? {
            return Err(StoreError::NotAStore {
                dir: dir.to_path_buf(),
            });
        }
        store.check_format_and_root()?;
        Ok(store)
    }

    /// Takes the format version and root from the facts file, when it is there and of
    /// this format: then the database stays closed until something needs it.
    fn open_by_facts(&mut self) -> Result<bool> {
        match facts::read(&facts::path_in(&self.dir)) {
            Some((FORMAT_VERSION, root)) => {
                self.collection_root = self.resolve_root(&root)?;
                Ok(true)
            }
            _ => Ok(false),
        }
    }

    /// Checks the database's format version and reads its root, then keeps both in the
    /// facts file for the next opening (best effort).
    fn check_format_and_root(&mut self) -> Result<()> {
        self.check_format()?;
        let root = self.raw_root()?;
        self.collection_root = self.resolve_root(&root)?;
        let _ = derived::write_whole(
            &facts::path_in(&self.dir),
            &facts::encode(FORMAT_VERSION, &root),
        );
        Ok(())
    }

    /// Opens an existing store like [`Store::open`], waiting up to `patience` while its
    /// holder keeps it only for a moment (the review page writing one decision); a holder
    /// that keeps it longer (a scan, training) is reported at once.
    pub fn open_patiently(dir: &Path, patience: std::time::Duration) -> Result<Store> {
        Store::open_waiting(dir, patience, false)
    }

    /// Opens an existing store to change it within a moment: waits up to `patience` for
    /// whoever holds it, and tells others who wait that this hold is brief.
    pub fn open_briefly(dir: &Path, patience: std::time::Duration) -> Result<Store> {
        Store::open_waiting(dir, patience, true)
    }

    fn open_waiting(dir: &Path, patience: std::time::Duration, brief: bool) -> Result<Store> {
        let deadline = std::time::Instant::now() + patience;
        loop {
            match Store::open_as(dir, brief) {
                Err(StoreError::InUse { .. })
                    if std::time::Instant::now() < deadline
                        && (brief || lock::held_briefly(dir)) =>
                {
                    std::thread::sleep(std::time::Duration::from_millis(50));
                }
                opened => return opened,
            }
        }
    }

    /// True for a database whose creation was cut short (a process killed before the
    /// first flush): no format version and nothing else written. Such a store is created
    /// anew rather than refused as an unknown format.
    fn is_unfinished(&self) -> Result<bool> {
        let database = self.db()?;
        let versioned = database
            .meta
            .contains_key(META_FORMAT)
            .map_err(|e| self.db_error(e))?;
        let mut no_vectors = true;
        for kind in self.vector_kinds()? {
            no_vectors &= self.vector_tree(&kind)?.is_empty();
        }
        Ok(!versioned && database.items.is_empty() && database.blobs.is_empty() && no_vectors)
    }

    /// The nearest `.tagweave` folder in `start` or any folder above it, the way git
    /// finds `.git`.
    pub fn locate(start: &Path) -> Option<PathBuf> {
        start
            .ancestors()
            .map(|dir| dir.join(DEFAULT_DIR_NAME))
            .find(|candidate| has_database(candidate))
    }

    /// Deletes a store folder so it can be rebuilt. Refuses folders that do not look like
    /// a store, so a mistyped path cannot wipe anything else.
    pub fn remove(dir: &Path) -> Result<()> {
        if !dir.exists() {
            return Ok(());
        }
        if !has_database(dir) {
            return Err(StoreError::NotAStore {
                dir: dir.to_path_buf(),
            });
        }
        // Taking the lock first makes sure no other process is using it.
        let lock = StoreLock::acquire(dir)?;
        drop(lock);
        std::fs::remove_dir_all(dir).map_err(|source| StoreError::Io {
            path: dir.to_path_buf(),
            source,
        })
    }

    fn open_locked(dir: &Path, brief: bool) -> Result<Store> {
        let lock = StoreLock::acquire_for(dir, brief).map_err(|e| disk_full_named(dir, e))?;
        finish_compaction(dir).map_err(|source| io_error(dir, dir, source))?;
        Ok(Store {
            dir: dir.to_path_buf(),
            collection_root: PathBuf::new(),
            database: Arc::new(LazyDatabase::new(dir, dir.join(DB_DIR))),
            changes: derived::Changes::default(),
            _lock: lock,
        })
    }

    /// The database, opened now if no one needed it before.
    fn db(&self) -> Result<&Database> {
        self.database.get()
    }

    /// Rewrites the database compactly when its file grew past 1.5 × its size after the
    /// last compaction (and 64 MB); returns whether it did. For writers that wrote much (a
    /// scan, training).
    ///
    /// sled keeps the room of rewritten pages as free segments and writes every free
    /// segment over each time it opens: after a million items were written, 490 MB at
    /// every command's start (0.4 s of a `suggest`). A copy of every tree into a fresh
    /// folder has none. The copy is swapped in by two renames; a swap cut short is finished
    /// or undone at the next open ([`finish_compaction`]).
    pub fn compact_if_grown(&mut self) -> Result<bool> {
        let size = self.db()?.db.size_on_disk().map_err(|e| self.db_error(e))?;
        let last = self
            .meta_array(META_COMPACTED_SIZE)?
            .map(u64::from_be_bytes);
        if size < COMPACT_FROM_BYTES || last.is_some_and(|last| size <= last / 2 * 3) {
            return Ok(false);
        }
        self.compact_database()?;
        let size = self.db()?.db.size_on_disk().map_err(|e| self.db_error(e))?;
        self.put_meta(META_COMPACTED_SIZE, &size.to_be_bytes())?;
        self.flush()?;
        Ok(true)
    }

    /// Copies every tree into a fresh database and swaps it in (see [`Self::compact_if_grown`]).
    fn compact_database(&mut self) -> Result<()> {
        self.flush()?;
        let io = |path: &Path, source| io_error(&self.dir, path, source);
        let fresh_path = self.dir.join(COMPACT_DIR);
        if fresh_path.exists() {
            std::fs::remove_dir_all(&fresh_path).map_err(|e| io(&fresh_path, e))?;
        }
        let db = &self.db()?.db;
        let copied = (|| -> sled::Result<()> {
            let fresh = Database::open(&fresh_path)?.db;
            for name in db.tree_names() {
                let (from, to) = (db.open_tree(&name)?, fresh.open_tree(&name)?);
                let mut batch = sled::Batch::default();
                for (i, entry) in from.iter().enumerate() {
                    let (key, value) = entry?;
                    batch.insert(key, value);
                    if i % 16_384 == 16_383 {
                        to.apply_batch(std::mem::take(&mut batch))?;
                    }
                }
                to.apply_batch(batch)?;
            }
            fresh.flush()?;
            Ok(())
        })();
        if let Err(error) = copied {
            let _ = std::fs::remove_dir_all(&fresh_path);
            return Err(self.db_error(error));
        }
        // Let go of the old database (sled closes its file with its last handle), swap the
        // folders; the copy opens when next needed.
        let db_path = self.dir.join(DB_DIR);
        self.database = Arc::new(LazyDatabase::new(&self.dir, db_path.clone()));
        let old_path = self.dir.join(OLD_DIR);
        std::fs::rename(&db_path, &old_path).map_err(|e| io(&db_path, e))?;
        std::fs::rename(&fresh_path, &db_path).map_err(|e| io(&fresh_path, e))?;
        std::fs::remove_dir_all(&old_path).map_err(|e| io(&old_path, e))?;
        Ok(())
    }

    /// A meta value of `N` bytes (a number); `None` when missing or of another length.
    fn meta_array<const N: usize>(&self, key: &str) -> Result<Option<[u8; N]>> {
        Ok(self
            .db()?
            .meta
            .get(key)
            .map_err(|e| self.db_error(e))?
            .and_then(|bytes| <[u8; N]>::try_from(bytes.as_ref()).ok()))
    }

    fn check_format(&self) -> Result<()> {
        let found = self.meta_array(META_FORMAT)?.map(u32::from_be_bytes);
        match found {
            Some(FORMAT_VERSION) => Ok(()),
            found => Err(StoreError::FormatMismatch {
                dir: self.dir.clone(),
                found,
                expected: FORMAT_VERSION,
            }),
        }
    }

    /// The collection root as the database keeps it.
    fn raw_root(&self) -> Result<String> {
        let raw = self
            .db()?
            .meta
            .get(META_ROOT)
            .map_err(|e| self.db_error(e))?
            .ok_or_else(|| self.corrupt(META_ROOT, "missing"))?;
        std::str::from_utf8(&raw)
            .map(str::to_string)
            .map_err(|_| self.corrupt(META_ROOT, "not UTF-8"))
    }

    /// The folder a root kept as `text` names.
    fn resolve_root(&self, text: &str) -> Result<PathBuf> {
        if text == ROOT_IS_PARENT {
            let parent = absolute(&self.dir)?;
            Ok(parent.parent().map(Path::to_path_buf).unwrap_or(parent))
        } else {
            Ok(PathBuf::from(text))
        }
    }

    /// The folder this store indexes.
    pub fn collection_root(&self) -> &Path {
        &self.collection_root
    }

    /// The store's own folder.
    pub fn dir(&self) -> &Path {
        &self.dir
    }

    /// Every indexed item, ordered by id. Read from the item list when it is there, else
    /// from the database, after which the list is written for the next reader (best
    /// effort: a store that cannot take it only starts slower).
    pub fn items(&self) -> Result<Vec<ItemRecord>> {
        let mut items = self.items_by_path()?;
        items.par_sort_unstable_by(|a, b| a.id.cmp(&b.id));
        Ok(items)
    }

    /// Every indexed item, ordered by relative path (the order the item list keeps, so
    /// the questions' start sorts nothing).
    pub fn items_by_path(&self) -> Result<Vec<ItemRecord>> {
        let list = item_list::path_in(&self.dir);
        if let Some(listed) = item_list::read(&list, |key, bytes| self.decode(key, bytes)) {
            return Ok(listed);
        }
        let seen = self.changes.seen();
        let stored: Vec<(sled::IVec, sled::IVec)> = self
            .db()?
            .items
            .iter()
            .collect::<std::result::Result<_, _>>()
            .map_err(|e| self.db_error(e))?;
        let mut items = stored
            .par_iter()
            .enumerate()
            .map(|(i, (key, value))| {
                let item: ItemRecord = self.decode(&String::from_utf8_lossy(key), value)?;
                Ok((i, item))
            })
            .collect::<Result<Vec<(usize, ItemRecord)>>>()?;
        items.par_sort_unstable_by(|(_, a), (_, b)| a.rel_path.cmp(&b.rel_path));
        let records: Vec<(&[u8], &ItemRecord)> = items
            .iter()
            .map(|(i, item)| (stored[*i].1.as_ref(), item))
            .collect();
        let bytes = item_list::encode(&records);
        drop(records);
        drop(stored);
        self.changes.write_if_unchanged(seen, &list, &bytes);
        Ok(items.into_iter().map(|(_, item)| item).collect())
    }

    /// Every indexed item for questions: read one at a time from the item list when it is
    /// there, else all read from the database (which writes the list for the next reader).
    pub fn items_to_ask(&self) -> Result<Items> {
        match item_list::ListFile::open(&item_list::path_in(&self.dir)) {
            Some(list) => Ok(Items::listed(self.dir.clone(), list)),
            None => Ok(Items::held(self.dir.clone(), self.items_by_path()?)),
        }
    }

    /// Every indexed item, held (by relative path), for questions asked after the store is
    /// closed.
    pub fn items_to_keep(&self) -> Result<Items> {
        Ok(Items::held(self.dir.clone(), self.items_by_path()?))
    }

    /// One item by id.
    pub fn item(&self, id: &str) -> Result<Option<ItemRecord>> {
        self.db()?
            .items
            .get(id)
            .map_err(|e| self.db_error(e))?
            .map(|value| self.decode(id, &value))
            .transpose()
    }

    /// Number of indexed items (sled counts by walking them all; the item list knows).
    pub fn item_count(&self) -> Result<usize> {
        match item_list::count(&item_list::path_in(&self.dir)) {
            Some(count) => Ok(count),
            None => Ok(self.db()?.items.len()),
        }
    }

    /// Writes a batch of new or refreshed items and removes the given ids, then flushes so
    /// a crash after this call loses nothing of it. Vectors computed from a picture whose
    /// bytes changed, or that is gone, are dropped with it.
    pub fn update_items(&self, upserts: &[ItemRecord], removals: &[String]) -> Result<()> {
        if !upserts.is_empty() || !removals.is_empty() {
            self.before_change(vec![item_list::path_in(&self.dir)])?;
        }
        let mut stale: Vec<&str> = removals.iter().map(String::as_str).collect();
        for item in upserts {
            if let Some(old) = self.item(&item.id)? {
                if old.content_hash != item.content_hash {
                    stale.push(&item.id);
                }
            }
        }
        // Vectors go first, flushed: a crash in between leaves an item without vectors
        // (recomputed by the next scan), never an item with vectors of other bytes.
        if !stale.is_empty() {
            let kinds = self.vector_kinds()?;
            self.before_change(kinds.iter().flat_map(|k| self.derived_from(k)).collect())?;
            for kind in kinds {
                let tree = self.vector_tree(&kind)?;
                let mut vector_batch = sled::Batch::default();
                for id in &stale {
                    vector_batch.remove(id.as_bytes());
                }
                let dropped = self.held_bytes(&tree, stale.iter().copied())?;
                tree.apply_batch(vector_batch)
                    .map_err(|e| self.db_error(e))?;
                let live = self.live_bytes(&kind)?.saturating_sub(dropped);
                self.set_live_bytes(&kind, live)?;
            }
            self.flush()?;
        }
        let mut batch = sled::Batch::default();
        for item in upserts {
            let value =
                serde_json::to_vec(item).map_err(|e| self.corrupt(&item.id, &e.to_string()))?;
            batch.insert(item.id.as_bytes(), value);
        }
        for id in removals {
            batch.remove(id.as_bytes());
        }
        self.db()?
            .items
            .apply_batch(batch)
            .map_err(|e| self.db_error(e))?;
        self.flush()
    }

    /// Tag counts over all indexed items, most frequent first.
    pub fn vocabulary(&self) -> Result<Vocabulary> {
        // Counted, so any order does; untagged items count nothing.
        let items = self.items_to_ask()?;
        let tagged = items.records(items.tagged_rows()?)?;
        Ok(Vocabulary::from_tag_lists(
            tagged.iter().map(|item| item.tags.as_slice()),
        ))
    }

    /// Stores a named, versioned piece of learned state (a dictionary, a model).
    pub fn put_blob<T: Serialize>(&self, name: &str, value: &T) -> Result<()> {
        let bytes = serde_json::to_vec(value).map_err(|e| self.corrupt(name, &e.to_string()))?;
        self.put_blob_bytes(name, &bytes)
    }

    /// Reads a named blob; `None` when it was never stored.
    pub fn blob<T: DeserializeOwned>(&self, name: &str) -> Result<Option<T>> {
        self.blob_bytes(name)?
            .map(|bytes| self.decode(name, &bytes))
            .transpose()
    }

    /// A named blob's stored bytes, exactly as kept; `None` when it was never stored. Shard
    /// files name the extractor and model they were made with by a hash of these bytes.
    pub fn blob_bytes(&self, name: &str) -> Result<Option<Vec<u8>>> {
        let file = self.blob_file(name);
        match std::fs::read(&file) {
            Ok(bytes) => return Ok(Some(bytes)),
            Err(e) if e.kind() != std::io::ErrorKind::NotFound => {
                return Err(StoreError::Io {
                    path: file,
                    source: e,
                })
            }
            Err(_) => {}
        }
        // Stores written before blobs became files keep them in the database.
        Ok(self
            .db()?
            .blobs
            .get(name)
            .map_err(|e| self.db_error(e))?
            .map(|bytes| bytes.to_vec()))
    }

    /// Where a blob's file lies: `blobs/NAME.bin` beside the database. Reading a 20 MB
    /// model out of sled took 90 ms of every question; a file is read in a few.
    fn blob_file(&self, name: &str) -> PathBuf {
        self.dir.join(BLOB_DIR).join(format!("{name}.bin"))
    }

    /// Stores a named blob from bytes another store (or a file written from one) kept, so
    /// it stays byte for byte what it was. The bytes must decode as what `blob` expects.
    /// The file is whole and durable before the call returns (written beside, synced,
    /// renamed into place); a copy the database kept from before goes after it.
    pub fn put_blob_bytes(&self, name: &str, bytes: &[u8]) -> Result<()> {
        self.before_change(Vec::new())?;
        let file = self.blob_file(name);
        derived::write_whole(&file, bytes).map_err(|source| io_error(&self.dir, &file, source))?;
        if self
            .db()?
            .blobs
            .remove(name)
            .map_err(|e| self.db_error(e))?
            .is_some()
        {
            self.flush()?;
        }
        Ok(())
    }

    /// The trained model (of the caller's type `T`), or `None` before the first training.
    /// A model records the format it was written in (`format_of` reads it); one of
    /// another format than `format` is [`StoreError::ModelFormat`] ("train again"), not
    /// damage. Read once; only when that fails is the format number read on its own.
    pub fn model<T: DeserializeOwned>(
        &self,
        format: u32,
        format_of: impl Fn(&T) -> u32,
    ) -> Result<Option<T>> {
        #[derive(serde::Deserialize)]
        struct FormatOnly {
            format: u32,
        }
        let outdated = |found| StoreError::ModelFormat {
            found,
            expected: format,
        };
        let Some(bytes) = self.blob_bytes(MODEL_BLOB)? else {
            return Ok(None);
        };
        match decode_model::<T>(&bytes) {
            Ok(model) if format_of(&model) != format => Err(outdated(format_of(&model))),
            Ok(model) => Ok(Some(model)),
            Err(error) => match decode_model::<FormatOnly>(&bytes) {
                Ok(header) if header.format != format => Err(outdated(header.format)),
                _ => Err(self.corrupt(MODEL_BLOB, &error)),
            },
        }
    }

    /// Stores the trained model in binary (its first field must be its format number, as
    /// [`Self::model`] reads it): a million-picture model took 53 MB of JSON, and parsing
    /// it was a third of a `suggest PICTURE`'s time.
    pub fn put_model<T: Serialize>(&self, model: &T) -> Result<()> {
        let bytes = postcard::to_extend(model, BINARY_MODEL.to_vec())
            .map_err(|e| self.corrupt(MODEL_BLOB, &e.to_string()))?;
        self.put_blob_bytes(MODEL_BLOB, &bytes)
    }

    /// Removes a named blob (for example to force relearning).
    pub fn remove_blob(&self, name: &str) -> Result<()> {
        self.before_change(Vec::new())?;
        // The database's copy first: a crash in between leaves the file, never an older
        // copy to come back.
        self.db()?
            .blobs
            .remove(name)
            .map_err(|e| self.db_error(e))?;
        self.flush()?;
        let file = self.blob_file(name);
        derived::remove_if_there(&file).map_err(|source| io_error(&self.dir, &file, source))
    }

    /// Stores several vectors of one kind (`"features"`, `"code"` …), keyed by item id,
    /// packed as `packing` says (features and codes compactly, anything else exactly).
    /// The bytes are durable before the index points at them (`vector_log`).
    pub fn put_vectors(&self, kind: &str, rows: &[(String, Vec<f32>)]) -> Result<()> {
        let files = self.vector_files(kind)?;
        let tree = self.vector_tree(kind)?;
        self.before_change(self.derived_from(kind))?;
        let packed: Vec<Vec<u8>> = rows
            .iter()
            .map(|(_, values)| packing::pack(kind, values))
            .collect();
        let replaced = self.held_bytes(&tree, rows.iter().map(|(id, _)| id.as_str()))?;
        let locations = files.append(packed.iter().map(Vec::as_slice))?;
        let mut batch = sled::Batch::default();
        let mut added = 0;
        for ((id, _), location) in rows.iter().zip(&locations) {
            batch.insert(id.as_bytes(), &location.to_bytes());
            added += location.len();
        }
        tree.apply_batch(batch).map_err(|e| self.db_error(e))?;
        let live = (self.live_bytes(kind)? + added).saturating_sub(replaced);
        self.set_live_bytes(kind, live)?;
        self.flush()?;
        if files.worth_compacting(live)? {
            let live = files
                .compact(&tree)
                .inspect_err(|_| self.database.mark_failed())?;
            self.set_live_bytes(kind, live)?;
            self.flush()?;
        }
        Ok(())
    }

    /// One item's vector of a kind; `None` when it has none yet.
    pub fn vector(&self, kind: &str, id: &str) -> Result<Option<Vec<f32>>> {
        self.vector_reader(kind)?.get(id)
    }

    /// The vectors of `kind`, to read a few at a time while this store is open.
    pub fn vector_reader(&self, kind: &str) -> Result<VectorReader> {
        let files = self.vector_files(kind)?;
        let table = location_table::path_in(&self.dir, kind);
        Ok(VectorReader {
            database: Arc::clone(&self.database),
            table: LocationTable::open(&table, &files.state()?).map(Arc::new),
            tree: std::sync::OnceLock::new(),
            files,
            dir: self.dir.clone(),
            kind: kind.to_string(),
            changes: self.changes.clone(),
        })
    }

    /// Every stored vector of one kind as `(id, values)`, in id order. Streams: a million
    /// codes are never held twice, and no other kind is read.
    pub fn vectors_of_kind(
        &self,
        kind: &str,
    ) -> Box<dyn Iterator<Item = Result<(String, Vec<f32>)>>> {
        match self.vector_reader(kind) {
            Ok(reader) => Box::new(reader.iter()),
            Err(e) => Box::new(std::iter::once(Err(e))),
        }
    }

    /// Drops every vector of one kind (for example after relearning features).
    pub fn clear_vectors(&self, kind: &str) -> Result<()> {
        self.before_change(self.derived_from(kind))?;
        self.vector_tree(kind)?
            .clear()
            .map_err(|e| self.db_error(e))?;
        self.set_live_bytes(kind, 0)?;
        self.flush()?;
        self.vector_files(kind)?.remove_all()
    }

    /// The tree holding where the vectors of `kind` lie (one per kind, so reading one
    /// kind never walks the others).
    fn vector_tree(&self, kind: &str) -> Result<sled::Tree> {
        vector_tree(&self.database, kind)
    }

    fn vector_files(&self, kind: &str) -> Result<VectorFiles> {
        if kind.is_empty() || !kind.bytes().all(|b| b.is_ascii_lowercase() || b == b'_') {
            return Err(StoreError::Inconsistent(format!(
                "`{kind}` cannot name a vector kind (lower-case letters and `_` only)"
            )));
        }
        Ok(VectorFiles::new(&self.dir, kind))
    }

    /// Answers kept under `name` (lower-case letters and `-`), to be written back while
    /// this store is open.
    pub fn kept_answers(&self, name: &str) -> KeptAnswers {
        KeptAnswers::new(self.kept_answers_path(name), Some(&self.changes))
    }

    /// Answers kept under `name`, read only: for readers that outlive the store.
    pub fn kept_answers_to_read(&self, name: &str) -> KeptAnswers {
        KeptAnswers::new(self.kept_answers_path(name), None)
    }

    fn kept_answers_path(&self, name: &str) -> PathBuf {
        self.dir.join(format!("{KEPT_ANSWERS_PREFIX}{name}.bin"))
    }

    /// Every file of kept answers there is.
    fn kept_answer_files(&self) -> Vec<PathBuf> {
        let Ok(entries) = std::fs::read_dir(&self.dir) else {
            return Vec::new();
        };
        entries
            .flatten()
            .map(|entry| entry.path())
            .filter(|path| {
                path.file_name()
                    .and_then(|n| n.to_str())
                    .is_some_and(|n| n.starts_with(KEPT_ANSWERS_PREFIX))
            })
            .collect()
    }

    /// Counts a change and deletes the derived files it makes untrue (`derived`), and
    /// every file of kept answers (they are worked out from everything).
    fn before_change(&self, mut untrue: Vec<PathBuf>) -> Result<()> {
        untrue.extend(self.kept_answer_files());
        self.changes
            .before(&untrue)
            .map_err(|source| io_error(&self.dir, &self.dir, source))
    }

    /// The derived files worked out from the vectors of `kind`: its saved code index and
    /// its table of locations.
    fn derived_from(&self, kind: &str) -> Vec<PathBuf> {
        vec![
            search::saved_path(&self.dir, kind),
            location_table::path_in(&self.dir, kind),
        ]
    }

    /// Every vector kind the store holds.
    fn vector_kinds(&self) -> Result<Vec<String>> {
        Ok(self
            .db()?
            .db
            .tree_names()
            .into_iter()
            .filter_map(|name| {
                name.strip_prefix(VECTOR_TREE_PREFIX.as_bytes())
                    .map(|kind| String::from_utf8_lossy(kind).into_owned())
            })
            .collect())
    }

    /// Bytes of the vectors `tree` holds for `ids` (for the live count).
    fn held_bytes<'a>(&self, tree: &sled::Tree, ids: impl Iterator<Item = &'a str>) -> Result<u64> {
        let mut total = 0;
        for id in ids {
            if let Some(value) = tree.get(id.as_bytes()).map_err(|e| self.db_error(e))? {
                total += Location::from_bytes(&value).map_or(0, Location::len);
            }
        }
        Ok(total)
    }

    fn live_bytes(&self, kind: &str) -> Result<u64> {
        Ok(self
            .db()?
            .meta
            .get(format!("{META_LIVE_PREFIX}{kind}"))
            .map_err(|e| self.db_error(e))?
            .and_then(|bytes| <[u8; 8]>::try_from(bytes.as_ref()).ok())
            .map_or(0, u64::from_be_bytes))
    }

    fn set_live_bytes(&self, kind: &str, live: u64) -> Result<()> {
        self.db()?
            .meta
            .insert(format!("{META_LIVE_PREFIX}{kind}"), &live.to_be_bytes())
            .map(|_| ())
            .map_err(|e| self.db_error(e))
    }

    /// Makes everything written so far durable.
    pub fn flush(&self) -> Result<()> {
        match self.database.if_open() {
            Some(database) => database
                .db
                .flush()
                .map(|_| ())
                .map_err(|e| self.db_error(e)),
            None => Ok(()),
        }
    }

    fn put_meta(&mut self, key: &str, value: &[u8]) -> Result<()> {
        self.db()?
            .meta
            .insert(key, value)
            .map(|_| ())
            .map_err(|e| self.db_error(e))
    }

    fn decode<T: DeserializeOwned>(&self, key: &str, bytes: &[u8]) -> Result<T> {
        serde_json::from_slice(bytes).map_err(|e| self.corrupt(key, &e.to_string()))
    }

    fn db_error(&self, source: sled::Error) -> StoreError {
        self.database.error(source)
    }

    fn corrupt(&self, key: &str, detail: &str) -> StoreError {
        StoreError::Corrupt {
            dir: self.dir.clone(),
            key: key.to_string(),
            detail: detail.to_string(),
        }
    }
}

/// A model's bytes as [`Store::put_model`] writes them (binary), or as older stores kept
/// them (JSON); the error says why they do not decode.
pub fn decode_model<T: DeserializeOwned>(bytes: &[u8]) -> std::result::Result<T, String> {
    match bytes.strip_prefix(BINARY_MODEL.as_slice()) {
        // Read from the start, the rest left: a binary model's first field is its format
        // number, which is how it is read alone.
        Some(binary) => postcard::take_from_bytes::<T>(binary)
            .map(|(model, _)| model)
            .map_err(|e| e.to_string()),
        None => serde_json::from_slice::<T>(bytes).map_err(|e| e.to_string()),
    }
}

/// Whether `dir` holds a database (or the copy of one a compaction cut short swaps in).
fn has_database(dir: &Path) -> bool {
    dir.join(DB_DIR).exists() || dir.join(COMPACT_DIR).exists()
}

/// The tree holding where the vectors of `kind` lie (one per kind, so reading one kind
/// never walks the others).
fn vector_tree(database: &LazyDatabase, kind: &str) -> Result<sled::Tree> {
    database
        .get()?
        .db
        .open_tree(format!("{VECTOR_TREE_PREFIX}{kind}"))
        .map_err(|e| database.error(e))
}

/// Finishes or undoes a compaction cut short (see [`Store::compact_if_grown`]): a copy
/// beside the database was cut short while being made (it goes); a copy without the
/// database was swapped in half-way (it is whole: it takes the database's place); an old
/// database beside the new one is left over.
fn finish_compaction(dir: &Path) -> std::io::Result<()> {
    let (db, fresh, old) = (dir.join(DB_DIR), dir.join(COMPACT_DIR), dir.join(OLD_DIR));
    if fresh.exists() {
        if db.exists() {
            std::fs::remove_dir_all(&fresh)?;
        } else {
            std::fs::rename(&fresh, &db)?;
        }
    }
    if old.exists() && db.exists() {
        std::fs::remove_dir_all(&old)?;
    }
    Ok(())
}

/// A database error of the store at `dir`; a full disk is said as such, since only the
/// user can make room.
pub(crate) fn database_error(dir: &Path, source: sled::Error) -> StoreError {
    match source {
        sled::Error::Io(io) if io.kind() == std::io::ErrorKind::StorageFull => {
            StoreError::DiskFull {
                dir: dir.to_path_buf(),
                source: io,
            }
        }
        source => StoreError::Database {
            dir: dir.to_path_buf(),
            source,
        },
    }
}

/// `error`, or [`StoreError::DiskFull`] when it is a file of the store at `dir` that could
/// not be written for want of space.
pub(crate) fn disk_full_named(dir: &Path, error: StoreError) -> StoreError {
    match error {
        StoreError::Io { source, .. } if source.kind() == std::io::ErrorKind::StorageFull => {
            StoreError::DiskFull {
                dir: dir.to_path_buf(),
                source,
            }
        }
        error => error,
    }
}

/// An I/O error on `path` of the store at `dir`; a full disk said as such.
fn io_error(dir: &Path, path: &Path, source: std::io::Error) -> StoreError {
    disk_full_named(
        dir,
        StoreError::Io {
            path: path.to_path_buf(),
            source,
        },
    )
}

fn is_default_location(dir: &Path, collection_root: &Path) -> bool {
    match (absolute(dir), absolute(collection_root)) {
        (Ok(dir), Ok(root)) => dir.parent() == Some(root.as_path()),
        _ => false,
    }
}

fn absolute(path: &Path) -> Result<PathBuf> {
    path.canonicalize().map_err(|source| StoreError::Io {
        path: path.to_path_buf(),
        source,
    })
}

#[cfg(test)]
mod tests;
