//! Fuzz target `manifest`: see `deeptime_fuzz::manifest`.
#![no_main]

libfuzzer_sys::fuzz_target!(|data: &[u8]| deeptime_fuzz::manifest(data));
