//! Every item record in one file beside the database, read in one go.
//!
//! Walking a million records in sled and decoding each took 4.8 s with the disk cache warm
//! and 7 s cold; every question starts by reading them. The list holds the same records
//! (as the database stores them, length-prefixed) so they are read with one `read` and
//! decoded on every core. Like every derived file (`derived`) it exists only while it is
//! true.

use std::path::{Path, PathBuf};

use rayon::prelude::*;
use tagweave_collection::ItemRecord;

/// The file's first bytes (2: records by relative path); a file without them (or cut short)
/// is ignored and rewritten.
const MAGIC: &[u8; 8] = b"twitems2";

pub(crate) const FILE_NAME: &str = "item-list.bin";

pub(crate) fn path_in(store_dir: &Path) -> PathBuf {
    store_dir.join(FILE_NAME)
}

/// The stored bytes of each record, in the order given (by relative path), as one file's
/// contents.
pub(crate) fn encode<'a>(records: impl ExactSizeIterator<Item = &'a sled::IVec>) -> Vec<u8> {
    let mut out = Vec::with_capacity(MAGIC.len() + 8);
    out.extend_from_slice(MAGIC);
    out.extend_from_slice(&(records.len() as u64).to_le_bytes());
    for record in records {
        out.extend_from_slice(&(record.len() as u32).to_le_bytes());
        out.extend_from_slice(record);
    }
    out
}

/// The records a list file holds, or `None` when it is missing, cut short, not a list or
/// holds a record that does not decode (the database is then read instead).
pub(crate) fn read(
    path: &Path,
    decode: impl Fn(&str, &[u8]) -> crate::Result<ItemRecord> + Sync,
) -> Option<Vec<ItemRecord>> {
    let bytes = std::fs::read(path).ok()?;
    let body = bytes.strip_prefix(MAGIC.as_slice())?;
    let count = u64::from_le_bytes(body.get(..8)?.try_into().ok()?) as usize;
    let mut slices = Vec::with_capacity(count.min(body.len() / 4));
    let mut at = 8;
    for _ in 0..count {
        let len = u32::from_le_bytes(body.get(at..at + 4)?.try_into().ok()?) as usize;
        slices.push(body.get(at + 4..at + 4 + len)?);
        at += 4 + len;
    }
    if at != body.len() {
        return None;
    }
    slices
        .par_iter()
        .enumerate()
        .map(|(i, record)| decode(&format!("item list #{i}"), record))
        .collect::<crate::Result<Vec<_>>>()
        .ok()
}

/// How many records the list at `path` holds, from its header alone.
pub(crate) fn count(path: &Path) -> Option<usize> {
    let mut header = [0u8; 16];
    std::io::Read::read_exact(&mut std::fs::File::open(path).ok()?, &mut header).ok()?;
    let count = header.strip_prefix(MAGIC.as_slice())?;
    Some(u64::from_le_bytes(count.try_into().ok()?) as usize)
}
