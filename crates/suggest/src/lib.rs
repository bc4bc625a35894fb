//! The product's tag suggester: what `tagweave train` learns and every question asked of a
//! trained collection uses.
//!
//! Pure computation on feature matrices (rows = pictures) and tag columns: feature
//! scaling learned from training pictures ([`Standardiser`]), the tags the suggester
//! knows ([`TagColumns`]), k-nearest-neighbour tag transfer ([`KnnScorer`]), the joint
//! model's read-out blended with it and calibrated ([`TagSuggester`], [`Calibration`]).
//! No files, no store, no printing: callers hand in matrices and keep what they get back.

mod calibration;
mod columns;
mod completion;
mod error;
mod knn;
mod linalg;
pub mod ranking;
mod ridge;
mod standardiser;
mod suggester;
mod tagging_order;
#[cfg(test)]
mod test_support;
mod train_set;
mod trained;

pub use calibration::Calibration;
pub use columns::TagColumns;
pub use completion::{
    best_weights, completion_lrap, mix, reveal_half, unrevealed, validation_fold,
    validation_reveal, weight_grid, Reveal, TagCooccurrence, TagCounts,
};
pub use error::SuggestError;
pub use knn::{knn_leave_one_out_scores, unit_rows, KnnScorer};
pub use ridge::RidgeScorer;
pub use standardiser::Standardiser;
pub use suggester::{TagSuggester, TrainingRun};
pub use tagging_order::{
    choose_pictures_to_tag, Pick, PickReason, TaggingPool, TaggingStrategy, NEAR_DUPLICATE,
};
pub use train_set::{
    choose_by_cv, group_ids, grouped_folds, tag_frequencies, tag_matrix, TrainRows, TrainSet,
};
pub use trained::{TrainedModel, TrainingData, TrainingHistory, MODEL_FORMAT};
