//! Fuzz target `pack`: see `deeptime_fuzz::pack`.
#![no_main]

libfuzzer_sys::fuzz_target!(|data: &[u8]| deeptime_fuzz::pack(data));
