//! Fuzz target: see `candor_fuzz::dataset_jsonl`.
#![no_main]

libfuzzer_sys::fuzz_target!(|data: &[u8]| candor_fuzz::dataset_jsonl(data));
