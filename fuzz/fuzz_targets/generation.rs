//! Fuzz target `generation`: see `deeptime_fuzz::generation`.
#![no_main]

libfuzzer_sys::fuzz_target!(|data: &[u8]| deeptime_fuzz::generation(data));
