//! Integration tests: one binary, one module per topic.

mod cli;
mod conformance;
mod serve;
mod support;
