//! candor: recalibrate a classifier's confidences and decide accept-or-defer.
//!
//! Module map:
//! - [`numeric`] — lse, softmax, sigmoid and friends (pure).
//! - [`method`] — each recalibration method's validated parameters and how it is applied (pure).
//! - [`fit`] — fitting maps from held-out logits and labels (pure).
//! - [`decision`] — certified acceptance thresholds, the accept-or-defer rule and the evidence
//!   behind a threshold (pure).
//! - [`stats`] — lnΓ, incomplete beta, binomial tails, Clopper–Pearson bounds (pure).
//! - [`eval`] — calibration quality: ECE and friends, NLL, Brier, AURC, bootstrap, drift (pure).
//! - [`dataset`] — reading labelled logits from .npy, CSV and JSON Lines; writing probabilities.
//! - [`mapfile`] — the map file: reading with every problem named, writing sealed with a digest.
//! - [`journal`] — the decision log: recent decisions joined to outcomes, and the rotated journal.
//! - [`registry`] — the live maps as immutable snapshots swapped whole: the map store, its
//!   watcher, versions, canary, shadow, and decision counters.
//! - [`service`] — the gRPC handlers (data plane and admin plane) and the one mapping of errors
//!   to status codes.
//! - [`server`] — running the sidecar: data plane, admin plane, health, reflection, graceful
//!   shutdown.
//! - [`telemetry`] — request counters and latency histogram; Prometheus exposition, `/ready`,
//!   `/live`.
//! - [`proto`] — generated protobuf code.
//! - [`report`] — the reviewer's HTML report: charts, tables and the policy evidence (pure).
//! - [`demo`] — the demo scenario and its deterministic data generator.
//! - [`loadgen`] — the closed-loop load generator behind `candor bench`.
//! - [`cli`] — the `candor` command line.
//! - [`heap`] — giving freed memory back to the system after maps are read (the crate's one
//!   `unsafe` call, glibc's `malloc_trim`).
#![deny(unsafe_code)]

pub mod cli;
pub mod dataset;
pub mod decision;
pub mod demo;
pub mod eval;
pub mod fit;
pub mod heap;
pub mod journal;
pub mod live;
pub mod loadgen;
pub mod mapfile;
pub mod method;
pub mod numeric;
pub mod proto;
pub mod registry;
pub mod report;
pub mod server;
pub mod service;
pub mod stats;
pub mod telemetry;
pub mod tls;
