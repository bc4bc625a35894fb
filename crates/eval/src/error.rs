//! The one error type of this crate.

/// Everything that can stop an evaluation, worded so the caller can act on it.
#[derive(Debug, thiserror::Error)]
pub enum EvalError {
    #[error(transparent)]
    Suggest(#[from] tagweave_suggest::SuggestError),
    #[error("{what} has {got} entries but the feature matrix has {expected} rows; pass exactly one entry per picture, in the same order as the feature rows")]
    LengthMismatch {
        what: &'static str,
        got: usize,
        expected: usize,
    },
    #[error("a variant matrix has {got} columns but the features have {expected}; describe the variants with the same feature extractor as the pictures")]
    VariantWidth { got: usize, expected: usize },
    #[error("the feature matrix has no columns; extract picture features before evaluating")]
    NoFeatures,
    #[error("train fraction {0} is outside the open interval (0, 1); use a value such as 0.75")]
    BadFraction(f64),
    #[error("noise fraction {0} is outside [0, 0.5]; use a small value such as 0.05")]
    BadNoiseFraction(f64),
    #[error("cannot split {items} pictures with {groups} distinct contents into non-empty train and test parts; evaluate on at least two different pictures")]
    TooFewItems { items: usize, groups: usize },
    #[error("no train picture carries a tag, so there is nothing to learn; tag more pictures or change the seed")]
    EmptyVocabulary,
    #[error("no test picture carries a tag that also occurs on a train picture, so nothing can be measured; tag more pictures or change the seed")]
    NothingToMeasure,
    #[error("feature value of picture {row}, dimension {col} is not a finite number; re-extract the features of that picture")]
    NonFiniteFeature { row: usize, col: usize },
    #[error("two methods are both named '{0}'; give every method a distinct name")]
    DuplicateMethod(String),
    #[error("method '{method}' returned a {got_rows}x{got_cols} score matrix, expected {rows}x{cols} (test pictures x vocabulary); fix the method's score function")]
    BadScoreShape {
        method: String,
        got_rows: usize,
        got_cols: usize,
        rows: usize,
        cols: usize,
    },
    #[error("method '{method}' returned a non-finite score for test picture {row}, tag {col}; fix the method's score function")]
    NonFiniteScore {
        method: String,
        row: usize,
        col: usize,
    },
    #[error("{pictures} pictures are too few to simulate tagging order starting from {start} tagged: the last measurement is at a third of the set; use a larger set or a smaller start")]
    TooFewToOrder { pictures: usize, start: usize },
    #[error("an out-of-fold audit needs at least 2 folds, got {0}; use 5")]
    BadFolds(usize),
}
