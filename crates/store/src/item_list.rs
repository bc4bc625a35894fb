//! Every item record in one file beside the database, read in one go or one record at a
//! time.
//!
//! Walking a million records in sled and decoding each took 4.8 s with the disk cache warm
//! and 7 s cold; decoding all of them from one file still takes a second on two cores, and
//! `suggest PICTURE` needs one. The list holds the records (as the database stores them,
//! length-prefixed) by relative path, with tables to find a record by row, by id, and the
//! rows that carry tags, so a question reads only the records it asks about. Like every
//! derived file (`derived`) it exists only while it is true.
//!
//! Layout, little-endian: the magic, then `count`, `tagged`, `records_end` and `ids_end`
//! (u64 each); the records from byte 40 to `records_end` (u32 length, then the bytes);
//! `count` u64 offsets of the records; to `ids_end` the ids in ascending order, each as
//! u32 row, u8 length, then the id; `tagged` u32 rows that carry tags.

use std::os::unix::fs::FileExt;
use std::path::{Path, PathBuf};

use rayon::prelude::*;
use tagweave_collection::ItemRecord;

use crate::{Result, StoreError};

/// The file's first bytes (3: records by relative path, with tables); a file without them
/// (or of another length than its header says) is ignored and rewritten.
const MAGIC: &[u8; 8] = b"twitems3";
const HEADER: usize = 40;

pub(crate) const FILE_NAME: &str = "item-list.bin";

pub(crate) fn path_in(store_dir: &Path) -> PathBuf {
    store_dir.join(FILE_NAME)
}

/// Where each part of a list file lies, from its header.
#[derive(Clone, Copy, Debug)]
struct Layout {
    count: usize,
    tagged: usize,
    records_end: usize,
    ids_end: usize,
}

impl Layout {
    fn parse(header: &[u8]) -> Option<Layout> {
        let rest = header.get(..HEADER)?.strip_prefix(MAGIC.as_slice())?;
        let number = |i: usize| -> Option<usize> {
            Some(u64::from_le_bytes(rest.get(i * 8..i * 8 + 8)?.try_into().ok()?) as usize)
        };
        let layout = Layout {
            count: number(0)?,
            tagged: number(1)?,
            records_end: number(2)?,
            ids_end: number(3)?,
        };
        (layout.records_end >= HEADER
            && layout.tagged <= layout.count
            && layout.ids_end >= layout.ids_at())
        .then_some(layout)
    }

    fn offsets_at(&self) -> usize {
        self.records_end
    }

    fn ids_at(&self) -> usize {
        self.offsets_at() + self.count * 8
    }

    fn tagged_at(&self) -> usize {
        self.ids_end
    }

    fn file_len(&self) -> usize {
        self.tagged_at() + self.tagged * 4
    }
}

/// The stored bytes of each record with the record, in the order given (by relative path),
/// as one file's contents.
pub(crate) fn encode(records: &[(&[u8], &ItemRecord)]) -> Vec<u8> {
    let count = records.len();
    let body: usize = records.iter().map(|(bytes, _)| 4 + bytes.len()).sum();
    let mut out = Vec::with_capacity(HEADER + body + count * 16);
    out.extend_from_slice(&[0; HEADER]);
    let mut offsets = Vec::with_capacity(count);
    for (bytes, _) in records {
        offsets.push(out.len() as u64);
        out.extend_from_slice(&(bytes.len() as u32).to_le_bytes());
        out.extend_from_slice(bytes);
    }
    let records_end = out.len();
    for offset in offsets {
        out.extend_from_slice(&offset.to_le_bytes());
    }
    out.extend_from_slice(&IdTable::of(records.iter().map(|(_, item)| item.id.as_str())).bytes);
    let ids_end = out.len();
    let mut tagged = 0;
    for (row, (_, item)) in records.iter().enumerate() {
        if !item.tags.is_empty() {
            out.extend_from_slice(&(row as u32).to_le_bytes());
            tagged += 1;
        }
    }
    out[..8].copy_from_slice(MAGIC);
    for (i, number) in [count, tagged, records_end, ids_end]
        .into_iter()
        .enumerate()
    {
        out[8 + i * 8..16 + i * 8].copy_from_slice(&(number as u64).to_le_bytes());
    }
    out
}

/// The records a list file holds, or `None` when it is missing, cut short, not a list or
/// holds a record that does not decode (the database is then read instead).
pub(crate) fn read(
    path: &Path,
    decode: impl Fn(&str, &[u8]) -> Result<ItemRecord> + Sync,
) -> Option<Vec<ItemRecord>> {
    ListFile::open(path)?.read_all(decode).ok()
}

/// The bytes of record `row` of a whole list file.
fn record_in<'a>(bytes: &'a [u8], layout: &Layout, row: usize) -> Option<&'a [u8]> {
    let at = layout.offsets_at() + row * 8;
    let offset = u64::from_le_bytes(bytes.get(at..at + 8)?.try_into().ok()?) as usize;
    let len = u32::from_le_bytes(bytes.get(offset..offset + 4)?.try_into().ok()?) as usize;
    bytes.get(offset + 4..offset + 4 + len)
}

/// How many records the list at `path` holds, from its header alone.
pub(crate) fn count(path: &Path) -> Option<usize> {
    Some(ListFile::open(path)?.layout.count)
}

/// A list file opened to read records when asked (its handle stays readable if the file is
/// deleted by a change meanwhile: what was read stays as it was at open).
pub(crate) struct ListFile {
    file: std::fs::File,
    layout: Layout,
}

impl ListFile {
    /// The list at `path`, or `None` when it is missing, not a list, or of another length
    /// than its header says (cut short).
    pub(crate) fn open(path: &Path) -> Option<ListFile> {
        let file = std::fs::File::open(path).ok()?;
        let mut header = [0u8; HEADER];
        file.read_exact_at(&mut header, 0).ok()?;
        let layout = Layout::parse(&header)?;
        let len = file.metadata().ok()?.len() as usize;
        (len == layout.file_len()).then_some(ListFile { file, layout })
    }

    pub(crate) fn count(&self) -> usize {
        self.layout.count
    }

    fn bytes_at(&self, at: usize, len: usize) -> std::io::Result<Vec<u8>> {
        let mut bytes = vec![0u8; len];
        self.file.read_exact_at(&mut bytes, at as u64)?;
        Ok(bytes)
    }

    fn u32s_at(&self, at: usize, len: usize) -> std::io::Result<Vec<u32>> {
        let bytes = self.bytes_at(at, len * 4)?;
        Ok(bytes
            .chunks_exact(4)
            .map(|b| u32::from_le_bytes(b.try_into().expect("four bytes")))
            .collect())
    }

    /// The stored bytes of record `row`.
    pub(crate) fn record(&self, row: usize) -> std::io::Result<Vec<u8>> {
        let offset = self.bytes_at(self.layout.offsets_at() + row * 8, 8)?;
        let offset = u64::from_le_bytes(offset.try_into().expect("eight bytes")) as usize;
        let len = self.bytes_at(offset, 4)?;
        let len = u32::from_le_bytes(len.try_into().expect("four bytes")) as usize;
        if offset + 4 + len > self.layout.records_end {
            return Err(std::io::Error::new(
                std::io::ErrorKind::InvalidData,
                format!("record {row} runs past the records"),
            ));
        }
        self.bytes_at(offset + 4, len)
    }

    /// The ids with their rows.
    pub(crate) fn id_table(&self) -> std::io::Result<IdTable> {
        let bytes = self.bytes_at(
            self.layout.ids_at(),
            self.layout.ids_end - self.layout.ids_at(),
        )?;
        IdTable::from_bytes(bytes, self.layout.count).ok_or_else(|| {
            std::io::Error::new(std::io::ErrorKind::InvalidData, "the id table is damaged")
        })
    }

    /// The rows whose records carry tags, in row order.
    pub(crate) fn tagged_rows(&self) -> std::io::Result<Vec<u32>> {
        self.u32s_at(self.layout.tagged_at(), self.layout.tagged)
    }

    /// The whole file, to decode every record at once.
    pub(crate) fn read_all(
        &self,
        decode: impl Fn(&str, &[u8]) -> Result<ItemRecord> + Sync,
    ) -> Result<Vec<ItemRecord>> {
        let bytes = self.bytes_at(0, self.layout.file_len()).map_err(|e| {
            StoreError::Inconsistent(format!("the item list could not be read: {e}"))
        })?;
        (0..self.layout.count)
            .into_par_iter()
            .map(|row| {
                let key = format!("item list #{row}");
                let record = record_in(&bytes, &self.layout, row)
                    .ok_or_else(|| StoreError::Inconsistent(format!("{key} is cut short")))?;
                decode(&key, record)
            })
            .collect()
    }
}

/// Item ids in ascending order with the row of each: `u32` row, `u8` length, the id.
pub(crate) struct IdTable {
    bytes: Vec<u8>,
    /// Where each entry starts.
    starts: Vec<u32>,
}

impl IdTable {
    /// The table of the ids of rows `0, 1, …` (each id at most 255 bytes: ids are 16 hex
    /// digits).
    pub(crate) fn of<'a>(ids: impl Iterator<Item = &'a str>) -> IdTable {
        let mut ids: Vec<(&str, u32)> = ids.zip(0u32..).collect();
        ids.par_sort_unstable();
        let mut bytes = Vec::with_capacity(ids.len() * 21);
        let mut starts = Vec::with_capacity(ids.len());
        for (id, row) in ids {
            starts.push(bytes.len() as u32);
            let id = &id.as_bytes()[..id.len().min(255)];
            bytes.extend_from_slice(&row.to_le_bytes());
            bytes.push(id.len() as u8);
            bytes.extend_from_slice(id);
        }
        IdTable { bytes, starts }
    }

    fn from_bytes(bytes: Vec<u8>, count: usize) -> Option<IdTable> {
        let mut starts = Vec::with_capacity(count);
        let mut at = 0;
        while at < bytes.len() {
            starts.push(at as u32);
            at += 5 + *bytes.get(at + 4)? as usize;
        }
        (at == bytes.len() && starts.len() == count).then_some(IdTable { bytes, starts })
    }

    fn entry(&self, i: usize) -> (&[u8], usize) {
        let at = self.starts[i] as usize;
        let row = u32::from_le_bytes(self.bytes[at..at + 4].try_into().expect("four bytes"));
        let len = self.bytes[at + 4] as usize;
        (&self.bytes[at + 5..at + 5 + len], row as usize)
    }

    /// The first entry at or after `from` whose id is not below `id`.
    fn lower_bound(&self, from: usize, id: &[u8]) -> usize {
        let (mut low, mut high) = (from, self.starts.len());
        while low < high {
            let middle = (low + high) / 2;
            if self.entry(middle).0 < id {
                low = middle + 1;
            } else {
                high = middle;
            }
        }
        low
    }

    /// The row of each id; a walk beside the table while the ids come in ascending order
    /// (a code index's), a search for each otherwise.
    pub(crate) fn rows_of<'a>(&self, ids: impl Iterator<Item = &'a str>) -> Vec<Option<usize>> {
        // Every entry before `next` lies below the previous id.
        let mut next = 0;
        let mut previous: &[u8] = &[];
        ids.map(|id| {
            let id = id.as_bytes();
            if id < previous {
                next = 0;
            }
            previous = id;
            let found = if next < self.starts.len() && self.entry(next).0 >= id {
                next
            } else {
                self.lower_bound(next, id)
            };
            next = found;
            (found < self.starts.len() && self.entry(found).0 == id).then(|| self.entry(found).1)
        })
        .collect()
    }
}
