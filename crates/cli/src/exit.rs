//! Exit codes that mean something to scripts.

use std::process::ExitCode;

/// How a command ended. Usage errors exit with 2 (clap's own convention).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Outcome {
    /// Everything done.
    Done,
    /// Could not do the job; the message says why.
    Failed,
    /// Done, but some files were passed over; the summary lists them.
    DoneWithSkips,
}

impl From<Outcome> for ExitCode {
    fn from(outcome: Outcome) -> ExitCode {
        ExitCode::from(match outcome {
            Outcome::Done => 0,
            Outcome::Failed => 1,
            Outcome::DoneWithSkips => 3,
        })
    }
}
