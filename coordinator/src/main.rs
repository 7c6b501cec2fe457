//! `deeptime`: advance Life-like patterns to astronomically far generations.
//!
//! The command lives in the library (`lib.rs`); this is its entry point.

fn main() -> std::process::ExitCode {
    deeptime_coordinator::main()
}
