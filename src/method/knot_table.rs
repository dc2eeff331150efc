//! Every class's isotonic knots packed into one table for one-vs-rest rows.
//!
//! A one-vs-rest isotonic row at K = 1000 makes a thousand short interval searches, one per class.
//! With each class's knots in separate vectors a row touched five scattered cache lines per class
//! (both ends of x, the fences, the knot block, y) and was bound by memory latency, not arithmetic
//! (`cargo bench --bench apply`, `workspace/isotonic/1000`: 13 µs a row). Here:
//! - the clip range [x₀, x_last] and the first segment (x₁, y₀ and its slope) of every class sit
//!   in arrays of their own, read in class order: one vectorised pass answers every class as if
//!   its score were in its first segment, which at large K is where most scores are (tiny
//!   probabilities, an isotonic fit's flat low block);
//! - the classes whose score is past x₁ are then found eight at a time from a compare mask and
//!   looked up in the knots, stored in blocks of [`BLOCK`] (one 64-byte line) padded with +∞, with
//!   the fences (the last knot of every block but the last) in blocks of their own, and each
//!   knot's value and slope side by side.
//!
//! A lookup past x₁ counts the fences ≤ s (one line for up to 72 knots), then the knots ≤ s in
//! that block (one line): j = #{x ≤ s} ≥ 2, and the answer is y[j−1] + slope[j−1]·(s − x[j−1]),
//! with slope 0 after the last knot. Both counts are branch-free vector compares. Past
//! [`FENCE_BLOCKS_MAX`] fence blocks (520 knots) the interval is found by binary search instead.
//! The arithmetic is exactly [`Isotonic::apply`]'s, so both give the same bits (tested).

use super::Isotonic;

/// Knots per block: eight f64, one 64-byte cache line.
pub const BLOCK: usize = 8;
/// Up to this many fence blocks (64 fences, 65 knot blocks, 520 knots) the interval is found by
/// counting; longer knot lists use binary search.
pub const FENCE_BLOCKS_MAX: usize = 8;

/// Where one class's knots are.
#[derive(Debug, Clone, Copy, PartialEq)]
struct Offsets {
    /// First fence block.
    fence: u32,
    /// Fence blocks.
    fence_blocks: u32,
    /// First knot block; the class's values and slopes start at BLOCK times this.
    block: u32,
    /// Knots.
    knots: u32,
}

/// The knots of every class of a one-vs-rest isotonic map (derived from the maps; never written).
#[derive(Debug, Clone, PartialEq)]
pub struct KnotTable {
    /// x₀ of each class: scores below are clipped to it.
    lo: Vec<f64>,
    /// x_last of each class: scores above are clipped to it.
    hi: Vec<f64>,
    /// x₁ of each class (+∞ for a single knot): the end of the first segment.
    first_end: Vec<f64>,
    /// y₀ of each class.
    first_y: Vec<f64>,
    /// The first segment's slope of each class.
    first_slope: Vec<f64>,
    at: Vec<Offsets>,
    fences: Vec<[f64; BLOCK]>,
    blocks: Vec<[f64; BLOCK]>,
    /// (y, slope) of knot i of a class at BLOCK·offsets.block + i.
    values: Vec<[f64; 2]>,
}

impl KnotTable {
    /// Packs the maps, one per class; None when the table would not fit 32-bit offsets.
    pub fn new(maps: &[&Isotonic]) -> Option<Self> {
        let k = maps.len();
        let mut t = KnotTable {
            lo: Vec::with_capacity(k),
            hi: Vec::with_capacity(k),
            first_end: Vec::with_capacity(k),
            first_y: Vec::with_capacity(k),
            first_slope: Vec::with_capacity(k),
            at: Vec::with_capacity(k),
            fences: Vec::new(),
            blocks: Vec::new(),
            values: Vec::new(),
        };
        for m in maps {
            let (x, y, slope) = (m.x(), m.y(), m.slopes());
            let n = x.len();
            let knot_blocks = n.div_ceil(BLOCK);
            let fences: Vec<f64> = (0..knot_blocks - 1)
                .map(|b| x[b * BLOCK + BLOCK - 1])
                .collect();
            t.at.push(Offsets {
                fence: u32::try_from(t.fences.len()).ok()?,
                fence_blocks: u32::try_from(fences.len().div_ceil(BLOCK)).ok()?,
                block: u32::try_from(t.blocks.len()).ok()?,
                knots: u32::try_from(n).ok()?,
            });
            t.lo.push(x[0]);
            t.hi.push(x[n - 1]);
            t.first_end.push(x.get(1).copied().unwrap_or(f64::INFINITY));
            t.first_y.push(y[0]);
            t.first_slope.push(slope[0]);
            t.fences.extend(padded_blocks(&fences));
            t.blocks.extend(padded_blocks(x));
            t.values
                .extend((0..knot_blocks * BLOCK).map(|i| match i < n {
                    true => [y[i], slope[i]],
                    false => [y[n - 1], 0.0],
                }));
            // The last offsets must fit too.
            u32::try_from(t.blocks.len().max(t.fences.len())).ok()?;
        }
        Some(t)
    }

    /// Number of classes.
    pub fn classes(&self) -> usize {
        self.lo.len()
    }

    /// Overwrites each class's probability score with its map's value clipped to [0, 1] and
    /// returns their sum (in eight lanes, [`crate::numeric::lane_sum`]). `scores` has one entry
    /// per class and no NaN; `clipped` is scratch space, grown to K once.
    ///
    /// The first pass answers every class from its first segment and keeps the clipped score;
    /// the second visits, eight classes at a time, only those whose score is past x₁ (a compare
    /// mask and its set bits: no branch per class).
    #[inline(always)]
    pub fn apply_row(&self, scores: &mut [f64], clipped: &mut Vec<f64>) -> f64 {
        let k = self.classes();
        debug_assert_eq!(scores.len(), k);
        if clipped.len() < k {
            clipped.resize(k, 0.0);
        }
        let clipped = &mut clipped[..k];
        let (lo, hi) = (&self.lo[..k], &self.hi[..k]);
        let (fy, fs) = (&self.first_y[..k], &self.first_slope[..k]);
        // Plain indexed loops over equal-length slices: they vectorise, and a closure might stay
        // un-inlined and lose the caller's vector width.
        for c in 0..k {
            let s = scores[c].max(lo[c]).min(hi[c]);
            clipped[c] = s;
            scores[c] = (fy[c] + fs[c] * (s - lo[c])).clamp(0.0, 1.0);
        }
        let ends = &self.first_end[..k];
        for base in (0..k).step_by(BLOCK) {
            let width = BLOCK.min(k - base);
            let mut past = 0u32;
            for t in 0..width {
                past |= u32::from(clipped[base + t] >= ends[base + t]) << t;
            }
            if past == 0 {
                continue;
            }
            // In stages over the group, so the group's loads of one level are independent of
            // each other instead of one class's chain of three dependent loads after another.
            let mut knot = [0usize; BLOCK];
            let mut m = past;
            while m != 0 {
                let t = m.trailing_zeros() as usize;
                knot[t] = self.knots_at_or_below(base + t, clipped[base + t]);
                m &= m - 1;
            }
            let mut m = past;
            while m != 0 {
                let t = m.trailing_zeros() as usize;
                let c = base + t;
                scores[c] = self
                    .segment_value(c, knot[t] - 1, clipped[c])
                    .clamp(0.0, 1.0);
                m &= m - 1;
            }
        }
        crate::numeric::lane_sum(scores)
    }

    /// The value of class `class`'s map at `s` (for tests and single lookups).
    pub fn value(&self, class: usize, s: f64) -> f64 {
        // max and min ignore a NaN argument, so even a NaN score lands on a knot.
        let s = s.max(self.lo[class]).min(self.hi[class]);
        if s < self.first_end[class] {
            self.first_y[class] + self.first_slope[class] * (s - self.lo[class])
        } else {
            self.segment_value(class, self.knots_at_or_below(class, s) - 1, s)
        }
    }

    /// j = #{x ≤ s} of class `c` for a clipped score s ≥ x₁ (so j ≥ 2).
    #[inline(always)]
    fn knots_at_or_below(&self, c: usize, s: f64) -> usize {
        let h = self.at[c];
        let block = h.block as usize;
        if (h.fence_blocks as usize) <= FENCE_BLOCKS_MAX {
            let fence = h.fence as usize;
            let mut below = 0;
            // Fences increase, so the first block with a fence above s ends the count (and the
            // early exit keeps the compiler from vectorising across blocks with gathers, which
            // is several times slower for the usual single fence block).
            for f in &self.fences[fence..fence + h.fence_blocks as usize] {
                let n = count_at_or_below(f, s);
                below += n;
                if n < BLOCK {
                    break;
                }
            }
            below * BLOCK + count_at_or_below(&self.blocks[block + below], s)
        } else {
            let knots = &self.blocks[block..block + (h.knots as usize).div_ceil(BLOCK)];
            knots.as_flattened()[..h.knots as usize].partition_point(|&x| x <= s)
        }
    }

    /// y[i] + slope[i]·(s − x[i]) of class `c`.
    #[inline(always)]
    fn segment_value(&self, c: usize, i: usize, s: f64) -> f64 {
        let block = self.at[c].block as usize;
        let x = self.blocks[block + i / BLOCK][i % BLOCK];
        let [y, slope] = self.values[block * BLOCK + i];
        y + slope * (s - x)
    }
}

/// How many of the block's values are ≤ s (a NaN-free s; +∞ pads never count). Written as a
/// bit mask and a population count, which compiles to one vector compare and `popcnt`.
#[inline(always)]
fn count_at_or_below(block: &[f64; BLOCK], s: f64) -> usize {
    let mut mask = 0u32;
    for (t, &v) in block.iter().enumerate() {
        mask |= u32::from(v <= s) << t;
    }
    mask.count_ones() as usize
}

/// `values` in blocks of [`BLOCK`], the last padded with +∞.
fn padded_blocks(values: &[f64]) -> impl Iterator<Item = [f64; BLOCK]> + '_ {
    values.chunks(BLOCK).map(|c| {
        let mut b = [f64::INFINITY; BLOCK];
        b[..c.len()].copy_from_slice(c);
        b
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::method::BinaryMap;
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    /// An increasing curve on `n` knots spread unevenly over [lo, hi].
    fn curve(n: usize, lo: f64, hi: f64, rng: &mut ChaCha8Rng) -> Isotonic {
        let mut x: Vec<f64> = (0..n).map(|_| rng.random_range(lo..hi)).collect();
        x.sort_by(f64::total_cmp);
        x.dedup();
        let mut y: Vec<f64> = x.iter().map(|_| rng.random_range(0.0..1.0)).collect();
        y.sort_by(f64::total_cmp);
        Isotonic::try_new(x, y, "m").unwrap()
    }

    #[test]
    fn table_lookups_are_the_maps_own_values_bit_for_bit() {
        // Knot counts around every block and fence-block boundary, one knot, and past the
        // counted limit (binary search), all in one table.
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        let counted = (FENCE_BLOCKS_MAX * BLOCK + 1) * BLOCK;
        let sizes = [
            1,
            2,
            7,
            8,
            9,
            15,
            16,
            17,
            63,
            64,
            65,
            72,
            73,
            counted - 1,
            counted,
            counted + 1,
            2000,
        ];
        let maps: Vec<Isotonic> = sizes
            .iter()
            .map(|&n| curve(n, 0.05, 0.9, &mut rng))
            .collect();
        let t = KnotTable::new(&maps.iter().collect::<Vec<_>>()).unwrap();
        assert_eq!(t.classes(), maps.len());
        for (c, m) in maps.iter().enumerate() {
            let mut points: Vec<f64> = vec![-1.0, 0.0, 0.05, 0.9, 1.0, 2.0, f64::NAN];
            points.extend(m.x().iter().copied());
            points.extend(m.x().windows(2).map(|w| (w[0] + w[1]) / 2.0));
            points.extend((0..200).map(|_| rng.random_range(0.0..1.0)));
            for s in points {
                let (a, b) = (t.value(c, s), m.apply(s));
                assert_eq!(
                    a.to_bits(),
                    b.to_bits(),
                    "class {c} ({} knots), s = {s}",
                    m.x().len()
                );
            }
        }
    }

    #[test]
    fn rows_are_clipped_and_summed() {
        let maps = [
            Isotonic::try_new(vec![0.0, 0.5], vec![0.0, 1.0], "m").unwrap(),
            Isotonic::try_new(vec![0.2], vec![0.25], "m").unwrap(),
        ];
        let t = KnotTable::new(&maps.iter().collect::<Vec<_>>()).unwrap();
        let mut row = [0.25, 0.9];
        let sum = t.apply_row(&mut row, &mut Vec::new());
        assert_eq!(row, [0.5, 0.25]);
        assert_eq!(sum, 0.75);
    }

    #[test]
    fn a_row_answers_every_class_as_its_own_lookup() {
        // K = 19 (two full groups of eight and a partial one), knots of every size class, and
        // scores in and past the first segment, so the mask pass meets every pattern.
        let mut rng = ChaCha8Rng::seed_from_u64(5);
        let maps: Vec<Isotonic> = (0..19)
            .map(|c| curve([1, 3, 9, 64, 700][c % 5], 0.0, 1.0, &mut rng))
            .collect();
        let t = KnotTable::new(&maps.iter().collect::<Vec<_>>()).unwrap();
        let mut scratch = Vec::new();
        for _ in 0..200 {
            let scores: Vec<f64> = (0..19).map(|_| rng.random_range(0.0..1.0)).collect();
            let mut row = scores.clone();
            let sum = t.apply_row(&mut row, &mut scratch);
            let want: Vec<f64> = scores
                .iter()
                .enumerate()
                .map(|(c, &s)| t.value(c, s).clamp(0.0, 1.0))
                .collect();
            assert_eq!(row, want);
            assert_eq!(sum, crate::numeric::lane_sum(&want));
        }
    }
}
