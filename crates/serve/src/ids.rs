//! The ids that name pictures in the page's addresses.
//!
//! An item's own id is the plain BLAKE3 of its path, so anyone who can guess a path can
//! work out its address, and a page on another site could ask whether a picture exists.
//! The page names each picture instead by a BLAKE3 hash keyed with a secret kept in the
//! store folder (`review-page.key`, readable by its owner only): stable from run to run,
//! so bookmarks and the browser's cache keep working, but not computable without the key.
//! Deleting the file (or the store) gives every picture a new address.

use std::io::{ErrorKind, Write};
use std::path::{Path, PathBuf};

use crate::ServeError;

/// The key's file name inside the store folder.
pub const KEY_FILE: &str = "review-page.key";

/// Hex digits of a page id.
pub const ID_LEN: usize = 16;

/// Names pictures by keyed hash.
pub struct PageIds {
    key: [u8; 32],
}

impl PageIds {
    /// The ids of the store in `store_dir`: its key is read, or made and kept there
    /// (mode 0600) on first use. A key file that is not 64 hex digits is replaced.
    pub fn open(store_dir: &Path) -> Result<PageIds, ServeError> {
        let path = store_dir.join(KEY_FILE);
        if let Some(key) = read_key(&path)? {
            return Ok(PageIds { key });
        }
        let key: [u8; 32] = rand::random();
        write_key(&path, &key)?;
        // Two servers cannot start on one store (its lock), but read back anyway, so the
        // key in use is always the one on disk.
        match read_key(&path)? {
            Some(kept) => Ok(PageIds { key: kept }),
            None => Err(key_error(
                &path,
                std::io::Error::new(ErrorKind::InvalidData, "the key did not read back"),
            )),
        }
    }

    /// The page id of the picture at `rel_path` (16 lower-case hex digits).
    pub fn of(&self, rel_path: &str) -> String {
        blake3::keyed_hash(&self.key, rel_path.as_bytes()).to_hex()[..ID_LEN].to_string()
    }
}

fn key_error(path: &Path, source: std::io::Error) -> ServeError {
    ServeError::Key {
        path: path.to_path_buf(),
        source,
    }
}

fn read_key(path: &Path) -> Result<Option<[u8; 32]>, ServeError> {
    let text = match std::fs::read_to_string(path) {
        Ok(text) => text,
        Err(e) if e.kind() == ErrorKind::NotFound || e.kind() == ErrorKind::InvalidData => {
            return Ok(None)
        }
        Err(e) => return Err(key_error(path, e)),
    };
    let text = text.trim();
    if text.len() != 64 || !text.bytes().all(|b| b.is_ascii_hexdigit()) {
        return Ok(None);
    }
    let mut key = [0u8; 32];
    for (i, byte) in key.iter_mut().enumerate() {
        *byte = u8::from_str_radix(&text[2 * i..2 * i + 2], 16).expect("checked hex");
    }
    Ok(Some(key))
}

/// Writes the key to a new private file and renames it into place.
fn write_key(path: &Path, key: &[u8; 32]) -> Result<(), ServeError> {
    let hex: String = key.iter().map(|b| format!("{b:02x}")).collect();
    let suffix: u64 = rand::random();
    let temp: PathBuf = path.with_file_name(format!(".{KEY_FILE}-{suffix:016x}"));
    let mut options = std::fs::OpenOptions::new();
    options.write(true).create_new(true);
    #[cfg(unix)]
    {
        use std::os::unix::fs::OpenOptionsExt;
        options.mode(0o600);
    }
    let written = options
        .open(&temp)
        .and_then(|mut f| f.write_all(format!("{hex}\n").as_bytes()).and(f.sync_all()))
        .and_then(|()| std::fs::rename(&temp, path));
    if let Err(e) = written {
        let _ = std::fs::remove_file(&temp);
        return Err(key_error(path, e));
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ids_are_keyed_stable_per_store_and_private() {
        let one = tempfile::tempdir().unwrap();
        let two = tempfile::tempdir().unwrap();
        let a = PageIds::open(one.path()).unwrap();
        let id = a.of("1950s/harbour.jpg");
        assert_eq!(id.len(), ID_LEN);
        assert!(id.bytes().all(|b| matches!(b, b'0'..=b'9' | b'a'..=b'f')));
        // Not the unkeyed hash a guesser could compute from the path.
        let plain = blake3::hash(b"1950s/harbour.jpg").to_hex()[..ID_LEN].to_string();
        assert_ne!(id, plain);
        assert_ne!(a.of("1950s/harbour.jpg"), a.of("1950s/harbour2.jpg"));
        // The same store gives the same ids again; another store other ids.
        assert_eq!(
            PageIds::open(one.path()).unwrap().of("1950s/harbour.jpg"),
            id
        );
        assert_ne!(
            PageIds::open(two.path()).unwrap().of("1950s/harbour.jpg"),
            id
        );
        #[cfg(unix)]
        {
            use std::os::unix::fs::PermissionsExt;
            let mode = std::fs::metadata(one.path().join(KEY_FILE))
                .unwrap()
                .permissions()
                .mode();
            assert_eq!(mode & 0o777, 0o600, "{mode:o}");
        }
        // source: BLAKE3 keyed_hash mode (the blake3 crate's own function), checked
        // against the key as written on disk.
        let text = std::fs::read_to_string(one.path().join(KEY_FILE)).unwrap();
        let mut key = [0u8; 32];
        for (i, b) in key.iter_mut().enumerate() {
            *b = u8::from_str_radix(&text.trim()[2 * i..2 * i + 2], 16).unwrap();
        }
        assert_eq!(
            blake3::keyed_hash(&key, b"1950s/harbour.jpg").to_hex()[..ID_LEN],
            id
        );
    }

    #[test]
    fn a_damaged_key_file_is_replaced() {
        let dir = tempfile::tempdir().unwrap();
        std::fs::write(dir.path().join(KEY_FILE), "not a key").unwrap();
        let ids = PageIds::open(dir.path()).unwrap();
        let text = std::fs::read_to_string(dir.path().join(KEY_FILE)).unwrap();
        assert_eq!(text.trim().len(), 64);
        assert_eq!(PageIds::open(dir.path()).unwrap().of("x"), ids.of("x"));
    }
}
