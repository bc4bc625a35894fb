//! Which store a command works on.

use std::path::{Path, PathBuf};

use anyhow::Context;
use tagweave_store::{Store, StoreError, DEFAULT_DIR_NAME};

/// `--store PATH` when given, else the nearest `.tagweave/` here or above.
pub fn open_existing(explicit: Option<&Path>) -> anyhow::Result<Store> {
    let dir = match explicit {
        Some(dir) => dir.to_path_buf(),
        None => {
            let here = std::env::current_dir().context("cannot read the current folder")?;
            Store::locate(&here).ok_or(StoreError::NotFound { start: here })?
        }
    };
    Ok(Store::open(&dir)?)
}

/// The store a scan of `folder` writes to: `--store PATH`, else `FOLDER/.tagweave`.
pub fn for_folder(folder: &Path, explicit: Option<&Path>) -> PathBuf {
    explicit
        .map(Path::to_path_buf)
        .unwrap_or_else(|| folder.join(DEFAULT_DIR_NAME))
}
