//! The crate's one error type. Messages name the file and say what to do about it.

use std::path::PathBuf;

/// Limits on sidecar files: a tag file bigger than this is almost certainly something else
/// that happens to share a picture's name, and reading it whole would waste memory.
pub const MAX_SIDECAR_BYTES: u64 = 8 * 1024 * 1024;
/// Longest line accepted in a plain-text sidecar (one tag per line; a real tag is short).
pub const MAX_TEXT_LINE_BYTES: usize = 64 * 1024;

#[derive(Debug, thiserror::Error)]
pub enum CollectionError {
    #[error("collection folder {} cannot be read: {source}; check the path and its permissions", root.display())]
    RootUnreadable {
        root: PathBuf,
        #[source]
        source: std::io::Error,
    },

    #[error("{} is not a folder; give the folder that holds the pictures", root.display())]
    RootNotFolder { root: PathBuf },

    /// A sidecar could not be used; `problem` says why without repeating the path.
    #[error("sidecar {}: {problem}", path.display())]
    Sidecar {
        path: PathBuf,
        #[source]
        problem: Box<CollectionError>,
    },

    #[error("cannot be read ({0}); check that it exists and that you may read it")]
    Read(#[from] std::io::Error),

    #[error("is {size} bytes, over the {limit}-byte limit for sidecars; a tag file is never this big, so move this file away from the picture")]
    TooLarge { size: u64, limit: u64 },

    #[error("line {line} is longer than {limit} bytes; put one tag per line")]
    LineTooLong { line: usize, limit: usize },

    #[error("line {line} is not UTF-8 text; re-save the file as UTF-8")]
    NotUtf8 { line: usize },

    #[error("declares a DOCTYPE; entity declarations are never expanded, for safety, so remove the <!DOCTYPE ...> part (XMP never needs one)")]
    XmlDoctype,

    #[error("is not well-formed XML ({problem}); repair it in an XMP-aware editor or delete it")]
    XmlMalformed { problem: String },
}
