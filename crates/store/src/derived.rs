//! Files derived from the database and kept beside it for a fast start (the item list,
//! saved code indexes). Each exists only while it is true: a change deletes it first
//! (`Changes::before`), and a reader writes it again only if nothing changed in this
//! process since it read what the file holds (`Changes::write_if_unchanged`); other
//! processes are kept out by the store's lock.

use std::io::Write;
use std::path::{Path, PathBuf};
use std::sync::{Arc, Mutex};

/// Counts changes to what derived files hold, shared by a store and its readers.
#[derive(Clone, Default)]
pub(crate) struct Changes(Arc<Mutex<u64>>);

impl Changes {
    /// The count now, to hand back to [`Self::write_if_unchanged`].
    pub(crate) fn seen(&self) -> u64 {
        *self.0.lock().unwrap_or_else(|e| e.into_inner())
    }

    /// Counts a change and deletes the derived files it makes untrue.
    pub(crate) fn before(&self, untrue: &[PathBuf]) -> std::io::Result<()> {
        let mut count = self.0.lock().unwrap_or_else(|e| e.into_inner());
        *count += 1;
        untrue.iter().try_for_each(|path| remove_if_there(path))
    }

    /// Writes `bytes` to `path` if nothing changed since `seen`. Best effort: a store
    /// that cannot take the file (full disk, read-only) only starts slower next time.
    pub(crate) fn write_if_unchanged(&self, seen: u64, path: &Path, bytes: &[u8]) {
        let count = self.0.lock().unwrap_or_else(|e| e.into_inner());
        if *count == seen {
            let _ = write_whole(path, bytes);
        }
    }
}

/// Deletes `path`; one that is not there is fine.
pub(crate) fn remove_if_there(path: &Path) -> std::io::Result<()> {
    match std::fs::remove_file(path) {
        Err(e) if e.kind() != std::io::ErrorKind::NotFound => Err(e),
        _ => Ok(()),
    }
}

/// Writes through a temporary file renamed into place, so a reader finds the whole file
/// or none; the folder is made if missing and synced after the rename, so the file stays
/// after a crash.
pub(crate) fn write_whole(path: &Path, bytes: &[u8]) -> std::io::Result<()> {
    let temporary = path.with_extension("tmp");
    let written = (|| {
        let folder = path.parent().unwrap_or(Path::new("."));
        std::fs::create_dir_all(folder)?;
        let mut file = std::fs::File::create(&temporary)?;
        file.write_all(bytes)?;
        file.sync_data()?;
        std::fs::rename(&temporary, path)?;
        std::fs::File::open(folder)?.sync_all()
    })();
    if written.is_err() {
        let _ = std::fs::remove_file(&temporary);
    }
    written
}

/// A file of answers worked out from everything a store holds (items, vectors, model),
/// kept beside it for the next reader: deleted before any change, written back only if
/// nothing changed since this handle was taken.
pub struct KeptAnswers {
    path: PathBuf,
    /// `None`: never written back (a handle that outlives its store cannot know of changes
    /// made by others).
    changes: Option<(Changes, u64)>,
}

impl KeptAnswers {
    pub(crate) fn new(path: PathBuf, changes: Option<&Changes>) -> KeptAnswers {
        KeptAnswers {
            path,
            changes: changes.map(|c| (c.clone(), c.seen())),
        }
    }

    /// The kept bytes, if any (possibly damaged: the reader checks them).
    pub fn read(&self) -> Option<Vec<u8>> {
        std::fs::read(&self.path).ok()
    }

    /// Keeps `bytes` for the next reader, if nothing changed since the handle was taken
    /// (best effort).
    pub fn keep(&self, bytes: &[u8]) {
        if let Some((changes, seen)) = &self.changes {
            changes.write_if_unchanged(*seen, &self.path, bytes);
        }
    }
}
