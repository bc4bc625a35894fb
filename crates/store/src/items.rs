//! The indexed items as questions read them: rows in relative-path order, found by path or
//! by id, the tagged ones listed. A question about one picture of a million reads one
//! record from the item list; only what asks for every item decodes them all.

use std::borrow::Cow;
use std::path::PathBuf;
use std::sync::OnceLock;

use rayon::prelude::*;
use serde::de::DeserializeOwned;
use serde::Deserialize;
use tagweave_collection::ItemRecord;

use crate::item_list::{IdTable, ListFile};
use crate::{Result, StoreError};

/// Every indexed item, each record read when asked (or all held, where they were read
/// already or must outlive the store).
pub struct Items {
    dir: PathBuf,
    count: usize,
    source: Source,
    ids: OnceLock<IdTable>,
    tagged: OnceLock<Vec<usize>>,
}

/// Where a record is read now (see [`Items::reading`]).
enum Reading<'a> {
    InMemory(&'a [ItemRecord]),
    FromList(&'a ListFile),
}

enum Source {
    /// All read already, by relative path.
    Held(Vec<ItemRecord>),
    /// The item list, a record read when asked; all of them once asked for all.
    Listed {
        list: ListFile,
        all: OnceLock<Vec<ItemRecord>>,
    },
}

impl Items {
    /// Items all read already, by relative path.
    pub(crate) fn held(dir: PathBuf, by_path: Vec<ItemRecord>) -> Items {
        Items {
            dir,
            count: by_path.len(),
            source: Source::Held(by_path),
            ids: OnceLock::new(),
            tagged: OnceLock::new(),
        }
    }

    /// Items read from the item list when asked.
    pub(crate) fn listed(dir: PathBuf, list: ListFile) -> Items {
        Items {
            dir,
            count: list.count(),
            source: Source::Listed {
                list,
                all: OnceLock::new(),
            },
            ids: OnceLock::new(),
            tagged: OnceLock::new(),
        }
    }

    pub fn len(&self) -> usize {
        self.count
    }

    pub fn is_empty(&self) -> bool {
        self.count == 0
    }

    fn damaged(&self, key: &str, detail: impl ToString) -> StoreError {
        StoreError::Corrupt {
            dir: self.dir.clone(),
            key: key.to_string(),
            detail: detail.to_string(),
        }
    }

    /// Record `row` of the list, decoded as `T` (the whole record, or some of its fields).
    fn decode_record<T: DeserializeOwned>(&self, list: &ListFile, row: usize) -> Result<T> {
        let key = format!("item list #{row}");
        let bytes = list.record(row).map_err(|e| self.damaged(&key, e))?;
        serde_json::from_slice(&bytes).map_err(|e| self.damaged(&key, e))
    }

    /// Every item, if all are read already (held, or read by [`Self::all`]).
    pub fn loaded(&self) -> Option<&[ItemRecord]> {
        match self.reading() {
            Reading::InMemory(all) => Some(all),
            Reading::FromList(_) => None,
        }
    }

    /// Where a record is read now: among all of them in memory, or from the list.
    fn reading(&self) -> Reading<'_> {
        match &self.source {
            Source::Held(all) => Reading::InMemory(all),
            Source::Listed { list, all } => match all.get() {
                Some(all) => Reading::InMemory(all),
                None => Reading::FromList(list),
            },
        }
    }

    /// The item at `row` (relative-path order).
    pub fn get(&self, row: usize) -> Result<Cow<'_, ItemRecord>> {
        match self.reading() {
            Reading::InMemory(all) => Ok(Cow::Borrowed(&all[row])),
            Reading::FromList(list) => Ok(Cow::Owned(self.decode_record(list, row)?)),
        }
    }

    /// The items at `rows`, read on every core.
    pub fn records(&self, rows: &[usize]) -> Result<Vec<ItemRecord>> {
        rows.par_iter()
            .map(|&row| Ok(self.get(row)?.into_owned()))
            .collect()
    }

    /// Every item, by relative path (decoded on every core the first time).
    pub fn all(&self) -> Result<&[ItemRecord]> {
        match &self.source {
            Source::Held(all) => Ok(all),
            Source::Listed { list, all } => {
                if let Some(all) = all.get() {
                    return Ok(all);
                }
                let read = list.read_all(|key, bytes| {
                    serde_json::from_slice(bytes).map_err(|e| self.damaged(key, e))
                })?;
                Ok(all.get_or_init(|| read))
            }
        }
    }

    /// The row of the item at `rel` (relative to the collection root, `/`-separated).
    pub fn row_of_rel_path(&self, rel: &str) -> Result<Option<usize>> {
        let list = match self.reading() {
            Reading::InMemory(all) => {
                return Ok(all
                    .binary_search_by(|item| item.rel_path.as_str().cmp(rel))
                    .ok())
            }
            Reading::FromList(list) => list,
        };
        #[derive(Deserialize)]
        struct PathOnly {
            rel_path: String,
        }
        let (mut low, mut high) = (0, self.count);
        while low < high {
            let middle = (low + high) / 2;
            let path: PathOnly = self.decode_record(list, middle)?;
            match path.rel_path.as_str().cmp(rel) {
                std::cmp::Ordering::Less => low = middle + 1,
                std::cmp::Ordering::Greater => high = middle,
                std::cmp::Ordering::Equal => return Ok(Some(middle)),
            }
        }
        Ok(None)
    }

    /// The row of the item of each id (`None`: not indexed); fastest with the ids in
    /// ascending order.
    pub fn rows_of_ids<'a>(
        &self,
        ids: impl Iterator<Item = &'a str>,
    ) -> Result<Vec<Option<usize>>> {
        let table = match self.ids.get() {
            Some(table) => table,
            None => {
                let table = match &self.source {
                    Source::Listed { list, .. } => list
                        .id_table()
                        .map_err(|e| self.damaged("item list ids", e))?,
                    Source::Held(all) => IdTable::of(all.iter().map(|item| item.id.as_str())),
                };
                self.ids.get_or_init(|| table)
            }
        };
        Ok(table.rows_of(ids))
    }

    /// The rows of the items that carry tags, ascending.
    pub fn tagged_rows(&self) -> Result<&[usize]> {
        if let Some(rows) = self.tagged.get() {
            return Ok(rows);
        }
        let rows = match &self.source {
            Source::Listed { list, .. } => list
                .tagged_rows()
                .map_err(|e| self.damaged("item list tagged rows", e))?
                .into_iter()
                .map(|r| r as usize)
                .collect(),
            Source::Held(all) => (0..all.len())
                .filter(|&r| !all[r].tags.is_empty())
                .collect(),
        };
        Ok(self.tagged.get_or_init(|| rows))
    }

    /// Whether the item at `row` carries tags.
    pub fn is_tagged(&self, row: usize) -> Result<bool> {
        match self.reading() {
            Reading::InMemory(all) => Ok(!all[row].tags.is_empty()),
            Reading::FromList(_) => Ok(self.tagged_rows()?.binary_search(&row).is_ok()),
        }
    }
}
