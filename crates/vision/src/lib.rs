//! Image features for tagweave: decoding at working size, CIELAB colour statistics and a
//! patch dictionary learned from the collection itself (spherical k-means on ZCA-whitened
//! patches), pooled over a spatial pyramid.
//!
//! Nothing here prints or walks folders: callers hand in paths or decoded pictures and get
//! vectors back; long work reports progress through a callback.

mod colour;
mod decode;
mod error;
mod extractor;
mod kmeans;
mod linalg;
mod patches;
mod raw;

pub use colour::{srgb_to_lab, ColourOptions};
pub use decode::{
    load_working_image, load_working_image_with, DecodeOptions, JpegDecoder, WorkingImage,
};
pub use error::VisionError;
pub use extractor::{FeatureExtractor, FeatureOptions, Variant, TRAINING_VARIANTS};
pub use patches::{Activation, PatchDictionary, PatchOptions};

/// Progress callback: `(done, total)` work units; called from worker threads.
pub type ProgressFn<'a> = &'a (dyn Fn(usize, usize) + Sync);
