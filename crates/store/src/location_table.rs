//! Where every vector of one kind lies, by id, in one file beside the database, so a
//! question about a few pictures finds their vectors without opening sled (`database`).
//! Like every derived file (`derived`) it exists only while it is true; it also names the
//! vector files as they were when it was written (generation and length), and is not used
//! once they differ, whoever changed them.
//!
//! Layout, little-endian: the magic; `files` (u64), then `files` × (u32 generation, u64
//! length); `count` (u64); `count` locations (16 bytes each, as the database keeps them);
//! `count` u64 ends of the ids in the id bytes; the id bytes, ids in ascending byte order.

use std::fs::File;
use std::os::unix::fs::FileExt;
use std::path::{Path, PathBuf};

use crate::vector_log::Location;

const MAGIC: &[u8; 8] = b"twlocat1";
const LOCATION: u64 = 16;

/// The table of vectors of `kind` in the store at `store_dir`.
pub(crate) fn path_in(store_dir: &Path, kind: &str) -> PathBuf {
    store_dir.join(format!("locations-{kind}.bin"))
}

/// The file's bytes for `entries` (id, location as kept), in ascending id order, of vector
/// files in the state `files` (generation, length).
pub(crate) fn encode(files: &[(u32, u64)], entries: &[(Vec<u8>, [u8; 16])]) -> Vec<u8> {
    let ids: usize = entries.iter().map(|(id, _)| id.len()).sum();
    let mut out = Vec::with_capacity(32 + files.len() * 12 + entries.len() * 24 + ids);
    out.extend_from_slice(MAGIC);
    out.extend_from_slice(&(files.len() as u64).to_le_bytes());
    for (generation, len) in files {
        out.extend_from_slice(&generation.to_le_bytes());
        out.extend_from_slice(&len.to_le_bytes());
    }
    out.extend_from_slice(&(entries.len() as u64).to_le_bytes());
    for (_, location) in entries {
        out.extend_from_slice(location);
    }
    let mut end = 0u64;
    for (id, _) in entries {
        end += id.len() as u64;
        out.extend_from_slice(&end.to_le_bytes());
    }
    for (id, _) in entries {
        out.extend_from_slice(id);
    }
    out
}

/// An open table, read by binary search a few bytes at a time.
pub(crate) struct LocationTable {
    bytes: Bytes,
    count: u64,
    locations_at: u64,
}

/// Where a table's bytes are read from: its file (a question about a few pictures), or
/// memory (one about every picture: a million searches through the file took 20 s).
enum Bytes {
    File(File),
    Held(Vec<u8>),
}

impl Bytes {
    fn read_exact_at(&self, out: &mut [u8], at: u64) -> std::io::Result<()> {
        match self {
            Bytes::File(file) => file.read_exact_at(out, at),
            Bytes::Held(held) => {
                let part = usize::try_from(at)
                    .ok()
                    .and_then(|at| held.get(at..at.checked_add(out.len())?))
                    .ok_or_else(|| {
                        std::io::Error::new(std::io::ErrorKind::UnexpectedEof, "table cut short")
                    })?;
                out.copy_from_slice(part);
                Ok(())
            }
        }
    }

    fn u64_at(&self, at: u64) -> std::io::Result<u64> {
        let mut bytes = [0u8; 8];
        self.read_exact_at(&mut bytes, at)?;
        Ok(u64::from_le_bytes(bytes))
    }
}

impl LocationTable {
    /// The table at `path` if it is there, whole, and written for vector files in the
    /// state `files`; otherwise `None` (the database is asked instead).
    pub(crate) fn open(path: &Path, files: &[(u32, u64)]) -> Option<LocationTable> {
        let file = File::open(path).ok()?;
        let len = file.metadata().ok()?.len();
        let bytes = Bytes::File(file);
        let mut magic = [0u8; 8];
        bytes.read_exact_at(&mut magic, 0).ok()?;
        let kept_files = bytes.u64_at(8).ok()?;
        if &magic != MAGIC || kept_files != files.len() as u64 {
            return None;
        }
        for (i, &(generation, size)) in files.iter().enumerate() {
            let mut kept_generation = [0u8; 4];
            let at = 16 + i as u64 * 12;
            bytes.read_exact_at(&mut kept_generation, at).ok()?;
            let kept_size = bytes.u64_at(at + 4).ok()?;
            if (u32::from_le_bytes(kept_generation), kept_size) != (generation, size) {
                return None;
            }
        }
        let count_at = 16 + kept_files * 12;
        let count = bytes.u64_at(count_at).ok()?;
        // Counts that could not fit the file are damage (and would overflow below).
        if count > len / (LOCATION + 8) {
            return None;
        }
        let table = LocationTable {
            count,
            locations_at: count_at + 8,
            bytes,
        };
        let ids_len = table.id_bytes().ok()?;
        (table.ids_at().checked_add(ids_len) == Some(len)).then_some(table)
    }

    /// The table read into memory, for many searches.
    pub(crate) fn held(&self) -> std::io::Result<LocationTable> {
        let len = self.ids_at() + self.id_bytes()?;
        let mut bytes = vec![0u8; usize::try_from(len).map_err(std::io::Error::other)?];
        self.bytes.read_exact_at(&mut bytes, 0)?;
        Ok(LocationTable {
            bytes: Bytes::Held(bytes),
            count: self.count,
            locations_at: self.locations_at,
        })
    }

    /// Length of the ids' bytes (the last id's end).
    fn id_bytes(&self) -> std::io::Result<u64> {
        match self.count {
            0 => Ok(0),
            n => self.id_end(n - 1),
        }
    }

    /// Where the id of entry `i` ends in the id bytes.
    fn id_end(&self, i: u64) -> std::io::Result<u64> {
        self.bytes.u64_at(self.ends_at() + i * 8)
    }

    fn ends_at(&self) -> u64 {
        self.locations_at + self.count * LOCATION
    }

    fn ids_at(&self) -> u64 {
        self.ends_at() + self.count * 8
    }

    /// Where the vector of `id` lies; `None` when the table holds none for it, or the
    /// table turned out damaged (`Err`: its reading failed).
    pub(crate) fn find(&self, id: &[u8]) -> std::io::Result<Option<Location>> {
        let (mut low, mut high) = (0, self.count);
        while low < high {
            let middle = low + (high - low) / 2;
            match self.id(middle)?.as_slice().cmp(id) {
                std::cmp::Ordering::Less => low = middle + 1,
                std::cmp::Ordering::Greater => high = middle,
                std::cmp::Ordering::Equal => {
                    let mut bytes = [0u8; 16];
                    self.bytes
                        .read_exact_at(&mut bytes, self.locations_at + middle * LOCATION)?;
                    return Ok(Location::from_bytes(&bytes));
                }
            }
        }
        Ok(None)
    }

    /// The id of entry `i`.
    fn id(&self, i: u64) -> std::io::Result<Vec<u8>> {
        let start = if i == 0 { 0 } else { self.id_end(i - 1)? };
        let len = self
            .id_end(i)?
            .checked_sub(start)
            .filter(|&n| n <= 1 << 16)
            .ok_or_else(|| {
                std::io::Error::new(std::io::ErrorKind::InvalidData, "ids out of order")
            })?;
        let mut id = vec![0u8; len as usize];
        self.bytes.read_exact_at(&mut id, self.ids_at() + start)?;
        Ok(id)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn location(generation: u32, offset: u64, len: u32) -> Location {
        Location::from_bytes(
            &[
                generation.to_be_bytes().as_slice(),
                &offset.to_be_bytes(),
                &len.to_be_bytes(),
            ]
            .concat(),
        )
        .expect("16 bytes")
    }

    #[test]
    fn every_id_is_found_and_no_other_and_a_changed_file_state_is_refused() {
        let folder = tempfile::tempdir().expect("temporary folder");
        let path = path_in(folder.path(), "code");
        // Ids of differing lengths in byte order, as sled keeps its keys.
        let ids: Vec<Vec<u8>> = ["a", "ab", "b", "ba0", "c", "zz"]
            .iter()
            .map(|s| s.as_bytes().to_vec())
            .collect();
        let entries: Vec<(Vec<u8>, [u8; 16])> = ids
            .iter()
            .enumerate()
            .map(|(i, id)| (id.clone(), location(1, i as u64 * 10, 10).to_bytes()))
            .collect();
        let files = [(1, 60)];
        std::fs::write(&path, encode(&files, &entries)).expect("write");
        let table = LocationTable::open(&path, &files).expect("a whole table");
        for (i, id) in ids.iter().enumerate() {
            let found = table.find(id).expect("read");
            assert_eq!(found, Some(location(1, i as u64 * 10, 10)), "{id:?}");
        }
        for absent in ["", "0", "aa", "b0", "bb", "zzz"] {
            assert_eq!(
                table.find(absent.as_bytes()).expect("read"),
                None,
                "{absent}"
            );
        }
        let held = table.held().expect("read whole");
        for id in ids
            .iter()
            .map(Vec::as_slice)
            .chain([b"aa".as_slice(), b"zzz"])
        {
            assert_eq!(held.find(id).expect("read"), table.find(id).expect("read"));
        }
        // Vector files grown or of another generation since: not used.
        assert!(LocationTable::open(&path, &[(1, 70)]).is_none());
        assert!(LocationTable::open(&path, &[(2, 60)]).is_none());
        assert!(LocationTable::open(&path, &[]).is_none());
        // Cut short: not used.
        let bytes = std::fs::read(&path).expect("read");
        std::fs::write(&path, &bytes[..bytes.len() - 1]).expect("write");
        assert!(LocationTable::open(&path, &files).is_none());
        // Empty table of no files.
        std::fs::write(&path, encode(&[], &[])).expect("write");
        let empty = LocationTable::open(&path, &[]).expect("an empty table");
        assert_eq!(empty.find(b"a").expect("read"), None);
    }
}
