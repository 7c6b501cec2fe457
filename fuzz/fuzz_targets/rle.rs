//! Fuzz target `rle`: see `deeptime_fuzz::rle`.
#![no_main]

libfuzzer_sys::fuzz_target!(|data: &[u8]| deeptime_fuzz::rle(data));
