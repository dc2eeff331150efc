//! Integration tests: one binary, one module per topic.

mod cli;
mod serve;
mod support;
