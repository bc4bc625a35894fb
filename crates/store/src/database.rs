//! The sled database of a store, opened when first needed.
//!
//! At a million pictures sled's page table (every item and every vector location) made
//! opening the database 43 % and closing it 16 % of a `suggest PICTURE`, which needs none
//! of it: the derived files (`derived`) answer it. So a store opens sled only when a
//! question or a change reaches it, and its vector readers share that one opening.

use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Mutex, OnceLock};

use crate::{Result, StoreError};

/// sled's page cache. Its default (about 1 GiB) made loading 1,000,000 codes peak at 1.25 GB
/// of RAM; with 64 MiB the peak was 542 MB and loading was faster (3.7 s against 6.8 s),
/// measured with tools/code-search-bench.
const PAGE_CACHE_BYTES: u64 = 64 << 20;

/// An open database with the trees every store has.
pub(crate) struct Database {
    pub(crate) db: sled::Db,
    pub(crate) meta: sled::Tree,
    pub(crate) items: sled::Tree,
    pub(crate) blobs: sled::Tree,
}

impl Database {
    pub(crate) fn open(path: &Path) -> sled::Result<Database> {
        let db = sled::Config::new()
            .path(path)
            .mode(sled::Mode::LowSpace)
            .cache_capacity(PAGE_CACHE_BYTES)
            .open()?;
        Ok(Database {
            meta: db.open_tree("meta")?,
            items: db.open_tree("items")?,
            blobs: db.open_tree("blobs")?,
            db,
        })
    }
}

/// The database of the store at `dir`, opened at the first [`LazyDatabase::get`].
pub(crate) struct LazyDatabase {
    dir: PathBuf,
    path: PathBuf,
    opened: OnceLock<Database>,
    /// Held while opening: sled refuses a second opening of one folder.
    opening: Mutex<()>,
    /// Set once the database reported an error: sled's flush then waits forever (seen
    /// with a full disk), so nothing flushes it on drop.
    failed: AtomicBool,
}

impl LazyDatabase {
    /// The database at `path` of the store at `dir` (which errors name), not opened yet.
    pub(crate) fn new(dir: &Path, path: PathBuf) -> LazyDatabase {
        LazyDatabase {
            dir: dir.to_path_buf(),
            path,
            opened: OnceLock::new(),
            opening: Mutex::new(()),
            failed: AtomicBool::new(false),
        }
    }

    /// The database, opened now if it was not yet.
    pub(crate) fn get(&self) -> Result<&Database> {
        if let Some(database) = self.opened.get() {
            return Ok(database);
        }
        let _opening = self.opening.lock().unwrap_or_else(|e| e.into_inner());
        if let Some(database) = self.opened.get() {
            return Ok(database);
        }
        let database = Database::open(&self.path).map_err(|e| self.error(e))?;
        Ok(self.opened.get_or_init(|| database))
    }

    /// The database if it was opened.
    pub(crate) fn if_open(&self) -> Option<&Database> {
        self.opened.get()
    }

    /// `source` as the store's error; remembers that the database failed.
    pub(crate) fn error(&self, source: sled::Error) -> StoreError {
        self.mark_failed();
        crate::database_error(&self.dir, source)
    }

    /// Remembers that writing failed part-way (see [`Drop`]).
    pub(crate) fn mark_failed(&self) {
        self.failed.store(true, Ordering::Relaxed);
    }
}

impl Drop for LazyDatabase {
    fn drop(&mut self) {
        let Some(database) = self.opened.get() else {
            return;
        };
        if self.failed.load(Ordering::Relaxed) {
            // sled flushes when its last handle goes and, after an I/O error, waits for
            // that flush forever: keep one handle, so the process can end with its error.
            std::mem::forget(database.db.clone());
            return;
        }
        // Best effort: every writer already flushed; this covers readers' bookkeeping.
        let _ = database.db.flush();
    }
}
