//! Fitting recalibration maps from held-out logits and labels (METHODS.md section 2).
//!
//! Each method's fit returns the validated parameters of `crate::method` plus [`FitDiagnostics`].
//! Objectives are mean NLL (METHODS.md 2.0) unless a method's source defines another.

pub mod affine;
mod affine_objective;
#[cfg(test)]
mod affine_properties;
#[cfg(test)]
mod affine_reference;
pub mod bbq;
pub mod beta;
mod error;
pub mod histogram;
pub mod isotonic;
mod lbfgs;
pub mod odir;
pub mod ovr;
pub mod platt;
pub mod prior_shift;
pub mod select;
pub mod split;
pub mod temperature;
mod temperature_pass;

pub use error::FitError;

use serde::{Deserialize, Serialize};

/// How a fit ended, recorded in the map's provenance.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct FitDiagnostics {
    /// Optimiser iterations used (0 for closed-form fits).
    pub iterations: u32,
    /// True when the stopping rule was met (closed-form fits: true).
    pub converged: bool,
    /// Final gradient norm (max-abs) on the objective's scale, when there is a gradient.
    pub gradient_norm: Option<f64>,
    /// Objective (e.g. mean NLL) at the identity map, when the method has one.
    pub objective_start: Option<f64>,
    /// Objective at the fitted parameters.
    pub objective_end: Option<f64>,
    /// Notes a reviewer should see, e.g. "parameter on its bound: T = e^10".
    pub flags: Vec<String>,
}

/// Checks labels against K and returns the per-class counts.
///
/// # Errors
/// [`FitError::Empty`], [`FitError::LabelOutOfRange`].
pub fn class_counts(labels: &[u32], classes: usize) -> Result<Vec<usize>, FitError> {
    if labels.is_empty() {
        return Err(FitError::Empty);
    }
    let mut counts = vec![0usize; classes];
    for (row, &y) in labels.iter().enumerate() {
        match counts.get_mut(y as usize) {
            Some(c) => *c += 1,
            None => {
                return Err(FitError::LabelOutOfRange {
                    row,
                    label: y,
                    classes,
                })
            }
        }
    }
    Ok(counts)
}
