use std::path::PathBuf;

/// Everything that can go wrong with a store, phrased so the user knows what to do next.
#[derive(Debug, thiserror::Error)]
pub enum StoreError {
    #[error(
        "the store at {dir} is in use by another tagweave process{}; wait for it to finish, or stop it",
        pid.map(|p| format!(" (PID {p})")).unwrap_or_default()
    )]
    InUse { dir: PathBuf, pid: Option<u32> },

    #[error(
        "the store at {dir} was written in format version {}, this tagweave reads version {expected}; \
         rebuild it from the pictures and sidecars with `tagweave scan FOLDER --rebuild`",
        found.map(|v| v.to_string()).unwrap_or_else(|| "unknown".into())
    )]
    FormatMismatch {
        dir: PathBuf,
        found: Option<u32>,
        expected: u32,
    },

    #[error("no tagweave store at {dir}; run `tagweave scan FOLDER` first (or pass --store PATH)")]
    NotAStore { dir: PathBuf },

    #[error(
        "no tagweave store found in {start} or any folder above it; run `tagweave scan FOLDER` first, \
         or pass --store PATH"
    )]
    NotFound { start: PathBuf },

    #[error("the store at {dir} could not be read or written ({source}); if this persists, rebuild it with `tagweave scan FOLDER --rebuild`")]
    Database {
        dir: PathBuf,
        #[source]
        source: sled::Error,
    },

    #[error(
        "the disk holding the store at {dir} is full (no space left on the device); free \
         some space there and run the command again (what was written before stays \
         readable, and a scan picks up where this one stopped)"
    )]
    DiskFull {
        dir: PathBuf,
        #[source]
        source: std::io::Error,
    },

    #[error("the store at {dir} holds a damaged entry `{key}` ({detail}); rebuild it with `tagweave scan FOLDER --rebuild`")]
    Corrupt {
        dir: PathBuf,
        key: String,
        detail: String,
    },

    #[error(
        "the code of item {id} cannot be searched: {detail}; the stored codes do not match the \
         model, recompute them (`tagweave scan FOLDER --rebuild`)"
    )]
    BadCode { id: String, detail: String },

    #[error("cannot build a code index: {detail}")]
    BadIndexShape { detail: String },

    #[error(
        "the search query cannot be used: {detail}; compute the query code with the same model \
         as the indexed codes"
    )]
    BadQuery { detail: String },

    #[error("the store disagrees with itself: {0}")]
    Inconsistent(String),

    #[error(
        "the stored model has format {found}, this tagweave reads format {expected}; \
         run `tagweave train` again"
    )]
    ModelFormat { found: u32, expected: u32 },

    #[error("{path}: {source}")]
    Io {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
}
