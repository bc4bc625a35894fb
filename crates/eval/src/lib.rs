//! Measuring how well a method suggests tags for pictures, finds pictures from
//! keywords and spots pictures whose tags were swapped — on held-out pictures of
//! a tagged collection, always beside simple baselines on the same split.
//!
//! Pure computation on feature matrices (rows = pictures) and tag lists: no
//! files, no printing. A method plugs in by implementing [`TagScorer`]; the
//! runner [`evaluate`] builds the split, fits every method on train rows only
//! and returns a serialisable [`Report`]; [`audit_out_of_fold`] disputes every
//! tagged picture with methods that never saw its tags, to be scored against
//! pictures known to be mislabelled; [`run_experiment`] does both for the baselines and
//! tagweave's suggester, as `tagweave eval` reports them.
//!
//! The product never depends on this crate: it measures the suggester (from
//! `tagweave-suggest`), never the other way round.

mod audit;
mod baselines;
mod completion;
mod error;
mod experiment;
mod joint;
pub mod metrics;
mod mislabel;
mod reliability;
mod report;
mod runner;
mod split;
mod tagging_order;

pub use audit::{audit_out_of_fold, Audit, KnownMislabelScore, KnownMislabels};
pub use baselines::{PriorScorer, TagScorer};
pub use completion::{
    measure_completion, CompletionReport, CooccurrenceScorer, RidgeCooccurrenceBlend,
};
pub use error::EvalError;
pub use experiment::{all_methods, run_experiment, Collection, AUDIT_FOLDS};
pub use joint::JointScorer;
pub use mislabel::{disagreement, inject_mislabels, Injection};
pub use reliability::{Reliability, ReliabilityBin};
pub use report::{Completion, CompletionSplit, MethodReport, Report, SplitSummary};
pub use runner::{
    baselines, completion_baselines, evaluate, evaluate_with_variants, EvalOptions, Progress,
    SUGGESTIONS,
};
pub use split::{split, Split};
pub use tagging_order::{
    simulate_tagging_order, TaggingCurve, TaggingOrder, TaggingOrderOptions, TaggingProgress,
    RANDOM,
};
pub use tagweave_suggest::RidgeScorer;
