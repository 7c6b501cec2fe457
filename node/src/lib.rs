//! A deeptime cluster node, and the wire helpers both cluster roles share.
//!
//! A node joins a coordinator, holds a lease, and keeps a shard of quads
//! (`deeptime_engine::shard`): it computes the coordinator's base-case
//! tasks with its own engine, keeps what it computed, serves records to
//! peers by content id and fetches from them only what it lacks. At a
//! checkpoint it writes the packs of its pieces to the run's storage
//! itself (`storage`, which the coordinator uses too). A node whose store is
//! full spills the pieces it has held longest to that storage and reads
//! them back when they are needed (`spill`).

pub mod auth;
pub mod fetch;
pub mod membership;
pub mod packs;
pub mod serve;
pub mod service;
pub mod spill;
pub mod wire;

pub use serve::{NodeConfig, run_node};
