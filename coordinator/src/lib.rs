//! The runs of a job, as a library: `deeptime run` (the embedded mode:
//! the engine's recursion with a local base case) and `deeptime
//! coordinator` (the same recursion with tasks on nodes as its base case),
//! the job file both read, and what they report. The `deeptime` binary
//! (`cli/`) parses the command line and calls it; the fuzz targets call its
//! job file reader.

pub mod args;
pub mod cluster;
pub mod input;
pub mod job;
pub mod memory;
pub mod numbers;
pub mod output;
pub mod progress;
pub mod report;
pub mod run;
