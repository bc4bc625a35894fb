//! Finds the pictures of a collection and the tags people wrote beside them (sidecars) or
//! inside them (XMP and IPTC keywords in the picture's metadata segments).
//!
//! The sidecar files are the record; everything here only reads them, and the pictures.

mod crawl;
mod embedded;
mod error;
mod item;
mod normalize;
pub mod sidecar;
#[cfg(test)]
mod test_support;
mod typo;
mod vocabulary;
mod xmp;

pub use crawl::{crawl, Candidate, Crawl, CrawlOptions, Note, SkipReason, Skipped};
pub use embedded::MAX_EMBEDDED_BYTES;
pub use error::{CollectionError, MAX_SIDECAR_BYTES, MAX_TEXT_LINE_BYTES};
pub use item::{
    is_unchanged, item_id, read_item, FileStamp, ImageFormat, ItemRecord, ReadItem, SidecarKind,
    SidecarRef,
};
pub use normalize::{misleading_char, normalize_tag};
pub use typo::closest_tag;
pub use vocabulary::Vocabulary;
