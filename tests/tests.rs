//! Integration tests: one binary, one module per topic.

mod cli;
mod report;
mod serve;
mod support;
