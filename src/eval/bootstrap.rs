//! Seeded percentile bootstrap (Efron 1979; Efron & Tibshirani 1993; METHODS.md 1.9).
//!
//! Replicate r draws n indices uniformly with replacement from its own ChaCha8 stream
//! (rand_chacha 0.9: `ChaCha8Rng::seed_from_u64(seed)` with `set_stream(r)`), through
//! `rand::distr::Uniform` (Lemire's multiply-and-reject, no modulo bias). Each replicate depends
//! only on (seed, r), so results do not depend on the thread count. Intervals use numpy's
//! default 'linear' quantile rule. Injected index matrices (e.g. from numpy) bypass the RNG.

use super::EvalError;
use rand::distr::{Distribution, Uniform};
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

/// Replicates R used when none is given (METHODS.md 1.9: R ≥ 1000).
pub const DEFAULT_REPLICATES: usize = 1000;

/// Interval level used when none is given.
pub const DEFAULT_LEVEL: f64 = 0.95;

/// RNG named in reports next to every interval.
pub const RNG_NAME: &str = "ChaCha8Rng (rand_chacha 0.9), seed_from_u64(seed), stream = replicate";

/// Validated bootstrap settings: replicates R ≥ 1, level in (0, 1), seed, worker threads.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct BootstrapConfig {
    replicates: usize,
    level: f64,
    seed: u64,
    threads: usize,
}

impl BootstrapConfig {
    /// R replicates, a two-sided interval of the given level (e.g. 0.95) and a seed; one thread.
    ///
    /// # Errors
    /// [`EvalError::Setting`] if `replicates` is 0 or `level` is not strictly between 0 and 1.
    pub fn try_new(replicates: usize, level: f64, seed: u64) -> Result<Self, EvalError> {
        if replicates == 0 {
            return Err(EvalError::Setting {
                what: "bootstrap replicates",
                value: 0.0,
                rule: "must be at least 1",
            });
        }
        check_level(level)?;
        Ok(Self {
            replicates,
            level,
            seed,
            threads: 1,
        })
    }

    /// The same settings run on `threads` worker threads (0 is taken as 1); results do not
    /// change with the thread count.
    pub fn with_threads(self, threads: usize) -> Self {
        Self {
            threads: threads.max(1),
            ..self
        }
    }

    /// Number of replicates R.
    pub fn replicates(&self) -> usize {
        self.replicates
    }

    /// Interval level, in (0, 1).
    pub fn level(&self) -> f64 {
        self.level
    }

    /// Seed of the replicate streams.
    pub fn seed(&self) -> u64 {
        self.seed
    }

    /// Number of worker threads (at least 1).
    pub fn threads(&self) -> usize {
        self.threads
    }
}

/// Rejects a level outside (0, 1).
pub(crate) fn check_level(level: f64) -> Result<(), EvalError> {
    if !(level > 0.0 && level < 1.0) {
        return Err(EvalError::Setting {
            what: "interval level",
            value: level,
            rule: "must be strictly between 0 and 1",
        });
    }
    Ok(())
}

/// Fills `out` with the n indices of replicate `replicate` drawn from stream (seed, replicate);
/// `out` is left empty if n = 0.
pub fn resample_indices(n: usize, seed: u64, replicate: u64, out: &mut Vec<usize>) {
    out.clear();
    for_each_index(n, seed, replicate, |i| out.push(i));
}

/// Calls `f` with each of the n indices of replicate `replicate`, in draw order (nothing if
/// n = 0).
pub(crate) fn for_each_index(n: usize, seed: u64, replicate: u64, mut f: impl FnMut(usize)) {
    let Ok(uniform) = Uniform::new(0, n) else {
        return;
    };
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    rng.set_stream(replicate);
    for _ in 0..n {
        f(uniform.sample(&mut rng));
    }
}

/// A validated R×n matrix of resampling indices (row-major), each below n.
#[derive(Debug, Clone, PartialEq)]
pub struct IndexMatrix {
    n: usize,
    indices: Vec<usize>,
}

impl IndexMatrix {
    /// Wraps `indices` (R rows of n indices, row-major) for a data set of n items.
    ///
    /// # Errors
    /// [`EvalError::Empty`] if n = 0 or there is no row; [`EvalError::Length`] if the length is
    /// not a multiple of n; [`EvalError::IndexOutOfRange`] for an index ≥ n.
    pub fn try_new(n: usize, indices: Vec<usize>) -> Result<Self, EvalError> {
        if n == 0 || indices.is_empty() {
            return Err(EvalError::Empty {
                what: "bootstrap index matrix",
            });
        }
        if !indices.len().is_multiple_of(n) {
            let expected = indices.len().div_ceil(n) * n;
            return Err(EvalError::Length {
                what: "bootstrap index matrix",
                expected,
                got: indices.len(),
            });
        }
        if let Some(at) = indices.iter().position(|&i| i >= n) {
            let (replicate, position) = (at / n, at % n);
            return Err(EvalError::IndexOutOfRange {
                replicate,
                position,
                index: indices[at],
                n,
            });
        }
        Ok(Self { n, indices })
    }

    /// Number of items n.
    pub fn n(&self) -> usize {
        self.n
    }

    /// Number of replicates R.
    pub fn replicates(&self) -> usize {
        self.indices.len() / self.n
    }

    /// The n indices of replicate r (panics if r ≥ R, an internal index).
    pub fn row(&self, r: usize) -> &[usize] {
        &self.indices[r * self.n..(r + 1) * self.n]
    }
}

/// Metric values of the replicates where the metric was defined, in replicate order, and the
/// number of replicates skipped because it was not (`None` or NaN).
#[derive(Debug, Clone, PartialEq)]
pub struct Replicates {
    /// θ*_r of the defined replicates.
    pub values: Vec<f64>,
    /// Replicates where the metric was undefined.
    pub skipped: usize,
}

impl Replicates {
    /// Collects per-replicate results, counting `None` and NaN as skipped.
    fn from_results(results: Vec<Option<f64>>) -> Self {
        let total = results.len();
        let values: Vec<f64> = results
            .into_iter()
            .flatten()
            .filter(|v| !v.is_nan())
            .collect();
        Self {
            skipped: total - values.len(),
            values,
        }
    }

    /// Percentile interval at `level`; `None` if every replicate was skipped.
    ///
    /// # Errors
    /// [`EvalError::Setting`] if `level` is not strictly between 0 and 1.
    pub fn interval(&self, level: f64) -> Result<Option<(f64, f64)>, EvalError> {
        percentile_interval(&self.values, level)
    }

    /// Sample standard deviation (ddof = 1) of the values: the bootstrap standard error;
    /// `None` with fewer than two values.
    pub fn standard_error(&self) -> Option<f64> {
        let m = self.values.len();
        if m < 2 {
            return None;
        }
        let mean = self.values.iter().sum::<f64>() / m as f64;
        let ss: f64 = self.values.iter().map(|v| (v - mean) * (v - mean)).sum();
        Some((ss / (m - 1) as f64).sqrt())
    }
}

/// Quantile of sorted values by numpy's default 'linear' rule (Hyndman–Fan type 7): virtual
/// index h = (len − 1)·q, interpolated between floor(h) and floor(h) + 1 the way numpy's
/// `_lerp` does. `None` for an empty slice; `q` is clamped to [0, 1].
pub fn quantile_linear(sorted: &[f64], q: f64) -> Option<f64> {
    let last = sorted.len().checked_sub(1)?;
    let h = last as f64 * q.clamp(0.0, 1.0);
    if h >= last as f64 {
        return Some(sorted[last]);
    }
    let lo = h.floor();
    let gamma = h - lo;
    let (a, b) = (sorted[lo as usize], sorted[lo as usize + 1]);
    let diff = b - a;
    Some(if gamma >= 0.5 {
        b - diff * (1.0 - gamma)
    } else {
        a + diff * gamma
    })
}

/// Percentile interval [Q((1 − level)/2), Q((1 + level)/2)] of unsorted values; `None` if empty.
///
/// # Errors
/// [`EvalError::Setting`] if `level` is not strictly between 0 and 1.
pub fn percentile_interval(values: &[f64], level: f64) -> Result<Option<(f64, f64)>, EvalError> {
    check_level(level)?;
    let mut sorted = values.to_vec();
    sorted.sort_by(f64::total_cmp);
    let low = quantile_linear(&sorted, (1.0 - level) / 2.0);
    let high = quantile_linear(&sorted, (1.0 + level) / 2.0);
    Ok(low.zip(high))
}

/// Runs `work(state, r)` for r in 0..count on up to `threads` scoped threads, each with its own
/// `init()` state; results come back in replicate order whatever the thread count.
pub(crate) fn run_parallel<T, S, I, F>(
    count: usize,
    threads: usize,
    init: I,
    work: F,
) -> Result<Vec<T>, EvalError>
where
    T: Send,
    I: Fn() -> S + Sync,
    F: Fn(&mut S, usize) -> T + Sync,
{
    let threads = threads.clamp(1, count.max(1));
    if threads == 1 {
        let mut state = init();
        return Ok((0..count).map(|r| work(&mut state, r)).collect());
    }
    let chunk = count.div_ceil(threads);
    let (init, work) = (&init, &work);
    std::thread::scope(|scope| {
        let mut handles = Vec::with_capacity(threads);
        for t in 0..threads {
            let range = (t * chunk).min(count)..((t + 1) * chunk).min(count);
            let handle = std::thread::Builder::new()
                .spawn_scoped(scope, move || {
                    let mut state = init();
                    range.map(|r| work(&mut state, r)).collect::<Vec<T>>()
                })
                .map_err(|e| EvalError::Thread {
                    reason: e.to_string(),
                })?;
            handles.push(handle);
        }
        let mut out = Vec::with_capacity(count);
        for handle in handles {
            match handle.join() {
                Ok(part) => out.extend(part),
                Err(payload) => std::panic::resume_unwind(payload),
            }
        }
        Ok(out)
    })
}

/// Bootstraps any metric: `metric(indices)` gets the n resampled indices of one replicate (in
/// draw order) and returns `None` where the metric is undefined (skipped and counted).
///
/// # Errors
/// [`EvalError::Empty`] if n = 0; [`EvalError::Thread`] if a worker cannot start.
pub fn bootstrap<F>(n: usize, config: &BootstrapConfig, metric: F) -> Result<Replicates, EvalError>
where
    F: Fn(&[usize]) -> Option<f64> + Sync,
{
    if n == 0 {
        return Err(EvalError::Empty {
            what: "bootstrap data",
        });
    }
    let results = run_parallel(config.replicates, config.threads, Vec::new, |idx, r| {
        resample_indices(n, config.seed, r as u64, idx);
        metric(idx)
    })?;
    Ok(Replicates::from_results(results))
}

/// Bootstraps any metric over injected resampling indices (one replicate per row).
pub fn bootstrap_with_indices<F>(indices: &IndexMatrix, metric: F) -> Replicates
where
    F: Fn(&[usize]) -> Option<f64>,
{
    let results = (0..indices.replicates())
        .map(|r| metric(indices.row(r)))
        .collect();
    Replicates::from_results(results)
}

#[cfg(test)]
#[path = "bootstrap_tests.rs"]
mod tests;
