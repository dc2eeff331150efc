//! L-BFGS minimisation for the affine fits, following the optimiser recipe of METHODS.md 2.5: the
//! limited-memory BFGS two-loop recursion (Nocedal 1980, Mathematics of Computation 35; Liu &
//! Nocedal 1989, Mathematical Programming 45) with a backtracking Armijo line search (c1 = 1e−4,
//! step halved) and the stopping rule ‖∇L‖_∞ ≤ 1e−8 or a relative decrease below 1e−14 for 3
//! consecutive iterations.
//!
//! Safeguards of common practice: a curvature pair with sᵀy ≤ ε_mach·yᵀy is not stored (scipy's
//! L-BFGS-B applies the same test), a direction that is not a descent direction is replaced by
//! steepest descent, and the line search gives up after [`MAX_BACKTRACKS`] halvings. Only steps
//! that pass the Armijo test are taken, so the result is never worse than the start.

use std::collections::VecDeque;

/// Number of (s, y) pairs kept (METHODS.md 2.5: 10–20).
pub(crate) const HISTORY: usize = 10;
/// Armijo sufficient-decrease constant c1 (METHODS.md 2.5).
pub(crate) const ARMIJO_C1: f64 = 1e-4;
/// Factor applied to the step after a failed Armijo test: halve it (METHODS.md 2.5).
pub(crate) const BACKTRACK_FACTOR: f64 = 0.5;
/// Halvings before a line search gives up: 2^−60 ≈ 1e−18 is below any useful relative step.
pub(crate) const MAX_BACKTRACKS: u32 = 60;
/// Stop when the largest gradient component is at most this (mean-NLL scale, METHODS.md 2.5).
pub(crate) const GRADIENT_TOLERANCE: f64 = 1e-8;
/// A relative decrease of the objective below this counts as a stalled iteration (METHODS.md 2.5).
pub(crate) const RELATIVE_DECREASE_TOLERANCE: f64 = 1e-14;
/// Consecutive stalled iterations that end the run as converged (METHODS.md 2.5).
pub(crate) const STALLED_ITERATIONS: u32 = 3;

/// A smooth objective with an analytic gradient.
pub(crate) trait Smooth {
    /// Number of parameters.
    fn dimension(&self) -> usize;
    /// The objective at `x`; writes ∇ at `x` into `gradient` (length [`Smooth::dimension`]).
    fn value_and_gradient(&self, x: &[f64], gradient: &mut [f64]) -> f64;
}

/// Where a minimisation ended.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct Minimum {
    /// The last accepted point (never worse than the start).
    pub x: Vec<f64>,
    /// Objective at `x`.
    pub value: f64,
    /// ‖∇‖_∞ at `x`.
    pub gradient_norm: f64,
    /// Accepted L-BFGS steps.
    pub iterations: u32,
    /// True when the stopping rule of METHODS.md 2.5 was met.
    pub converged: bool,
    /// Why the run ended when it did not converge.
    pub note: Option<String>,
}

/// Largest absolute component (NaN if any component is NaN; 0 for an empty slice).
pub(crate) fn max_abs(v: &[f64]) -> f64 {
    v.iter().fold(
        0.0,
        |m: f64, x| if x.is_nan() { f64::NAN } else { m.max(x.abs()) },
    )
}

fn dot(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| x * y).sum()
}

/// The current point of a run.
struct Point {
    x: Vec<f64>,
    value: f64,
    gradient: Vec<f64>,
}

/// Curvature pairs (s, y, 1/sᵀy), oldest first.
type Memory = VecDeque<(Vec<f64>, Vec<f64>, f64)>;

/// Minimises `objective` from `start` with at most `max_iterations` L-BFGS steps.
pub(crate) fn minimise<O: Smooth>(objective: &O, start: Vec<f64>, max_iterations: u32) -> Minimum {
    let mut gradient = vec![0.0; objective.dimension()];
    let value = objective.value_and_gradient(&start, &mut gradient);
    let mut here = Point {
        x: start,
        value,
        gradient,
    };
    let mut memory = Memory::with_capacity(HISTORY);
    let (mut iterations, mut stalled) = (0u32, 0u32);
    let outcome = loop {
        let norm = max_abs(&here.gradient);
        if norm <= GRADIENT_TOLERANCE {
            break Ok(());
        }
        if !(norm.is_finite() && here.value.is_finite()) {
            break Err(format!("non-finite objective {} or gradient", here.value));
        }
        if iterations >= max_iterations {
            break Err(format!(
                "iteration cap {max_iterations} reached before convergence"
            ));
        }
        let Some(next) = step(objective, &here, &mut memory) else {
            break Err("line search found no decrease along steepest descent".to_string());
        };
        let decrease = (here.value - next.value) / here.value.abs().max(f64::MIN_POSITIVE);
        stalled = if decrease < RELATIVE_DECREASE_TOLERANCE {
            stalled + 1
        } else {
            0
        };
        remember(&mut memory, &here, &next);
        here = next;
        iterations += 1;
        if stalled >= STALLED_ITERATIONS {
            break Ok(());
        }
    };
    Minimum {
        gradient_norm: max_abs(&here.gradient),
        x: here.x,
        value: here.value,
        iterations,
        converged: outcome.is_ok(),
        note: outcome.err(),
    }
}

/// One accepted step along the L-BFGS direction, or steepest descent when that fails.
fn step<O: Smooth>(objective: &O, here: &Point, memory: &mut Memory) -> Option<Point> {
    if !memory.is_empty() {
        let d = direction(&here.gradient, memory);
        if let Some(next) = line_search(objective, here, &d, 1.0) {
            return Some(next);
        }
        memory.clear();
    }
    let d: Vec<f64> = here.gradient.iter().map(|g| -g).collect();
    // First or restarted step: a unit step along −g scaled to move no component by more than 1.
    let first = 1.0 / max_abs(&here.gradient).max(1.0);
    line_search(objective, here, &d, first)
}

/// −H∇ by the two-loop recursion, with H₀ = (sᵀy / yᵀy) I from the newest pair.
fn direction(gradient: &[f64], memory: &Memory) -> Vec<f64> {
    let mut q = gradient.to_vec();
    let mut alphas = Vec::with_capacity(memory.len());
    for (s, y, rho) in memory.iter().rev() {
        let a = rho * dot(s, &q);
        q.iter_mut().zip(y).for_each(|(q, y)| *q -= a * y);
        alphas.push(a);
    }
    if let Some((s, y, _)) = memory.back() {
        let gamma = dot(s, y) / dot(y, y);
        q.iter_mut().for_each(|q| *q *= gamma);
    }
    for ((s, y, rho), a) in memory.iter().zip(alphas.iter().rev()) {
        let b = rho * dot(y, &q);
        q.iter_mut().zip(s).for_each(|(q, s)| *q += (a - b) * s);
    }
    q.iter_mut().for_each(|q| *q = -*q);
    q
}

/// Backtracking from step `alpha`: the first point with f ≤ f₀ + c1·α·∇f₀ᵀd, if any.
fn line_search<O: Smooth>(objective: &O, here: &Point, d: &[f64], mut alpha: f64) -> Option<Point> {
    let slope = dot(&here.gradient, d);
    if slope.is_nan() || slope >= 0.0 {
        return None;
    }
    let mut x = vec![0.0; d.len()];
    let mut gradient = vec![0.0; d.len()];
    for _ in 0..=MAX_BACKTRACKS {
        x.iter_mut()
            .zip(&here.x)
            .zip(d)
            .for_each(|((x, x0), d)| *x = x0 + alpha * d);
        let value = objective.value_and_gradient(&x, &mut gradient);
        if value <= here.value + ARMIJO_C1 * alpha * slope {
            return Some(Point { x, value, gradient });
        }
        alpha *= BACKTRACK_FACTOR;
    }
    None
}

/// Stores the pair (s, y) of an accepted step when sᵀy > ε_mach·yᵀy.
fn remember(memory: &mut Memory, from: &Point, to: &Point) {
    let s: Vec<f64> = to.x.iter().zip(&from.x).map(|(a, b)| a - b).collect();
    let y: Vec<f64> = to
        .gradient
        .iter()
        .zip(&from.gradient)
        .map(|(a, b)| a - b)
        .collect();
    let (sy, yy) = (dot(&s, &y), dot(&y, &y));
    if sy > f64::EPSILON * yy && sy.is_finite() {
        if memory.len() == HISTORY {
            memory.pop_front();
        }
        memory.push_back((s, y, 1.0 / sy));
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// f(x) = Σ_i c_i (x_i − i)², a separable quadratic with minimum 0 at x_i = i.
    struct Bowl(Vec<f64>);

    impl Smooth for Bowl {
        fn dimension(&self) -> usize {
            self.0.len()
        }
        fn value_and_gradient(&self, x: &[f64], g: &mut [f64]) -> f64 {
            let mut f = 0.0;
            for (i, (c, (xi, gi))) in self.0.iter().zip(x.iter().zip(g.iter_mut())).enumerate() {
                let d = xi - i as f64;
                f += c * d * d;
                *gi = 2.0 * c * d;
            }
            f
        }
    }

    /// Rosenbrock's function (1 − a)² + 100 (b − a²)², minimum 0 at (1, 1) (textbook).
    struct Rosenbrock;

    impl Smooth for Rosenbrock {
        fn dimension(&self) -> usize {
            2
        }
        fn value_and_gradient(&self, x: &[f64], g: &mut [f64]) -> f64 {
            let (a, b) = (x[0], x[1]);
            g[0] = -2.0 * (1.0 - a) - 400.0 * a * (b - a * a);
            g[1] = 200.0 * (b - a * a);
            (1.0 - a).powi(2) + 100.0 * (b - a * a).powi(2)
        }
    }

    #[test]
    fn quadratic_reaches_the_gradient_tolerance() {
        // Closed form: the minimiser is x_i = i.
        let bowl = Bowl(vec![1.0, 10.0, 0.1, 3.0]);
        let m = minimise(&bowl, vec![0.0; 4], 1000);
        assert!(m.converged, "{m:?}");
        assert!(m.gradient_norm <= GRADIENT_TOLERANCE);
        for (i, xi) in m.x.iter().enumerate() {
            assert!((xi - i as f64).abs() < 1e-8, "x[{i}] = {xi}");
        }
    }

    #[test]
    fn rosenbrock_from_the_textbook_start() {
        // Textbook start (−1.2, 1); minimiser (1, 1) (Rosenbrock 1960).
        let m = minimise(&Rosenbrock, vec![-1.2, 1.0], 10_000);
        assert!(m.converged, "{m:?}");
        assert!(
            (m.x[0] - 1.0).abs() < 1e-6 && (m.x[1] - 1.0).abs() < 1e-6,
            "{m:?}"
        );
    }

    #[test]
    fn iteration_cap_is_reported_and_never_worse_than_the_start() {
        let start = vec![-1.2, 1.0];
        let m = minimise(&Rosenbrock, start.clone(), 2);
        assert!(!m.converged);
        assert_eq!(m.iterations, 2);
        assert!(m.note.as_deref().is_some_and(|n| n.contains("cap 2")));
        let mut g = [0.0; 2];
        assert!(m.value <= Rosenbrock.value_and_gradient(&start, &mut g));
    }

    #[test]
    fn a_stationary_start_stops_at_once() {
        let bowl = Bowl(vec![1.0, 1.0]);
        let m = minimise(&bowl, vec![0.0, 1.0], 100);
        assert!(m.converged);
        assert_eq!(m.iterations, 0);
        assert_eq!(m.value, 0.0);
    }
}
