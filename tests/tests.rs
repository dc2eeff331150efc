//! Integration tests: one binary, one module per topic.

mod cli;
mod conformance;
mod fuzz_corpus;
mod offline;
mod report;
mod serve;
mod support;
