//! Whole-file writes that either happen completely or not at all, even if the process is
//! killed or the machine loses power halfway.

use std::fs::{File, Permissions};
use std::io::Write;
use std::path::Path;

use crate::error::WritebackError;

/// Temporary files start with a dot so the crawler (which skips hidden names) never takes
/// one left behind by a crash for a picture or a sidecar.
pub(crate) const TEMP_PREFIX: &str = ".tagweave-";

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Mode {
    /// Put the new file in place of whatever is there.
    Replace,
    /// Fail with `ErrorKind::AlreadyExists` inside [`WritebackError::Io`] if the name is taken.
    CreateNew,
}

/// Writes a temporary file in the same folder (so the rename stays on one file system),
/// flushes it to disk, renames it over `path`, then flushes the folder so the rename itself
/// survives a power cut. `permissions` are set on the file before it takes the name; `None`
/// gives a new file the usual read-write mode (less the umask). `last_check` runs after the
/// new bytes are on disk and just before the rename, to keep the window for a lost update by
/// another program as short as can be.
pub(crate) fn write_atomically(
    path: &Path,
    bytes: &[u8],
    mode: Mode,
    permissions: Option<Permissions>,
    last_check: &dyn Fn() -> Result<(), WritebackError>,
) -> Result<(), WritebackError> {
    let folder = match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p,
        _ => Path::new("."),
    };
    let mut builder = tempfile::Builder::new();
    builder.prefix(TEMP_PREFIX).suffix(".tmp");
    #[cfg(unix)]
    {
        use std::os::unix::fs::PermissionsExt;
        builder.permissions(Permissions::from_mode(0o666));
    }
    let mut temp = builder
        .tempfile_in(folder)
        .map_err(WritebackError::io(folder, "create a temporary file in"))?;
    temp.write_all(bytes)
        .map_err(WritebackError::io(temp.path(), "write"))?;
    if let Some(permissions) = permissions {
        temp.as_file()
            .set_permissions(permissions)
            .map_err(WritebackError::io(temp.path(), "set the permissions of"))?;
    }
    temp.as_file()
        .sync_all()
        .map_err(WritebackError::io(temp.path(), "flush to disk"))?;
    last_check()?;
    let persisted = match mode {
        Mode::Replace => temp.persist(path),
        Mode::CreateNew => temp.persist_noclobber(path),
    };
    persisted.map_err(|e| WritebackError::Io {
        path: path.to_path_buf(),
        action: "put in place",
        source: e.error,
    })?;
    sync_folder(folder)
}

/// Makes a rename durable: on Unix the folder entry is only on disk once the folder is synced.
fn sync_folder(folder: &Path) -> Result<(), WritebackError> {
    #[cfg(unix)]
    {
        File::open(folder)
            .and_then(|f| f.sync_all())
            .map_err(WritebackError::io(folder, "flush the folder"))?;
    }
    #[cfg(not(unix))]
    {
        // Windows cannot open a folder as a file; its rename is journalled by NTFS.
        let _ = (folder, File::open);
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn replaces_and_refuses_to_clobber() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("a.txt");
        write_atomically(&path, b"one\n", Mode::CreateNew, None, &|| Ok(())).unwrap();
        assert_eq!(std::fs::read(&path).unwrap(), b"one\n");
        let err = write_atomically(&path, b"two\n", Mode::CreateNew, None, &|| Ok(())).unwrap_err();
        assert!(
            matches!(&err, WritebackError::Io { source, .. } if source.kind() == std::io::ErrorKind::AlreadyExists),
            "{err:?}"
        );
        assert_eq!(std::fs::read(&path).unwrap(), b"one\n");
        write_atomically(&path, b"two\n", Mode::Replace, None, &|| Ok(())).unwrap();
        assert_eq!(std::fs::read(&path).unwrap(), b"two\n");
        let left: Vec<_> = std::fs::read_dir(dir.path())
            .unwrap()
            .map(|e| e.unwrap().file_name())
            .collect();
        assert_eq!(left, ["a.txt"], "no temporary file is left behind");
    }

    #[cfg(unix)]
    #[test]
    fn keeps_the_given_permissions() {
        use std::os::unix::fs::PermissionsExt;
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("a.txt");
        write_atomically(
            &path,
            b"x",
            Mode::Replace,
            Some(Permissions::from_mode(0o640)),
            &|| Ok(()),
        )
        .unwrap();
        let mode = std::fs::metadata(&path).unwrap().permissions().mode();
        assert_eq!(mode & 0o777, 0o640);
    }
}
