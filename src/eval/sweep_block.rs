//! Running sums of one block of bootstrap replicates in the sweep engine (`sweep.rs`).
//!
//! The order-free sums (counts, Σ confidence, Σ correct per bin; NLL, Brier, coverage) are kept
//! as `[cell][lane]` arrays with one lane per replicate, so adding one item to every replicate is
//! a few fixed-width vector operations (groups of [`LANES`]) and a short remainder. The
//! order-dependent sums (AURC, equal-mass groups) follow each replicate's own positions, one
//! replicate at a time, with a fast path for the common case of no group boundary crossed.

use super::bins::{array_split_end, ece_of, mce_of, BinStats};
use super::standard::{StandardMetrics, StandardSettings};
use super::sweep::Sweep;

/// Replicates handled by one fixed-width vector step (eight f64: one AVX-512 register, two
/// AVX2 registers).
pub(crate) const LANES: usize = 8;

/// One item at its sweep position, as the block needs it.
pub(crate) struct Item<'r> {
    pub conf: f64,
    pub hit: bool,
    pub label: usize,
    pub nll: f64,
    pub brier: f64,
    pub top_bin: usize,
    pub row: &'r [f64],
}

/// Where one replicate stands in the sweep.
#[derive(Clone, Copy, Default)]
struct Lane {
    /// Copies placed so far (the sweep position of the next copy).
    pos: usize,
    /// n · AURC so far.
    aurc: f64,
    /// Inside a run of equal confidences: the ascending position just above the copies not
    /// yet placed.
    tie_top: usize,
    /// The equal-mass group last added to, and its [begin, end) positions.
    group: usize,
    group_begin: usize,
    group_end: usize,
    /// Sums added to that group since it was last written to the block.
    open: BinStats,
}

/// The per-position data the order-dependent sums read, in sweep order.
pub(crate) struct Order<'s> {
    pub conf: &'s [f64],
    pub hit: &'s [bool],
    /// tail[j] = Σ_{k=j+1}^{n} 1/k.
    pub tail: &'s [f64],
}

/// Copies of one item whose AURC terms are added without a branch (a multinomial count
/// exceeds 4 about once in 270 items).
const UNROLLED_COPIES: usize = 4;

/// Running sums of up to [`super::sweep::MAX_BLOCK`] replicates.
pub(crate) struct Block {
    /// Replicates in the block.
    pub width: usize,
    n: usize,
    /// Top-label count, Σ confidence, Σ correct at `[bin · width + lane]`.
    top: [Vec<f64>; 3],
    /// Per-class count, Σ q, Σ 1[y = k] at `[(k · bins + bin) · width + lane]`.
    class: [Vec<f64>; 3],
    /// Correct, NLL, Brier, accepted, accepted and correct, at `[lane]`.
    scalars: [Vec<f64>; 5],
    lanes: Vec<Lane>,
    /// End of each equal-mass group (numpy.array_split sizes).
    group_ends: Vec<usize>,
    /// Equal-mass group sums at `[lane · groups + g]`.
    adaptive: Vec<BinStats>,
}

impl Block {
    /// Zeroed sums for `width` replicates over the items of `sweep`.
    pub fn new(width: usize, sweep: &Sweep<'_, '_>) -> Self {
        let (n, m, k, groups) = sweep.shape();
        let zeros = |cells: usize| vec![0.0; cells * width];
        let group_ends: Vec<usize> = (0..groups).map(|g| array_split_end(n, groups, g)).collect();
        let first = Lane {
            group_end: group_ends[0],
            ..Lane::default()
        };
        Self {
            width,
            n,
            top: [zeros(m), zeros(m), zeros(m)],
            class: [zeros(k * m), zeros(k * m), zeros(k * m)],
            scalars: [zeros(1), zeros(1), zeros(1), zeros(1), zeros(1)],
            lanes: vec![first; width],
            group_ends,
            adaptive: vec![BinStats::default(); groups * width],
        }
    }

    /// Adds `item` with counts `wf` (as f64, one per lane) to the order-free sums.
    #[inline(always)]
    pub fn add_sums(&mut self, item: &Item<'_>, wf: &[f64], settings: &StandardSettings) {
        let s = self.width;
        let at = item.top_bin * s;
        add(&mut self.top[0][at..at + s], wf, 1.0);
        add(&mut self.top[1][at..at + s], wf, item.conf);
        let [hits, nll, brier, accepted, accepted_hits] = &mut self.scalars;
        add(nll, wf, item.nll);
        add(brier, wf, item.brier);
        let is_accepted = item.conf >= settings.threshold();
        if is_accepted {
            add(accepted, wf, 1.0);
        }
        if item.hit {
            add(&mut self.top[2][at..at + s], wf, 1.0);
            add(hits, wf, 1.0);
            if is_accepted {
                add(accepted_hits, wf, 1.0);
            }
        }
        let (bins, m) = (settings.bins(), settings.bins().n_bins());
        for (k, &q) in item.row.iter().enumerate() {
            let at = (k * m + bins.bin_of(q)) * s;
            add(&mut self.class[0][at..at + s], wf, 1.0);
            add(&mut self.class[1][at..at + s], wf, q);
            if k == item.label {
                add(&mut self.class[2][at..at + s], wf, 1.0);
            }
        }
    }

    /// Places replicate b's copies of the chunk at sweep position `start` (its counts `here`)
    /// in that replicate's orders: AURC from the sweep position, equal-mass groups from the
    /// ascending position. `runs` are the runs of equal confidence from the first one not
    /// ending before `start`; `run_weight` gives the total count of a run starting here.
    #[inline(always)]
    pub fn place(
        &mut self,
        b: usize,
        order: &Order<'_>,
        start: usize,
        here: &[u32],
        runs: &[(usize, usize)],
        mut run_weight: impl FnMut((usize, usize)) -> usize,
    ) {
        let n = self.n;
        let mut lane = self.lanes[b];
        let mut k = 0;
        for (j, &count) in (start..).zip(here) {
            while k < runs.len() && runs[k].1 <= j {
                k += 1;
            }
            let in_tie = k < runs.len() && runs[k].0 <= j;
            if in_tie && runs[k].0 == j {
                lane.tie_top = lane.pos + run_weight(runs[k]);
            }
            let (conf, hit, copies) = (order.conf[j], order.hit[j], count as usize);
            // AURC: a wrong copy at sweep position p adds tail[n − p − 1]. The first
            // UNROLLED_COPIES copies without a branch (counts are mostly 0, 1 or 2, at random),
            // the rare rest in a loop.
            let top = n - lane.pos;
            let mut tails = 0.0;
            for t in 0..UNROLLED_COPIES {
                let present = f64::from(u8::from(copies > t));
                tails += present * order.tail[top.saturating_sub(1 + t)];
            }
            for t in UNROLLED_COPIES..copies {
                tails += order.tail[top - 1 - t];
            }
            lane.aurc += f64::from(u8::from(!hit)) * tails;
            let (low, high) = if in_tie {
                lane.tie_top -= copies;
                (lane.tie_top, lane.tie_top + copies)
            } else {
                (lane.pos, lane.pos + copies)
            };
            lane.pos += copies;
            if !in_tie && low >= lane.group_begin && high <= lane.group_end {
                let cf = f64::from(count);
                lane.open.count += u64::from(count);
                lane.open.sum_conf += cf * conf;
                lane.open.sum_hit += cf * f64::from(u8::from(hit));
            } else {
                self.split(b, &mut lane, low, high, conf, hit);
            }
        }
        self.lanes[b] = lane;
    }

    /// Adds copies at ascending positions [low, high) to replicate b's groups, crossing group
    /// boundaries, after closing the open group sums. Inlined so that [`Block::place`] can keep
    /// its lane in registers.
    #[inline(always)]
    fn split(
        &mut self,
        b: usize,
        lane: &mut Lane,
        mut low: usize,
        high: usize,
        conf: f64,
        hit: bool,
    ) {
        if low >= high {
            return;
        }
        let groups = self.group_ends.len();
        let stats = &mut self.adaptive[b * groups..(b + 1) * groups];
        stats[lane.group].merge(&lane.open);
        lane.open = BinStats::default();
        let ends = &self.group_ends;
        let begin = |g: usize| if g == 0 { 0 } else { ends[g - 1] };
        let mut g = lane.group;
        while low < begin(g) {
            g -= 1;
        }
        while low >= ends[g] {
            g += 1;
        }
        while low < high {
            let take = high.min(ends[g]) - low;
            stats[g].add(conf, hit, take as u64);
            low += take;
            if low < high {
                g += 1;
            }
        }
        (lane.group, lane.group_begin, lane.group_end) = (g, begin(g), ends[g]);
    }

    /// The metrics of each replicate of the block (every count sums to n).
    pub fn finish(&self, k: usize, m: usize) -> Vec<StandardMetrics> {
        let (n, nf, s, groups) = (
            self.n as u64,
            self.n as f64,
            self.width,
            self.group_ends.len(),
        );
        let stats = |sums: &[Vec<f64>; 3], cells: usize, b: usize| -> Vec<BinStats> {
            (0..cells)
                .map(|cell| BinStats {
                    count: sums[0][cell * s + b] as u64,
                    sum_conf: sums[1][cell * s + b],
                    sum_hit: sums[2][cell * s + b],
                })
                .collect()
        };
        let [hits, nll, brier, accepted, accepted_hits] = &self.scalars;
        (0..self.width)
            .map(|b| {
                let top = stats(&self.top, m, b);
                let class = stats(&self.class, k * m, b);
                let classwise: f64 = class.chunks_exact(m).map(|c| ece_of(c, n)).sum();
                let lane = &self.lanes[b];
                debug_assert_eq!(lane.pos, self.n);
                let mut adaptive = self.adaptive[b * groups..(b + 1) * groups].to_vec();
                adaptive[lane.group].merge(&lane.open);
                StandardMetrics {
                    n: self.n,
                    accuracy: hits[b] / nf,
                    ece: ece_of(&top, n),
                    adaptive_ece: ece_of(&adaptive, n),
                    mce: mce_of(&top),
                    classwise_ece: classwise / k as f64,
                    nll: nll[b] / nf,
                    brier: brier[b] / nf,
                    aurc: lane.aurc / nf,
                    coverage: accepted[b] / nf,
                    accepted_accuracy: (accepted[b] > 0.0).then(|| accepted_hits[b] / accepted[b]),
                }
            })
            .collect()
    }
}

/// `dst[lane] += w[lane] · a` for every lane (both slices `width` long): whole groups of
/// [`LANES`] as fixed-size arrays, so each group is one vector operation, then the rest.
#[inline(always)]
fn add(dst: &mut [f64], w: &[f64], a: f64) {
    let (dst_groups, dst_rest) = dst.as_chunks_mut::<LANES>();
    let (w_groups, w_rest) = w.as_chunks::<LANES>();
    for (d, x) in dst_groups.iter_mut().zip(w_groups) {
        for l in 0..LANES {
            d[l] += x[l] * a;
        }
    }
    for (d, &x) in dst_rest.iter_mut().zip(w_rest) {
        *d += x * a;
    }
}
