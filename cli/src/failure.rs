//! Exit codes and one-line messages for every way a command can fail.
//!
//! 0 done; 1 a failure of the system (files, output); 2 bad input (usage,
//! pattern, rule, number); 3 a memory budget too small for the live state.

use deeptime_engine::{AdvanceError, BudgetExceeded};
use deeptime_storage::checkpoint::CheckpointError;

pub use deeptime_engine::{BadInput, InputOverBudget, OutputFailed};

pub const EXIT_FAILURE: u8 = 1;
pub const EXIT_BAD_INPUT: u8 = 2;
pub const EXIT_BUDGET: u8 = 3;

/// The exit code for an error, from the kind at the root of its chain.
pub fn exit_code(error: &anyhow::Error) -> u8 {
    for cause in error.chain() {
        if cause.is::<BadInput>()
            || cause.is::<deeptime_node::auth::BadTokenFile>()
            || matches!(
                cause.downcast_ref::<CheckpointError>(),
                Some(CheckpointError::BadInput(_))
            )
        {
            return EXIT_BAD_INPUT;
        }
        if is_budget(cause) {
            return EXIT_BUDGET;
        }
    }
    EXIT_FAILURE
}

/// The whole chain on one line, outermost first.
pub fn describe(error: &anyhow::Error) -> String {
    let mut text = String::new();
    for (at, cause) in error.chain().enumerate() {
        if at > 0 {
            text.push_str(": ");
        }
        text.push_str(&cause.to_string());
    }
    if error.chain().any(|cause| {
        is_budget(cause) && !cause.is::<deeptime_coordinator::cluster::NodeOutOfMemory>()
    }) {
        text.push_str(" (--memory)");
    }
    text
}

fn is_budget(cause: &(dyn std::error::Error + 'static)) -> bool {
    cause.is::<BudgetExceeded>()
        || cause.is::<InputOverBudget>()
        || cause.is::<deeptime_coordinator::cluster::NodeOutOfMemory>()
        || matches!(
            cause.downcast_ref::<AdvanceError>(),
            Some(AdvanceError::Budget(_))
        )
        || matches!(
            cause.downcast_ref::<CheckpointError>(),
            Some(CheckpointError::Budget(_))
        )
}
