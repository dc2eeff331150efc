//! Binary monotone maps extended to K classes one-vs-rest with renormalisation (Zadrozny & Elkan
//! 2002, KDD; METHODS.md 2.11 (A)).
//!
//! The rule, for a row of logits z with softmax p:
//! - K = 2: one map g for class 1 on the binary score of class 1; q₁ = g(score), q₀ = 1 − q₁.
//!   The score is the log-odds f = z₁ − z₀ for maps on log-odds (Platt) and p₁ = σ(f) for maps on
//!   probabilities (histogram, isotonic, BBQ, beta).
//! - K ≥ 3: one map g_k per class on class k's score (ln p_k − ln(1 − p_k), or p_k);
//!   u_k = g_k(score_k) and q_k = u_k / Σ_j u_j.
//! - Fallback: when Σ_j u_j = 0 (every map says 0) the row becomes uniform 1/K, as scikit-learn's
//!   one-vs-rest calibration does (METHODS.md 2.11, source-read there).

use super::knot_table::KnotTable;
use super::{Isotonic, Problem, Problems};
use crate::numeric::{ln_one_minus_exp, lse, max, softmax_in_place};

/// Which number a binary map reads.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ScoreKind {
    /// The class's log-odds ln p − ln(1 − p) (for K = 2, z₁ − z₀).
    LogOdds,
    /// The class's softmax probability p ∈ [0, 1].
    Probability,
}

/// A validated map from one class's score to the probability of that class.
pub trait BinaryMap {
    /// What the map reads.
    const SCORE: ScoreKind;
    /// P(class | score), in [0, 1]. `score` is never NaN.
    fn apply(&self, score: f64) -> f64;
    /// The knots, when the map is isotonic: a row of such maps is then looked up in one packed
    /// [`KnotTable`] instead of map by map.
    fn knots(&self) -> Option<&Isotonic> {
        None
    }
}

/// One binary map per calibrated class: one for K = 2 (class 1), K for K ≥ 3.
#[derive(Debug, Clone, PartialEq)]
pub struct OneVsRest<M> {
    maps: Vec<M>,
    /// The maps' knots packed for K ≥ 3 rows, when every map has knots (derived from `maps`).
    table: Option<KnotTable>,
}

impl<M: BinaryMap> OneVsRest<M> {
    /// Checks there is one map for K = 2 or K maps for K ≥ 3.
    ///
    /// # Errors
    /// The wrong number of maps, naming the expected count.
    pub fn try_new(classes: usize, maps: Vec<M>, field: &str) -> Result<Self, Vec<Problem>> {
        let mut p = Problems::new();
        let expected = Self::maps_needed(classes);
        if maps.len() != expected {
            p.push(
                field,
                format!(
                    "must have {expected} entr{} for {classes} classes (one for class 1 when K = 2, \
                     one per class otherwise), got {}",
                    if expected == 1 { "y" } else { "ies" },
                    maps.len()
                ),
            );
        }
        let table = if maps.len() >= 3 {
            maps.iter()
                .map(M::knots)
                .collect::<Option<Vec<&Isotonic>>>()
                .and_then(|knots| KnotTable::new(&knots))
        } else {
            None
        };
        p.finish(OneVsRest { maps, table })
    }

    /// How many maps K classes need.
    pub fn maps_needed(classes: usize) -> usize {
        if classes == 2 {
            1
        } else {
            classes
        }
    }

    /// The per-class maps.
    pub fn maps(&self) -> &[M] {
        &self.maps
    }

    /// Overwrites a row of logits with calibrated probabilities by the rule in the module docs.
    #[inline(always)]
    pub fn apply_in_place(&self, z: &mut [f64], scratch: &mut Vec<f64>) {
        if z.len() == 2 {
            let f = z[1] - z[0];
            let f = if f.is_nan() { 0.0 } else { f }; // (+∞) − (+∞): an undecided pair.
            let score = match M::SCORE {
                ScoreKind::LogOdds => f,
                ScoreKind::Probability => crate::numeric::sigmoid(f),
            };
            let q1 = self.maps[0].apply(score).clamp(0.0, 1.0);
            z[0] = 1.0 - q1;
            z[1] = q1;
            return;
        }
        let mut sum = 0.0;
        if M::SCORE == ScoreKind::Probability && max(z).is_finite() {
            // The scores are softmax(z): one vectorised pass (one exp per class) instead of
            // lse and a libm exp per class, a third of the cost of an isotonic row at K = 1000.
            softmax_in_place(z);
            if let Some(t) = &self.table {
                sum = t.apply_row(z, scratch);
            } else {
                for (v, map) in z.iter_mut().zip(&self.maps) {
                    *v = map.apply(*v).clamp(0.0, 1.0);
                    sum += *v;
                }
            }
        } else {
            let norm = lse(z);
            for (v, map) in z.iter_mut().zip(&self.maps) {
                let lp = if norm.is_finite() { *v - norm } else { 0.0 };
                let score = match M::SCORE {
                    ScoreKind::LogOdds => lp - ln_one_minus_exp(lp.min(0.0)),
                    ScoreKind::Probability => lp.exp(),
                };
                let score = if score.is_nan() { 0.0 } else { score };
                *v = map.apply(score).clamp(0.0, 1.0);
                sum += *v;
            }
        }
        if sum > 0.0 {
            let inv = 1.0 / sum;
            z.iter_mut().for_each(|v| *v *= inv);
        } else {
            let u = 1.0 / z.len() as f64;
            z.iter_mut().for_each(|v| *v = u);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A map that returns a fixed value, to test the reduction rule alone.
    #[derive(Debug, Clone)]
    struct Constant(f64, ScoreKind);
    impl BinaryMap for Constant {
        const SCORE: ScoreKind = ScoreKind::Probability;
        fn apply(&self, score: f64) -> f64 {
            assert!((0.0..=1.0).contains(&score));
            let _ = self.1;
            self.0
        }
    }

    /// Returns its input: probability scores pass straight through.
    #[derive(Debug)]
    struct Echo;
    impl BinaryMap for Echo {
        const SCORE: ScoreKind = ScoreKind::Probability;
        fn apply(&self, score: f64) -> f64 {
            score
        }
    }

    #[test]
    fn binary_uses_one_map_on_class_one() {
        let m = OneVsRest::try_new(2, vec![Constant(0.8, ScoreKind::Probability)], "m").unwrap();
        let mut z = [0.3, -4.0];
        m.apply_in_place(&mut z, &mut Vec::new());
        assert_eq!(z, [1.0 - 0.8, 0.8]);
    }

    #[test]
    fn multiclass_renormalises_and_falls_back_to_uniform() {
        let maps = vec![
            Constant(0.2, ScoreKind::Probability),
            Constant(0.2, ScoreKind::Probability),
            Constant(0.6, ScoreKind::Probability),
        ];
        let m = OneVsRest::try_new(3, maps, "m").unwrap();
        let mut z = [1.0, 2.0, 3.0];
        m.apply_in_place(&mut z, &mut Vec::new());
        assert!((z[0] - 0.2).abs() < 1e-15 && (z[2] - 0.6).abs() < 1e-15);
        let zeros = vec![Constant(0.0, ScoreKind::Probability); 3];
        let m = OneVsRest::try_new(3, zeros, "m").unwrap();
        let mut z = [1.0, 2.0, 3.0];
        m.apply_in_place(&mut z, &mut Vec::new());
        assert_eq!(z, [1.0 / 3.0; 3]);
    }

    #[test]
    fn identity_maps_give_softmax() {
        let m = OneVsRest::try_new(3, vec![Echo, Echo, Echo], "m").unwrap();
        let mut z = [1.0, 2.0, 3.0];
        let mut want = z;
        crate::numeric::softmax_in_place(&mut want);
        m.apply_in_place(&mut z, &mut Vec::new());
        for i in 0..3 {
            assert!((z[i] - want[i]).abs() < 1e-15);
        }
    }

    #[test]
    fn wrong_number_of_maps_is_named() {
        let err = OneVsRest::try_new(4, vec![Echo, Echo], "method.per_class").unwrap_err();
        assert_eq!(err[0].field, "method.per_class");
        assert!(
            err[0].message.contains("must have 4 entries"),
            "{}",
            err[0].message
        );
    }
}
