//! The engine behind the standard metric set: every per-item quantity is computed once, items
//! are sorted once (ascending and descending, both stable), and a replicate is then evaluated
//! from its multiplicities w_i (how often item i was drawn): one pass in input order for the
//! equal-width metrics, then the weights are gathered into each sorted order for AURC and the
//! adaptive ECE — no sort and no copy of the resampled rows. All w_i = 1 gives the point values.
//!
//! Ties: inside a replicate, copies of one item are identical, and distinct items with equal
//! confidence keep input order (the stable order of the original data). Resampling the rows and
//! stable-sorting the copy would instead order such ties by draw order; the two agree whenever
//! distinct items have distinct confidences.

use super::bins::{array_split_end, ece_of, mce_of, BinStats};
use super::order::{ascending_order, descending_order};
use super::scores::{item_brier, item_nll};
use super::standard::{StandardMetrics, StandardSettings};
use super::Predictions;

/// Per-item quantities of one evaluation set, ready for weighted passes.
pub(crate) struct Prepared<'p, 'a> {
    p: &'p Predictions<'a>,
    settings: StandardSettings,
    nll: Vec<f64>,
    brier: Vec<f64>,
    top_bin: Vec<u16>,
    /// n×K bin indices of q_ik for the classwise ECE.
    class_bin: Vec<u16>,
    /// Item indices in descending stable order, and whether each of them is wrong.
    descending: Vec<usize>,
    descending_miss: Vec<bool>,
    /// Item indices in ascending stable order, with their confidence and correctness.
    ascending: Vec<usize>,
    ascending_conf: Vec<f64>,
    ascending_hit: Vec<bool>,
}

impl<'p, 'a> Prepared<'p, 'a> {
    /// Computes per-item losses and bins, and both stable orders.
    pub fn new(p: &'p Predictions<'a>, settings: &StandardSettings) -> Self {
        let conf = p.confidence();
        Self::with_orders(p, settings, descending_order(conf), ascending_order(conf))
    }

    /// As [`Prepared::new`], with the stable descending and ascending orders already known.
    pub fn with_orders(
        p: &'p Predictions<'a>,
        settings: &StandardSettings,
        descending: Vec<usize>,
        ascending: Vec<usize>,
    ) -> Self {
        debug_assert_eq!((descending.len(), ascending.len()), (p.n(), p.n()));
        let bins = settings.bins();
        let labels = p.labels();
        let nll = (0..p.n()).map(|i| item_nll(p.row(i), labels[i])).collect();
        let brier = (0..p.n())
            .map(|i| item_brier(p.row(i), labels[i]))
            .collect();
        // Bin counts are capped at MAX_BINS = u16::MAX, so every index fits in a u16.
        let to_bin = |c: f64| bins.bin_of(c) as u16;
        let top_bin = p.confidence().iter().map(|&c| to_bin(c)).collect();
        let class_bin = p.probs().iter().map(|&q| to_bin(q)).collect();
        let conf = p.confidence();
        let descending_miss = descending.iter().map(|&i| !p.correct()[i]).collect();
        let ascending_conf = ascending.iter().map(|&i| conf[i]).collect();
        let ascending_hit = ascending.iter().map(|&i| p.correct()[i]).collect();
        Self {
            p,
            settings: settings.clone(),
            nll,
            brier,
            top_bin,
            class_bin,
            descending,
            descending_miss,
            ascending,
            ascending_conf,
            ascending_hit,
        }
    }

    /// Number of items n.
    pub fn n(&self) -> usize {
        self.p.n()
    }

    /// All metrics of the sample in which item i appears `w[i]` times (Σ w = n). `gathered`
    /// is scratch space, reused across calls to avoid an allocation per replicate.
    pub fn evaluate(&self, w: &[u32], gathered: &mut Vec<u32>) -> StandardMetrics {
        debug_assert_eq!(w.len(), self.n());
        debug_assert_eq!(w.iter().map(|&c| c as usize).sum::<usize>(), self.n());
        let mut m = self.equal_width_pass(w);
        // Gather the weights into each sorted order first (independent loads the CPU can
        // overlap), then run sequential passes.
        gathered.clear();
        gathered.extend(self.descending.iter().map(|&i| w[i]));
        m.aurc = self.aurc_pass(gathered);
        gathered.clear();
        gathered.extend(self.ascending.iter().map(|&i| w[i]));
        m.adaptive_ece = self.adaptive_pass(gathered);
        m
    }

    /// Accuracy, ECE, MCE, classwise ECE, NLL, Brier, coverage and accepted accuracy.
    fn equal_width_pass(&self, w: &[u32]) -> StandardMetrics {
        let p = self.p;
        let (n_bins, k_count) = (self.settings.bins().n_bins(), p.n_classes());
        let mut top = vec![BinStats::default(); n_bins];
        let mut class = vec![BinStats::default(); n_bins * k_count];
        let (mut hits, mut nll, mut brier) = (0u64, 0.0, 0.0);
        let (mut accepted, mut accepted_hits) = (0u64, 0u64);
        let theta = self.settings.threshold();
        for (i, &wi) in w.iter().enumerate().filter(|(_, &wi)| wi > 0) {
            let (wu, wf) = (u64::from(wi), f64::from(wi));
            let (conf, hit) = (p.confidence()[i], p.correct()[i]);
            hits += wu * u64::from(hit);
            nll += wf * self.nll[i];
            brier += wf * self.brier[i];
            top[usize::from(self.top_bin[i])].add(conf, hit, wu);
            if conf >= theta {
                accepted += wu;
                accepted_hits += wu * u64::from(hit);
            }
            let label = p.labels()[i] as usize;
            let bins_i = &self.class_bin[i * k_count..(i + 1) * k_count];
            for (k, (&q, &b)) in p.row(i).iter().zip(bins_i).enumerate() {
                class[k * n_bins + usize::from(b)].add(q, k == label, wu);
            }
        }
        let n = self.n() as u64;
        let nf = n as f64;
        let classwise: f64 = class.chunks_exact(n_bins).map(|s| ece_of(s, n)).sum();
        StandardMetrics {
            n: self.n(),
            accuracy: hits as f64 / nf,
            ece: ece_of(&top, n),
            adaptive_ece: f64::NAN,
            mce: mce_of(&top),
            classwise_ece: classwise / k_count as f64,
            nll: nll / nf,
            brier: brier / nf,
            aurc: f64::NAN,
            coverage: accepted as f64 / nf,
            accepted_accuracy: (accepted > 0).then(|| accepted_hits as f64 / accepted as f64),
        }
    }

    /// AURC = (1/n) Σ_k risk_k over the descending stable order, each item repeated w times
    /// (`w` in that order).
    fn aurc_pass(&self, w: &[u32]) -> f64 {
        let (mut covered, mut errors, mut sum_risk) = (0u64, 0u64, 0.0);
        for (&wi, &miss) in w.iter().zip(&self.descending_miss) {
            let miss = u64::from(miss);
            for _ in 0..wi {
                covered += 1;
                errors += miss;
                sum_risk += errors as f64 / covered as f64;
            }
        }
        sum_risk / self.n() as f64
    }

    /// Adaptive ECE over the ascending stable order, each item repeated w times (`w` in that
    /// order) and split across group boundaries by position (numpy.array_split sizes).
    fn adaptive_pass(&self, w: &[u32]) -> f64 {
        let (n, groups) = (self.n(), self.settings.adaptive_groups());
        let mut stats = vec![BinStats::default(); groups];
        let (mut g, mut pos, mut end) = (0, 0, array_split_end(n, groups, 0));
        let items = self.ascending_conf.iter().zip(&self.ascending_hit);
        for ((&conf, &hit), &wi) in items.zip(w) {
            let mut left = wi as usize;
            while left > 0 {
                while pos == end {
                    g += 1;
                    end = array_split_end(n, groups, g);
                }
                let take = left.min(end - pos);
                stats[g].add(conf, hit, take as u64);
                pos += take;
                left -= take;
            }
        }
        ece_of(&stats, n as u64)
    }
}
