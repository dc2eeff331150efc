//! Estimates from labels that come back late and only for some items (METHODS.md 4.1, 4.4).
//!
//! Accepted items are labelled only through the audit sample, each with a known audit
//! probability π; deferred items go to a person anyway and count with weight 1.

use crate::eval::{psi_from_proportions, EqualWidthBins, EvalError, PSI_EPSILON};
use crate::stats::{clopper_pearson_lower, clopper_pearson_upper, StatsError};
use serde::{Deserialize, Serialize};

/// One labelled item: its calibrated top-label confidence, whether the prediction was right and
/// the probability π with which it came to be labelled (1 for deferred items).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Labelled {
    /// Calibrated top-label confidence.
    pub confidence: f64,
    /// The prediction matched the label.
    pub correct: bool,
    /// Probability of being labelled, in (0, 1].
    pub pi: f64,
}

/// The Hájek (ratio) estimate Σ (c_i/π_i) / Σ (1/π_i) over the labelled sample and its
/// linearised standard error sqrt((1/N̂²) Σ (1 − π_i)(c_i − Â)²/π_i²), N̂ = Σ 1/π_i
/// (METHODS.md 4.1; Hájek 1971). `None` for an empty sample.
pub fn hajek(items: &[Labelled]) -> Option<(f64, f64)> {
    if items.is_empty() {
        return None;
    }
    let n_hat: f64 = items.iter().map(|x| 1.0 / x.pi).sum();
    let hits: f64 = items.iter().filter(|x| x.correct).map(|x| 1.0 / x.pi).sum();
    let a = hits / n_hat;
    let v: f64 = items
        .iter()
        .map(|x| {
            let c = f64::from(u8::from(x.correct));
            (1.0 - x.pi) * (c - a).powi(2) / (x.pi * x.pi)
        })
        .sum::<f64>()
        / (n_hat * n_hat);
    Some((a, v.sqrt()))
}

/// A proportion with its two-sided Clopper–Pearson interval at level 1 − δ (each side δ/2).
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Proportion {
    /// Items counted.
    pub n: u64,
    /// Point estimate.
    pub estimate: f64,
    /// Lower end of the interval.
    pub lower: f64,
    /// Upper end of the interval.
    pub upper: f64,
}

/// `hits` out of `n` with its exact two-sided interval at level 1 − δ; `None` when n = 0.
///
/// # Errors
/// [`StatsError`] when `hits > n` or δ ∉ (0, 1).
pub fn proportion(hits: u64, n: u64, delta: f64) -> Result<Option<Proportion>, StatsError> {
    if n == 0 {
        return Ok(None);
    }
    Ok(Some(Proportion {
        n,
        estimate: hits as f64 / n as f64,
        lower: clopper_pearson_lower(hits, n, delta / 2.0)?,
        upper: clopper_pearson_upper(hits, n, delta / 2.0)?,
    }))
}

/// Top-label ECE of labelled items weighted by 1/π: Σ_b (W_b/W)·|acc_b − conf_b| over
/// equal-width bins, with W_b, acc_b and conf_b the weight, weighted accuracy and weighted mean
/// confidence of bin b. With every π = 1 it is the ECE of METHODS.md 1.3. `None` when empty.
pub fn weighted_ece(items: &[Labelled], bins: &EqualWidthBins) -> Option<f64> {
    if items.is_empty() {
        return None;
    }
    let m = bins.n_bins();
    let (mut w, mut hit, mut conf) = (vec![0.0; m], vec![0.0; m], vec![0.0; m]);
    for x in items {
        let b = bins.bin_of(x.confidence);
        let wi = 1.0 / x.pi;
        w[b] += wi;
        conf[b] += wi * x.confidence;
        if x.correct {
            hit[b] += wi;
        }
    }
    let total: f64 = w.iter().sum();
    Some(
        (0..m)
            .filter(|&b| w[b] > 0.0)
            .map(|b| (hit[b] - conf[b]).abs() / total)
            .sum(),
    )
}

/// Drift of live bin counts against the reference proportions of the same bins.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct BinnedDrift {
    /// Population Stability Index with the ε rule of METHODS.md 4.4 (ε = 1e−4).
    pub psi: f64,
    /// max_b |F_ref − F_live| at the bin edges: the KS statistic of the binned distributions,
    /// a lower bound on the KS statistic of the unbinned ones.
    pub ks_binned: f64,
}

/// PSI and the binned KS statistic of `counts` (live items per bin) against `reference`
/// (proportions per bin); `None` when no item was counted.
///
/// # Errors
/// [`EvalError`] when the lengths differ or the reference is not a distribution.
pub fn binned_drift(reference: &[f64], counts: &[u64]) -> Result<Option<BinnedDrift>, EvalError> {
    let n: u64 = counts.iter().sum();
    if n == 0 {
        return Ok(None);
    }
    let live: Vec<f64> = counts.iter().map(|&c| c as f64 / n as f64).collect();
    let psi = psi_from_proportions(reference, &live, PSI_EPSILON)?;
    let (mut fr, mut fl, mut ks) = (0.0f64, 0.0f64, 0.0f64);
    for (r, l) in reference.iter().zip(&live) {
        fr += r;
        fl += l;
        ks = ks.max((fr - fl).abs());
    }
    Ok(Some(BinnedDrift { psi, ks_binned: ks }))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn item(confidence: f64, correct: bool, pi: f64) -> Labelled {
        Labelled {
            confidence,
            correct,
            pi,
        }
    }

    #[test]
    fn hajek_matches_a_direct_transcription() {
        // Reference: the Hájek formulas of METHODS.md 4.1 transcribed in numpy 2.4.6:
        //   pi=np.array([.1,.1,.5,.5,1.]); c=np.array([1,0,1,1,0.])
        //   N=(1/pi).sum(); A=(c/pi).sum()/N; se=np.sqrt(((1-pi)*(c-A)**2/pi**2).sum()/N**2)
        //   → A = 0.56, se = 0.272535942583726
        let items = [
            item(0.9, true, 0.1),
            item(0.9, false, 0.1),
            item(0.7, true, 0.5),
            item(0.7, true, 0.5),
            item(0.4, false, 1.0),
        ];
        let (a, se) = hajek(&items).unwrap();
        assert!((a - 0.56).abs() < 1e-12, "{a}");
        assert!((se - 0.272_535_942_583_726).abs() < 1e-12, "{se}");
        // Uniform π: the plain proportion (closed form).
        let uniform = [
            item(0.9, true, 0.2),
            item(0.9, false, 0.2),
            item(0.9, true, 0.2),
        ];
        assert!((hajek(&uniform).unwrap().0 - 2.0 / 3.0).abs() < 1e-15);
        assert_eq!(hajek(&[]), None);
    }

    #[test]
    fn weighted_ece_reduces_to_ece_and_weights_by_inverse_pi() {
        let bins = EqualWidthBins::try_new(10).unwrap();
        // π = 1: bin [0.9, 1.0] holds confidences 0.95, 0.95 with one hit: |0.5 − 0.95| = 0.45,
        // weight 2/3; bin [0.3, 0.4) holds 0.35 correct: |1 − 0.35| = 0.65, weight 1/3
        // (closed form: 0.3 + 0.21666…).
        let items = [
            item(0.95, true, 1.0),
            item(0.95, false, 1.0),
            item(0.35, true, 1.0),
        ];
        let e = weighted_ece(&items, &bins).unwrap();
        assert!(
            (e - (2.0 / 3.0 * 0.45 + 1.0 / 3.0 * 0.65)).abs() < 1e-12,
            "{e}"
        );
        // The audited item at π = 0.5 counts twice: bin 9 has weight 3 (hits 2), total 4.
        let items = [
            item(0.95, true, 0.5),
            item(0.95, false, 1.0),
            item(0.35, true, 1.0),
        ];
        let e = weighted_ece(&items, &bins).unwrap();
        let want = 0.75 * (2.0f64 / 3.0 - 0.95).abs() + 0.25 * 0.65;
        assert!((e - want).abs() < 1e-12, "{e} vs {want}");
    }

    #[test]
    fn binned_drift_matches_the_worked_psi_and_a_cdf_gap() {
        // METHODS.md 5.4: e = [0.1, 0.2, 0.4, 0.3], a = [0.15, 0.25, 0.35, 0.25]
        // → PSI 0.04722308044204256 (direct); counts 15, 25, 35, 25 give those proportions.
        let d = binned_drift(&[0.1, 0.2, 0.4, 0.3], &[15, 25, 35, 25])
            .unwrap()
            .unwrap();
        assert!(
            (d.psi - 0.047_223_080_442_042_56).abs() < 1e-12,
            "{}",
            d.psi
        );
        // CDF gaps 0.05, 0.10, 0.05, 0 (closed form).
        assert!((d.ks_binned - 0.1).abs() < 1e-12);
        assert_eq!(binned_drift(&[0.5, 0.5], &[0, 0]).unwrap(), None);
        assert!(binned_drift(&[0.5, 0.5], &[1, 2, 3]).is_err());
    }

    #[test]
    fn proportions_carry_exact_intervals() {
        // scipy 1.17.1: stats.binomtest(45, 50).proportion_ci(0.95, 'exact')
        // → (0.7818646335657977, 0.9667249064109785).
        let p = proportion(45, 50, 0.05).unwrap().unwrap();
        assert!(
            (p.lower - 0.781_864_633_565_797_7).abs() < 1e-9,
            "{}",
            p.lower
        );
        assert!(
            (p.upper - 0.966_724_906_410_978_5).abs() < 1e-9,
            "{}",
            p.upper
        );
        assert_eq!(proportion(0, 0, 0.05).unwrap(), None);
    }
}
