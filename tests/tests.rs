//! Integration tests: one binary, one module per topic.

mod cli;
mod conformance;
mod loadgen;
mod offline;
mod report;
mod serve;
mod support;
