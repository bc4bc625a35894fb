//! The store's format version and collection root in a small file beside the database,
//! so a store opened for a question need not open sled to learn them (`database`). Written
//! only after the database said the same; they never change afterwards (a rebuild makes a
//! new store folder).
//!
//! Layout: the magic, the format version (u32, little-endian), then the root as the
//! database keeps it (UTF-8).

use std::path::{Path, PathBuf};

const MAGIC: &[u8; 8] = b"twfacts1";

pub(crate) fn path_in(store_dir: &Path) -> PathBuf {
    store_dir.join("facts.bin")
}

pub(crate) fn encode(format: u32, root: &str) -> Vec<u8> {
    [MAGIC.as_slice(), &format.to_le_bytes(), root.as_bytes()].concat()
}

/// The format version and root kept at `path`; `None` when there is no whole file.
pub(crate) fn read(path: &Path) -> Option<(u32, String)> {
    let bytes = std::fs::read(path).ok()?;
    let rest = bytes.strip_prefix(MAGIC.as_slice())?;
    let format = u32::from_le_bytes(rest.get(..4)?.try_into().ok()?);
    let root = std::str::from_utf8(rest.get(4..)?).ok()?;
    Some((format, root.to_string()))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn facts_read_back_and_a_damaged_file_reads_as_none() {
        let folder = tempfile::tempdir().expect("temporary folder");
        let path = path_in(folder.path());
        assert_eq!(read(&path), None, "missing");
        std::fs::write(&path, encode(3, "/photos/harbour")).expect("write");
        assert_eq!(read(&path), Some((3, "/photos/harbour".to_string())));
        std::fs::write(&path, &encode(3, "..")[..10]).expect("write");
        assert_eq!(read(&path), None, "cut short");
        std::fs::write(&path, b"twfacts2\x03\x00\x00\x00..").expect("write");
        assert_eq!(read(&path), None, "another magic");
    }
}
