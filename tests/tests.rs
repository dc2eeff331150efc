//! Integration tests: one binary, one module per topic.

mod cli;
mod offline;
mod serve;
mod support;
