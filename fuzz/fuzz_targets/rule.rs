//! Fuzz target `rule`: see `deeptime_fuzz::rule`.
#![no_main]

libfuzzer_sys::fuzz_target!(|data: &[u8]| deeptime_fuzz::rule(data));
