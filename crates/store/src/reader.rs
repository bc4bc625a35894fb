//! Reading vectors of one kind a picture at a time, so a question about a few pictures
//! costs the memory of those few, not of the whole collection.

use std::path::{Path, PathBuf};
use std::sync::{Arc, OnceLock};

use rayon::prelude::*;

use crate::database::LazyDatabase;
use crate::location_table::{self, LocationTable};
use crate::vector_log::{Location, VectorFiles};
use crate::{packing, Result, StoreError};

/// The vectors of one kind, read by item id when asked. Read through it only while the
/// store it came from is open (it shares that store's files); what must outlive the store
/// (the review page's) keeps [`PackedVector`]s instead.
#[derive(Clone)]
pub struct VectorReader {
    /// The store's database, whose tree of the kind says where each item's vector lies in
    /// `files` (opened only when the table below cannot answer).
    pub(crate) database: Arc<LazyDatabase>,
    /// The same as a derived file, when it is there and true.
    pub(crate) table: Option<Arc<LocationTable>>,
    /// The database's tree of the kind, once opened.
    pub(crate) tree: OnceLock<sled::Tree>,
    pub(crate) files: VectorFiles,
    pub(crate) dir: PathBuf,
    pub(crate) kind: String,
    /// The store's change count, so files derived from these vectors stay true.
    pub(crate) changes: crate::derived::Changes,
}

impl VectorReader {
    /// One item's vector; `None` when it has none yet.
    pub fn get(&self, id: &str) -> Result<Option<Vec<f32>>> {
        self.get_packed(id)?
            .map(|packed| packed.values(&self.dir, id))
            .transpose()
    }

    /// Every vector of the kind as `(id, values)`, in id order, read as it goes.
    pub fn iter(&self) -> impl Iterator<Item = Result<(String, Vec<f32>)>> + 'static {
        let reader = self.clone();
        let (entries, failed) = match self.tree() {
            Ok(tree) => (Some(tree.iter()), None),
            Err(e) => (None, Some(Err(e))),
        };
        failed
            .into_iter()
            .chain(entries.into_iter().flatten().map(move |entry| {
                let (key, value) = entry.map_err(|source| reader.db_error(source))?;
                let id = String::from_utf8_lossy(&key).into_owned();
                let values = reader.read_at(&value, &id)?.values(&reader.dir, &id)?;
                Ok((id, values))
            }))
    }

    /// Every vector of the kind as the store keeps it, `(id, vector)` in id order, handed
    /// to `take` `batch` at a time; each batch is read from the files on every core.
    pub fn packed_in_batches(
        &self,
        batch: usize,
        mut take: impl FnMut(Vec<(String, PackedVector)>) -> Result<()>,
    ) -> Result<()> {
        let mut located: Vec<(String, sled::IVec)> = Vec::with_capacity(batch);
        let mut read_and_take = |located: &mut Vec<(String, sled::IVec)>| {
            let read = located
                .par_iter()
                .map(|(id, location)| Ok((id.clone(), self.read_at(location, id)?)))
                .collect::<Result<Vec<_>>>()?;
            located.clear();
            take(read)
        };
        for entry in self.tree()?.iter() {
            let (key, location) = entry.map_err(|source| self.db_error(source))?;
            located.push((String::from_utf8_lossy(&key).into_owned(), location));
            if located.len() == batch {
                read_and_take(&mut located)?;
            }
        }
        if !located.is_empty() {
            read_and_take(&mut located)?;
        }
        Ok(())
    }

    /// Where the vectors of `ids` lie, with their files held open, to read after the store
    /// is closed (the review page, which lets the store go while it runs). They read as
    /// they were when taken: the files are only appended to, and a file that a compaction
    /// or a rebuild deletes stays readable through a handle opened before.
    pub fn hold(&self, ids: &[&str]) -> Result<HeldVectors> {
        let mut reader = self.clone();
        if let Some(table) = &self.table {
            let held = table.held().map_err(|e| self.damaged_table(e))?;
            reader.table = Some(Arc::new(held));
        }
        let locations = ids
            .par_iter()
            .map(|id| reader.location_of(id))
            .collect::<Result<Vec<_>>>()?;
        self.files.open_all()?;
        Ok(HeldVectors {
            files: self.files.clone(),
            locations,
            dir: self.dir.clone(),
        })
    }

    /// Whether the store holds exactly `values` as this kind's vector for `id`, as it
    /// would keep them (packed: a vector that packs to the stored bytes is the same).
    pub fn holds(&self, id: &str, values: &[f32]) -> Result<bool> {
        Ok(self
            .get_packed(id)?
            .is_some_and(|held| held.bytes() == packing::pack(&self.kind, values).as_slice()))
    }

    /// Whether an item has a vector of the kind (without reading it).
    pub fn has(&self, id: &str) -> Result<bool> {
        Ok(self.location_of(id)?.is_some())
    }

    /// One item's vector as the store keeps it (compact); `None` when it has none yet.
    pub fn get_packed(&self, id: &str) -> Result<Option<PackedVector>> {
        self.location_of(id)?
            .map(|location| Ok(PackedVector(self.files.read(location, id)?)))
            .transpose()
    }

    /// Where an item's vector lies: from the table of locations when it is there, else
    /// from the database.
    fn location_of(&self, id: &str) -> Result<Option<Location>> {
        if let Some(table) = &self.table {
            return table.find(id.as_bytes()).map_err(|e| self.damaged_table(e));
        }
        self.tree()?
            .get(id.as_bytes())
            .map_err(|source| self.db_error(source))?
            .map(|bytes| self.location(&bytes, id))
            .transpose()
    }

    /// Writes the table of locations of the kind for the next reader, when it is not
    /// there: a question about one picture then opens no database.
    pub fn keep_locations(&self) -> Result<()> {
        if self.table.is_some() {
            return Ok(());
        }
        let seen = self.changes.seen();
        let files = self.files.state()?;
        let mut entries = Vec::new();
        for entry in self.tree()?.iter() {
            let (key, value) = entry.map_err(|source| self.db_error(source))?;
            let id = String::from_utf8_lossy(&key);
            entries.push((key.to_vec(), self.location(&value, &id)?.to_bytes()));
        }
        let path = location_table::path_in(&self.dir, &self.kind);
        self.changes
            .write_if_unchanged(seen, &path, &location_table::encode(&files, &entries));
        Ok(())
    }

    fn damaged_table(&self, error: std::io::Error) -> StoreError {
        StoreError::Corrupt {
            dir: self.dir.clone(),
            key: location_table::path_in(&self.dir, &self.kind)
                .display()
                .to_string(),
            detail: format!("{error} (delete the file: it is made again)"),
        }
    }

    fn tree(&self) -> Result<sled::Tree> {
        if let Some(tree) = self.tree.get() {
            return Ok(tree.clone());
        }
        let tree = crate::vector_tree(&self.database, &self.kind)?;
        Ok(self.tree.get_or_init(|| tree).clone())
    }

    /// The vector whose stored location is `location`.
    fn read_at(&self, location: &[u8], id: &str) -> Result<PackedVector> {
        let location = self.location(location, id)?;
        Ok(PackedVector(self.files.read(location, id)?))
    }

    fn location(&self, bytes: &[u8], id: &str) -> Result<Location> {
        Location::from_bytes(bytes).ok_or_else(|| StoreError::Corrupt {
            dir: self.dir.clone(),
            key: id.to_string(),
            detail: "its vector's location is not 16 bytes".into(),
        })
    }

    fn db_error(&self, source: sled::Error) -> StoreError {
        self.database.error(source)
    }
}

/// The vectors of some items as [`VectorReader::hold`] took them: 16 bytes an item in
/// memory, the vectors read from their files when asked.
pub struct HeldVectors {
    files: VectorFiles,
    /// By the position of the item in the ids given to `hold`.
    locations: Vec<Option<Location>>,
    dir: PathBuf,
}

impl HeldVectors {
    /// Whether the item at `position` had a vector.
    pub fn has(&self, position: usize) -> bool {
        self.locations.get(position).is_some_and(Option::is_some)
    }

    /// The vector of the item at `position` (`id` names it in an error); `None` when it had
    /// none.
    pub fn get(&self, position: usize, id: &str) -> Result<Option<Vec<f32>>> {
        match self.locations.get(position).copied().flatten() {
            None => Ok(None),
            Some(location) => PackedVector(self.files.read(location, id)?)
                .values(&self.dir, id)
                .map(Some),
        }
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

    pub(crate) fn bytes(&self) -> &[u8] {
        &self.0
    }

    /// The values as unit bytes (`round(v · 255)`), when the vector is kept so.
    pub(crate) fn unit_bytes(&self) -> Option<&[u8]> {
        packing::unit_bytes(&self.0)
    }
}
