//! The objective of the affine families: mean NLL of softmax(w ⊙ x + b) (vector scaling) or
//! softmax(W x + b) (matrix scaling on logits, Dirichlet calibration on ln p), plus the ODIR
//! penalty λ/(K(K−1)) Σ_{j≠k} W_jk² + μ/K Σ_k b_k², with analytic gradients (METHODS.md 2.2–2.4;
//! Guo et al. 2017, ICML; Kull et al. 2019, NeurIPS).
//!
//! Parameters are one flat vector: vector scaling `[w (K), b (K)]`, matrix scaling
//! `[W row-major (K·K), b (K)]`. Rows are summed in fixed chunks of [`CHUNK_ROWS`]; chunk sums are
//! added in chunk order, so the result is bit-identical for any number of threads (METHODS.md 2.5).

use std::ops::Range;

use pulp::{Arch, Simd, WithSimd};

use super::lbfgs::Smooth;
use crate::numeric::{softmax_in_place, Logit};

/// Rows per chunk of the objective's sum; the unit of work handed to threads.
pub(crate) const CHUNK_ROWS: usize = 2048;

/// Which affine family the parameters describe.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Shape {
    /// Per-class weight and bias: 2K parameters.
    Vector,
    /// Full K×K matrix and bias: K² + K parameters.
    Matrix,
}

impl Shape {
    /// Number of parameters for K classes.
    pub(crate) fn dimension(self, classes: usize) -> usize {
        match self {
            Shape::Vector => 2 * classes,
            Shape::Matrix => classes * classes + classes,
        }
    }

    /// The identity map: w = 1 or W = I, and b = 0 (METHODS.md 2.0).
    pub(crate) fn identity(self, classes: usize) -> Vec<f64> {
        let mut x = vec![0.0; self.dimension(classes)];
        match self {
            Shape::Vector => x[..classes].fill(1.0),
            Shape::Matrix => (0..classes).for_each(|k| x[k * classes + k] = 1.0),
        }
        x
    }

    /// Offset of the biases in the parameter vector.
    pub(crate) fn bias_offset(self, classes: usize) -> usize {
        self.dimension(classes) - classes
    }
}

/// ODIR strengths on the mean-NLL scale: λ on off-diagonal weights, μ on biases.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) struct Penalty {
    /// λ ≥ 0 (ignored by vector scaling, which has no off-diagonal weights).
    pub lambda: f64,
    /// μ ≥ 0.
    pub mu: f64,
}

/// Mean NLL + ODIR over n rows of K features with labels.
pub(crate) struct AffineObjective<'a, X> {
    features: &'a [X],
    labels: &'a [u32],
    classes: usize,
    shape: Shape,
    penalty: Penalty,
    /// Classes whose parameters stay at the identity (their gradient is zeroed).
    frozen: Vec<bool>,
    threads: usize,
    /// The instruction set the row loops are compiled for (see [`ChunkJob`]).
    arch: Arch,
}

/// One chunk's sums as a job for [`Arch::dispatch`]: compiled for the widest vector instructions
/// detected at run time (AVX-512, AVX2, x86-64 baseline), with the same result on each.
struct ChunkJob<'o, 'a, 'g, X> {
    objective: &'o AffineObjective<'a, X>,
    params: &'o [f64],
    rows: Range<usize>,
    gradient: Option<&'g mut [f64]>,
}

impl<X: Logit> WithSimd for ChunkJob<'_, '_, '_, X> {
    type Output = f64;

    #[inline(always)]
    fn with_simd<S: Simd>(self, _simd: S) -> f64 {
        self.objective
            .chunk_sum(self.params, self.rows, self.gradient)
    }
}

impl<'a, X: Logit> AffineObjective<'a, X> {
    /// `features` is row-major n×K with n = `labels.len()`; labels are < K (checked by the caller).
    pub(crate) fn new(
        features: &'a [X],
        labels: &'a [u32],
        classes: usize,
        shape: Shape,
        penalty: Penalty,
        frozen: Vec<bool>,
        threads: usize,
    ) -> Self {
        debug_assert_eq!(features.len(), labels.len() * classes);
        debug_assert_eq!(frozen.len(), classes);
        AffineObjective {
            features,
            labels,
            classes,
            shape,
            penalty,
            frozen,
            threads: threads.max(1),
            arch: Arch::new(),
        }
    }

    /// The same objective with its row loops compiled for `arch` (tests compare instruction sets).
    #[cfg(test)]
    pub(crate) fn with_arch(self, arch: Arch) -> Self {
        AffineObjective { arch, ..self }
    }

    /// Σ_i −ln q_{i,y_i} over all rows (no penalty, not divided by n).
    pub(crate) fn total_nll(&self, params: &[f64]) -> f64 {
        let (losses, _) = self.chunk_sums(params, false);
        losses.iter().sum()
    }

    /// Mean NLL (no penalty).
    pub(crate) fn mean_nll(&self, params: &[f64]) -> f64 {
        self.total_nll(params) / self.labels.len() as f64
    }

    /// The ODIR penalty at `params`; adds its gradient into `gradient` when given.
    pub(crate) fn penalty(&self, params: &[f64], mut gradient: Option<&mut [f64]>) -> f64 {
        let k = self.classes;
        let mut value = 0.0;
        if self.shape == Shape::Matrix && self.penalty.lambda > 0.0 {
            let c = self.penalty.lambda / (k * (k - 1)) as f64;
            for (idx, w) in params[..k * k].iter().enumerate() {
                if idx / k != idx % k {
                    value += c * w * w;
                    if let Some(g) = gradient.as_deref_mut() {
                        g[idx] += 2.0 * c * w;
                    }
                }
            }
        }
        if self.penalty.mu > 0.0 {
            let c = self.penalty.mu / k as f64;
            let offset = self.shape.bias_offset(k);
            for (j, b) in params[offset..].iter().enumerate() {
                value += c * b * b;
                if let Some(g) = gradient.as_deref_mut() {
                    g[offset + j] += 2.0 * c * b;
                }
            }
        }
        value
    }

    /// Per-chunk loss sums and (when asked) per-chunk gradient sums, chunk-major.
    fn chunk_sums(&self, params: &[f64], with_gradient: bool) -> (Vec<f64>, Vec<f64>) {
        let chunks = self.labels.len().div_ceil(CHUNK_ROWS);
        let p = if with_gradient { params.len() } else { 0 };
        let mut losses = vec![0.0; chunks];
        let mut gradients = vec![0.0; chunks * p];
        let per_thread = chunks.div_ceil(self.threads.min(chunks).max(1)).max(1);
        std::thread::scope(|scope| {
            let mut rest_losses = losses.as_mut_slice();
            let mut rest_gradients = gradients.as_mut_slice();
            let mut first = 0;
            while !rest_losses.is_empty() {
                let take = per_thread.min(rest_losses.len());
                let (l, lr) = std::mem::take(&mut rest_losses).split_at_mut(take);
                let (g, gr) = std::mem::take(&mut rest_gradients).split_at_mut(take * p);
                (rest_losses, rest_gradients) = (lr, gr);
                if rest_losses.is_empty() {
                    self.fill_chunks(params, first, l, g);
                } else {
                    scope.spawn(move || self.fill_chunks(params, first, l, g));
                }
                first += take;
            }
        });
        (losses, gradients)
    }

    /// Fills chunk sums for chunks `first..first + losses.len()`.
    fn fill_chunks(&self, params: &[f64], first: usize, losses: &mut [f64], gradients: &mut [f64]) {
        let p = gradients.len() / losses.len();
        let n = self.labels.len();
        for (c, loss) in losses.iter_mut().enumerate() {
            let start = (first + c) * CHUNK_ROWS;
            let rows = start..(start + CHUNK_ROWS).min(n);
            let g = (p > 0).then(|| &mut gradients[c * p..(c + 1) * p]);
            *loss = self.arch.dispatch(ChunkJob {
                objective: self,
                params,
                rows,
                gradient: g,
            });
        }
    }

    /// Σ over `rows` of −ln q_{i,y_i}; adds Σ ∂/∂θ into `gradient` when given. Inlined with all it
    /// calls, so all of it is compiled for the instruction set [`ChunkJob`] picks.
    #[inline(always)]
    fn chunk_sum(
        &self,
        params: &[f64],
        rows: Range<usize>,
        mut gradient: Option<&mut [f64]>,
    ) -> f64 {
        let k = self.classes;
        let mut x = vec![0.0; k];
        let mut u = vec![0.0; k];
        let mut loss = 0.0;
        for i in rows {
            let y = self.labels[i] as usize;
            for (xv, f) in x.iter_mut().zip(&self.features[i * k..(i + 1) * k]) {
                *xv = f.to_f64();
            }
            self.forward(params, &x, &mut u);
            let uy = u[y];
            loss += softmax_in_place(&mut u) - uy;
            if let Some(g) = gradient.as_deref_mut() {
                u[y] -= 1.0; // r = q − e_y
                self.accumulate(&x, &u, g);
            }
        }
        loss
    }

    /// u ← w ⊙ x + b or W x + b.
    #[inline(always)]
    fn forward(&self, params: &[f64], x: &[f64], u: &mut [f64]) {
        let k = self.classes;
        let b = &params[self.shape.bias_offset(k)..];
        match self.shape {
            Shape::Vector => {
                for (((u, w), x), b) in u.iter_mut().zip(&params[..k]).zip(x).zip(b) {
                    *u = w * x + b;
                }
            }
            Shape::Matrix => {
                for (j, (u, b)) in u.iter_mut().zip(b).enumerate() {
                    let row = &params[j * k..(j + 1) * k];
                    *u = b + row.iter().zip(x).map(|(w, x)| w * x).sum::<f64>();
                }
            }
        }
    }

    /// g_w += r ⊙ x (or g_W += r xᵀ) and g_b += r.
    #[inline(always)]
    fn accumulate(&self, x: &[f64], r: &[f64], g: &mut [f64]) {
        let k = self.classes;
        let (gw, gb) = g.split_at_mut(self.shape.bias_offset(k));
        match self.shape {
            Shape::Vector => {
                for ((g, r), x) in gw.iter_mut().zip(r).zip(x) {
                    *g += r * x;
                }
            }
            Shape::Matrix => {
                for (row, r) in gw.chunks_exact_mut(k).zip(r) {
                    row.iter_mut().zip(x).for_each(|(g, x)| *g += r * x);
                }
            }
        }
        gb.iter_mut().zip(r).for_each(|(g, r)| *g += r);
    }

    /// Zeroes the gradient of frozen classes' parameters.
    fn freeze(&self, g: &mut [f64]) {
        let k = self.classes;
        let offset = self.shape.bias_offset(k);
        for (c, _) in self.frozen.iter().enumerate().filter(|(_, f)| **f) {
            match self.shape {
                Shape::Vector => g[c] = 0.0,
                Shape::Matrix => g[c * k..(c + 1) * k].fill(0.0),
            }
            g[offset + c] = 0.0;
        }
    }
}

impl<X: Logit> Smooth for AffineObjective<'_, X> {
    fn dimension(&self) -> usize {
        self.shape.dimension(self.classes)
    }

    fn value_and_gradient(&self, params: &[f64], gradient: &mut [f64]) -> f64 {
        let p = params.len();
        let (losses, sums) = self.chunk_sums(params, true);
        let inv_n = 1.0 / self.labels.len() as f64;
        gradient.fill(0.0);
        for chunk in sums.chunks_exact(p) {
            gradient.iter_mut().zip(chunk).for_each(|(g, s)| *g += s);
        }
        gradient.iter_mut().for_each(|g| *g *= inv_n);
        let value = losses.iter().sum::<f64>() * inv_n + self.penalty(params, Some(gradient));
        self.freeze(gradient);
        value
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    /// Seeded rows of K features in [−3, 3] with labels, and random parameters near the identity.
    fn problem(n: usize, k: usize, shape: Shape, seed: u64) -> (Vec<f64>, Vec<u32>, Vec<f64>) {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let features = (0..n * k).map(|_| rng.random_range(-3.0..3.0)).collect();
        let labels = (0..n).map(|_| rng.random_range(0..k as u32)).collect();
        let mut params = shape.identity(k);
        params
            .iter_mut()
            .for_each(|p| *p += rng.random_range(-0.5..0.5));
        (features, labels, params)
    }

    /// Central differences with h = 1e−6 against the analytic gradient (METHODS.md 2.5: relative
    /// error < 1e−6, here as ‖a − d‖₂ / ‖d‖₂).
    fn check_gradient(objective: &AffineObjective<'_, f64>, params: &[f64]) {
        const H: f64 = 1e-6;
        let mut analytic = vec![0.0; params.len()];
        objective.value_and_gradient(params, &mut analytic);
        let mut scratch = vec![0.0; params.len()];
        let mut x = params.to_vec();
        let (mut err, mut norm) = (0.0f64, 0.0f64);
        for j in 0..params.len() {
            x[j] = params[j] + H;
            let up = objective.value_and_gradient(&x, &mut scratch);
            x[j] = params[j] - H;
            let down = objective.value_and_gradient(&x, &mut scratch);
            x[j] = params[j];
            let numeric = (up - down) / (2.0 * H);
            err += (analytic[j] - numeric).powi(2);
            norm += numeric.powi(2);
        }
        let rel = err.sqrt() / norm.sqrt();
        assert!(rel < 1e-6, "relative gradient error {rel}");
    }

    #[test]
    fn vector_gradient_matches_central_differences() {
        let (f, y, p) = problem(40, 4, Shape::Vector, 1);
        let penalty = Penalty {
            lambda: 0.0,
            mu: 0.0,
        };
        check_gradient(
            &AffineObjective::new(&f, &y, 4, Shape::Vector, penalty, vec![false; 4], 1),
            &p,
        );
        // With the bias penalty μ/K Σ b² (METHODS.md 2.4), as used for absent classes.
        let penalty = Penalty {
            lambda: 0.7,
            mu: 0.3,
        };
        check_gradient(
            &AffineObjective::new(&f, &y, 4, Shape::Vector, penalty, vec![false; 4], 1),
            &p,
        );
    }

    #[test]
    fn matrix_gradient_with_odir_matches_central_differences() {
        let (f, y, p) = problem(40, 3, Shape::Matrix, 2);
        for (lambda, mu) in [(0.0, 0.0), (0.8, 0.0), (0.0, 0.6), (2.0, 1.5)] {
            let penalty = Penalty { lambda, mu };
            let o = AffineObjective::new(&f, &y, 3, Shape::Matrix, penalty, vec![false; 3], 1);
            check_gradient(&o, &p);
        }
    }

    #[test]
    fn dirichlet_features_gradient_matches_central_differences() {
        // Dirichlet calibration is matrix scaling on x = ln p ≤ 0 (METHODS.md 2.4).
        let (z, y, p) = problem(30, 3, Shape::Matrix, 3);
        let mut x = Vec::new();
        for row in z.chunks_exact(3) {
            let mut r = row.to_vec();
            softmax_in_place(&mut r);
            x.extend(r.iter().map(|v| v.max(1e-12).ln()));
        }
        let penalty = Penalty {
            lambda: 1.0,
            mu: 0.5,
        };
        check_gradient(
            &AffineObjective::new(&x, &y, 3, Shape::Matrix, penalty, vec![false; 3], 1),
            &p,
        );
    }

    #[test]
    fn frozen_classes_have_zero_gradient() {
        let (f, y, p) = problem(20, 3, Shape::Matrix, 4);
        let penalty = Penalty {
            lambda: 0.5,
            mu: 0.5,
        };
        let o = AffineObjective::new(
            &f,
            &y,
            3,
            Shape::Matrix,
            penalty,
            vec![false, true, false],
            1,
        );
        let mut g = vec![0.0; p.len()];
        o.value_and_gradient(&p, &mut g);
        assert_eq!(&g[3..6], &[0.0; 3]);
        assert_eq!(g[9 + 1], 0.0);
        assert!(g[..3].iter().all(|v| *v != 0.0));
    }
}
