//! Decisions: the serving-time accept-or-defer rule and the evidence behind a threshold.

pub mod certify;
pub mod policy;
pub mod stratified;

pub use policy::{Decision, DecisionPolicy, Evidence};
