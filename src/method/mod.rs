//! Recalibration maps: the parameters of each method and how a map turns one row of logits into
//! calibrated probabilities (METHODS.md section 2).
//!
//! Every method works in place on a [`Workspace`]: the row's logits are widened to f64 into
//! `Workspace::z`, the method overwrites them with probabilities, and nothing is allocated once the
//! workspace has grown to the largest K seen. Fitting lives in `crate::fit`; this module only holds
//! what serving needs.

mod affine;
mod bbq;
mod beta;
mod histogram;
mod isotonic;
mod knot_table;
mod one_vs_rest;
mod platt;
mod problem;
mod temperature;

pub use affine::{Dirichlet, MatrixScaling, VectorScaling};
pub use bbq::{Bbq, BbqModel, WEIGHT_SUM_TOLERANCE};
pub use beta::BetaCalibration;
pub use histogram::{bin_index, Histogram};
pub use isotonic::Isotonic;
pub use knot_table::{KnotTable, BLOCK as KNOT_BLOCK, FENCE_BLOCKS_MAX};
pub use one_vs_rest::{BinaryMap, OneVsRest, ScoreKind};
pub use platt::Platt;
pub use problem::{Problem, Problems};
pub use temperature::Temperature;

use crate::numeric::{softmax_in_place, Logit};
use pulp::{Arch, Simd, WithSimd};

/// A recalibration method with validated parameters for a fixed number of classes.
#[derive(Debug, Clone, PartialEq)]
pub enum Method {
    /// Plain softmax of the logits: no recalibration (the uncalibrated baseline).
    Identity,
    /// softmax(z / T), METHODS.md 2.1.
    Temperature(Temperature),
    /// softmax(w ⊙ z + b), METHODS.md 2.2.
    Vector(VectorScaling),
    /// softmax(W z + b), METHODS.md 2.3.
    Matrix(MatrixScaling),
    /// softmax(W ln clamp(softmax(z)) + b), METHODS.md 2.4.
    Dirichlet(Dirichlet),
    /// Platt scaling on log-odds, one-vs-rest for K ≥ 3, METHODS.md 2.6 and 2.11.
    Platt(OneVsRest<Platt>),
    /// Histogram binning on probabilities, METHODS.md 2.7 and 2.11.
    Histogram(OneVsRest<Histogram>),
    /// Isotonic regression on probabilities, METHODS.md 2.8 and 2.11.
    Isotonic(OneVsRest<Isotonic>),
    /// Bayesian binning into quantiles, METHODS.md 2.9 and 2.11.
    Bbq(OneVsRest<Bbq>),
    /// Beta calibration on probabilities, METHODS.md 2.10 and 2.11.
    Beta(OneVsRest<BetaCalibration>),
}

impl Method {
    /// The method's name as written in a map file's `method.kind`.
    pub fn kind(&self) -> &'static str {
        match self {
            Method::Identity => "identity",
            Method::Temperature(_) => "temperature",
            Method::Vector(_) => "vector",
            Method::Matrix(_) => "matrix",
            Method::Dirichlet(_) => "dirichlet",
            Method::Platt(_) => "platt",
            Method::Histogram(_) => "histogram",
            Method::Isotonic(_) => "isotonic",
            Method::Bbq(_) => "bbq",
            Method::Beta(_) => "beta",
        }
    }

    /// Overwrites `z` (one row of K logits, finite or ±∞, never NaN) with calibrated
    /// probabilities. `scratch` is grown as needed and holds no state between calls.
    #[inline(always)]
    pub fn apply_in_place(&self, z: &mut [f64], scratch: &mut Vec<f64>) {
        match self {
            Method::Identity => {
                softmax_in_place(z);
            }
            Method::Temperature(m) => m.apply_in_place(z),
            Method::Vector(m) => m.apply_in_place(z),
            Method::Matrix(m) => m.apply_in_place(z, scratch),
            Method::Dirichlet(m) => m.apply_in_place(z, scratch),
            Method::Platt(m) => m.apply_in_place(z, scratch),
            Method::Histogram(m) => m.apply_in_place(z, scratch),
            Method::Isotonic(m) => m.apply_in_place(z, scratch),
            Method::Bbq(m) => m.apply_in_place(z, scratch),
            Method::Beta(m) => m.apply_in_place(z, scratch),
        }
    }
}

/// How a request's numbers are read (METHODS.md 0.3).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum InputForm {
    /// K logits, one per class.
    Logits,
    /// K = 2 only: one log-odds score f for class 1, read as the logit pair (0, f).
    BinaryScore,
}

impl InputForm {
    /// Number of values a request must carry for a map with `classes` classes.
    pub fn input_len(self, classes: usize) -> usize {
        match self {
            InputForm::Logits => classes,
            InputForm::BinaryScore => 1,
        }
    }

    /// Name as written in a map file.
    pub fn name(self) -> &'static str {
        match self {
            InputForm::Logits => "logits",
            InputForm::BinaryScore => "binary_score",
        }
    }
}

/// Reusable buffers for applying maps without allocating per row.
#[derive(Debug, Default, Clone)]
pub struct Workspace {
    z: Vec<f64>,
    scratch: Vec<f64>,
    /// The vector instruction set the apply is compiled for, detected once (see [`ApplyJob`]).
    arch: Arch,
}

/// One row's apply as a job for [`Arch::dispatch`], which runs it compiled for the widest vector
/// instructions the processor has (AVX-512, AVX2 or the x86-64 baseline). The softmax's exp loop
/// then runs 4 or 8 lanes wide instead of 2. Results do not depend on the choice: every
/// reduction's order is fixed by the code and Rust never fuses a multiply and an add (tested).
struct ApplyJob<'a> {
    method: &'a Method,
    z: &'a mut [f64],
    scratch: &'a mut Vec<f64>,
}

impl WithSimd for ApplyJob<'_> {
    type Output = ();

    #[inline(always)]
    fn with_simd<S: Simd>(self, _simd: S) {
        self.method.apply_in_place(self.z, self.scratch);
    }
}

/// The argmax of an applied row and, when asked, the row narrowed to f32, as a job for
/// [`Arch::dispatch`] like [`ApplyJob`].
struct FinishJob<'a> {
    q: &'a [f64],
    out: Option<&'a mut Vec<f32>>,
}

impl WithSimd for FinishJob<'_> {
    type Output = usize;

    #[inline(always)]
    fn with_simd<S: Simd>(self, _simd: S) -> usize {
        if let Some(out) = self.out {
            out.clear();
            out.resize(self.q.len(), 0.0);
            // A plain loop (see numeric::softmax_scaled_in_place on closures).
            for (o, &v) in out.iter_mut().zip(self.q) {
                *o = v as f32;
            }
        }
        crate::numeric::argmax(self.q)
    }
}

impl Workspace {
    /// The class of the largest probability of the row last returned by [`Workspace::apply`]
    /// (the first on ties), and with `out`, that row narrowed to f32 into `out` (cleared first;
    /// its capacity is reused). Compiled for the widest vector instructions, as the apply is.
    pub fn argmax_narrowed(&self, out: Option<&mut Vec<f32>>) -> usize {
        self.arch.dispatch(FinishJob { q: &self.z, out })
    }

    /// The row last returned by [`Workspace::apply`].
    pub fn row(&self) -> &[f64] {
        &self.z
    }

    /// An empty workspace; it grows to the largest K it is used with.
    pub fn new() -> Self {
        Self::default()
    }

    /// A workspace that applies maps compiled for `arch` (tests compare instruction sets).
    #[cfg(test)]
    fn with_arch(arch: Arch) -> Self {
        Workspace {
            arch,
            ..Self::default()
        }
    }

    /// Calibrates one row: widens `input` to f64 in the given form, applies `method` and returns
    /// the K calibrated probabilities. The caller has checked `input.len()` against the form and
    /// rejected NaN.
    pub fn apply<L: Logit>(
        &mut self,
        method: &Method,
        form: InputForm,
        classes: usize,
        input: &[L],
    ) -> &[f64] {
        self.z.clear();
        match form {
            InputForm::Logits => self.z.extend(input.iter().map(|v| v.to_f64())),
            InputForm::BinaryScore => {
                debug_assert_eq!(classes, 2);
                self.z.push(0.0);
                self.z.push(input[0].to_f64());
            }
        }
        debug_assert_eq!(self.z.len(), classes);
        self.arch.dispatch(ApplyJob {
            method,
            z: &mut self.z,
            scratch: &mut self.scratch,
        });
        &self.z
    }
}

#[cfg(test)]
#[path = "workspace_tests.rs"]
mod tests;
