//! Which store a command works on.

use std::path::{Path, PathBuf};

use anyhow::Context;
use tagweave_store::{Store, StoreError, DEFAULT_DIR_NAME};

/// `--store PATH` when given (a store folder, or a collection folder holding one in
/// `.tagweave/`), else the nearest `.tagweave/` here or above. Waits a moment
/// ([`tagweave_store::PATIENCE`]) for a process that holds it briefly, such as the review
/// page writing a decision.
pub fn open_existing(explicit: Option<&Path>) -> anyhow::Result<Store> {
    let dir = match explicit {
        Some(dir) => store_in(dir),
        None => {
            let here = std::env::current_dir().context("cannot read the current folder")?;
            Store::locate(&here).ok_or(StoreError::NotFound { start: here })?
        }
    };
    Ok(Store::open_patiently(&dir, tagweave_store::PATIENCE)?)
}

/// The store a scan of `folder` writes to: `--store PATH`, else `FOLDER/.tagweave`. A
/// `--store` naming the collection folder itself (or any folder holding a `.tagweave/`
/// store) means the store inside it: a store is never made among the pictures.
pub fn for_folder(folder: &Path, explicit: Option<&Path>) -> PathBuf {
    match explicit {
        Some(dir) if same_folder(dir, folder) => folder.join(DEFAULT_DIR_NAME),
        Some(dir) => store_in(dir),
        None => folder.join(DEFAULT_DIR_NAME),
    }
}

/// `dir` itself when it is a store (or not a folder that holds one), else its `.tagweave/`.
fn store_in(dir: &Path) -> PathBuf {
    let inside = dir.join(DEFAULT_DIR_NAME);
    if !is_store(dir) && is_store(&inside) {
        inside
    } else {
        dir.to_path_buf()
    }
}

fn is_store(dir: &Path) -> bool {
    dir.join("db").exists()
}

fn same_folder(a: &Path, b: &Path) -> bool {
    match (std::fs::canonicalize(a), std::fs::canonicalize(b)) {
        (Ok(a), Ok(b)) => a == b,
        _ => a == b,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_collection_folder_means_the_store_inside_it() {
        let temp = tempfile::tempdir().unwrap();
        let collection = temp.path().join("photos");
        let store = collection.join(DEFAULT_DIR_NAME);
        std::fs::create_dir_all(store.join("db")).unwrap();
        assert_eq!(store_in(&collection), store);
        assert_eq!(store_in(&store), store, "a store stays itself");
        let elsewhere = temp.path().join("elsewhere");
        assert_eq!(
            store_in(&elsewhere),
            elsewhere,
            "a new store's folder stays itself"
        );
        assert_eq!(for_folder(&collection, Some(&collection)), store);
        assert_eq!(for_folder(&collection, Some(&elsewhere)), elsewhere);
        assert_eq!(for_folder(&collection, None), store);
    }
}
