//! One process per store. An OS file lock (released by the kernel when the process dies,
//! however it dies) guards the store; the holder's PID is written inside for the message,
//! followed by [`BRIEF`] when the holder means to let go within a moment (the review page
//! writing one decision), so others know waiting is worth it.

use std::fs::{File, OpenOptions, TryLockError};
use std::io::{Read, Seek, SeekFrom, Write};
use std::path::Path;

use crate::StoreError;

/// Written after the PID by a holder that keeps the store only a moment.
const BRIEF: &str = "brief";

pub(crate) struct StoreLock {
    _file: File,
}

/// Whether the store's current holder said it keeps the store only a moment.
pub(crate) fn held_briefly(dir: &Path) -> bool {
    std::fs::read_to_string(dir.join("lock"))
        .is_ok_and(|text| text.split_whitespace().nth(1) == Some(BRIEF))
}

impl StoreLock {
    pub(crate) fn acquire(dir: &Path) -> Result<StoreLock, StoreError> {
        StoreLock::acquire_for(dir, false)
    }

    /// Takes the lock; `brief` tells waiting processes it will be let go within a moment.
    pub(crate) fn acquire_for(dir: &Path, brief: bool) -> Result<StoreLock, StoreError> {
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
        if brief {
            write!(file, "{} {BRIEF}", std::process::id()).map_err(io)?;
        } else {
            write!(file, "{}", std::process::id()).map_err(io)?;
        }
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
            if let Some(Ok(pid)) = text.split_whitespace().next().map(str::parse) {
                return Some(pid);
            }
        }
        if attempt < TRIES {
            std::thread::sleep(std::time::Duration::from_millis(5));
        }
    }
    None
}
