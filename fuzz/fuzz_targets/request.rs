//! Fuzz target: see `candor_fuzz::request`.
#![no_main]

libfuzzer_sys::fuzz_target!(|data: &[u8]| candor_fuzz::request(data));
