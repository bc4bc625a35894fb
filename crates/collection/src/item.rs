//! What the crawler knows about one picture: where it is, how to tell whether it changed,
//! and the tags a person wrote beside it.

use serde::{Deserialize, Serialize};

/// Picture formats recognised by their first bytes (the extension alone is not trusted).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum ImageFormat {
    Jpeg,
    Png,
    Webp,
    Tiff,
    Bmp,
    Gif,
}

/// Which kind of sidecar file a tag came from.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum SidecarKind {
    /// `NAME.txt`: one tag per line, commas also separate, `#` starts a comment.
    Text,
    /// `NAME.xmp`: keywords in `dc:subject`.
    Xmp,
}

/// Size and modification time: cheap to read, enough to decide "unchanged" without hashing.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub struct FileStamp {
    pub size: u64,
    /// Modification time in nanoseconds since the Unix epoch (0 when the platform has none).
    pub mtime_ns: i128,
}

/// A sidecar found beside a picture.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct SidecarRef {
    /// Path relative to the collection root, `/`-separated.
    pub rel_path: String,
    pub kind: SidecarKind,
    pub stamp: FileStamp,
}

/// One indexed picture. The sidecars stay the record; this is a cache of them.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct ItemRecord {
    /// Stable id derived from `rel_path` (16 hex digits), so a rescan keeps ids.
    pub id: String,
    /// Path relative to the collection root, `/`-separated.
    pub rel_path: String,
    pub format: ImageFormat,
    pub stamp: FileStamp,
    /// BLAKE3 of the picture's bytes, hex.
    pub content_hash: String,
    pub sidecars: Vec<SidecarRef>,
    /// Normalised tags, de-duplicated, in order of first appearance (text sidecar first).
    pub tags: Vec<String>,
}
