//! Choosing the ODIR strength λ = μ for matrix scaling or Dirichlet calibration by seeded,
//! stratified K-fold cross-validation over a log grid, minimising held-out NLL (Kull et al. 2019,
//! NeurIPS, tuned by cross-validation; METHODS.md 2.4, common practice).

use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

use super::affine::{
    check_epsilon, check_options, check_rows, dirichlet_features, fit_features, AffineOptions,
    Regularisation,
};
use super::affine_objective::{AffineObjective, Penalty, Shape};
use super::FitError;
use crate::numeric::Logit;

/// The log grid of METHODS.md 2.4: 1e−4, 1e−3, …, 1e2.
pub const DEFAULT_GRID: [f64; 7] = [1e-4, 1e-3, 1e-2, 1e-1, 1.0, 1e1, 1e2];
/// Default number of folds.
pub const DEFAULT_FOLDS: usize = 5;

/// Which ODIR-regularised family is being tuned.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum OdirFamily {
    /// Matrix scaling on logits (METHODS.md 2.3).
    Matrix,
    /// Dirichlet calibration on ln max(softmax(z), ε) (METHODS.md 2.4).
    Dirichlet {
        /// Clamp ε ∈ (0, 1) before the logarithm.
        epsilon: f64,
    },
}

/// What to search and how to split.
#[derive(Debug, Clone, PartialEq)]
pub struct OdirSearch {
    /// The family to tune.
    pub family: OdirFamily,
    /// Candidate strengths λ = μ (finite, ≥ 0, at least one).
    pub grid: Vec<f64>,
    /// Number of folds (2 ≤ folds ≤ n).
    pub folds: usize,
    /// Seed of the fold assignment (ChaCha8).
    pub seed: u64,
}

impl OdirSearch {
    /// The default grid and fold count for `family`, with `seed`.
    pub fn new(family: OdirFamily, seed: u64) -> Self {
        OdirSearch {
            family,
            grid: DEFAULT_GRID.to_vec(),
            folds: DEFAULT_FOLDS,
            seed,
        }
    }
}

/// Held-out score of one grid point.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct OdirScore {
    /// λ = μ.
    pub strength: f64,
    /// Held-out NLL summed over all folds' held-out rows, divided by n.
    pub held_out_nll: f64,
}

/// The chosen strength and every grid point's score, in grid order.
#[derive(Debug, Clone, PartialEq)]
pub struct OdirSelection {
    /// The strength with the smallest held-out NLL (ties: the larger strength).
    pub strength: f64,
    /// One score per grid point.
    pub scores: Vec<OdirScore>,
}

/// Selects λ = μ for `search.family` by K-fold cross-validation on row-major n×K `logits`.
///
/// # Errors
/// The input errors of [`crate::fit::affine::fit_matrix`]; [`FitError::BadOption`] for an empty
/// or invalid grid, fewer than 2 folds or a bad ε; [`FitError::TooFewRows`] when n < folds.
pub fn cross_validate_odir<L: Logit>(
    logits: &[L],
    classes: usize,
    labels: &[u32],
    search: &OdirSearch,
    options: AffineOptions,
) -> Result<OdirSelection, FitError> {
    check_rows(logits, classes, labels)?;
    check_search(search, labels.len())?;
    for &s in &search.grid {
        check_options(options, Regularisation::odir(s))?;
    }
    let features = match search.family {
        OdirFamily::Matrix => logits.iter().map(|v| v.to_f64()).collect(),
        OdirFamily::Dirichlet { epsilon } => dirichlet_features(logits, classes, epsilon),
    };
    let fold_of = stratified_folds(labels, classes, search.folds, search.seed);
    let mut totals = vec![0.0; search.grid.len()];
    for fold in 0..search.folds {
        let (train, test) = split(&features, labels, classes, &fold_of, fold);
        for (total, &s) in totals.iter_mut().zip(&search.grid) {
            let reg = Regularisation::odir(s);
            let fit = fit_features(&train.0, classes, &train.1, Shape::Matrix, reg, options);
            let none = Penalty {
                lambda: 0.0,
                mu: 0.0,
            };
            let held_out = AffineObjective::new(
                &test.0,
                &test.1,
                classes,
                Shape::Matrix,
                none,
                vec![false; classes],
                options.threads,
            );
            *total += held_out.total_nll(&fit.params);
        }
    }
    let n = labels.len() as f64;
    let scores: Vec<OdirScore> = search
        .grid
        .iter()
        .zip(&totals)
        .map(|(&strength, &t)| OdirScore {
            strength,
            held_out_nll: t / n,
        })
        .collect();
    let best = scores
        .iter()
        .copied()
        .reduce(|a, b| match b.held_out_nll.total_cmp(&a.held_out_nll) {
            std::cmp::Ordering::Less => b,
            std::cmp::Ordering::Equal if b.strength > a.strength => b,
            _ => a,
        })
        .map_or(0.0, |s| s.strength);
    Ok(OdirSelection {
        strength: best,
        scores,
    })
}

fn check_search(search: &OdirSearch, rows: usize) -> Result<(), FitError> {
    let bad = |name, value: String, reason: &str| FitError::BadOption {
        name,
        value,
        reason: reason.to_string(),
    };
    if search.grid.is_empty() {
        return Err(bad("grid", "[]".into(), "needs at least one strength"));
    }
    if let OdirFamily::Dirichlet { epsilon } = search.family {
        check_epsilon(epsilon)?;
    }
    if search.folds < 2 {
        return Err(bad("folds", search.folds.to_string(), "must be at least 2"));
    }
    if rows < search.folds {
        return Err(FitError::TooFewRows {
            method: "ODIR cross-validation",
            needed: search.folds,
            got: rows,
        });
    }
    Ok(())
}

/// Fold of every row: each class's rows are shuffled (one ChaCha8 stream, classes in order) and
/// dealt round-robin, continuing the deal across classes so fold sizes differ by at most one.
fn stratified_folds(labels: &[u32], classes: usize, folds: usize, seed: u64) -> Vec<usize> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut by_class: Vec<Vec<usize>> = vec![Vec::new(); classes];
    for (i, &y) in labels.iter().enumerate() {
        by_class[y as usize].push(i);
    }
    let mut fold_of = vec![0; labels.len()];
    let mut next = 0;
    for rows in &mut by_class {
        rows.shuffle(&mut rng);
        for &i in rows.iter() {
            fold_of[i] = next % folds;
            next += 1;
        }
    }
    fold_of
}

type Part = (Vec<f64>, Vec<u32>);

/// (training part, held-out part) for `fold`, rows in their original order.
fn split(
    features: &[f64],
    labels: &[u32],
    k: usize,
    fold_of: &[usize],
    fold: usize,
) -> (Part, Part) {
    let (mut train, mut test): (Part, Part) = Default::default();
    for (i, (&f, &y)) in fold_of.iter().zip(labels).enumerate() {
        let part = if f == fold { &mut test } else { &mut train };
        part.0.extend_from_slice(&features[i * k..(i + 1) * k]);
        part.1.push(y);
    }
    (train, test)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::fit::affine::fit_matrix;
    use rand::Rng;

    /// Seeded logits with a weak signal: K = 4, noise dominates, so an unregularised
    /// 20-parameter matrix overfits 80 rows.
    fn data(n: usize, seed: u64) -> (Vec<f64>, Vec<u32>) {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let labels: Vec<u32> = (0..n).map(|_| rng.random_range(0..4)).collect();
        let mut z = Vec::with_capacity(4 * n);
        for &y in &labels {
            z.extend((0..4).map(|c| 2.0 * rng.random_range(-1.0..1.0) + f64::from(c == y)));
        }
        (z, labels)
    }

    #[test]
    fn folds_are_stratified_and_balanced() {
        let labels: Vec<u32> = (0..53).map(|i| [0, 0, 1, 2, 2, 2][i % 6]).collect();
        let fold_of = stratified_folds(&labels, 3, 5, 9);
        for class in 0..3u32 {
            let per_fold: Vec<usize> = (0..5)
                .map(|f| {
                    (0..53)
                        .filter(|&i| labels[i] == class && fold_of[i] == f)
                        .count()
                })
                .collect();
            let (lo, hi) = (
                per_fold.iter().min().unwrap(),
                per_fold.iter().max().unwrap(),
            );
            assert!(hi - lo <= 1, "class {class}: {per_fold:?}");
        }
        let sizes: Vec<usize> = (0..5)
            .map(|f| fold_of.iter().filter(|&&x| x == f).count())
            .collect();
        assert!(
            sizes.iter().max().unwrap() - sizes.iter().min().unwrap() <= 1,
            "{sizes:?}"
        );
        assert_eq!(fold_of, stratified_folds(&labels, 3, 5, 9));
    }

    #[test]
    fn scores_are_held_out_nll_of_fold_fits() {
        // Each score must equal Σ_folds Σ_held-out −ln q_y / n with q from the public fit
        // (METHODS.md 2.4 recipe), recomputed here through the map's probabilities.
        let (z, y) = data(60, 21);
        let search = OdirSearch {
            family: OdirFamily::Matrix,
            grid: vec![1e-2, 1.0],
            folds: 3,
            seed: 4,
        };
        let o = AffineOptions::default();
        let selection = cross_validate_odir(&z, 4, &y, &search, o).unwrap();
        let fold_of = stratified_folds(&y, 4, 3, 4);
        for score in &selection.scores {
            let mut total = 0.0;
            for fold in 0..3 {
                let ((tz, ty), (hz, hy)) = split(&z, &y, 4, &fold_of, fold);
                let (map, _) =
                    fit_matrix(&tz, 4, &ty, Regularisation::odir(score.strength), o).unwrap();
                for (row, &label) in hz.chunks_exact(4).zip(&hy) {
                    let mut q = row.to_vec();
                    map.apply_in_place(&mut q, &mut Vec::new());
                    total -= q[label as usize].ln();
                }
            }
            let want = total / 60.0;
            assert!(
                (score.held_out_nll - want).abs() < 1e-12 * want,
                "{score:?} vs {want}"
            );
        }
    }

    #[test]
    fn selection_prefers_regularisation_when_matrix_scaling_overfits() {
        // METHODS.md 2.3: unregularised matrix scaling overfits; the tiniest strength must lose.
        let (z, y) = data(80, 22);
        let search = OdirSearch {
            grid: vec![1e-4, 1.0, 100.0],
            ..OdirSearch::new(OdirFamily::Matrix, 5)
        };
        let s = cross_validate_odir(&z, 4, &y, &search, AffineOptions::default()).unwrap();
        assert_eq!(s.scores.len(), 3);
        assert!(s.strength > 1e-4, "{s:?}");
        let best = s
            .scores
            .iter()
            .map(|x| x.held_out_nll)
            .fold(f64::INFINITY, f64::min);
        assert!(s
            .scores
            .iter()
            .any(|x| x.strength == s.strength && x.held_out_nll == best));
        let dirichlet = OdirSearch {
            family: OdirFamily::Dirichlet { epsilon: 1e-12 },
            ..search
        };
        let d = cross_validate_odir(&z, 4, &y, &dirichlet, AffineOptions::default()).unwrap();
        assert!(d.scores.iter().all(|x| x.held_out_nll.is_finite()));
    }

    #[test]
    fn bad_searches_are_named() {
        let (z, y) = data(8, 23);
        let o = AffineOptions::default();
        let mut search = OdirSearch::new(OdirFamily::Matrix, 1);
        search.folds = 1;
        let err = cross_validate_odir(&z, 4, &y, &search, o).unwrap_err();
        assert!(
            matches!(err, FitError::BadOption { name: "folds", .. }),
            "{err}"
        );
        search.folds = 9;
        let err = cross_validate_odir(&z, 4, &y, &search, o).unwrap_err();
        assert_eq!(
            err,
            FitError::TooFewRows {
                method: "ODIR cross-validation",
                needed: 9,
                got: 8
            }
        );
        search.folds = 2;
        search.grid = vec![];
        let err = cross_validate_odir(&z, 4, &y, &search, o).unwrap_err();
        assert!(
            matches!(err, FitError::BadOption { name: "grid", .. }),
            "{err}"
        );
        search.grid = vec![f64::NAN];
        let err = cross_validate_odir(&z, 4, &y, &search, o).unwrap_err();
        assert!(
            matches!(err, FitError::BadOption { name: "lambda", .. }),
            "{err}"
        );
    }
}
