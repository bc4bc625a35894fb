use thiserror::Error;

/// Everything that can go wrong in this crate; messages say what to change.
#[derive(Debug, Error, PartialEq)]
pub enum ModelError {
    #[error("{what} has {got} columns but the model has {expected} visible units; pass rows with the feature layout the model was built for")]
    WidthMismatch {
        what: &'static str,
        expected: usize,
        got: usize,
    },
    #[error("{what} has {got} rows but the features have {expected}; pass one row per picture, in the same order")]
    RowMismatch {
        what: &'static str,
        expected: usize,
        got: usize,
    },
    #[error("{what} has no rows; give at least one example")]
    Empty { what: &'static str },
    #[error("{what} holds a non-finite value at row {row}, column {col}; clean and standardise the features first")]
    NonFinite {
        what: &'static str,
        row: usize,
        col: usize,
    },
    #[error("{what} holds {value} at row {row}, column {col}, outside [0, 1]; binary units need values scaled to [0, 1]")]
    OutOfUnitRange {
        what: &'static str,
        row: usize,
        col: usize,
        value: f32,
    },
    #[error("{what} holds {value} at row {row}, column {col}; replicated-softmax visible units are word counts: pass non-negative whole numbers (0 or 1 per tag)")]
    NotACount {
        what: &'static str,
        row: usize,
        col: usize,
        value: f32,
    },
    #[error("exact enumeration handles at most {max} hidden units but the model has {got}; use log_partition_ais for larger models")]
    TooManyHidden { max: usize, got: usize },
    #[error("option {name} = {value} is invalid: {fix}")]
    InvalidOption {
        name: &'static str,
        value: String,
        fix: &'static str,
    },
    #[error("training diverged at epoch {epoch} (reconstruction error is not finite); lower learning_rate or raise weight_decay")]
    Diverged { epoch: usize },
}
