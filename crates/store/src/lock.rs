//! One process per store. An OS file lock (released by the kernel when the process dies,
//! however it dies) guards the store; the holder's PID is written inside for the message.

use std::fs::{File, OpenOptions, TryLockError};
use std::io::{Read, Seek, SeekFrom, Write};
use std::path::Path;

use crate::StoreError;

pub(crate) struct StoreLock {
    _file: File,
}

impl StoreLock {
    pub(crate) fn acquire(dir: &Path) -> Result<StoreLock, StoreError> {
        let path = dir.join("lock");
        let io = |source| StoreError::Io {
            path: path.clone(),
            source,
        };
        let mut file = OpenOptions::new()
            .read(true)
            .write(true)
            .create(true)
            .truncate(false)
            .open(&path)
            .map_err(io)?;
        match file.try_lock() {
            Ok(()) => {}
            Err(TryLockError::WouldBlock) => {
                let mut text = String::new();
                let pid = file
                    .read_to_string(&mut text)
                    .ok()
                    .and_then(|_| text.trim().parse().ok());
                return Err(StoreError::InUse {
                    dir: dir.to_path_buf(),
                    pid,
                });
            }
            Err(TryLockError::Error(source)) => return Err(io(source)),
        }
        file.set_len(0).map_err(io)?;
        file.seek(SeekFrom::Start(0)).map_err(io)?;
        write!(file, "{}", std::process::id()).map_err(io)?;
        file.flush().map_err(io)?;
        Ok(StoreLock { _file: file })
    }
}
