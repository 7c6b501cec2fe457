//! Fuzz target `pack_records`: see `deeptime_fuzz::pack_records`.
#![no_main]

libfuzzer_sys::fuzz_target!(|data: &[u8]| deeptime_fuzz::pack_records(data));
