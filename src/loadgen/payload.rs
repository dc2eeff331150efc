//! Deterministic request payloads: the same seed, K and count give the same logits on every
//! machine, so two servers (or two runs) are measured on identical requests.

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;

/// Spread of the background logits (standard deviation).
pub const LOGIT_SCALE: f64 = 2.0;
/// Largest extra margin given to each row's planted top class, so rows range from undecided
/// (margin near 0, low confidence, deferred) to clear-cut (accepted).
pub const MAX_MARGIN: f64 = 12.0;

/// `count` rows of `classes` logits from a ChaCha8 stream seeded with `seed`: N(0, LOGIT_SCALE²)
/// per class plus a uniform margin in [0, MAX_MARGIN) on one class chosen uniformly per row.
pub fn generate(seed: u64, classes: usize, count: usize) -> Vec<Vec<f32>> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    (0..count)
        .map(|_| {
            let mut row: Vec<f32> = (0..classes)
                .map(|_| {
                    let z: f64 = rng.sample(StandardNormal);
                    (LOGIT_SCALE * z) as f32
                })
                .collect();
            if classes > 0 {
                let top = rng.random_range(0..classes);
                let margin = rng.random_range(0.0..MAX_MARGIN);
                row[top] += margin as f32;
            }
            row
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn same_seed_same_rows_other_seed_other_rows() {
        let a = generate(7, 10, 5);
        assert_eq!(a, generate(7, 10, 5));
        assert_ne!(a, generate(8, 10, 5));
        assert_eq!(a.len(), 5);
        assert!(a
            .iter()
            .all(|r| r.len() == 10 && r.iter().all(|v| v.is_finite())));
    }

    #[test]
    fn a_longer_run_starts_with_the_shorter_one() {
        // Rows are drawn in order, so asking for more payloads only appends.
        let short = generate(3, 4, 2);
        let long = generate(3, 4, 6);
        assert_eq!(short[..], long[..2]);
    }
}
