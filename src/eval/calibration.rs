//! Binned calibration errors: top-label ECE, MCE and ECE_p on equal-width bins (Naeini et al.
//! 2015; Guo et al. 2017), adaptive ECE on equal-mass groups (Nixon et al. 2019), classwise ECE
//! (Kull et al. 2019) and the plug-in and debiased CE² (Kumar, Liang & Ma 2019). METHODS.md
//! 1.3–1.5 and 1.10.

use super::bins::{array_split_end, ece_of, lp_sum, mce_of, top_label_stats, BinStats};
use super::order::ascending_order;
use super::{EqualWidthBins, EvalError, Predictions};
use serde::Serialize;

/// Top-label ECE: Σ over non-empty bins of (n_m/n)·|acc_m − conf_m|, in [0, 1].
pub fn ece(p: &Predictions<'_>, bins: &EqualWidthBins) -> f64 {
    ece_of(&top_label_stats(p, bins), p.n() as u64)
}

/// MCE: the largest |acc_m − conf_m| over non-empty bins (report bin counts next to it).
pub fn mce(p: &Predictions<'_>, bins: &EqualWidthBins) -> f64 {
    mce_of(&top_label_stats(p, bins))
}

/// ECE_p = (Σ_m (n_m/n)·|acc_m − conf_m|^p)^{1/p} for a finite `power` ≥ 1.
///
/// # Errors
/// [`EvalError::Setting`] if `power` is not finite or below 1.
pub fn ece_lp(p: &Predictions<'_>, bins: &EqualWidthBins, power: f64) -> Result<f64, EvalError> {
    if !(power.is_finite() && power >= 1.0) {
        return Err(EvalError::Setting {
            what: "ECE exponent",
            value: power,
            rule: "must be finite and at least 1",
        });
    }
    Ok(lp_sum(&top_label_stats(p, bins), p.n() as u64, power).powf(1.0 / power))
}

/// RMS calibration error: ECE_p with p = 2.
pub fn rms_calibration_error(p: &Predictions<'_>, bins: &EqualWidthBins) -> f64 {
    lp_sum(&top_label_stats(p, bins), p.n() as u64, 2.0).sqrt()
}

/// Adaptive (equal-mass) ECE with `n_groups` groups: confidences sorted ascending with a stable
/// sort (ties keep input order), sorted positions split by the numpy.array_split rule (the first
/// `n mod B` groups hold one extra item; METHODS.md 1.4), groups split by position even inside
/// a tie, empty groups (n < B) skipped.
///
/// # Errors
/// [`EvalError::Setting`] if `n_groups` is 0.
pub fn adaptive_ece(p: &Predictions<'_>, n_groups: usize) -> Result<f64, EvalError> {
    check_groups(n_groups)?;
    let conf = p.confidence();
    let order = ascending_order(conf);
    let n = p.n();
    let mut stats = vec![BinStats::default(); n_groups];
    let mut start = 0;
    for (g, slot) in stats.iter_mut().enumerate() {
        let end = array_split_end(n, n_groups, g);
        for &i in &order[start..end] {
            slot.add(conf[i], p.correct()[i], 1);
        }
        start = end;
    }
    Ok(ece_of(&stats, n as u64))
}

/// Rejects a group count of 0.
pub(crate) fn check_groups(n_groups: usize) -> Result<(), EvalError> {
    if n_groups == 0 {
        return Err(EvalError::Setting {
            what: "equal-mass group count",
            value: 0.0,
            rule: "must be at least 1",
        });
    }
    Ok(())
}

/// Classwise ECE: the mean over classes k of the ECE of q_ik against 1[y_i = k], each class
/// binned over all n items with the given equal-width bins (METHODS.md 1.5).
pub fn classwise_ece(p: &Predictions<'_>, bins: &EqualWidthBins) -> f64 {
    let k_count = p.n_classes();
    let mut stats = vec![BinStats::default(); k_count * bins.n_bins()];
    for (i, &label) in p.labels().iter().enumerate() {
        for (k, &q) in p.row(i).iter().enumerate() {
            stats[k * bins.n_bins() + bins.bin_of(q)].add(q, k == label as usize, 1);
        }
    }
    let n = p.n() as u64;
    let total: f64 = stats
        .chunks_exact(bins.n_bins())
        .map(|s| ece_of(s, n))
        .sum();
    total / k_count as f64
}

/// Squared (ℓ2) top-label calibration error, plug-in and debiased (METHODS.md 1.10).
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct SquaredCalibrationError {
    /// Σ_m (n_m/n)(acc_m − conf_m)²; biased upward for a calibrated model.
    pub plugin: f64,
    /// Σ_{m: n_m ≥ 2} (n_m/n)[(acc_m − conf_m)² − acc_m(1 − acc_m)/(n_m − 1)]; may be negative,
    /// reported as is.
    pub debiased: f64,
}

/// Plug-in and debiased CE² on equal-width bins (Kumar, Liang & Ma 2019).
pub fn squared_calibration_error(
    p: &Predictions<'_>,
    bins: &EqualWidthBins,
) -> SquaredCalibrationError {
    let stats = top_label_stats(p, bins);
    let n = p.n() as f64;
    let mut debiased = 0.0;
    for s in stats.iter().filter(|s| s.count >= 2) {
        if let Some((conf, acc)) = s.means() {
            let m = s.count as f64;
            debiased += (m / n) * ((acc - conf).powi(2) - acc * (1.0 - acc) / (m - 1.0));
        }
    }
    SquaredCalibrationError {
        plugin: lp_sum(&stats, p.n() as u64, 2.0),
        debiased,
    }
}

#[cfg(test)]
mod tests {
    use super::super::fixtures::{E3_LABELS, E3_PROBS, RANDOM_LABELS, RANDOM_PROBS};
    use super::*;

    fn close(got: f64, want: f64, rel: f64) {
        assert!(
            (got - want).abs() <= rel * want.abs().max(1e-300),
            "got {got}, want {want}"
        );
    }

    /// For METHODS.md values printed to 10 decimals: half a unit in the last place.
    fn close10(got: f64, want: f64) {
        assert!((got - want).abs() <= 5e-11, "got {got}, want {want}");
    }

    fn bins(m: usize) -> EqualWidthBins {
        EqualWidthBins::try_new(m).unwrap()
    }

    #[test]
    fn e3_binned_errors() {
        let p = Predictions::try_new(&E3_PROBS, 3, &E3_LABELS).unwrap();
        // METHODS.md E3 (values given to 10 digits where shown so).
        close(ece(&p, &bins(5)), 0.09375, 1e-12);
        close10(mce(&p, &bins(5)), 0.1366666667);
        close(ece(&p, &bins(15)), 0.25625, 1e-12);
        close(mce(&p, &bins(15)), 0.61, 1e-12);
        close(adaptive_ece(&p, 2).unwrap(), 0.22125, 1e-12);
        // array_split sizes (3,3,2) → 0.09375; the floor rule (2,3,3) would give 0.18625.
        close(adaptive_ece(&p, 3).unwrap(), 0.09375, 1e-12);
        close10(classwise_ece(&p, &bins(5)), 0.1983333333);
        close10(classwise_ece(&p, &bins(15)), 0.2716666667);
        let ce2 = squared_calibration_error(&p, &bins(5));
        close10(ce2.plugin, 0.0110208333);
        close(ce2.debiased, -0.0723125, 1e-12);
    }

    #[test]
    fn random_set_matches_numpy() {
        let p = Predictions::try_new(&RANDOM_PROBS, 3, &RANDOM_LABELS).unwrap();
        close(ece(&p, &bins(15)), 0.20182661385130696, 1e-12); // ece_mce(conf, hit, 15)[0]
        close(mce(&p, &bins(15)), 0.5547326360662717, 1e-12); // ece_mce(conf, hit, 15)[1]
        close(ece(&p, &bins(10)), 0.11769166240601422, 1e-12); // ece_mce(conf, hit, 10)[0]
        close(mce(&p, &bins(10)), 0.17877320801365337, 1e-12); // ece_mce(conf, hit, 10)[1]
                                                               // ece_mce(conf, hit, 15, 2)[0]
        close(
            rms_calibration_error(&p, &bins(15)),
            0.2332321471272956,
            1e-12,
        );
        close(
            ece_lp(&p, &bins(15), 2.0).unwrap(),
            0.2332321471272956,
            1e-12,
        );
        close(adaptive_ece(&p, 15).unwrap(), 0.18131079707179867, 1e-12); // adaptive(conf, hit, 15)
        close(adaptive_ece(&p, 4).unwrap(), 0.15012389720351618, 1e-12); // adaptive(conf, hit, 4)
        close(classwise_ece(&p, &bins(15)), 0.18707220540249012, 1e-12); // classwise(P, y, 15)
        let ce2 = squared_calibration_error(&p, &bins(10)); // ce2(conf, hit, 10)
        close(ce2.plugin, 0.016812002483753218, 1e-12);
        close(ce2.debiased, -0.027553076881326147, 1e-12);
    }

    #[test]
    fn edge_cases_of_section_1_11() {
        // All correct: ECE = mean(1 − conf) (METHODS.md 1.11); ECE_1 equals ECE.
        let probs = [0.9, 0.1, 0.3, 0.7, 0.6, 0.4];
        let p = Predictions::try_new(&probs, 2, &[0, 1, 0]).unwrap();
        close(ece(&p, &bins(1)), (0.1 + 0.3 + 0.4) / 3.0, 1e-15);
        close(ece_lp(&p, &bins(7), 1.0).unwrap(), ece(&p, &bins(7)), 1e-15);
        // More groups than items: empty groups are skipped, each item is its own group.
        close(adaptive_ece(&p, 5).unwrap(), (0.1 + 0.3 + 0.4) / 3.0, 1e-15);
        assert!(adaptive_ece(&p, 0).is_err());
        assert!(ece_lp(&p, &bins(5), 0.5).is_err());
        assert!(ece_lp(&p, &bins(5), f64::NAN).is_err());
        // conf = 1 lands in the last bin, conf = 0.8 (the edge 4·0.2, exact in f64) in the bin
        // below it: two bins with gaps 0 and 0.8; one shared bin would give MCE 0.4.
        let p = Predictions::try_new(&[1.0, 0.0, 0.2, 0.8], 2, &[0, 0]).unwrap();
        close(mce(&p, &bins(5)), 0.8, 1e-15);
        close(ece(&p, &bins(5)), 0.4, 1e-15);
    }
}
