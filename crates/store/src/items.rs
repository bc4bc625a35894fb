//! The indexed items as questions read them: rows in relative-path order, found by path or
//! by id, the tagged ones listed. A question about one picture of a million reads one
//! record from the item list; only what asks for every item decodes them all.

use std::borrow::Cow;
use std::path::PathBuf;
use std::sync::OnceLock;

use rayon::prelude::*;
use serde::Deserialize;
use tagweave_collection::ItemRecord;

use crate::item_list::{decode_part, IdTable, ListFile};
use crate::{Result, StoreError};

/// Every indexed item, each record read when asked (or all held, where they were read
/// already or must outlive the store).
pub struct Items {
    dir: PathBuf,
    count: usize,
    /// The item list, opened when the records are read when asked.
    list: Option<ListFile>,
    all: OnceLock<Vec<ItemRecord>>,
    ids: OnceLock<IdTable>,
    tagged: OnceLock<Vec<usize>>,
}

impl Items {
    /// Items all read already, by relative path.
    pub(crate) fn held(dir: PathBuf, by_path: Vec<ItemRecord>) -> Items {
        Items {
            dir,
            count: by_path.len(),
            list: None,
            all: OnceLock::from(by_path),
            ids: OnceLock::new(),
            tagged: OnceLock::new(),
        }
    }

    /// Items read from the item list when asked.
    pub(crate) fn listed(dir: PathBuf, list: ListFile) -> Items {
        Items {
            dir,
            count: list.count(),
            list: Some(list),
            all: OnceLock::new(),
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

    /// The stored bytes of record `row` of the list.
    fn record_bytes(&self, list: &ListFile, row: usize) -> Result<Vec<u8>> {
        list.record(row)
            .map_err(|e| self.damaged(&format!("item list #{row}"), e))
    }

    /// The item at `row` (relative-path order).
    pub fn get(&self, row: usize) -> Result<Cow<'_, ItemRecord>> {
        match (self.all.get(), &self.list) {
            (Some(all), _) => Ok(Cow::Borrowed(&all[row])),
            (None, Some(list)) => {
                let bytes = self.record_bytes(list, row)?;
                let item = serde_json::from_slice(&bytes)
                    .map_err(|e| self.damaged(&format!("item list #{row}"), e))?;
                Ok(Cow::Owned(item))
            }
            (None, None) => unreachable!("items are held or listed"),
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
        if let Some(all) = self.all.get() {
            return Ok(all);
        }
        let list = self.list.as_ref().expect("items are held or listed");
        let read = list.read_all(|key, bytes| {
            serde_json::from_slice(bytes).map_err(|e| self.damaged(key, e))
        })?;
        Ok(self.all.get_or_init(|| read))
    }

    /// Every item, if all are read already (held, or read by [`Self::all`]).
    pub fn loaded(&self) -> Option<&[ItemRecord]> {
        self.all.get().map(Vec::as_slice)
    }

    /// The row of the item at `rel` (relative to the collection root, `/`-separated).
    pub fn row_of_rel_path(&self, rel: &str) -> Result<Option<usize>> {
        if let Some(all) = self.all.get() {
            return Ok(all
                .binary_search_by(|item| item.rel_path.as_str().cmp(rel))
                .ok());
        }
        #[derive(Deserialize)]
        struct PathOnly {
            rel_path: String,
        }
        let list = self.list.as_ref().expect("items are held or listed");
        let (mut low, mut high) = (0, self.count);
        while low < high {
            let middle = (low + high) / 2;
            let bytes = self.record_bytes(list, middle)?;
            let path: PathOnly = decode_part(&bytes)
                .ok_or_else(|| self.damaged(&format!("item list #{middle}"), "no path"))?;
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
                let table = match (&self.list, self.all.get()) {
                    (Some(list), _) => list
                        .id_table()
                        .map_err(|e| self.damaged("item list ids", e))?,
                    (None, Some(all)) => IdTable::of(all.iter().map(|item| item.id.as_str())),
                    (None, None) => unreachable!("items are held or listed"),
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
        let rows = match (&self.list, self.all.get()) {
            (Some(list), _) => list
                .tagged_rows()
                .map_err(|e| self.damaged("item list tagged rows", e))?
                .into_iter()
                .map(|r| r as usize)
                .collect(),
            (None, Some(all)) => (0..all.len())
                .filter(|&r| !all[r].tags.is_empty())
                .collect(),
            (None, None) => unreachable!("items are held or listed"),
        };
        Ok(self.tagged.get_or_init(|| rows))
    }

    /// Whether the item at `row` carries tags.
    pub fn is_tagged(&self, row: usize) -> Result<bool> {
        if let Some(all) = self.all.get() {
            return Ok(!all[row].tags.is_empty());
        }
        Ok(self.tagged_rows()?.binary_search(&row).is_ok())
    }
}
