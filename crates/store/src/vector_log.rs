//! Vectors kept beside the database, not in it: one append-only file per kind, read by
//! offset.
//!
//! At a million pictures the packed features are 4.6 GB; inside sled they took 8.6 GB
//! on disk, and the item records, spread among them, took 25 s to read from a cold disk.
//! Here the database keeps for each item only where its vector lies (16 bytes: file
//! generation, offset, length) and the bytes sit in `vectors/KIND-GEN.bin`.
//!
//! Crash safety: a batch is appended and synced before the database learns where it is,
//! so an entry never points at bytes that are not all there; bytes a crash leaves behind
//! unreferenced are garbage, reclaimed by compaction (a rewrite of the live vectors into
//! the next generation) once the files hold more than twice what is live.

use std::collections::HashMap;
use std::fs::File;
use std::io::{BufWriter, Write};
use std::os::unix::fs::FileExt;
use std::path::{Path, PathBuf};
use std::sync::{Arc, Mutex};

use crate::{Result, StoreError};

/// The folder inside the store that holds the vector files.
pub(crate) const FOLDER: &str = "vectors";

/// Garbage that never triggers a compaction on its own, however small what is live.
const SLACK_BYTES: u64 = 64 << 20;

/// Index entries moved per database batch while compacting.
const COMPACT_BATCH: usize = 10_000;

/// Where one item's vector lies: 16 bytes in the index tree.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) struct Location {
    generation: u32,
    offset: u64,
    len: u32,
}

impl Location {
    pub(crate) fn to_bytes(self) -> [u8; 16] {
        let mut out = [0u8; 16];
        out[..4].copy_from_slice(&self.generation.to_be_bytes());
        out[4..12].copy_from_slice(&self.offset.to_be_bytes());
        out[12..].copy_from_slice(&self.len.to_be_bytes());
        out
    }

    pub(crate) fn from_bytes(bytes: &[u8]) -> Option<Location> {
        let bytes: &[u8; 16] = bytes.try_into().ok()?;
        Some(Location {
            generation: u32::from_be_bytes(bytes[..4].try_into().ok()?),
            offset: u64::from_be_bytes(bytes[4..12].try_into().ok()?),
            len: u32::from_be_bytes(bytes[12..].try_into().ok()?),
        })
    }

    pub(crate) fn len(self) -> u64 {
        u64::from(self.len)
    }
}

/// The files of one vector kind. Cheap to clone; clones share open files.
#[derive(Clone)]
pub(crate) struct VectorFiles {
    store_dir: PathBuf,
    kind: String,
    open: Arc<Mutex<HashMap<u32, Arc<File>>>>,
}

impl VectorFiles {
    pub(crate) fn new(store_dir: &Path, kind: &str) -> VectorFiles {
        VectorFiles {
            store_dir: store_dir.to_path_buf(),
            kind: kind.to_string(),
            open: Arc::default(),
        }
    }

    pub(crate) fn path_of(&self, generation: u32) -> PathBuf {
        self.store_dir
            .join(FOLDER)
            .join(format!("{}-{generation}.bin", self.kind))
    }

    fn io_error(&self, path: &Path, source: std::io::Error) -> StoreError {
        crate::disk_full_named(
            &self.store_dir,
            StoreError::Io {
                path: path.to_path_buf(),
                source,
            },
        )
    }

    /// The generations that have a file, lowest first.
    pub(crate) fn generations(&self) -> Result<Vec<u32>> {
        let folder = self.store_dir.join(FOLDER);
        let entries = match std::fs::read_dir(&folder) {
            Ok(entries) => entries,
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(Vec::new()),
            Err(source) => return Err(self.io_error(&folder, source)),
        };
        let prefix = format!("{}-", self.kind);
        let mut found = Vec::new();
        for entry in entries {
            let entry = entry.map_err(|source| self.io_error(&folder, source))?;
            let name = entry.file_name();
            let generation = name
                .to_str()
                .and_then(|n| n.strip_prefix(&prefix))
                .and_then(|n| n.strip_suffix(".bin"))
                .and_then(|n| n.parse::<u32>().ok());
            found.extend(generation);
        }
        found.sort_unstable();
        Ok(found)
    }

    /// Every file of the kind as (generation, length), lowest generation first: what a
    /// derived table of locations was written for.
    pub(crate) fn state(&self) -> Result<Vec<(u32, u64)>> {
        self.generations()?
            .into_iter()
            .map(|generation| {
                let path = self.path_of(generation);
                let len = std::fs::metadata(&path)
                    .map_err(|source| self.io_error(&path, source))?
                    .len();
                Ok((generation, len))
            })
            .collect()
    }

    /// Total bytes of every file of the kind, garbage included.
    pub(crate) fn bytes_on_disk(&self) -> Result<u64> {
        Ok(self.state()?.iter().map(|&(_, len)| len).sum())
    }

    /// Appends `vectors` to the newest file and makes them durable; their locations, in
    /// order. On failure the file is cut back to where it was.
    pub(crate) fn append<'a>(
        &self,
        vectors: impl IntoIterator<Item = &'a [u8]>,
    ) -> Result<Vec<Location>> {
        let generation = self.generations()?.last().copied().unwrap_or(0);
        self.append_to(generation, vectors)
    }

    pub(crate) fn append_to<'a>(
        &self,
        generation: u32,
        vectors: impl IntoIterator<Item = &'a [u8]>,
    ) -> Result<Vec<Location>> {
        let path = self.path_of(generation);
        let folder = self.store_dir.join(FOLDER);
        std::fs::create_dir_all(&folder).map_err(|source| self.io_error(&folder, source))?;
        let file = std::fs::OpenOptions::new()
            .create(true)
            .append(true)
            .open(&path)
            .map_err(|source| self.io_error(&path, source))?;
        let start = file
            .metadata()
            .map_err(|source| self.io_error(&path, source))?
            .len();
        let mut offset = start;
        let mut locations = Vec::new();
        let mut writer = BufWriter::with_capacity(1 << 20, &file);
        let written = (|| {
            for bytes in vectors {
                let len = u32::try_from(bytes.len()).map_err(|_| {
                    std::io::Error::new(std::io::ErrorKind::InvalidInput, "vector over 4 GB")
                })?;
                writer.write_all(bytes)?;
                locations.push(Location {
                    generation,
                    offset,
                    len,
                });
                offset += u64::from(len);
            }
            writer.flush()?;
            drop(writer);
            file.sync_data()
        })();
        if let Err(source) = written {
            // Best effort: the bytes are unreferenced either way.
            let _ = file.set_len(start);
            return Err(self.io_error(&path, source));
        }
        Ok(locations)
    }

    /// The bytes at `location`; `key` names the item in an error.
    pub(crate) fn read(&self, location: Location, key: &str) -> Result<Box<[u8]>> {
        let file = self.file(location.generation, key)?;
        let mut bytes = vec![0u8; location.len as usize];
        file.read_exact_at(&mut bytes, location.offset)
            .map_err(|e| self.damaged(key, &format!("vector file: {e}")))?;
        Ok(bytes.into_boxed_slice())
    }

    fn file(&self, generation: u32, key: &str) -> Result<Arc<File>> {
        let mut open = self.open.lock().unwrap_or_else(|e| e.into_inner());
        if let Some(file) = open.get(&generation) {
            return Ok(Arc::clone(file));
        }
        let path = self.path_of(generation);
        let file = File::open(&path).map_err(|e| {
            self.damaged(
                key,
                &format!("its vector file {} is missing: {e}", path.display()),
            )
        })?;
        let file = Arc::new(file);
        open.insert(generation, Arc::clone(&file));
        Ok(file)
    }

    /// Opens every file of the kind now, so reads keep working if a file is deleted later.
    pub(crate) fn open_all(&self) -> Result<()> {
        for generation in self.generations()? {
            self.file(generation, "")?;
        }
        Ok(())
    }

    fn damaged(&self, key: &str, detail: &str) -> StoreError {
        StoreError::Corrupt {
            dir: self.store_dir.clone(),
            key: key.to_string(),
            detail: detail.to_string(),
        }
    }

    /// Whether files of `live_bytes` live vectors hold so much garbage that rewriting
    /// them pays.
    pub(crate) fn worth_compacting(&self, live_bytes: u64) -> Result<bool> {
        Ok(self.bytes_on_disk()? > 2 * live_bytes + SLACK_BYTES)
    }

    /// Rewrites every vector `index` points at into a new generation, moves the index
    /// there batch by batch, then deletes the older files. A crash part-way leaves index
    /// entries in both generations, each pointing at whole bytes; the next compaction
    /// finishes the job. Returns the live bytes.
    pub(crate) fn compact(&self, index: &sled::Tree) -> Result<u64> {
        let generation = self.generations()?.last().map_or(0, |g| g + 1);
        let db_error = |source| crate::database_error(&self.store_dir, source);
        let mut live = 0;
        let mut keys: Vec<sled::IVec> = Vec::with_capacity(COMPACT_BATCH);
        let mut bytes: Vec<Box<[u8]>> = Vec::with_capacity(COMPACT_BATCH);
        let mut moved = Vec::new();
        let mut move_batch = |keys: &mut Vec<sled::IVec>, bytes: &mut Vec<Box<[u8]>>| {
            let locations = self.append_to(generation, bytes.iter().map(|b| &b[..]))?;
            for (key, location) in keys.drain(..).zip(locations) {
                moved.push((key, location));
            }
            bytes.clear();
            Result::Ok(())
        };
        for entry in index.iter() {
            let (key, value) = entry.map_err(db_error)?;
            let name = String::from_utf8_lossy(&key).into_owned();
            let location =
                Location::from_bytes(&value).ok_or_else(|| self.damaged(&name, "bad location"))?;
            live += location.len();
            bytes.push(self.read(location, &name)?);
            keys.push(key);
            if keys.len() == COMPACT_BATCH {
                move_batch(&mut keys, &mut bytes)?;
            }
        }
        move_batch(&mut keys, &mut bytes)?;
        for chunk in moved.chunks(COMPACT_BATCH) {
            let mut batch = sled::Batch::default();
            for (key, location) in chunk {
                batch.insert(key, &location.to_bytes());
            }
            index.apply_batch(batch).map_err(db_error)?;
        }
        index.flush().map_err(db_error)?;
        self.remove_files_below(generation)?;
        Ok(live)
    }

    /// Deletes every file of the kind (after its index was cleared), leaving an empty file
    /// of the next generation: a generation number is never used twice, so a file handle
    /// held open for one never reads another's bytes.
    pub(crate) fn remove_all(&self) -> Result<()> {
        let next = self.generations()?.last().map_or(0, |g| g + 1);
        self.append_to(next, std::iter::empty())?;
        self.remove_files_below(next)
    }

    fn remove_files_below(&self, generation: u32) -> Result<()> {
        let mut open = self.open.lock().unwrap_or_else(|e| e.into_inner());
        for old in self.generations()?.into_iter().filter(|&g| g < generation) {
            open.remove(&old);
            let path = self.path_of(old);
            std::fs::remove_file(&path).map_err(|source| self.io_error(&path, source))?;
        }
        Ok(())
    }
}
