//! Reading vectors of one kind a picture at a time, so a question about a few pictures
//! costs the memory of those few, not of the whole collection.

use std::path::{Path, PathBuf};

use crate::{packing, Result, StoreError};

/// The vectors of one kind, read by item id when asked. Read through it only while the
/// store it came from is open (it shares that store's files); what must outlive the store
/// (the review page's) keeps [`PackedVector`]s instead.
#[derive(Clone)]
pub struct VectorReader {
    pub(crate) tree: sled::Tree,
    pub(crate) dir: PathBuf,
}

impl VectorReader {
    /// One item's vector; `None` when it has none yet.
    pub fn get(&self, id: &str) -> Result<Option<Vec<f32>>> {
        self.get_packed(id)?
            .map(|packed| packed.values(&self.dir, id))
            .transpose()
    }

    /// Every vector of the kind as `(id, values)`, in id order, read as it goes.
    pub fn iter(&self) -> impl Iterator<Item = Result<(String, Vec<f32>)>> + '_ {
        self.tree.iter().map(move |entry| {
            let (key, value) = entry.map_err(|source| StoreError::Database {
                dir: self.dir.clone(),
                source,
            })?;
            let id = String::from_utf8_lossy(&key).into_owned();
            let values = PackedVector(value.as_ref().into()).values(&self.dir, &id)?;
            Ok((id, values))
        })
    }

    /// One item's vector as the store keeps it (compact); `None` when it has none yet.
    pub fn get_packed(&self, id: &str) -> Result<Option<PackedVector>> {
        let held = self
            .tree
            .get(id.as_bytes())
            .map_err(|source| StoreError::Database {
                dir: self.dir.clone(),
                source,
            })?;
        Ok(held.map(|bytes| PackedVector(bytes.as_ref().into())))
    }
}

/// A vector as the store keeps it: 1.25 bytes a feature value, one byte a code value.
#[derive(Debug, Clone, PartialEq)]
pub struct PackedVector(Box<[u8]>);

impl PackedVector {
    /// Its values; `dir` and `id` (the store and item it was read for) name a damaged
    /// entry in the error.
    pub fn values(&self, dir: &Path, id: &str) -> Result<Vec<f32>> {
        packing::unpack(&self.0).map_err(|problem| StoreError::Corrupt {
            dir: dir.to_path_buf(),
            key: id.to_string(),
            detail: problem.to_string(),
        })
    }

    /// Bytes it takes in memory (besides its own small header).
    pub fn len_bytes(&self) -> usize {
        self.0.len()
    }
}
