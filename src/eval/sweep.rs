//! The fast replicate engine of the standard set: a block of up to [`MAX_BLOCK`] bootstrap
//! replicates is evaluated in one sequential sweep over the items, with each replicate's
//! multiplicities drawn chunk by chunk on the fly (`multinomial.rs`), so per-item data is read
//! once per block and nothing of size n is written per replicate.
//!
//! The items are stored once in "sweep order": confidence ascending, equal confidences by item
//! index descending — exactly the reverse of the stable descending order of the risk–coverage
//! curve. Replicate counts are drawn over sweep positions (any fixed relabelling of the items
//! leaves the multinomial law unchanged). In one forward sweep, chunk by chunk:
//! - the equal-width sums (accuracy, ECE, MCE, classwise ECE, NLL, Brier, coverage) do not
//!   depend on order; they are kept as `[bin][replicate]` arrays, one short vector add per item;
//! - AURC = (1/n) Σ_k E_k / k over the descending order equals (1/n) Σ over wrong copies of
//!   Σ_{k ≥ rank} 1/k; a copy at sweep position p has descending rank n − p, so it adds
//!   `tail[n − p − 1]` (tail sums of 1/k, all positive, prepared once);
//! - the adaptive ECE needs ascending positions with ties in input order: outside runs of equal
//!   confidence the sweep position is the ascending position; inside a run (visited in reverse
//!   input order) copies are placed downward from the run's top, whose total weight is summed
//!   first (from the chunk buffer, the other chunks' totals, and at most one extra chunk).
//!
//! Copies of one item are identical, and distinct items with equal confidence keep the input
//! order of the original data — the same conventions as the weighted engine in `replicate.rs`,
//! which the tests hold this one to.

use super::bootstrap::run_parallel;
use super::multinomial::ChunkCounts;
use super::order::{stable_orders, sweep_order};
use super::replicate::Prepared;
use super::scores::{item_brier, item_nll};
use super::standard::{StandardMetrics, StandardSettings};
use super::sweep_block::{Block, Item, Order};
use super::{EvalError, Predictions};
use pulp::{Arch, Simd, WithSimd};
use std::ops::Range;

/// Most replicates evaluated in one sweep.
pub(crate) const MAX_BLOCK: usize = 32;

/// Bytes of per-bin accumulators a block may hold; with many classes the block narrows so the
/// `[class][bin][replicate]` sums stay in a core's cache.
const ACCUMULATOR_BUDGET_BYTES: usize = 512 * 1024;

/// Most probabilities (n·K) copied into sweep order (128 MiB of f64), so that every block reads
/// them in sequence rather than one scattered row at a time; larger sets are read in place.
const MAX_SORTED_VALUES: usize = 1 << 24;

/// Per-item data in sweep order, shared by every block.
pub(crate) struct Sweep<'p, 'a> {
    p: &'p Predictions<'a>,
    settings: StandardSettings,
    /// Item at each sweep position.
    item: Vec<usize>,
    /// The n×K probabilities in sweep order (empty above [`MAX_SORTED_VALUES`]: rows are then
    /// read in place, at a cache miss each).
    rows: Vec<f64>,
    conf: Vec<f64>,
    hit: Vec<bool>,
    label: Vec<u32>,
    nll: Vec<f64>,
    brier: Vec<f64>,
    top_bin: Vec<u16>,
    /// tail[j] = Σ_{k=j+1}^{n} 1/k.
    tail: Vec<f64>,
    /// Runs of two or more sweep positions with equal confidence, as [start, end).
    ties: Vec<(usize, usize)>,
}

impl<'p, 'a> Sweep<'p, 'a> {
    /// Sorts the items once into sweep order and gathers their data.
    pub fn new(p: &'p Predictions<'a>, settings: &StandardSettings) -> Self {
        let (n, k, labels) = (p.n(), p.n_classes(), p.labels());
        let (item, conf) = sweep_order(p.confidence());
        // The scattered reads first, in loops short enough for the processor to overlap them.
        let mut rows = Vec::new();
        if n * k <= MAX_SORTED_VALUES {
            rows.reserve_exact(n * k);
            for &i in &item {
                for &q in p.row(i) {
                    rows.push(q);
                }
            }
        }
        let label: Vec<u32> = item.iter().map(|&i| labels[i]).collect();
        let hit = item.iter().map(|&i| p.correct()[i]).collect();
        let row = |j: usize| match rows.is_empty() {
            true => p.row(item[j]),
            false => &rows[j * k..(j + 1) * k],
        };
        let nll = (0..n).map(|j| item_nll(row(j), label[j])).collect();
        let brier = (0..n).map(|j| item_brier(row(j), label[j])).collect();
        let bins = settings.bins();
        // Bin counts are capped at MAX_BINS = u16::MAX, so every index fits in a u16.
        let top_bin = conf.iter().map(|&c| bins.bin_of(c) as u16).collect();
        let mut tail = vec![0.0; n];
        let mut acc = 0.0;
        for j in (0..n).rev() {
            acc += 1.0 / (j + 1) as f64;
            tail[j] = acc;
        }
        let mut ties = Vec::new();
        let mut start = 0;
        for j in 1..=n {
            if j == n || conf[j].total_cmp(&conf[start]).is_ne() {
                if j - start >= 2 {
                    ties.push((start, j));
                }
                start = j;
            }
        }
        Self {
            p,
            settings: settings.clone(),
            item,
            rows,
            conf,
            hit,
            label,
            nll,
            brier,
            top_bin,
            tail,
            ties,
        }
    }

    /// The weighted engine on the same items, with its orders taken from the sweep order
    /// rather than sorted again.
    pub fn prepared(&self) -> Prepared<'p, 'a> {
        let (descending, ascending) = stable_orders(&self.item, &self.ties);
        Prepared::with_orders(self.p, &self.settings, descending, ascending)
    }

    /// (n, bins, classes, equal-mass groups).
    pub fn shape(&self) -> (usize, usize, usize, usize) {
        let s = &self.settings;
        (
            self.p.n(),
            s.bins().n_bins(),
            self.p.n_classes(),
            s.adaptive_groups(),
        )
    }

    /// Probabilities of the item at sweep position `j`.
    #[inline(always)]
    fn row(&self, j: usize) -> &[f64] {
        let k = self.p.n_classes();
        if self.rows.is_empty() {
            self.p.row(self.item[j])
        } else {
            &self.rows[j * k..(j + 1) * k]
        }
    }

    /// Replicates per block for `replicates` spread over `threads` workers.
    pub fn block_width(&self, replicates: usize, threads: usize) -> usize {
        let cells = (self.p.n_classes() + 1) * self.settings.bins().n_bins();
        let by_cache = ACCUMULATOR_BUDGET_BYTES / (cells * 3 * std::mem::size_of::<f64>());
        by_cache
            .min(replicates.div_ceil(threads.max(1)))
            .clamp(1, MAX_BLOCK)
    }

    /// The metrics of replicates 0..`replicates`, in blocks spread over up to `threads` scoped
    /// threads; the result does not depend on the thread count.
    ///
    /// # Errors
    /// [`EvalError::Thread`] if a worker thread cannot start.
    pub fn run(
        &self,
        counts: &dyn ChunkCounts,
        replicates: usize,
        threads: usize,
    ) -> Result<Vec<StandardMetrics>, EvalError> {
        self.run_on(counts, replicates, threads, Arch::new())
    }

    /// [`Sweep::run`] compiled for the instruction set `arch` picks (tests pass
    /// `Arch::Scalar` to compare with the vector paths).
    fn run_on(
        &self,
        counts: &dyn ChunkCounts,
        replicates: usize,
        threads: usize,
        arch: Arch,
    ) -> Result<Vec<StandardMetrics>, EvalError> {
        let width = self.block_width(replicates, threads);
        let blocks = replicates.div_ceil(width);
        let parts = run_parallel(
            blocks,
            threads,
            || (),
            |_, i| {
                let reps = i * width..((i + 1) * width).min(replicates);
                arch.dispatch(BlockJob {
                    sweep: self,
                    counts,
                    reps,
                })
            },
        )?;
        Ok(parts.into_iter().flatten().collect())
    }

    /// The metrics of replicates `reps` (at most [`MAX_BLOCK`]), whose counts over sweep
    /// positions come from `counts`. Per chunk: the order-free sums item by item, all
    /// replicates at once; then the order-dependent ones replicate by replicate. Everything in
    /// the item loops is `#[inline(always)]`, so [`BlockJob`] compiles it for the processor's
    /// widest vectors.
    #[inline(always)]
    fn replicates(&self, counts: &dyn ChunkCounts, reps: Range<usize>) -> Vec<StandardMetrics> {
        let (n, chunk, width) = (self.p.n(), counts.chunk_len(), reps.len());
        let mut block = Block::new(width, self);
        let totals: Vec<Vec<u64>> = reps.clone().map(|r| counts.totals(r)).collect();
        // The chunk's counts twice: `[item][lane]` for the sums, `[lane][item]` for the order.
        let (mut by_item, mut by_lane) = (vec![0u32; chunk * width], vec![0u32; chunk * width]);
        let (mut scratch, mut wf) = (vec![0u32; chunk], vec![0.0; width]);
        let order = Order {
            conf: &self.conf,
            hit: &self.hit,
            tail: &self.tail,
        };
        for (c, start) in (0..n).step_by(chunk).enumerate() {
            let len = chunk.min(n - start);
            let by_item = &mut by_item[..len * width];
            let by_lane = &mut by_lane[..len * width];
            by_item.fill(0);
            by_lane.fill(0);
            for ((b, r), lane) in reps.clone().enumerate().zip(by_lane.chunks_exact_mut(len)) {
                counts.fill(r, c, totals[b][c], &mut |j| {
                    by_item[j * width + b] += 1;
                    lane[j] += 1;
                });
            }
            for (j, w) in (start..start + len).zip(by_item.chunks_exact(width)) {
                for (x, &c) in wf.iter_mut().zip(w) {
                    *x = f64::from(c);
                }
                let item = Item {
                    conf: self.conf[j],
                    hit: self.hit[j],
                    label: self.label[j] as usize,
                    nll: self.nll[j],
                    brier: self.brier[j],
                    top_bin: usize::from(self.top_bin[j]),
                    row: self.row(j),
                };
                block.add_sums(&item, &wf, &self.settings);
            }
            let runs = &self.ties[self.ties.partition_point(|t| t.1 <= start)..];
            for ((b, r), here) in reps.clone().enumerate().zip(by_lane.chunks_exact(len)) {
                let weight =
                    |run| self.run_weight(run, counts, r, &totals[b], start, here, &mut scratch);
                block.place(b, &order, start, here, runs, weight);
            }
        }
        block.finish(self.p.n_classes(), self.settings.bins().n_bins())
    }
}

/// One block of replicates as a job for [`Arch::dispatch`], which runs it compiled for the
/// widest vector instructions the processor has (AVX-512, AVX2 or the x86-64 baseline). The
/// results do not depend on which: every lane is one replicate, lanes never mix, and Rust never
/// fuses a multiply and an add.
struct BlockJob<'s, 'p, 'a, 'c> {
    sweep: &'s Sweep<'p, 'a>,
    counts: &'c dyn ChunkCounts,
    reps: Range<usize>,
}

impl WithSimd for BlockJob<'_, '_, '_, '_> {
    type Output = Vec<StandardMetrics>;

    #[inline(always)]
    fn with_simd<S: Simd>(self, _simd: S) -> Self::Output {
        self.sweep.replicates(self.counts, self.reps)
    }
}

impl Sweep<'_, '_> {
    /// Total count in replicate `r` of the run of equal confidences [s, e), which starts in
    /// the chunk at `start` whose counts are `here`: from that chunk, whole later chunks'
    /// totals, and the run's last chunk drawn into `scratch` when the run ends inside it.
    #[allow(clippy::too_many_arguments)]
    fn run_weight(
        &self,
        (s, e): (usize, usize),
        counts: &dyn ChunkCounts,
        r: usize,
        totals: &[u64],
        start: usize,
        here: &[u32],
        scratch: &mut [u32],
    ) -> usize {
        let (n, chunk) = (self.p.n(), counts.chunk_len());
        let here_end = e.min(start + here.len());
        let mut m: u64 = here[s - start..here_end - start]
            .iter()
            .map(|&c| u64::from(c))
            .sum();
        if e > here_end {
            let last = (e - 1) / chunk;
            m += totals[start / chunk + 1..last].iter().sum::<u64>();
            let last_start = last * chunk;
            let inside = e - last_start;
            if inside == chunk.min(n - last_start) {
                m += totals[last];
            } else {
                scratch.fill(0);
                counts.fill(r, last, totals[last], &mut |j| scratch[j] += 1);
                m += scratch[..inside].iter().map(|&c| u64::from(c)).sum::<u64>();
            }
        }
        m as usize
    }
}

#[cfg(test)]
#[path = "sweep_tests.rs"]
mod tests;
