//! The one error type of this crate.

/// Everything that can stop training or using the suggester, worded so the caller can act on it.
#[derive(Debug, thiserror::Error)]
pub enum SuggestError {
    #[error("the joint model could not be trained or run: {0}")]
    Model(#[from] tagweave_model::ModelError),
    #[error("method '{0}' was asked for scores before it was fitted; call fit first")]
    NotFitted(String),
    #[error("no candidate values were given for {0}; pass at least one")]
    NoCandidates(&'static str),
    #[error(
        "pictures have {got} features but the model was trained on {expected}; run \
         `tagweave train` again"
    )]
    FeatureWidth { got: usize, expected: usize },
    #[error("ridge regression system is not positive definite at pivot {pivot}; features may hold huge values, standardise them or raise the ridge strength")]
    NotPositiveDefinite { pivot: usize },
}
