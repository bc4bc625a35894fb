//! RBM building blocks for tagweave's joint picture–tag code.
//!
//! Pure computation: no files, no printing. Training reports progress through a
//! callback. Everything random is driven by seeded ChaCha generators and split into
//! fixed row chunks, so results do not depend on the number of rayon threads.
//!
//! Layers: [`BinaryRbm`] (tags, upper layers), [`GaussianBernoulliRbm`]
//! (standardised picture features) and [`ReplicatedSoftmaxRbm`] (a bag of tags as
//! draws from one softmax); one trainer ([`train`]) for all three; check values
//! for tiny models ([`log_partition_exact`], [`log_likelihood_exact`],
//! [`log_likelihood_gradient_exact`]) and an AIS estimate of log Z
//! ([`log_partition_ais`]) for models too large to enumerate. [`JointModel`] stacks
//! them into the picture–tag model and fine-tunes it as a tag predictor.

mod ais;
mod early_stopping;
mod error;
mod exact;
mod joint;
mod kernels;
mod optimiser;
mod rbm;
mod rows;
mod softmax;
mod train;

#[cfg(test)]
mod test_support;

pub use ais::{log_partition_ais, AisEstimate, AisOptions};
pub use error::ModelError;
pub use exact::{
    log_likelihood_exact, log_likelihood_gradient_exact, log_partition_exact, RbmGradient,
    MAX_EXACT_HIDDEN,
};
pub use joint::{
    FineTuneReport, JointModel, JointOptions, JointProgress, JointSummary, TagLayer, TagUnits,
};
pub use kernels::matmul;
pub use rbm::{Bernoulli, BinaryRbm, Gaussian, GaussianBernoulliRbm, Rbm, VisibleUnits};
pub use rows::SAMPLE_CHUNK_ROWS;
pub use softmax::ReplicatedSoftmaxRbm;
pub use train::{
    train, EpochReport, LearningRateSchedule, RbmTrainingOptions, Sparsity, TrainSummary, Trainable,
};
