//! Integration tests: one binary, one module per topic.

mod cli;
mod config;
mod conformance;
mod deploy;
mod fuzz_corpus;
mod journal;
mod limits;
mod live;
mod loadgen;
mod offline;
mod report;
mod rollout;
mod rollout_load;
mod serve;
mod support;
mod telemetry;
mod tls;
