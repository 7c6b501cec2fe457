//! The deeptime engine: Life-like rules, canonical quadtrees advanced by the
//! HashLife method, content ids and digests, and pattern text.
//!
//! Synchronous and free of network code: the cluster layers build on it.

/// The level of leaves: 8×8 cells.
pub const LEAF_LEVEL: u32 = 3;

pub mod cut;
pub mod direct;
pub mod fate;
pub mod finite;
pub mod generation;
pub mod pack;
pub mod pattern;
pub mod recursion;
pub mod render;
pub mod rule;
pub mod shard;
pub mod stored;
pub mod top;
pub mod walk;

mod advance;
mod content_id;
mod error;
mod figures;
mod kernel;
mod region;
mod stack;
mod store;
mod universe;
mod view;

pub use advance::{Observer, Progress};
pub use content_id::{BadContentId, ContentId};
pub use error::{
    AdvanceError, BadInput, BudgetExceeded, InputOverBudget, OutputFailed, StackRefused,
    TooLargeForText, human_bytes,
};
pub use kernel::kernel_instruction_set;
pub use store::{Handle, StoreStats};
pub use universe::{
    BoundingBox, KnownQuads, MAX_TEXT_CELLS, PackInput, Region, Universe, WriteError,
};
