//! Fitting a method chosen by name, and choosing one automatically by cross-validated NLL
//! (METHODS.md 2.12: select by held-out NLL, ECE as tie-break; the candidate set by data size and
//! K is common practice, not from one source).

use super::affine::{fit_dirichlet, fit_matrix, fit_vector, AffineOptions, Regularisation};
use super::histogram::{BinPrior, BinStrategy, HistogramOptions};
use super::odir::{cross_validate_odir, OdirFamily, OdirSearch};
use super::ovr::{fit_one_vs_rest, BetaFit, IsotonicFit, PlattFit};
use super::split::{stratified_folds, take_rows};
use super::temperature::{self, Rows};
use super::{bbq::BbqOptions, FitDiagnostics, FitError};
use crate::eval::{ece, EqualWidthBins, Predictions};
use crate::method::{InputForm, Method, Workspace};
use crate::numeric::Logit;
use serde::Serialize;

/// Folds of the cross-validation behind `auto`.
pub const AUTO_FOLDS: usize = 5;
/// NLL differences below this count as ties, broken by ECE.
pub const NLL_TIE: f64 = 1e-4;
/// Rows needed before the non-parametric binary methods (isotonic, histogram, BBQ) are candidates
/// per calibrated class (common practice: thousands of items per calibrated quantity, METHODS.md
/// 2.12; we use 500 positives-or-negatives as the floor).
pub const NONPARAMETRIC_MIN_ROWS_PER_CLASS: usize = 500;
/// Rows per parameter needed before matrix / Dirichlet scaling are candidates.
pub const AFFINE_ROWS_PER_PARAMETER: usize = 20;

/// How an ODIR strength is chosen.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Strength {
    /// λ = μ = this value.
    Fixed(f64),
    /// By K-fold cross-validation over the default grid.
    CrossValidated,
}

/// A method with its fit options.
#[derive(Debug, Clone, PartialEq)]
pub enum MethodChoice {
    /// Temperature scaling.
    Temperature,
    /// Vector scaling.
    Vector,
    /// Matrix scaling with ODIR.
    Matrix(Strength),
    /// Dirichlet calibration with ODIR.
    Dirichlet(Strength),
    /// Platt scaling (one-vs-rest for K ≥ 3).
    Platt,
    /// Beta calibration (one-vs-rest for K ≥ 3).
    Beta,
    /// Histogram binning (one-vs-rest for K ≥ 3).
    Histogram(HistogramOptions),
    /// Isotonic regression (one-vs-rest for K ≥ 3).
    Isotonic,
    /// Bayesian binning into quantiles (one-vs-rest for K ≥ 3).
    Bbq,
}

impl MethodChoice {
    /// The map-file kind this choice produces.
    pub fn kind(&self) -> &'static str {
        match self {
            MethodChoice::Temperature => "temperature",
            MethodChoice::Vector => "vector",
            MethodChoice::Matrix(_) => "matrix",
            MethodChoice::Dirichlet(_) => "dirichlet",
            MethodChoice::Platt => "platt",
            MethodChoice::Beta => "beta",
            MethodChoice::Histogram(_) => "histogram",
            MethodChoice::Isotonic => "isotonic",
            MethodChoice::Bbq => "bbq",
        }
    }
}

/// Default histogram options: 15 equal-mass bins with Laplace smoothing.
pub const DEFAULT_HISTOGRAM: HistogramOptions = HistogramOptions {
    bins: 15,
    strategy: BinStrategy::EqualMass,
    prior: BinPrior::Laplace,
};

/// A fitted method and what the fit reported.
#[derive(Debug, Clone)]
pub struct Fitted {
    /// The validated method.
    pub method: Method,
    /// One entry per fitted map (one, or one per class for one-vs-rest).
    pub diagnostics: Vec<FitDiagnostics>,
    /// The ODIR strength used, for matrix and Dirichlet.
    pub strength: Option<f64>,
}

/// Expands the binary-score form (one value f per row) to the pair (0, f).
fn pairs<L: Logit>(values: &[L]) -> Vec<f64> {
    values.iter().flat_map(|v| [0.0, v.to_f64()]).collect()
}

/// Fits `choice` on row-major `logits` with `columns` values per row (1 = binary score).
///
/// # Errors
/// The chosen fit's [`FitError`].
pub fn fit_choice<L: Logit>(
    choice: &MethodChoice,
    logits: &[L],
    columns: usize,
    labels: &[u32],
    seed: u64,
) -> Result<Fitted, FitError> {
    fit_choice_with(choice, logits, columns, labels, None, seed)
}

/// [`fit_choice`] by a weighted objective: row i counts w_i times (METHODS.md 4.2; labels
/// gathered with probability π_i are weighted 1/π_i). Temperature scaling and the one-vs-rest
/// methods take weights.
///
/// # Errors
/// As [`fit_choice`]; [`FitError::BadOption`] for bad weights, or for vector, matrix or
/// Dirichlet scaling, which do not take weights.
pub fn fit_choice_weighted<L: Logit>(
    choice: &MethodChoice,
    logits: &[L],
    columns: usize,
    labels: &[u32],
    weights: &[f64],
    seed: u64,
) -> Result<Fitted, FitError> {
    temperature::check_weights(weights, labels.len())?;
    if matches!(
        choice,
        MethodChoice::Vector | MethodChoice::Matrix(_) | MethodChoice::Dirichlet(_)
    ) {
        return Err(FitError::BadOption {
            name: "method",
            value: choice.kind().into(),
            reason: "vector, matrix and Dirichlet scaling do not take weights; use temperature or a one-vs-rest method".into(),
        });
    }
    fit_choice_with(choice, logits, columns, labels, Some(weights), seed)
}

fn fit_choice_with<L: Logit>(
    choice: &MethodChoice,
    logits: &[L],
    columns: usize,
    labels: &[u32],
    weights: Option<&[f64]>,
    seed: u64,
) -> Result<Fitted, FitError> {
    let classes = columns.max(2);
    let one = |(method, d): (Method, FitDiagnostics)| Fitted {
        method,
        diagnostics: vec![d],
        strength: None,
    };
    if columns == 1
        && matches!(
            choice,
            MethodChoice::Vector | MethodChoice::Matrix(_) | MethodChoice::Dirichlet(_)
        )
    {
        return fit_choice(choice, &pairs(logits), 2, labels, seed);
    }
    let affine = AffineOptions::default();
    Ok(match choice {
        MethodChoice::Temperature => {
            let rows = Rows::try_new(logits, columns)?;
            let (t, d) = match weights {
                None => temperature::fit(&rows, labels)?,
                Some(w) => temperature::fit_weighted(&rows, labels, w, Default::default())?,
            };
            one((Method::Temperature(t), d))
        }
        MethodChoice::Vector => {
            let (v, d) = fit_vector(logits, classes, labels, affine)?;
            one((Method::Vector(v), d))
        }
        MethodChoice::Matrix(Strength::CrossValidated)
        | MethodChoice::Dirichlet(Strength::CrossValidated) => {
            let fixed = fix_strength(choice.clone(), logits, columns, labels, seed)?;
            return fit_choice(&fixed, logits, columns, labels, seed);
        }
        MethodChoice::Matrix(Strength::Fixed(strength))
        | MethodChoice::Dirichlet(Strength::Fixed(strength)) => {
            let (strength, dirichlet) = (*strength, matches!(choice, MethodChoice::Dirichlet(_)));
            let reg = Regularisation::odir(strength);
            let (method, d) = if dirichlet {
                let eps = super::affine::DIRICHLET_EPSILON;
                let (m, d) = fit_dirichlet(logits, classes, labels, reg, eps, affine)?;
                (Method::Dirichlet(m), d)
            } else {
                let (m, d) = fit_matrix(logits, classes, labels, reg, affine)?;
                (Method::Matrix(m), d)
            };
            Fitted {
                method,
                diagnostics: vec![d],
                strength: Some(strength),
            }
        }
        MethodChoice::Platt => ovr(
            fit_one_vs_rest(&PlattFit, logits, columns, labels, weights)?,
            Method::Platt,
        ),
        MethodChoice::Beta => ovr(
            fit_one_vs_rest(&BetaFit, logits, columns, labels, weights)?,
            Method::Beta,
        ),
        MethodChoice::Isotonic => ovr(
            fit_one_vs_rest(&IsotonicFit, logits, columns, labels, weights)?,
            Method::Isotonic,
        ),
        MethodChoice::Histogram(o) => ovr(
            fit_one_vs_rest(o, logits, columns, labels, weights)?,
            Method::Histogram,
        ),
        MethodChoice::Bbq => ovr(
            fit_one_vs_rest(&BbqOptions::default(), logits, columns, labels, weights)?,
            Method::Bbq,
        ),
    })
}

fn ovr<M>(fitted: (M, Vec<FitDiagnostics>), wrap: impl FnOnce(M) -> Method) -> Fitted {
    Fitted {
        method: wrap(fitted.0),
        diagnostics: fitted.1,
        strength: None,
    }
}

/// The candidates `auto` compares for n rows and K classes.
pub fn candidates(labels: &[u32], classes: usize) -> Vec<MethodChoice> {
    let n = labels.len();
    let mut out = vec![MethodChoice::Temperature];
    let mut counts = vec![0usize; classes];
    labels.iter().for_each(|&y| counts[y as usize] += 1);
    let smallest = counts.iter().copied().min().unwrap_or(0);
    if n >= AFFINE_ROWS_PER_PARAMETER * 2 * classes {
        out.push(MethodChoice::Vector);
    }
    if classes >= 3 && n >= AFFINE_ROWS_PER_PARAMETER * classes * (classes + 1) {
        out.push(MethodChoice::Matrix(Strength::CrossValidated));
        out.push(MethodChoice::Dirichlet(Strength::CrossValidated));
    }
    if classes == 2 {
        out.push(MethodChoice::Platt);
        out.push(MethodChoice::Beta);
    }
    let per_class = if classes == 2 {
        smallest
    } else {
        smallest.min(n - smallest)
    };
    if per_class >= NONPARAMETRIC_MIN_ROWS_PER_CLASS {
        out.push(MethodChoice::Isotonic);
        out.push(MethodChoice::Histogram(DEFAULT_HISTOGRAM));
        out.push(MethodChoice::Bbq);
    }
    out
}

/// One candidate's cross-validated score.
#[derive(Debug, Clone, Serialize)]
pub struct CandidateScore {
    /// Map-file kind.
    pub method: &'static str,
    /// Mean held-out NLL over all rows (probabilities clipped at f64::EPSILON).
    pub nll: Option<f64>,
    /// Held-out top-label ECE (15 bins) over all rows.
    pub ece: Option<f64>,
    /// Why the candidate could not be scored, if it failed.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub error: Option<String>,
}

/// Held-out (NLL, ECE) of `choice` by `folds`-fold cross-validation.
///
/// # Errors
/// The candidate's fit errors on any fold.
pub fn cross_validate<L: Logit>(
    choice: &MethodChoice,
    logits: &[L],
    columns: usize,
    labels: &[u32],
    folds: usize,
    seed: u64,
) -> Result<(f64, f64), FitError> {
    let classes = columns.max(2);
    let fold_of = stratified_folds(labels, classes, folds, seed);
    let mut probs = vec![0.0; labels.len() * classes];
    let form = if columns == 1 {
        InputForm::BinaryScore
    } else {
        InputForm::Logits
    };
    let mut ws = Workspace::new();
    for fold in 0..folds {
        let (train, test): (Vec<usize>, Vec<usize>) =
            (0..labels.len()).partition(|&i| fold_of[i] != fold);
        let y: Vec<u32> = train.iter().map(|&i| labels[i]).collect();
        let fitted = fit_choice(
            choice,
            &take_rows(logits, columns, &train),
            columns,
            &y,
            seed,
        )?;
        for &i in &test {
            let q = ws.apply(
                &fitted.method,
                form,
                classes,
                &logits[i * columns..(i + 1) * columns],
            );
            probs[i * classes..(i + 1) * classes].copy_from_slice(q);
        }
    }
    let nll = labels
        .iter()
        .enumerate()
        .map(|(i, &y)| {
            -probs[i * classes + y as usize]
                .clamp(f64::EPSILON, 1.0 - f64::EPSILON)
                .ln()
        })
        .sum::<f64>()
        / labels.len() as f64;
    let p = Predictions::try_new(&probs, classes, labels).map_err(|e| FitError::NotApplicable {
        method: choice.kind(),
        reason: e.to_string(),
    })?;
    Ok((nll, ece(&p, &EqualWidthBins::default())))
}

/// Replaces a cross-validated ODIR strength by the value the search picks on all rows.
fn fix_strength<L: Logit>(
    choice: MethodChoice,
    logits: &[L],
    columns: usize,
    labels: &[u32],
    seed: u64,
) -> Result<MethodChoice, FitError> {
    let dirichlet = match choice {
        MethodChoice::Matrix(Strength::CrossValidated) => false,
        MethodChoice::Dirichlet(Strength::CrossValidated) => true,
        other => return Ok(other),
    };
    let family = if dirichlet {
        OdirFamily::Dirichlet {
            epsilon: super::affine::DIRICHLET_EPSILON,
        }
    } else {
        OdirFamily::Matrix
    };
    let search = OdirSearch::new(family, seed);
    let s = cross_validate_odir(
        logits,
        columns.max(2),
        labels,
        &search,
        AffineOptions::default(),
    )?
    .strength;
    Ok(if dirichlet {
        MethodChoice::Dirichlet(Strength::Fixed(s))
    } else {
        MethodChoice::Matrix(Strength::Fixed(s))
    })
}

/// Scores every candidate and returns the best (lowest NLL; within [`NLL_TIE`], lowest ECE).
///
/// # Errors
/// [`FitError::NotApplicable`] when no candidate could be scored.
pub fn choose<L: Logit>(
    logits: &[L],
    columns: usize,
    labels: &[u32],
    seed: u64,
) -> Result<(MethodChoice, Vec<CandidateScore>), FitError> {
    let classes = columns.max(2);
    let mut scores = Vec::new();
    let mut best: Option<(MethodChoice, f64, f64)> = None;
    for choice in candidates(labels, classes) {
        // ODIR strength: chosen once on all rows, then held fixed inside the outer folds (a
        // nested search would cost folds × grid × folds fits for little change in the ranking).
        let choice = match fix_strength(choice, logits, columns, labels, seed) {
            Ok(c) => c,
            Err(e) => {
                scores.push(CandidateScore {
                    method: "matrix/dirichlet",
                    nll: None,
                    ece: None,
                    error: Some(e.to_string()),
                });
                continue;
            }
        };
        match cross_validate(&choice, logits, columns, labels, AUTO_FOLDS, seed) {
            Ok((nll, ece)) => {
                scores.push(CandidateScore {
                    method: choice.kind(),
                    nll: Some(nll),
                    ece: Some(ece),
                    error: None,
                });
                let better = match &best {
                    None => true,
                    Some((_, b_nll, b_ece)) => {
                        nll < b_nll - NLL_TIE || ((nll - b_nll).abs() <= NLL_TIE && ece < *b_ece)
                    }
                };
                if better {
                    best = Some((choice, nll, ece));
                }
            }
            Err(e) => scores.push(CandidateScore {
                method: choice.kind(),
                nll: None,
                ece: None,
                error: Some(e.to_string()),
            }),
        }
    }
    match best {
        Some((choice, _, _)) => Ok((choice, scores)),
        None => Err(FitError::NotApplicable {
            method: "auto",
            reason: "no candidate method could be fitted".into(),
        }),
    }
}
