//! Certifying a threshold on journaled traffic, where labels were gathered with known
//! probabilities: every item the old map deferred went to a person, and accepted items were
//! labelled only through the random audit (METHODS.md 4.1–4.2).
//!
//! The items are split by how they came to be labelled: **deferred** by the old map (labelled
//! by people; usually all of them) and **accepted** by the old map (labelled only when audited, a
//! Bernoulli(π) sample independent of the labels). For a threshold θ of the *new* map, let
//! N_D(θ), N_S(θ) be the deferred and accepted items it would accept — known exactly, since the
//! journal keeps every decision's logits — and n_d, e_d and n_s, e_s the labelled ones among them
//! and their errors. An upper confidence bound on the number of errors among the N_D + N_S items
//! is e_d when every deferred item is labelled, else N_D·CP⁺(e_d, n_d), plus N_S·CP⁺(e_s, n_s),
//! where CP⁺ is the one-sided Clopper–Pearson upper bound and δ is split evenly over the strata
//! that were sampled (Bonferroni; the per-stratum combination is ours, METHODS.md 4.1). The
//! binomial bound is conservative for sampling from a finite stratum (common practice).
//!
//! Thresholds are tested by fixed-sequence testing (METHODS.md 3.5) from the top of
//! [`super::certify::default_grid`] down, each at level δ, starting at the first point with at
//! least `min_accepted` items whose counts could pass (see [`SKIP_RATE_FRACTION`]) and stopping at
//! the first failure.

use crate::stats::{clopper_pearson_upper, StatsError};
use serde::{Deserialize, Serialize};

/// How a journaled item came to be labelled.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Stratum {
    /// The old map deferred it: people label such items.
    Deferred,
    /// The old map accepted it: labelled only if audited.
    Accepted,
}

/// One journaled item under the new map.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct StratifiedItem {
    /// New map's calibrated top-label confidence.
    pub confidence: f64,
    /// `Some(true)` when labelled and the new map's prediction is right; `None` when unlabelled.
    pub correct: Option<bool>,
    /// The stratum.
    pub stratum: Stratum,
}

/// One tested threshold.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct StratifiedStep {
    /// θ.
    pub theta: f64,
    /// Items the new map accepts at θ: deferred and accepted by the old map.
    pub accepted: [u64; 2],
    /// Labelled items among them, per stratum.
    pub labelled: [u64; 2],
    /// Errors among the labelled ones, per stratum.
    pub errors: [u64; 2],
    /// Upper confidence bound on the selective risk at θ.
    pub bound: f64,
    /// bound ≤ r*.
    pub passed: bool,
}

/// The certified threshold, or none, with the trace.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct StratifiedCertification {
    /// Lowest threshold certified (None: defer everything).
    pub threshold: Option<f64>,
    /// Target selective risk r*.
    pub target_risk: f64,
    /// δ.
    pub delta: f64,
    /// The risk bound at the threshold (1 when none).
    pub bound: f64,
    /// Share of all items accepted at the threshold.
    pub coverage: f64,
    /// Items (labelled or not).
    pub n: u64,
    /// Every tested threshold, in order.
    pub trace: Vec<StratifiedStep>,
}

/// The risk bound at one threshold (see the module documentation).
///
/// # Errors
/// [`StatsError`] when δ ∉ (0, 1).
pub fn risk_bound(
    accepted: [u64; 2],
    labelled: [u64; 2],
    errors: [u64; 2],
    delta: f64,
) -> Result<f64, StatsError> {
    let total = accepted[0] + accepted[1];
    if total == 0 {
        return Ok(1.0);
    }
    // A stratum is sampled when some of its accepted items have no label.
    let sampled: Vec<usize> = (0..2)
        .filter(|&s| accepted[s] > 0 && labelled[s] < accepted[s])
        .collect();
    let share = delta / sampled.len().max(1) as f64;
    let mut bound = 0.0;
    for s in 0..2 {
        if accepted[s] == 0 {
            continue;
        }
        bound += if sampled.contains(&s) {
            accepted[s] as f64 * clopper_pearson_upper(errors[s], labelled[s], share)?
        } else {
            errors[s] as f64
        };
    }
    Ok(bound / total as f64)
}

/// Share of r* at which the skip rule imagines the error rate (as the plain procedure's
/// [`super::certify::default_min_accepted`] does).
pub const SKIP_RATE_FRACTION: f64 = 0.5;

/// The skip rule: true once a point's counts could be certified if its labelled items erred at
/// [`SKIP_RATE_FRACTION`]·r*. It reads how many items are accepted and labelled, never whether
/// they are right (audit draws are independent of the labels), so skipping keeps the sequence
/// fixed in advance.
fn could_certify(
    accepted: [u64; 2],
    labelled: [u64; 2],
    target_risk: f64,
    delta: f64,
) -> Result<bool, StatsError> {
    let errors = labelled.map(|l| (SKIP_RATE_FRACTION * target_risk * l as f64).floor() as u64);
    Ok(risk_bound(accepted, labelled, errors, delta)? <= target_risk)
}

/// Fixed-sequence certification over `grid` (strictly decreasing) at level δ.
///
/// # Errors
/// [`StatsError`] when δ ∉ (0, 1).
pub fn certify(
    items: &[StratifiedItem],
    target_risk: f64,
    delta: f64,
    grid: &[f64],
    min_accepted: u64,
) -> Result<StratifiedCertification, StatsError> {
    let mut sorted: Vec<&StratifiedItem> = items.iter().collect();
    sorted.sort_by(|a, b| b.confidence.total_cmp(&a.confidence));
    let (mut next, mut acc, mut lab, mut err) = (0usize, [0u64; 2], [0u64; 2], [0u64; 2]);
    let mut trace = Vec::new();
    let mut best: Option<(f64, f64, u64)> = None;
    for &theta in grid {
        while next < sorted.len() && sorted[next].confidence >= theta {
            let it = sorted[next];
            let s = match it.stratum {
                Stratum::Deferred => 0,
                Stratum::Accepted => 1,
            };
            acc[s] += 1;
            if let Some(c) = it.correct {
                lab[s] += 1;
                err[s] += u64::from(!c);
            }
            next += 1;
        }
        // The skip rule only chooses where the sequence starts; from there every point is tested.
        if trace.is_empty()
            && (acc[0] + acc[1] < min_accepted || !could_certify(acc, lab, target_risk, delta)?)
        {
            continue;
        }
        let bound = risk_bound(acc, lab, err, delta)?;
        let passed = bound <= target_risk;
        trace.push(StratifiedStep {
            theta,
            accepted: acc,
            labelled: lab,
            errors: err,
            bound,
            passed,
        });
        if !passed {
            break;
        }
        best = Some((theta, bound, acc[0] + acc[1]));
    }
    let n = items.len() as u64;
    Ok(StratifiedCertification {
        threshold: best.map(|b| b.0),
        target_risk,
        delta,
        bound: best.map_or(1.0, |b| b.1),
        coverage: best.map_or(0.0, |b| b.2 as f64 / n.max(1) as f64),
        n,
        trace,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::decision::certify::default_grid;
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    #[test]
    fn fully_labelled_strata_give_the_exact_risk() {
        // Nothing sampled: the bound is the observed error share (closed form).
        let b = risk_bound([10, 30], [10, 30], [1, 2], 0.05).unwrap();
        assert!((b - 3.0 / 40.0).abs() < 1e-15);
        assert_eq!(risk_bound([0, 0], [0, 0], [0, 0], 0.05).unwrap(), 1.0);
    }

    #[test]
    fn a_sampled_stratum_uses_its_clopper_pearson_bound_at_the_full_delta() {
        // Deferred stratum complete (1 error in 10); accepted stratum: 100 items, 20 audited,
        // 1 error. scipy 1.17.1: stats.beta.ppf(0.95, 2, 19) = 0.2161061642068473 is CP⁺(1, 20, 0.05);
        // the bound is (1 + 100·CP⁺)/110.
        let cp = clopper_pearson_upper(1, 20, 0.05).unwrap();
        assert!((cp - 0.216_106_164_206_847_3).abs() < 1e-9, "{cp}");
        let b = risk_bound([10, 100], [10, 20], [1, 1], 0.05).unwrap();
        assert!((b - (1.0 + 100.0 * cp) / 110.0).abs() < 1e-12);
        // Both strata sampled: δ/2 each.
        let b2 = risk_bound([10, 100], [5, 20], [1, 1], 0.05).unwrap();
        let want = (10.0 * clopper_pearson_upper(1, 5, 0.025).unwrap()
            + 100.0 * clopper_pearson_upper(1, 20, 0.025).unwrap())
            / 110.0;
        assert!((b2 - want).abs() < 1e-12);
    }

    /// A population where the true risk above θ is known: confidence c uniform on [0.5, 1],
    /// wrong with probability 1.2·(1 − c); the old map accepted c ≥ 0.8.
    fn population(rng: &mut ChaCha8Rng, n: usize, audit: f64) -> (Vec<StratifiedItem>, Vec<bool>) {
        let mut items = Vec::with_capacity(n);
        let mut truth = Vec::with_capacity(n);
        for _ in 0..n {
            let c: f64 = rng.random_range(0.5..1.0);
            let right = rng.random::<f64>() >= 1.2 * (1.0 - c);
            let stratum = if c >= 0.8 {
                Stratum::Accepted
            } else {
                Stratum::Deferred
            };
            let labelled = stratum == Stratum::Deferred || rng.random::<f64>() < audit;
            items.push(StratifiedItem {
                confidence: c,
                correct: labelled.then_some(right),
                stratum,
            });
            truth.push(right);
        }
        (items, truth)
    }

    #[test]
    fn the_certified_risk_holds_on_the_whole_population_in_repeated_draws() {
        // 300 seeded populations of 10,000 items, 30% audit, r* = 0.08, δ = 0.1: the share of
        // draws whose certified threshold has an actual error share above r* among all the items
        // it accepts (labelled or not) must stay near δ or below (binomial slack: 3 standard
        // errors of 300 draws).
        let (target, delta, draws) = (0.08, 0.1, 300);
        let grid = default_grid();
        let mut violations = 0;
        let mut certified = 0;
        for seed in 0..draws {
            let mut rng = ChaCha8Rng::seed_from_u64(seed);
            let (items, truth) = population(&mut rng, 10_000, 0.3);
            let c = certify(&items, target, delta, &grid, 50).unwrap();
            let Some(t) = c.threshold else { continue };
            certified += 1;
            let (mut a, mut e) = (0u32, 0u32);
            for (it, &right) in items.iter().zip(&truth) {
                if it.confidence >= t {
                    a += 1;
                    e += u32::from(!right);
                }
            }
            if f64::from(e) / f64::from(a) > target {
                violations += 1;
            }
        }
        assert!(
            certified > draws / 2,
            "certified only {certified} of {draws}"
        );
        let slack = 3.0 * (delta * (1.0 - delta) / f64::from(draws as u32)).sqrt();
        let rate = f64::from(violations) / f64::from(draws as u32);
        assert!(rate <= delta + slack, "violation rate {rate}");
    }

    #[test]
    fn the_sequence_stops_at_the_first_failure_and_counts_coverage_on_every_item() {
        let item = |c: f64, correct: Option<bool>, stratum| StratifiedItem {
            confidence: c,
            correct,
            stratum,
        };
        let mut items = vec![item(0.95, Some(true), Stratum::Deferred); 50];
        items.extend(vec![item(0.90, None, Stratum::Deferred); 50]);
        let c = certify(&items, 0.1, 0.05, &[0.97, 0.95, 0.9], 1).unwrap();
        // At 0.95 all 50 labelled and right: bound 0 passes; at 0.9 half the deferred stratum is
        // unlabelled: bound = CP⁺(0, 50, 0.05) = 1 − 0.05^(1/50) ≈ 0.058 (closed form) passes.
        assert_eq!(c.threshold, Some(0.9));
        assert_eq!(c.trace.len(), 2, "0.97 accepts nothing and is skipped");
        let want = 1.0 - 0.05f64.powf(1.0 / 50.0);
        assert!((c.bound - want).abs() < 1e-9, "{}", c.bound);
        assert_eq!(c.coverage, 1.0);
        // With r* below that bound the sequence stops at 0.9 and keeps 0.95.
        let c = certify(&items, 0.05, 0.05, &[0.97, 0.95, 0.9], 1).unwrap();
        assert_eq!((c.threshold, c.coverage), (Some(0.95), 0.5));
        assert!(!c.trace[1].passed);
    }
}
