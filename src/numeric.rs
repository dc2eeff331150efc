//! Numerical primitives shared by every method and metric (METHODS.md section 0.2).
//!
//! Everything here is pure: f64 arithmetic on slices, no allocation, no I/O.

/// A logit element type: candor stores logits as f32 (wire, files) or f64 (fits) and computes
/// in f64 either way.
pub trait Logit: Copy + Send + Sync + 'static {
    /// The value widened to f64.
    fn to_f64(self) -> f64;
}

impl Logit for f32 {
    #[inline(always)]
    fn to_f64(self) -> f64 {
        f64::from(self)
    }
}

impl Logit for f64 {
    #[inline(always)]
    fn to_f64(self) -> f64 {
        self
    }
}

/// Largest element of `z` (−∞ for an empty slice). NaN must have been rejected by the caller.
#[inline]
pub fn max(z: &[f64]) -> f64 {
    z.iter().copied().fold(f64::NEG_INFINITY, f64::max)
}

/// log-sum-exp: `m + ln(1 + Σ_{j≠j*} exp(z_j − m))` with `m = z_{j*} = max z`; −∞ for an empty
/// or all −∞ slice.
///
/// Summing every term but the maximum's and using `ln_1p` keeps ln p_k = z_k − lse(z) accurate
/// when one class holds nearly all the mass (as scipy.special.logsumexp does).
#[inline]
pub fn lse(z: &[f64]) -> f64 {
    let m = max(z);
    if !m.is_finite() {
        return m;
    }
    let top = z.iter().position(|&v| v == m).unwrap_or(0);
    let rest: f64 = z
        .iter()
        .enumerate()
        .filter(|&(j, _)| j != top)
        .map(|(_, &v)| (v - m).exp())
        .sum();
    m + rest.ln_1p()
}

/// Below this argument [`exp_nonpositive`] returns 0: e^−708 ≈ 3e−308 is the smallest power that
/// stays a normal f64, and anything smaller vanishes next to the row maximum's e^0 = 1 anyway
/// (and rounds to 0 in the f32 a response carries).
pub const EXP_UNDERFLOW: f64 = -708.0;

/// e^x for x ≤ 0, written so the compiler can vectorise a loop of it (no calls, no branches).
///
/// Range reduction x = k·ln 2 + r with |r| ≤ ln 2 / 2 and a degree-13 Taylor polynomial for e^r
/// (truncation error below 1e−17 relative, evaluated by Estrin's scheme), scaled by 2^k built from the exponent bits. Maximum
/// error against `f64::exp` is a few ulp (tested below); arguments below [`EXP_UNDERFLOW`] give 0.
/// Used for softmax, where every argument is z_k − max z ≤ 0.
#[inline(always)]
pub fn exp_nonpositive(x: f64) -> f64 {
    // 1.5·2^52: adding it rounds to the nearest integer and leaves k in the low mantissa bits.
    const SHIFT: f64 = 6755399441055744.0;
    // ln 2 split as in fdlibm: LN2_HI has its low 32 bits zero, so k·LN2_HI is exact for the k
    // that occur; LN2_LO carries the rest.
    const LN2_HI: f64 = f64::from_bits(0x3fe6_2e42_fee0_0000); // 6.93147180369123816490e-01
    const LN2_LO: f64 = f64::from_bits(0x3dea_39ef_3579_3c76); // 1.90821492927058770002e-10
    let xc = x.max(EXP_UNDERFLOW);
    let t = xc * std::f64::consts::LOG2_E + SHIFT;
    let k = t - SHIFT;
    let r = (xc - k * LN2_HI) - k * LN2_LO;
    // Taylor coefficients 1/n!, n = 0 … 13, evaluated by Estrin's scheme: a short dependency
    // chain, so consecutive elements overlap in the pipeline.
    let r2 = r * r;
    let r4 = r2 * r2;
    let r8 = r4 * r4;
    let a0 = 1.0 + r;
    let a1 = 0.5 + r * (1.0 / 6.0);
    let a2 = 1.0 / 24.0 + r * (1.0 / 120.0);
    let a3 = 1.0 / 720.0 + r * (1.0 / 5_040.0);
    let a4 = 1.0 / 40_320.0 + r * (1.0 / 362_880.0);
    let a5 = 1.0 / 3_628_800.0 + r * (1.0 / 39_916_800.0);
    let a6 = 1.0 / 479_001_600.0 + r * (1.0 / 6_227_020_800.0);
    let b0 = a0 + r2 * a1;
    let b1 = a2 + r2 * a3;
    let b2 = a4 + r2 * a5;
    let p = (b0 + r4 * b1) + r8 * (b2 + r4 * a6);
    // t's low bits hold k (two's complement); (k + 1023) << 52 is 2^k. The shift pushes SHIFT's
    // own bits out of the word.
    let scale = f64::from_bits(t.to_bits().wrapping_add(1023) << 52);
    if x < EXP_UNDERFLOW {
        0.0
    } else {
        p * scale
    }
}

/// Lanes of the partial maxima and sums below: enough independent accumulators for the
/// compiler to vectorise, and a fixed reduction order so results do not depend on the machine.
const LANES: usize = 8;

/// Largest element, with eight running maxima (NaN must have been rejected by the caller).
#[inline(always)]
fn max_lanes(z: &[f64]) -> f64 {
    let mut acc = [f64::NEG_INFINITY; LANES];
    let chunks = z.chunks_exact(LANES);
    let tail = chunks.remainder();
    for c in chunks {
        for (a, v) in acc.iter_mut().zip(c) {
            *a = if *v > *a { *v } else { *a };
        }
    }
    let mut m = acc.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    for &v in tail {
        m = m.max(v);
    }
    m
}

/// Overwrites `z` with `softmax(z)` in place. Returns `lse(z)` of the input.
///
/// Computes `exp(z_k − m)` once per element (by [`exp_nonpositive`]) and divides by their sum,
/// accumulated in eight lanes and reduced in a fixed order. An all −∞ row cannot be normalised
/// and becomes uniform; +∞ entries share the mass.
#[inline(always)]
pub fn softmax_in_place(z: &mut [f64]) -> f64 {
    softmax_scaled_in_place(z, 1.0)
}

/// Overwrites `z` with `softmax(β·z)` for β > 0 in one pass fewer than scaling first, and returns
/// `lse(β·z)`. Since β > 0, max(β·z) = β·max(z) and every exponent is β·(z_k − max z) ≤ 0.
#[inline(always)]
pub fn softmax_scaled_in_place(z: &mut [f64], beta: f64) -> f64 {
    debug_assert!(beta > 0.0);
    let m = max_lanes(z);
    if m == f64::NEG_INFINITY {
        let u = 1.0 / z.len() as f64;
        z.iter_mut().for_each(|v| *v = u);
        return m;
    }
    if m == f64::INFINITY {
        // Mass goes to the +∞ entries, shared evenly (the limit of softmax(z) as those grow).
        let n = z.iter().filter(|v| **v == f64::INFINITY).count() as f64;
        z.iter_mut()
            .for_each(|v| *v = if *v == f64::INFINITY { 1.0 / n } else { 0.0 });
        return m;
    }
    // Plain loops, not closures passed to for_each: a closure is a separate function that the
    // compiler may leave un-inlined, and then it runs at the baseline vector width even inside a
    // caller compiled for AVX2 or AVX-512 (method::Workspace::apply dispatches so).
    for v in z.iter_mut() {
        *v = exp_nonpositive(beta * (*v - m));
    }
    let sum = lane_sum(z);
    let inv = 1.0 / sum;
    for v in z.iter_mut() {
        *v *= inv;
    }
    beta * m + sum.ln()
}

/// The sum of `z`, accumulated in eight lanes and reduced in a fixed order: vector-wide, and the
/// same bits on every instruction set.
#[inline(always)]
pub fn lane_sum(z: &[f64]) -> f64 {
    let mut acc = [0.0f64; LANES];
    let chunks = z.chunks_exact(LANES);
    let tail = chunks.remainder();
    for c in chunks {
        for (a, v) in acc.iter_mut().zip(c) {
            *a += v;
        }
    }
    acc.iter().sum::<f64>() + tail.iter().sum::<f64>()
}

/// Logistic sigmoid `1 / (1 + e^−x)`, evaluated without overflow for either sign.
#[inline]
pub fn sigmoid(x: f64) -> f64 {
    if x >= 0.0 {
        1.0 / (1.0 + (-x).exp())
    } else {
        let e = x.exp();
        e / (1.0 + e)
    }
}

/// `ln(1 + e^x)` without overflow.
#[inline]
pub fn softplus(x: f64) -> f64 {
    x.max(0.0) + (-x.abs()).exp().ln_1p()
}

/// `ln σ(x) = −softplus(−x)`.
#[inline]
pub fn ln_sigmoid(x: f64) -> f64 {
    -softplus(-x)
}

/// `ln(1 − e^x)` for `x ≤ 0`, accurate near both ends (the two-branch rule of Mächler's note on
/// computing log1mexp, common practice).
#[inline]
pub fn ln_one_minus_exp(x: f64) -> f64 {
    if x > -std::f64::consts::LN_2 {
        (-x.exp_m1()).ln()
    } else {
        (-x.exp()).ln_1p()
    }
}

/// Log-odds `ln s − ln(1 − s)` of a probability clamped to `[eps, 1 − eps]`.
#[inline]
pub fn logit(s: f64, eps: f64) -> f64 {
    let s = s.clamp(eps, 1.0 - eps);
    s.ln() - (-s).ln_1p()
}

/// Index of the largest element; ties go to the smallest index (as numpy.argmax).
///
/// Two branch-free passes (lane maximum, then the first index holding it) rather than one
/// branchy scan: faster for the K in the thousands a request may carry. Always inlined, so a
/// caller compiled for wider vectors (`Workspace::argmax_narrowed`) runs it at that width.
#[inline(always)]
pub fn argmax(q: &[f64]) -> usize {
    let m = max_lanes(q);
    // Eight at a time: one vector compare and a mask per chunk instead of a branch per value.
    let chunks = q.chunks_exact(LANES);
    let tail = q.len() - chunks.remainder().len();
    for (i, c) in chunks.enumerate() {
        let mut hit = 0u32;
        for (t, &v) in c.iter().enumerate() {
            hit |= u32::from(v == m) << t;
        }
        if hit != 0 {
            return i * LANES + hit.trailing_zeros() as usize;
        }
    }
    q[tail..]
        .iter()
        .position(|&v| v == m)
        .map_or(0, |p| tail + p)
}

/// True when every value is finite; scans the whole slice without early exit so the loop
/// vectorises (the common case is that every value is fine).
#[inline]
pub fn all_finite(values: &[f32]) -> bool {
    values.iter().fold(true, |ok, v| ok & v.is_finite())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn close(a: f64, b: f64, rel: f64) -> bool {
        (a - b).abs() <= rel * b.abs().max(1e-300)
    }

    #[test]
    fn lse_matches_scipy_logsumexp() {
        // scipy.special.logsumexp([1., 2., 3.]) = 3.40760596444438 (scipy 1.17.1);
        // closed form 3 + ln(1 + e^-1 + e^-2).
        let want = 3.0 + (1.0 + (-1.0f64).exp() + (-2.0f64).exp()).ln();
        assert!(close(lse(&[1.0, 2.0, 3.0]), want, 1e-15));
        assert!(close(want, 3.40760596444438, 1e-13));
        // Invariant of METHODS.md 0.2: m <= lse <= m + ln K, and no overflow for huge logits.
        let z = [1000.0, 999.0, -1e6];
        let v = lse(&z);
        assert!((1000.0..=1000.0 + 3f64.ln()).contains(&v));
        assert_eq!(
            lse(&[f64::NEG_INFINITY, f64::NEG_INFINITY]),
            f64::NEG_INFINITY
        );
    }

    #[test]
    fn softmax_sums_to_one_and_matches_closed_form() {
        let mut z = [4.0 * 0.5684075964373381, 1.0 * 0.5684075964373381, 0.0];
        softmax_in_place(&mut z);
        // METHODS.md E5: softmax(β·[4, 1, 0]) = [0.778410207, 0.141461961, 0.080127832].
        for (got, want) in z.iter().zip([0.778410207, 0.141461961, 0.080127832]) {
            assert!((got - want).abs() < 5e-10, "{got} vs {want}");
        }
        assert!((z.iter().sum::<f64>() - 1.0).abs() < 1e-15);
    }

    #[test]
    fn softmax_of_infinities_is_defined() {
        let mut z = [f64::INFINITY, 0.0, f64::INFINITY];
        softmax_in_place(&mut z);
        assert_eq!(z, [0.5, 0.0, 0.5]);
        let mut z = [f64::NEG_INFINITY; 4];
        softmax_in_place(&mut z);
        assert_eq!(z, [0.25; 4]);
    }

    #[test]
    fn sigmoid_is_stable_and_symmetric() {
        assert_eq!(sigmoid(0.0), 0.5);
        assert_eq!(sigmoid(800.0), 1.0);
        assert!(sigmoid(-800.0) >= 0.0 && sigmoid(-800.0) < 1e-300);
        for x in [-30.0, -2.5, 0.1, 7.0] {
            assert!(close(sigmoid(x) + sigmoid(-x), 1.0, 1e-15));
            assert!(close(ln_sigmoid(x), sigmoid(x).ln(), 1e-12));
        }
        // scipy.special.expit(1.0) = 0.7310585786300049 (scipy 1.17.1).
        assert!(close(sigmoid(1.0), 0.7310585786300049, 1e-15));
    }

    #[test]
    fn logit_inverts_sigmoid() {
        for s in [1e-9, 0.2, 0.5, 0.9, 1.0 - 1e-9] {
            assert!(close(sigmoid(logit(s, 1e-12)), s, 1e-9));
        }
        assert!(logit(0.0, 1e-12).is_finite() && logit(1.0, 1e-12).is_finite());
    }

    #[test]
    fn ln_one_minus_exp_is_accurate_at_both_ends() {
        assert!(close(ln_one_minus_exp(-1e-20), (1e-20f64).ln(), 1e-12));
        assert!(close(ln_one_minus_exp(-50.0), -(-50.0f64).exp(), 1e-12));
        assert!(close(
            ln_one_minus_exp(-1.0),
            (1.0 - (-1.0f64).exp()).ln(),
            1e-15
        ));
    }

    #[test]
    fn fast_exp_agrees_with_std_exp_to_a_few_ulp() {
        // Reference: Rust's f64::exp (the platform libm), over a dense grid of [−708, 0] and
        // the awkward points near multiples of ln 2 / 2.
        let mut worst = 0.0f64;
        let mut x = 0.0;
        while x > EXP_UNDERFLOW {
            for d in [0.0, 1e-12, -1e-12] {
                let v = x + d;
                if v <= 0.0 {
                    let rel = ((exp_nonpositive(v) - v.exp()) / v.exp()).abs();
                    worst = worst.max(rel);
                }
            }
            x -= 0.001_953_125 * std::f64::consts::LN_2; // steps hit k·ln2/512 boundaries
        }
        assert!(
            worst <= 4.0 * f64::EPSILON,
            "worst relative error {worst:e}"
        );
        assert_eq!(exp_nonpositive(0.0), 1.0);
        assert_eq!(exp_nonpositive(-1000.0), 0.0);
        assert_eq!(exp_nonpositive(f64::NEG_INFINITY), 0.0);
        assert!(exp_nonpositive(-707.9) > 0.0);
    }

    #[test]
    fn softmax_lanes_handle_every_length() {
        for k in 1..40 {
            let mut z: Vec<f64> = (0..k).map(|i| ((i * 37 % 11) as f64) - 3.0).collect();
            let want: Vec<f64> = {
                let m = z.iter().copied().fold(f64::NEG_INFINITY, f64::max);
                let e: Vec<f64> = z.iter().map(|v| (v - m).exp()).collect();
                let s: f64 = e.iter().sum();
                e.iter().map(|v| v / s).collect()
            };
            softmax_in_place(&mut z);
            for (a, b) in z.iter().zip(&want) {
                assert!((a - b).abs() <= 1e-15, "k = {k}: {a} vs {b}");
            }
        }
    }

    #[test]
    fn argmax_is_the_first_maximum_across_chunks_and_tail() {
        // Against a plain scan, with the maximum repeated in and across chunks of eight and in
        // the tail.
        for k in [1usize, 7, 8, 9, 16, 23, 1000] {
            for first in [0, k / 3, k - 1] {
                let mut q: Vec<f64> = (0..k).map(|i| (i % 5) as f64 * 0.1).collect();
                q[first] = 2.0;
                if first + 9 < k {
                    q[first + 9] = 2.0;
                }
                let want = q.iter().position(|&v| v == 2.0).unwrap();
                assert_eq!(argmax(&q), want, "k = {k}, first = {first}");
            }
        }
    }

    #[test]
    fn argmax_ties_go_to_first() {
        assert_eq!(argmax(&[0.2, 0.4, 0.4]), 1);
        assert_eq!(argmax(&[1.0]), 0);
    }
}
