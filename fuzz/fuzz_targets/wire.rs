//! Fuzz target `wire`: see `deeptime_fuzz::wire`.
#![no_main]

libfuzzer_sys::fuzz_target!(|data: &[u8]| deeptime_fuzz::wire(data));
