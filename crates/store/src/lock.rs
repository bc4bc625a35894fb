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
                return Err(StoreError::InUse {
                    dir: dir.to_path_buf(),
                    pid: holder_pid(&mut file),
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

/// The PID the holder wrote. A holder that has only just taken the lock may not have
/// written it yet (two processes started together), so an empty file is read again for a
/// moment rather than leaving the PID out of the message.
fn holder_pid(file: &mut File) -> Option<u32> {
    const TRIES: u32 = 20;
    for attempt in 1..=TRIES {
        let mut text = String::new();
        if file.seek(SeekFrom::Start(0)).is_ok() && file.read_to_string(&mut text).is_ok() {
            if let Ok(pid) = text.trim().parse() {
                return Some(pid);
            }
        }
        if attempt < TRIES {
            std::thread::sleep(std::time::Duration::from_millis(5));
        }
    }
    None
}
