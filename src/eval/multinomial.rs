//! Bootstrap multiplicities drawn chunk by chunk, for the fast engine of the standard set.
//!
//! One replicate of the bootstrap draws n items uniformly with replacement; what a metric sees is
//! the count w_j of each item, and (w_1, …, w_n) ~ Multinomial(n; 1/n, …, 1/n). Here the items
//! are split into consecutive chunks of [`CHUNK`] and the counts are drawn in two stages:
//! 1. chunk totals T_c ~ Multinomial(n; |c|/n), by sequential binomials
//!    T_c ~ Binomial(n − Σ_{c' < c} T_c', |c| / (n − start_c)), the last chunk taking the rest;
//! 2. the T_c draws of chunk c spread uniformly over its items.
//!
//! This is the multinomial law exactly (a multinomial conditioned on its chunk totals is a
//! product of multinomials), so it is the same bootstrap as drawing n indices; only the random
//! stream differs. Its use is that the counts of any one chunk come from (seed, replicate,
//! chunk) alone, in a cache-sized buffer, with no n-long index list and no scattered writes.
//!
//! Stream: `ChaCha8Rng::seed_from_u64(seed)` with `set_stream(replicate)` (rand_chacha 0.9); the
//! totals start at word 0, chunk c's draws at word (c + 1)·2^[`REGION_BITS`]; binomials from
//! rand_distr 0.5 `Binomial` (BINV / BTPE, exact samplers), uniform positions from rand 0.9
//! `Uniform<u32>` (Lemire's multiply-and-reject, no modulo bias).

use rand::distr::{Distribution, Uniform};
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::Binomial;

/// Items per chunk. Part of the stream's definition: changing it changes every replicate.
pub(crate) const CHUNK: usize = 1024;

/// log₂ of the 32-bit words of stream reserved for each chunk's draws (and for the totals).
/// ChaCha's word position has 68 bits, so 2^(68 − 40) − 1 chunks fit (about 2.7·10¹¹ items)
/// without two regions overlapping.
pub(crate) const REGION_BITS: u32 = 40;

/// Most items the chunked draw serves: the sweep keeps counts in `u32` (a set this large would
/// need more than 64 GiB of probabilities anyway).
pub(crate) const MAX_ITEMS: usize = u32::MAX as usize;

/// Name of the scheme, recorded with every interval it produces.
pub const CHUNKED_RNG_NAME: &str = "ChaCha8Rng (rand_chacha 0.9), seed_from_u64(seed), \
stream = replicate; multinomial counts drawn per chunk of 1024 items (binomial chunk totals, \
then uniform positions)";

/// Where a weight source gets one replicate's counts, chunk by chunk. The fast engine reads
/// counts only through this, so tests can feed chosen counts.
pub(crate) trait ChunkCounts: Sync {
    /// Items per chunk (every chunk but the last is this long).
    fn chunk_len(&self) -> usize;
    /// The chunk totals T_c of replicate `r`.
    fn totals(&self, r: usize) -> Vec<u64>;
    /// Adds the counts of chunk `c` of replicate `r` (whose total is `total`) into `add`, called
    /// once per draw with the item's offset inside the chunk.
    fn fill(&self, r: usize, c: usize, total: u64, add: &mut dyn FnMut(usize));
}

/// The seeded chunked multinomial draw of n items.
pub(crate) struct ChunkedMultinomial {
    n: usize,
    seed: u64,
}

impl ChunkedMultinomial {
    /// Counts for n items from `seed`; n must be at most [`MAX_ITEMS`] (checked by the caller).
    pub fn new(n: usize, seed: u64) -> Self {
        debug_assert!(n <= MAX_ITEMS);
        Self { n, seed }
    }

    fn stream(&self, r: usize, region: usize) -> ChaCha8Rng {
        let mut rng = ChaCha8Rng::seed_from_u64(self.seed);
        rng.set_stream(r as u64);
        rng.set_word_pos((region as u128) << REGION_BITS);
        rng
    }
}

impl ChunkCounts for ChunkedMultinomial {
    fn chunk_len(&self) -> usize {
        CHUNK
    }

    fn totals(&self, r: usize) -> Vec<u64> {
        let chunks = self.n.div_ceil(CHUNK);
        let mut rng = self.stream(r, 0);
        let mut totals = Vec::with_capacity(chunks);
        let mut draws_left = self.n as u64;
        for c in 0..chunks {
            let start = c * CHUNK;
            let len = CHUNK.min(self.n - start);
            let items_left = self.n - start;
            let t = if len == items_left {
                draws_left
            } else {
                // 0 < len < items_left, so p is in (0, 1) and Binomial::new cannot fail.
                let p = len as f64 / items_left as f64;
                Binomial::new(draws_left, p).map_or(0, |b| b.sample(&mut rng))
            };
            totals.push(t);
            draws_left -= t;
        }
        totals
    }

    fn fill(&self, r: usize, c: usize, total: u64, add: &mut dyn FnMut(usize)) {
        let len = CHUNK.min(self.n - c * CHUNK);
        let Ok(uniform) = Uniform::new(0, len as u32) else {
            return;
        };
        let mut rng = self.stream(r, c + 1);
        for _ in 0..total {
            add(uniform.sample(&mut rng) as usize);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// All n counts of replicate r, in item order.
    fn counts(draw: &ChunkedMultinomial, r: usize) -> Vec<u64> {
        let totals = draw.totals(r);
        let mut w = vec![0u64; draw.n];
        for (c, &t) in totals.iter().enumerate() {
            let base = c * CHUNK;
            draw.fill(r, c, t, &mut |j| w[base + j] += 1);
        }
        w
    }

    #[test]
    fn every_replicate_draws_n_items_and_is_reproducible() {
        for n in [1, 7, CHUNK, CHUNK + 1, 5 * CHUNK + 17] {
            let draw = ChunkedMultinomial::new(n, 42);
            for r in 0..3 {
                let w = counts(&draw, r);
                assert_eq!(w.iter().sum::<u64>(), n as u64);
                assert_eq!(w, counts(&draw, r));
            }
            if n > 1 {
                assert_ne!(counts(&draw, 0), counts(&draw, 1));
                assert_ne!(counts(&draw, 0), counts(&ChunkedMultinomial::new(n, 43), 0));
            }
        }
    }

    #[test]
    fn small_sample_follows_the_multinomial_law() {
        // n = 3 items, 3 draws: the 10 count vectors have probability 3!/(w1! w2! w3!) / 27
        // (closed form): 1/27 for (3,0,0)-type, 3/27 for (2,1,0)-type, 6/27 for (1,1,1).
        // Pearson's chi-square over 27,000 replicates with 9 degrees of freedom stays below
        // 27.88, its 0.999 quantile (scipy 1.17.1: stats.chi2.ppf(0.999, 9) = 27.877...).
        let draw = ChunkedMultinomial::new(3, 7);
        let reps = 27_000;
        let mut seen = std::collections::BTreeMap::new();
        for r in 0..reps {
            *seen.entry(counts(&draw, r)).or_insert(0u64) += 1;
        }
        assert_eq!(seen.len(), 10);
        let chi2: f64 = seen
            .iter()
            .map(|(w, &o)| {
                let fact = |k: u64| (1..=k).product::<u64>() as f64;
                let p = 6.0 / w.iter().map(|&k| fact(k)).product::<f64>() / 27.0;
                let e = p * reps as f64;
                (o as f64 - e).powi(2) / e
            })
            .sum();
        assert!(chi2 < 27.88, "chi-square {chi2}");
    }

    #[test]
    fn counts_have_multinomial_moments_across_chunks() {
        // Multinomial(n; 1/n): E w_j = 1, Var w_j = 1 − 1/n, Cov(w_i, w_j) = −1/n (closed
        // form). Chunk sums over 3 chunks of 1024 + a short one: Var = s(1 − s/n) for s items.
        let n = 3 * CHUNK + 100;
        let draw = ChunkedMultinomial::new(n, 5);
        let reps = 2000;
        let (mut sum, mut sum_sq, mut chunk_sq) = (0.0, 0.0, 0.0);
        for r in 0..reps {
            let w = counts(&draw, r);
            sum += w.iter().sum::<u64>() as f64;
            sum_sq += w.iter().map(|&k| (k * k) as f64).sum::<f64>();
            let s: u64 = w[..CHUNK].iter().sum();
            chunk_sq += (s as f64 - CHUNK as f64).powi(2);
        }
        let cells = (n * reps) as f64;
        let mean = sum / cells;
        let var = sum_sq / cells - mean * mean;
        assert!((mean - 1.0).abs() < 1e-12);
        // 6.2 million counts: the variance estimate's standard error is about 0.0008.
        assert!(
            (var - (1.0 - 1.0 / n as f64)).abs() < 0.005,
            "variance {var}"
        );
        let want = CHUNK as f64 * (1.0 - CHUNK as f64 / n as f64);
        let got = chunk_sq / reps as f64;
        // 2000 replicates: relative standard error of a variance estimate ≈ sqrt(2/2000) ≈ 3%.
        assert!(
            (got / want - 1.0).abs() < 0.15,
            "chunk variance {got}, want {want}"
        );
    }
}
