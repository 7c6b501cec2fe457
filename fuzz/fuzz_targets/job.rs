//! Fuzz target `job`: see `deeptime_fuzz::job`.
#![no_main]

libfuzzer_sys::fuzz_target!(|data: &[u8]| deeptime_fuzz::job(data));
