//! Fuzz target `plaintext`: see `deeptime_fuzz::plaintext`.
#![no_main]

libfuzzer_sys::fuzz_target!(|data: &[u8]| deeptime_fuzz::plaintext(data));
