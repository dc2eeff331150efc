//! The passes over the rows that the temperature fit makes (METHODS.md 2.1): L, L′ and L″ at one
//! β in a single pass, and a first pass that adds what the fit needs once (L′(0), whether every
//! row is constant, mean |z|).
//!
//! Per row, e^{β(z_k − m)} (m the row maximum) is computed once by
//! [`exp_nonpositive`] into a row buffer, giving s = Σ_k e_k and the shifted mean
//! μ = Σ_k e_k (z_k − m) / s; a second sweep over the same row (still in cache) gives the variance
//! Σ_k e_k (z_k − m − μ)² / s by the two-pass formula. Then ln s − β(z_y − m), μ − (z_y − m) and
//! the variance are the row's terms of L, L′ and L″.
//!
//! Rows are summed in fixed chunks of about [`CHUNK_VALUES`] values; chunk sums are added in chunk
//! order, so every result is bit-identical for any number of threads. Each chunk runs compiled for
//! the widest vector instructions the processor has ([`ChunkJob`]).

use std::ops::Range;

use pulp::{Arch, Simd, WithSimd};

use super::temperature::Rows;
use crate::numeric::{exp_nonpositive, Logit};

/// Values per chunk of a pass: the unit of work handed to a thread.
pub(crate) const CHUNK_VALUES: usize = 1 << 16;

/// Independent accumulators per row sum, so the loops vectorise; reduced in a fixed order.
const LANES: usize = 8;

/// Sums over rows of the terms of L(β), L′(β) and L″(β) (divide by n for the means).
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub(crate) struct Terms {
    /// Σ_i lse(β z_i) − β z_{i,y_i}.
    pub loss: f64,
    /// Σ_i E_i − z_{i,y_i}.
    pub grad: f64,
    /// Σ_i V_i.
    pub curv: f64,
}

impl Terms {
    fn add(&mut self, other: &Terms) {
        self.loss += other.loss;
        self.grad += other.grad;
        self.curv += other.curv;
    }
}

/// What the first pass learns besides the terms at β = 1.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub(crate) struct Survey {
    /// Σ_i (mean_k z_ik − z_{i,y_i}) = n · L′(0).
    pub grad_at_zero: f64,
    /// Σ |v| over the stored values (for the gradient tolerance's scale).
    pub abs_sum: f64,
    /// True when some row is not constant across classes.
    pub varying: bool,
}

impl Survey {
    fn add(&mut self, other: &Survey) {
        self.grad_at_zero += other.grad_at_zero;
        self.abs_sum += other.abs_sum;
        self.varying |= other.varying;
    }
}

/// The rows, labels and thread count every pass shares.
pub(crate) struct Passes<'r, 'a, L> {
    pub rows: &'r Rows<'a, L>,
    pub labels: &'r [u32],
    /// Per-row weights (the weighted NLL Σ w_i·ℓ_i / Σ w_i); `None`: every row 1.
    pub weights: Option<&'r [f64]>,
    /// Σ w_i (the row count without weights).
    pub total_weight: f64,
    pub threads: usize,
    /// The instruction set the row loops are compiled for (see [`ChunkJob`]).
    pub arch: Arch,
}

/// Means (L, L′, L″) at one β.
#[derive(Debug, Clone, Copy)]
pub(crate) struct Point {
    pub beta: f64,
    pub loss: f64,
    pub grad: f64,
    pub curv: f64,
}

/// Evaluates L, L′, L″ and remembers the last few points, so a β the algorithm revisits (β = 1
/// as start, first bracket end and first Newton point; the final Newton point) costs no pass.
pub(crate) struct Objective<'p, 'r, 'a, L> {
    passes: &'p Passes<'r, 'a, L>,
    recent: Vec<Point>,
}

/// Points kept by [`Objective`]: the bracket ends and the current Newton point.
const REMEMBERED_POINTS: usize = 3;

impl<'p, 'r, 'a, L: Logit> Objective<'p, 'r, 'a, L> {
    /// An evaluator that remembers nothing yet.
    pub(crate) fn new(passes: &'p Passes<'r, 'a, L>) -> Self {
        Objective {
            passes,
            recent: Vec::with_capacity(REMEMBERED_POINTS),
        }
    }

    /// (L, L′, L″) at `beta`, from memory when it was evaluated lately.
    pub(crate) fn point(&mut self, beta: f64) -> Point {
        if let Some(p) = self.recent.iter().find(|p| p.beta == beta) {
            return *p;
        }
        let t = self.passes.terms(beta);
        self.remember(beta, t)
    }

    /// Stores sums found by a pass (for example [`Passes::first`]) as the point at `beta`.
    pub(crate) fn remember(&mut self, beta: f64, t: Terms) -> Point {
        let n = self.passes.total_weight;
        let p = Point {
            beta,
            loss: t.loss / n,
            grad: t.grad / n,
            curv: t.curv / n,
        };
        if self.recent.len() == REMEMBERED_POINTS {
            self.recent.remove(0);
        }
        self.recent.push(p);
        p
    }
}

/// One chunk's sums as a job for [`Arch::dispatch`], which runs it compiled for the widest
/// vector instructions the processor has (AVX-512, AVX2 or the x86-64 baseline), detected at run
/// time. The results do not depend on which: the lanes and their order are fixed by the code, and
/// Rust never fuses a multiply and an add.
struct ChunkJob<'p, 'r, 'a, L> {
    passes: &'p Passes<'r, 'a, L>,
    range: Range<usize>,
    beta: f64,
    survey: bool,
}

impl<L: Logit> WithSimd for ChunkJob<'_, '_, '_, L> {
    type Output = (Terms, Survey);

    #[inline(always)]
    fn with_simd<S: Simd>(self, _simd: S) -> Self::Output {
        self.passes.chunk(self.range, self.beta, self.survey)
    }
}

impl<L: Logit> Passes<'_, '_, L> {
    /// Σ of the terms at `beta` (β ≥ 0).
    pub(crate) fn terms(&self, beta: f64) -> Terms {
        let mut total = Terms::default();
        for (t, _) in self.map_chunks(|range| self.dispatch(range, beta, false)) {
            total.add(&t);
        }
        total
    }

    /// Σ of the terms at β = 1 and the [`Survey`], in one pass.
    pub(crate) fn first(&self) -> (Terms, Survey) {
        let (mut terms, mut survey) = (Terms::default(), Survey::default());
        for (t, s) in self.map_chunks(|range| self.dispatch(range, 1.0, true)) {
            terms.add(&t);
            survey.add(&s);
        }
        (terms, survey)
    }

    fn dispatch(&self, range: Range<usize>, beta: f64, survey: bool) -> (Terms, Survey) {
        self.arch.dispatch(ChunkJob {
            passes: self,
            range,
            beta,
            survey,
        })
    }

    /// Sums over the rows of `range`; the survey only when asked. Everything it calls is
    /// `#[inline(always)]` (and no closures), so it is all compiled for the instruction set
    /// [`ChunkJob`] picks.
    #[inline(always)]
    fn chunk(&self, range: Range<usize>, beta: f64, survey: bool) -> (Terms, Survey) {
        let width = self.rows.width();
        let values = self.rows.values();
        let mut buf = vec![0.0; self.rows.classes()];
        let (mut terms, mut s) = (Terms::default(), Survey::default());
        for i in range {
            let y = self.labels[i] as usize;
            let row = &values[i * width..(i + 1) * width];
            let (t, r) = if width == 1 {
                // The pair (0, f) (METHODS.md 0.3); its Σ|v| is |f|, the stored value's.
                let pair = [0.0, row[0].to_f64()];
                let r = if survey {
                    Some(row_survey(&pair, y))
                } else {
                    None
                };
                (row_terms(&pair, y, beta, &mut buf), r)
            } else {
                let r = if survey {
                    Some(row_survey(row, y))
                } else {
                    None
                };
                (row_terms(row, y, beta, &mut buf), r)
            };
            match self.weights {
                None => {
                    terms.add(&t);
                    if let Some(r) = r {
                        s.add(&r);
                    }
                }
                Some(w) => {
                    let w = w[i];
                    terms.add(&Terms {
                        loss: w * t.loss,
                        grad: w * t.grad,
                        curv: w * t.curv,
                    });
                    if let Some(mut r) = r {
                        r.grad_at_zero *= w;
                        s.add(&r);
                    }
                }
            }
        }
        (terms, s)
    }

    /// Runs `chunk` on consecutive ranges of whole rows (about [`CHUNK_VALUES`] values each),
    /// contiguous runs of chunks per thread, and returns the results in chunk order.
    fn map_chunks<T, F>(&self, chunk: F) -> Vec<T>
    where
        T: Send + Default + Clone,
        F: Fn(Range<usize>) -> T + Sync,
    {
        let n = self.labels.len();
        let chunk_rows = (CHUNK_VALUES / self.rows.width()).max(1);
        let chunks = n.div_ceil(chunk_rows);
        let mut out = vec![T::default(); chunks];
        let per_thread = chunks.div_ceil(self.threads.clamp(1, chunks.max(1))).max(1);
        let fill = |part: &mut [T], first: usize| {
            for (c, slot) in part.iter_mut().enumerate() {
                let start = (first + c) * chunk_rows;
                *slot = chunk(start..(start + chunk_rows).min(n));
            }
        };
        std::thread::scope(|scope| {
            let mut parts = out.chunks_mut(per_thread).enumerate();
            let own = parts.next();
            for (t, part) in parts {
                let fill = &fill;
                scope.spawn(move || fill(part, t * per_thread));
            }
            if let Some((_, part)) = own {
                fill(part, 0);
            }
        });
        out
    }
}

/// Largest value of a row, widened (eight running maxima; NaN was rejected by [`Rows`]).
#[inline(always)]
fn row_max<L: Logit>(z: &[L]) -> f64 {
    let mut acc = [f64::NEG_INFINITY; LANES];
    let chunks = z.chunks_exact(LANES);
    let tail = chunks.remainder();
    for c in chunks {
        for (a, v) in acc.iter_mut().zip(c) {
            let v = v.to_f64();
            *a = if v > *a { v } else { *a };
        }
    }
    let m = acc.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    tail.iter().fold(m, |m, v| m.max(v.to_f64()))
}

/// Σ of eight lanes in a fixed order.
#[inline(always)]
fn reduce(acc: [f64; LANES]) -> f64 {
    ((acc[0] + acc[1]) + (acc[2] + acc[3])) + ((acc[4] + acc[5]) + (acc[6] + acc[7]))
}

/// One row's terms of L, L′, L″ at β; `buf` (length ≥ the row's) receives e^{β(z_k − m)}.
#[inline(always)]
fn row_terms<L: Logit>(z: &[L], y: usize, beta: f64, buf: &mut [f64]) -> Terms {
    let m = row_max(z);
    let w = &mut buf[..z.len()];
    // A plain map loop, so the compiler vectorises the exponential.
    for (wv, zv) in w.iter_mut().zip(z) {
        *wv = exp_nonpositive(beta * (zv.to_f64() - m));
    }
    let (mut s, mut e) = ([0.0; LANES], [0.0; LANES]);
    let mut zc = z.chunks_exact(LANES);
    let mut wc = w.chunks_exact(LANES);
    for (zc, wc) in (&mut zc).zip(&mut wc) {
        for j in 0..LANES {
            s[j] += wc[j];
            e[j] += wc[j] * (zc[j].to_f64() - m);
        }
    }
    for (zv, wv) in zc.remainder().iter().zip(wc.remainder()) {
        s[0] += wv;
        e[0] += wv * (zv.to_f64() - m);
    }
    let s = reduce(s);
    let mean = reduce(e) / s;
    let mut q = [0.0; LANES];
    let mut zc = z.chunks_exact(LANES);
    let mut wc = w.chunks_exact(LANES);
    for (zc, wc) in (&mut zc).zip(&mut wc) {
        for j in 0..LANES {
            let c = zc[j].to_f64() - m - mean;
            q[j] += wc[j] * c * c;
        }
    }
    for (zv, wv) in zc.remainder().iter().zip(wc.remainder()) {
        let c = zv.to_f64() - m - mean;
        q[0] += wv * c * c;
    }
    let dy = z[y].to_f64() - m;
    Terms {
        loss: s.ln() - beta * dy,
        grad: mean - dy,
        curv: reduce(q) / s,
    }
}

/// One row's survey: mean_k z_k − z_y, Σ_k |z_k| and whether the row varies (eight lanes).
#[inline(always)]
fn row_survey<L: Logit>(z: &[L], y: usize) -> Survey {
    let first = z[0].to_f64();
    let (mut sum, mut abs, mut varying) = ([0.0; LANES], [0.0; LANES], false);
    let chunks = z.chunks_exact(LANES);
    let tail = chunks.remainder();
    for c in chunks {
        for j in 0..LANES {
            let v = c[j].to_f64();
            sum[j] += v;
            abs[j] += v.abs();
            varying |= v != first;
        }
    }
    let (mut sum, mut abs) = (reduce(sum), reduce(abs));
    for v in tail {
        let v = v.to_f64();
        sum += v;
        abs += v.abs();
        varying |= v != first;
    }
    Survey {
        grad_at_zero: sum / z.len() as f64 - z[y].to_f64(),
        abs_sum: abs,
        varying,
    }
}
