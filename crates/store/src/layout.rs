//! The names under which the store keeps what the other crates learn and compute.
//!
//! Blobs are named pieces of learned state; vectors are one per item and kind. The store
//! owns these names so every reader and writer agrees on them.

/// Blob holding the learned feature extractor.
pub const EXTRACTOR_BLOB: &str = "feature_extractor";
/// Blob holding the trained model (the suggester with its tag columns and scaling).
pub const MODEL_BLOB: &str = "tag_model";
/// Vector kind of each item's raw feature vector (as the extractor made it, not scaled).
pub const FEATURES: &str = "features";
/// Vector kind of each item's code (the trained model's shared-layer probabilities).
pub const CODES: &str = "code";
