//! Fuzz target: see `candor_fuzz::map_file`.
#![no_main]

libfuzzer_sys::fuzz_target!(|data: &[u8]| candor_fuzz::map_file(data));
