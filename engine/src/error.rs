//! The engine's error kinds.

use std::fmt;

/// The live quads no longer fit the memory budget, even after collection.
#[derive(Clone, Copy, Debug, PartialEq, Eq, thiserror::Error)]
pub struct BudgetExceeded {
    /// the budget, in bytes
    pub budget: u64,
    /// bytes in use when the store gave up
    pub in_use: u64,
    /// whether the advance stopped because collections kept discarding its
    /// work without it getting any further (rather than because the live
    /// quads alone filled the budget)
    pub thrashing: bool,
}

impl fmt::Display for BudgetExceeded {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        if self.thrashing {
            return write!(
                f,
                "memory budget of {} is too small for this advance: collections kept \
                 discarding its work in progress, even in smaller steps; give the run \
                 a larger memory budget",
                human_bytes(self.budget)
            );
        }
        write!(
            f,
            "memory budget of {} is too small: at least {} of quads are live; \
             give the run a larger memory budget",
            human_bytes(self.budget),
            human_bytes(self.in_use)
        )
    }
}

/// A state cannot be written as pattern text.
#[derive(Clone, Debug, PartialEq, Eq, thiserror::Error)]
#[error("the pattern is too large to write as text: {what}")]
pub struct TooLargeForText {
    /// what exceeded which limit
    pub what: String,
}

/// Bytes in binary units with one decimal, for messages.
pub fn human_bytes(bytes: u64) -> String {
    const UNITS: [&str; 5] = ["B", "KiB", "MiB", "GiB", "TiB"];
    let mut value = bytes as f64;
    let mut unit = 0;
    while value >= 1024.0 && unit + 1 < UNITS.len() {
        value /= 1024.0;
        unit += 1;
    }
    if unit == 0 {
        format!("{bytes} B")
    } else {
        format!("{value:.1} {}", UNITS[unit])
    }
}

/// The system refused the stack a very deep recursion needs.
#[derive(Clone, Copy, Debug, PartialEq, Eq, thiserror::Error)]
#[error(
    "the system refused a {} stack for a recursion over {levels} levels",
    human_bytes(*bytes)
)]
pub struct StackRefused {
    /// the stack size asked for
    pub bytes: u64,
    /// the depth of the recursion
    pub levels: u32,
}

/// Why an advance stopped.
#[derive(Clone, Copy, Debug, PartialEq, Eq, thiserror::Error)]
pub enum AdvanceError {
    /// the live quads do not fit the memory budget
    #[error(transparent)]
    Budget(#[from] BudgetExceeded),
    /// no thread with a deep enough stack could be made
    #[error(transparent)]
    Stack(#[from] StackRefused),
}

/// Input the user can fix: a malformed pattern, rule, number, option, job
/// file or checkpoint folder. Every deeptime crate marks such errors with
/// it, so that the command can answer them with exit code 2.
#[derive(Debug, thiserror::Error)]
#[error("{0}")]
pub struct BadInput(pub String);

/// An output file that could not be written (its folder, the disk): a
/// failure of the system, never a sign that what was read is damaged.
#[derive(Debug, thiserror::Error)]
#[error("{0}")]
pub struct OutputFailed(pub String);

/// Input that is sound but does not fit the memory budget.
#[derive(Debug, thiserror::Error)]
#[error("{0}")]
pub struct InputOverBudget(pub String);
