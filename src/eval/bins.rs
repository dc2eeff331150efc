//! Equal-width bins with the right-closed edge rule of METHODS.md 1.2, per-bin accumulators, and
//! reliability-diagram records (METHODS.md 1.8).

use super::{EvalError, Predictions};
use serde::Serialize;

/// Largest bin count accepted, so a bin index fits in a `u16` (the bootstrap stores one per
/// item and class).
pub const MAX_BINS: usize = u16::MAX as usize;

/// Bin count used when none is given: M = 15 (Guo et al. 2017; common practice, not a law).
pub const DEFAULT_BINS: usize = 15;

/// M equal-width bins on [0, 1]: bin 0 = [0, e₁], bin m ≥ 1 = (e_m, e_{m+1}], edges built as
/// numpy.linspace(0, 1, M + 1) builds them (`m · (1/M)`, last edge exactly 1.0).
#[derive(Debug, Clone, PartialEq)]
pub struct EqualWidthBins {
    edges: Vec<f64>,
}

impl EqualWidthBins {
    /// M equal-width bins, 1 ≤ M ≤ [`MAX_BINS`].
    ///
    /// # Errors
    /// [`EvalError::Setting`] if `n_bins` is 0 or above [`MAX_BINS`].
    pub fn try_new(n_bins: usize) -> Result<Self, EvalError> {
        if n_bins == 0 || n_bins > MAX_BINS {
            return Err(EvalError::Setting {
                what: "bin count",
                value: n_bins as f64,
                rule: "must be between 1 and 65535",
            });
        }
        Ok(Self {
            edges: linspace_edges(n_bins),
        })
    }

    /// Number of bins M.
    pub fn n_bins(&self) -> usize {
        self.edges.len() - 1
    }

    /// The M + 1 edges, from 0.0 to 1.0.
    pub fn edges(&self) -> &[f64] {
        &self.edges
    }

    /// Bin of a value in [0, 1]: the number of interior edges strictly below it, as
    /// `np.searchsorted(edges[1:-1], c, side='left')`. A value on an interior edge goes to the
    /// lower bin, 0 to the first bin, 1 to the last.
    ///
    /// Guessed as ⌊c·M⌋ and then moved against the stored edges until the edge rule holds, so
    /// the result is exactly the search's (the guess is off by one on an edge, or where an edge
    /// is not exactly m/M) at a fraction of its cost.
    #[inline]
    pub fn bin_of(&self, c: f64) -> usize {
        let m = self.n_bins();
        // The cast truncates (NaN and negatives to 0, +∞ saturates); `min` keeps a valid bin.
        let mut b = ((c * m as f64) as usize).min(m - 1);
        while b > 0 && self.edges[b] >= c {
            b -= 1;
        }
        while b + 1 < m && self.edges[b + 1] < c {
            b += 1;
        }
        b
    }
}

impl Default for EqualWidthBins {
    fn default() -> Self {
        Self {
            edges: linspace_edges(DEFAULT_BINS),
        }
    }
}

/// `numpy.linspace(0, 1, n_bins + 1)`: `m · (1/n_bins)`, last edge forced to 1.0.
fn linspace_edges(n_bins: usize) -> Vec<f64> {
    let step = 1.0 / n_bins as f64;
    let mut edges: Vec<f64> = (0..=n_bins).map(|m| m as f64 * step).collect();
    edges[n_bins] = 1.0;
    edges
}

/// Running sums of one bin: item count (with multiplicity), Σ confidence, Σ outcome.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub(crate) struct BinStats {
    pub count: u64,
    pub sum_conf: f64,
    pub sum_hit: f64,
}

impl BinStats {
    /// Adds an item `w` times (w is a bootstrap multiplicity; 1 outside the bootstrap).
    #[inline]
    pub fn add(&mut self, conf: f64, hit: bool, w: u64) {
        let wf = w as f64;
        self.count += w;
        self.sum_conf += wf * conf;
        self.sum_hit += if hit { wf } else { 0.0 };
    }

    /// Adds another bin's sums.
    #[inline]
    pub fn merge(&mut self, other: &BinStats) {
        self.count += other.count;
        self.sum_conf += other.sum_conf;
        self.sum_hit += other.sum_hit;
    }

    /// (mean confidence, accuracy) of a non-empty bin.
    #[inline]
    pub fn means(&self) -> Option<(f64, f64)> {
        (self.count > 0).then(|| {
            let c = self.count as f64;
            (self.sum_conf / c, self.sum_hit / c)
        })
    }
}

/// ECE = Σ over non-empty bins of (n_m/n)·|acc_m − conf_m| (METHODS.md 1.3).
pub(crate) fn ece_of(stats: &[BinStats], n: u64) -> f64 {
    lp_sum(stats, n, 1.0)
}

/// Σ over non-empty bins of (n_m/n)·|acc_m − conf_m|^p (the p-th power of ECE_p).
pub(crate) fn lp_sum(stats: &[BinStats], n: u64, p: f64) -> f64 {
    let nf = n as f64;
    stats
        .iter()
        .filter_map(|s| {
            s.means()
                .map(|(conf, acc)| (s.count as f64 / nf) * (acc - conf).abs().powf(p))
        })
        .sum()
}

/// MCE = largest |acc_m − conf_m| over non-empty bins (0 if all are empty, which needs n = 0).
pub(crate) fn mce_of(stats: &[BinStats]) -> f64 {
    stats
        .iter()
        .filter_map(|s| s.means().map(|(conf, acc)| (acc - conf).abs()))
        .fold(0.0, f64::max)
}

/// Top-label bin sums of all items, each counted once.
pub(crate) fn top_label_stats(p: &Predictions<'_>, bins: &EqualWidthBins) -> Vec<BinStats> {
    let mut stats = vec![BinStats::default(); bins.n_bins()];
    for (&conf, &hit) in p.confidence().iter().zip(p.correct()) {
        stats[bins.bin_of(conf)].add(conf, hit, 1);
    }
    stats
}

/// One bar of a reliability diagram; empty bins have `count` 0 and `None` means.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ReliabilityBin {
    /// Lower edge (exclusive, except 0 for the first bin).
    pub lower: f64,
    /// Upper edge (inclusive).
    pub upper: f64,
    /// Number of items whose top-label confidence falls in the bin.
    pub count: u64,
    /// Mean top-label confidence of those items; `None` if the bin is empty.
    pub mean_confidence: Option<f64>,
    /// Fraction of those items predicted correctly; `None` if the bin is empty.
    pub accuracy: Option<f64>,
    /// |accuracy − mean_confidence|; `None` if the bin is empty.
    pub gap: Option<f64>,
}

/// Top-label reliability-diagram data: one record per bin, empty bins included (METHODS.md 1.8).
pub fn reliability_diagram(p: &Predictions<'_>, bins: &EqualWidthBins) -> Vec<ReliabilityBin> {
    let stats = top_label_stats(p, bins);
    stats
        .iter()
        .zip(bins.edges().windows(2))
        .map(|(s, edge)| {
            let means = s.means();
            ReliabilityBin {
                lower: edge[0],
                upper: edge[1],
                count: s.count,
                mean_confidence: means.map(|m| m.0),
                accuracy: means.map(|m| m.1),
                gap: means.map(|(conf, acc)| (acc - conf).abs()),
            }
        })
        .collect()
}

/// End (exclusive) of equal-mass group `g` of `groups` over `n` sorted positions, by the
/// numpy.array_split rule: the first `n mod groups` groups hold ⌈n/groups⌉ items, the rest
/// ⌊n/groups⌋.
#[inline]
pub(crate) fn array_split_end(n: usize, groups: usize, g: usize) -> usize {
    (g + 1) * (n / groups) + (g + 1).min(n % groups)
}

#[cfg(test)]
mod tests {
    use super::super::fixtures::{E3_LABELS, E3_PROBS};
    use super::*;
    use proptest::prelude::prop_oneof;
    use proptest::strategy::Just;

    #[test]
    fn edges_follow_numpy_linspace() {
        // METHODS.md 1.2: np.linspace(0, 1, 11)[3] = 0.30000000000000004; for M = 15 every edge
        // equals m/15 exactly.
        let b10 = EqualWidthBins::try_new(10).unwrap();
        assert_eq!(b10.edges()[3], 0.30000000000000004);
        assert_eq!(b10.edges()[10], 1.0);
        let b15 = EqualWidthBins::default();
        for (m, &e) in b15.edges().iter().enumerate() {
            assert_eq!(e, m as f64 / 15.0);
        }
        assert!(EqualWidthBins::try_new(0).is_err());
        assert!(EqualWidthBins::try_new(MAX_BINS + 1).is_err());
    }

    #[test]
    fn edge_values_go_to_the_lower_bin() {
        // METHODS.md 1.2: with 5 bins, 0.2 and 0.4 go to bins 0 and 1 (searchsorted, side='left'),
        // 0 to the first bin, 1 to the last.
        let b = EqualWidthBins::try_new(5).unwrap();
        assert_eq!(b.bin_of(0.2), 0);
        assert_eq!(b.bin_of(0.4), 1);
        assert_eq!(b.bin_of(0.4 + 1e-12), 2);
        assert_eq!(b.bin_of(0.0), 0);
        assert_eq!(b.bin_of(1.0), 4);
        // The edge as numpy stores it: 0.30000000000000004 is in bin 2 of 10, 0.3 in bin 2 too,
        // while ceil(c·M) − 1 would put 0.30000000000000004 in bin 3.
        let b10 = EqualWidthBins::try_new(10).unwrap();
        assert_eq!(b10.bin_of(0.30000000000000004), 2);
        assert_eq!(b10.bin_of(0.3), 2);
    }

    proptest::proptest! {
        #[test]
        fn bin_of_equals_the_edge_search(
            m in prop_oneof![1usize..40, Just(MAX_BINS), 100usize..2000],
            edge in 0usize..2000,
            step in -2i64..3,
            free in -0.1f64..1.1,
        ) {
            let bins = EqualWidthBins::try_new(m).unwrap();
            let interior = &bins.edges()[1..m];
            // Values on, just below and just above an edge, and anywhere.
            let mut c = bins.edges()[edge.min(m)];
            for _ in 0..step.abs() {
                c = if step > 0 { c.next_up() } else { c.next_down() };
            }
            for v in [c, free, f64::NAN, f64::INFINITY, -0.0] {
                let want = interior.partition_point(|&e| e < v);
                proptest::prop_assert_eq!(bins.bin_of(v), want, "M = {}, c = {}", m, v);
            }
        }
    }

    #[test]
    fn reliability_diagram_of_e3_keeps_empty_bins() {
        let p = Predictions::try_new(&E3_PROBS, 3, &E3_LABELS).unwrap();
        let d = reliability_diagram(&p, &EqualWidthBins::try_new(5).unwrap());
        assert_eq!(d.len(), 5);
        assert_eq!(d[0].count + d[1].count, 0);
        assert_eq!(
            (d[0].mean_confidence, d[0].accuracy, d[0].gap),
            (None, None, None)
        );
        // METHODS.md E3: calibration_curve(c, conf, n_bins=5) → prob_true [1/3, 2/3, 1],
        // prob_pred [0.47, 0.70, 0.88]; counts 3, 3, 2.
        let counts: Vec<u64> = d.iter().map(|b| b.count).collect();
        assert_eq!(counts, [0, 0, 3, 3, 2]);
        for (bin, (acc, conf)) in
            d[2..]
                .iter()
                .zip([(1.0 / 3.0, 0.47), (2.0 / 3.0, 0.70), (1.0, 0.88)])
        {
            assert!((bin.accuracy.unwrap() - acc).abs() < 1e-12);
            assert!((bin.mean_confidence.unwrap() - conf).abs() < 1e-12);
        }
        assert!((d[2].gap.unwrap() - 0.1366666666666667).abs() < 1e-12);
        assert_eq!((d[4].lower, d[4].upper), (0.8, 1.0));
        let json = serde_json::to_string(&d[0]).unwrap();
        assert_eq!(
            json,
            r#"{"lower":0.0,"upper":0.2,"count":0,"mean_confidence":null,"accuracy":null,"gap":null}"#
        );
    }

    #[test]
    fn array_split_sizes() {
        // np.array_split(range(8), 3) → sizes (3, 3, 2); range(2) into 3 → (1, 1, 0).
        let ends: Vec<usize> = (0..3).map(|g| array_split_end(8, 3, g)).collect();
        assert_eq!(ends, [3, 6, 8]);
        let ends: Vec<usize> = (0..3).map(|g| array_split_end(2, 3, g)).collect();
        assert_eq!(ends, [1, 2, 2]);
    }
}
