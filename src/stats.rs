//! Special functions and exact binomial bounds (METHODS.md sections 0.2 and 3.2).
//!
//! Holds ln Γ (Lanczos 1964, g = 7 with 9 coefficients, below 10; Stirling's series above), ln B,
//! the regularised incomplete beta function I_x(a, b) (continued fraction evaluated with the modified
//! Lentz method, Lentz 1976 / Thompson & Barnett 1986, with the symmetry switch of Press et al.,
//! Numerical Recipes, 2007), its inverse, binomial tails, one-sided Clopper–Pearson bounds
//! (Clopper & Pearson 1934, Biometrika 26(4)) and the selective-risk bound B* of Geifman & El-Yaniv
//! (2017, NeurIPS).
//!
//! For large shape parameters the power prefactor x^a (1−x)^b / B(a, b) is formed around the mode
//! with Stirling remainders (the idea of DiDonato & Morris 1992, ACM TOMS 708), so that a, b of
//! order 10⁶ keep close to full relative precision. The special functions follow `f64` math
//! conventions: outside their domain they return NaN. The bounds validate their counts and return
//! [`StatsError`].

use std::f64::consts::PI;

/// Lanczos shift g of the coefficient set [`LANCZOS_COEF`].
const LANCZOS_G: f64 = 7.0;
/// Lanczos coefficients for g = 7, n = 9 (relative error of Γ about 1e−15 for x ≥ 0.5).
const LANCZOS_COEF: [f64; 9] = [
    0.999_999_999_999_809_9,
    676.520_368_121_885_1,
    -1_259.139_216_722_402_8,
    771.323_428_777_653_1,
    -176.615_029_162_140_6,
    12.507_343_278_686_905,
    -0.138_571_095_265_720_12,
    9.984_369_578_019_572e-6,
    1.505_632_735_149_311_6e-7,
];
/// From this argument on, ln Γ and ln B use Stirling's series: its remainder after
/// [`STIRLING_COEF`] is below 1e−16 here.
const STIRLING_MIN: f64 = 10.0;
/// Coefficients B₂ₖ / (2k(2k−1)) of Stirling's series for ln Γ(x) − [(x−½) ln x − x + ½ ln 2π].
const STIRLING_COEF: [f64; 8] = [
    1.0 / 12.0,
    -1.0 / 360.0,
    1.0 / 1260.0,
    -1.0 / 1680.0,
    1.0 / 1188.0,
    -691.0 / 360_360.0,
    1.0 / 156.0,
    -3617.0 / 122_400.0,
];
/// The continued fraction stops once a Lentz update changes the value by less than this
/// (relative): within one ulp of 1 either side, so rounding noise cannot stall convergence.
const CF_TOLERANCE: f64 = 2.0 * f64::EPSILON;
/// Upper limit on continued-fraction steps; convergence takes O(√max(a, b)) steps, so this covers
/// shape parameters far beyond 10⁹. Not converging yields NaN.
const CF_MAX_STEPS: usize = 200_000;
/// Floor that keeps Lentz denominators away from zero (Numerical Recipes' FPMIN).
const LENTZ_TINY: f64 = 1e-300;
/// Bisection steps over the bit patterns of [0, 1]; 62 halvings already reach adjacent floats.
const QUANTILE_MAX_STEPS: usize = 64;

/// Failure of a binomial bound: invalid counts or confidence level, or no convergence.
#[derive(Debug, Clone, Copy, PartialEq, thiserror::Error)]
pub enum StatsError {
    /// More successes (or errors) than trials.
    #[error("count {count} exceeds the number of trials {trials}")]
    CountExceedsTrials {
        /// The offending count.
        count: u64,
        /// The number of trials.
        trials: u64,
    },
    /// δ must lie strictly between 0 and 1.
    #[error("delta must lie in (0, 1), got {0}")]
    Delta(f64),
    /// The incomplete beta function did not converge (shape parameters far too large).
    #[error("incomplete beta did not converge for a = {a}, b = {b}")]
    NoConvergence {
        /// First shape parameter.
        a: f64,
        /// Second shape parameter.
        b: f64,
    },
}

/// Stirling remainder ln Γ(x) − [(x−½) ln x − x + ½ ln 2π], accurate for x ≥ [`STIRLING_MIN`].
fn stirling_remainder(x: f64) -> f64 {
    let inv2 = 1.0 / (x * x);
    let poly = STIRLING_COEF
        .iter()
        .rev()
        .fold(0.0, |acc, &c| acc * inv2 + c);
    poly / x
}

/// ln Γ(x) for x > 0 (relative error about 1e−15); NaN for x ≤ 0 or NaN, +∞ for x = +∞.
pub fn ln_gamma(x: f64) -> f64 {
    if x.is_nan() || x <= 0.0 {
        return f64::NAN;
    }
    if x < 0.5 {
        // Γ(x) = Γ(x + 1) / x keeps the Lanczos sum in its accurate range.
        return ln_gamma(x + 1.0) - x.ln();
    }
    if x >= STIRLING_MIN {
        if x.is_infinite() {
            return f64::INFINITY;
        }
        return (x - 0.5) * x.ln() - x + 0.5 * (2.0 * PI).ln() + stirling_remainder(x);
    }
    let z = x - 1.0;
    let sum = LANCZOS_COEF[1..]
        .iter()
        .enumerate()
        .fold(LANCZOS_COEF[0], |acc, (i, &c)| {
            acc + c / (z + (i + 1) as f64)
        });
    let t = z + LANCZOS_G + 0.5;
    0.5 * (2.0 * PI).ln() + (z + 0.5) * t.ln() - t + sum.ln()
}

/// ln B(a, b) = ln Γ(a) + ln Γ(b) − ln Γ(a + b) for a, b > 0, without cancellation for large a, b.
pub fn ln_beta(a: f64, b: f64) -> f64 {
    if !(a > 0.0 && b > 0.0 && a.is_finite() && b.is_finite()) {
        return f64::NAN;
    }
    let (small, large) = if a <= b { (a, b) } else { (b, a) };
    let s = a + b;
    if small >= STIRLING_MIN {
        -a * (b / a).ln_1p() - b * (a / b).ln_1p()
            + 0.5 * (s / (a * b)).ln()
            + 0.5 * (2.0 * PI).ln()
            + stirling_remainder(a)
            + stirling_remainder(b)
            - stirling_remainder(s)
    } else if large >= STIRLING_MIN {
        // ln Γ(large) − ln Γ(s) by Stirling, so the two huge terms cancel analytically.
        ln_gamma(small) - small * s.ln() + small - (large - 0.5) * (small / large).ln_1p()
            + stirling_remainder(large)
            - stirling_remainder(s)
    } else {
        ln_gamma(a) + ln_gamma(b) - ln_gamma(s)
    }
}

/// ln[x^a y^b / B(a, b)] with ln x, ln y given and d = x(a+b) − a (so y(a+b) − b = −d).
fn ln_power_terms(a: f64, b: f64, ln_x: f64, ln_y: f64, d: f64) -> f64 {
    if a.min(b) >= STIRLING_MIN {
        let s = a + b;
        a * (d / a).ln_1p() + b * (-d / b).ln_1p() + 0.5 * (a * b / (2.0 * PI * s)).ln()
            - stirling_remainder(a)
            - stirling_remainder(b)
            + stirling_remainder(s)
    } else {
        a * ln_x + b * ln_y - ln_beta(a, b)
    }
}

/// Continued fraction of I_x(a, b) (Numerical Recipes' betacf), NaN if it does not converge.
fn beta_continued_fraction(a: f64, b: f64, x: f64) -> f64 {
    let guard = |v: f64| if v.abs() < LENTZ_TINY { LENTZ_TINY } else { v };
    let (qab, qap, qam) = (a + b, a + 1.0, a - 1.0);
    let mut c = 1.0;
    let mut d = 1.0 / guard(1.0 - qab * x / qap);
    let mut h = d;
    for step in 1..=CF_MAX_STEPS {
        let m = step as f64;
        let m2 = 2.0 * m;
        let even = m * (b - m) * x / ((qam + m2) * (a + m2));
        d = 1.0 / guard(1.0 + even * d);
        c = guard(1.0 + even / c);
        h *= d * c;
        let odd = -(a + m) * (qab + m) * x / ((a + m2) * (qap + m2));
        d = 1.0 / guard(1.0 + odd * d);
        c = guard(1.0 + odd / c);
        let delta = d * c;
        h *= delta;
        if (delta - 1.0).abs() < CF_TOLERANCE {
            return h;
        }
    }
    f64::NAN
}

/// (I_x(a, b), 1 − I_x(a, b)), each computed directly where it is the smaller one.
fn beta_inc_pair(a: f64, b: f64, x: f64) -> (f64, f64) {
    let valid = a > 0.0 && b > 0.0 && a.is_finite() && b.is_finite();
    if !valid || !(0.0..=1.0).contains(&x) {
        return (f64::NAN, f64::NAN);
    }
    if x == 0.0 {
        return (0.0, 1.0);
    }
    if x == 1.0 {
        return (1.0, 0.0);
    }
    let d = x.mul_add(a + b, -a);
    let (ln_x, ln_y) = (x.ln(), (-x).ln_1p());
    // Clamp: rounding can push a value a few ulps past 1 next to the symmetry switch.
    if x <= (a + 1.0) / (a + b + 2.0) {
        let v = ln_power_terms(a, b, ln_x, ln_y, d).exp() * beta_continued_fraction(a, b, x) / a;
        let v = v.clamp(0.0, 1.0);
        (v, 1.0 - v)
    } else {
        let w =
            ln_power_terms(b, a, ln_y, ln_x, -d).exp() * beta_continued_fraction(b, a, 1.0 - x) / b;
        let w = w.clamp(0.0, 1.0);
        (1.0 - w, w)
    }
}

/// Regularised incomplete beta I_x(a, b) for a, b > 0 and x ∈ [0, 1]; NaN outside that domain.
pub fn beta_inc(a: f64, b: f64, x: f64) -> f64 {
    beta_inc_pair(a, b, x).0
}

/// 1 − I_x(a, b), accurate even where it is tiny; NaN outside the domain of [`beta_inc`].
pub fn beta_inc_complement(a: f64, b: f64, x: f64) -> f64 {
    beta_inc_pair(a, b, x).1
}

/// Smallest float t in (0, 1] with `at_or_above(t)` true, by bisection over bit patterns; NaN if
/// the predicate reports a NaN. Assumes the predicate is monotone, false at 0 and true at 1.
fn smallest_in_unit_where(at_or_above: impl Fn(f64) -> Option<bool>) -> f64 {
    let mut lo = 0.0_f64.to_bits();
    let mut hi = 1.0_f64.to_bits();
    for _ in 0..QUANTILE_MAX_STEPS {
        if hi - lo <= 1 {
            break;
        }
        let mid = lo + (hi - lo) / 2;
        match at_or_above(f64::from_bits(mid)) {
            Some(true) => hi = mid,
            Some(false) => lo = mid,
            None => return f64::NAN,
        }
    }
    f64::from_bits(hi)
}

/// Compares `value` with a target; None if `value` is NaN.
fn checked(value: f64, holds: impl Fn(f64) -> bool) -> Option<bool> {
    (!value.is_nan()).then(|| holds(value))
}

/// Beta quantile B⁻¹(u; a, b): the smallest float x with I_x(a, b) ≥ u; NaN outside the domain.
pub fn beta_quantile(u: f64, a: f64, b: f64) -> f64 {
    let valid = a > 0.0 && b > 0.0 && a.is_finite() && b.is_finite();
    if !valid || !(0.0..=1.0).contains(&u) {
        return f64::NAN;
    }
    if u == 0.0 {
        return 0.0;
    }
    if u == 1.0 {
        return 1.0;
    }
    if u <= 0.5 {
        smallest_in_unit_where(|t| checked(beta_inc(a, b, t), |v| v >= u))
    } else {
        let q = 1.0 - u;
        smallest_in_unit_where(|t| checked(beta_inc_complement(a, b, t), |v| v <= q))
    }
}

/// Binomial CDF P(X ≤ k) for X ~ Binomial(m, p); NaN unless p ∈ [0, 1].
pub fn binom_cdf(k: u64, m: u64, p: f64) -> f64 {
    if !(0.0..=1.0).contains(&p) {
        return f64::NAN;
    }
    if k >= m || p == 0.0 {
        return 1.0;
    }
    // P(X ≤ k) = 1 − I_p(k + 1, m − k): evaluated at p itself, never at a rounded 1 − p.
    beta_inc_complement((k + 1) as f64, (m - k) as f64, p)
}

/// Binomial survival function P(X > k) for X ~ Binomial(m, p); NaN unless p ∈ [0, 1].
pub fn binom_sf(k: u64, m: u64, p: f64) -> f64 {
    if !(0.0..=1.0).contains(&p) {
        return f64::NAN;
    }
    if k >= m || p == 0.0 {
        return 0.0;
    }
    beta_inc((k + 1) as f64, (m - k) as f64, p)
}

/// Checks counts and δ shared by the Clopper–Pearson bounds.
fn check_bound_args(count: u64, trials: u64, delta: f64) -> Result<(), StatsError> {
    if count > trials {
        return Err(StatsError::CountExceedsTrials { count, trials });
    }
    if !(delta > 0.0 && delta < 1.0) {
        return Err(StatsError::Delta(delta));
    }
    Ok(())
}

/// Turns a NaN from the special functions into [`StatsError::NoConvergence`].
fn converged(value: f64, a: f64, b: f64) -> Result<f64, StatsError> {
    if value.is_nan() {
        Err(StatsError::NoConvergence { a, b })
    } else {
        Ok(value)
    }
}

/// One-sided Clopper–Pearson lower bound (level 1 − δ) on a success rate: B⁻¹(δ; x, m − x + 1).
///
/// Returns 0 for x = 0 (including m = 0).
///
/// # Errors
/// [`StatsError`] if `successes > trials`, δ ∉ (0, 1), or the incomplete beta does not converge.
pub fn clopper_pearson_lower(successes: u64, trials: u64, delta: f64) -> Result<f64, StatsError> {
    check_bound_args(successes, trials, delta)?;
    if successes == 0 {
        return Ok(0.0);
    }
    let (a, b) = (successes as f64, (trials - successes + 1) as f64);
    converged(beta_quantile(delta, a, b), a, b)
}

/// One-sided Clopper–Pearson upper bound (level 1 − δ) on a rate: B⁻¹(1 − δ; x + 1, m − x).
///
/// Returns 1 for x = m (including m = 0). Found as the smallest t with 1 − I_t(x+1, m−x) ≤ δ, so
/// δ is never rounded through 1 − δ.
///
/// # Errors
/// [`StatsError`] if `successes > trials`, δ ∉ (0, 1), or the incomplete beta does not converge.
pub fn clopper_pearson_upper(successes: u64, trials: u64, delta: f64) -> Result<f64, StatsError> {
    check_bound_args(successes, trials, delta)?;
    if successes == trials {
        return Ok(1.0);
    }
    let (a, b) = ((successes + 1) as f64, (trials - successes) as f64);
    let bound = smallest_in_unit_where(|t| checked(beta_inc_complement(a, b, t), |v| v <= delta));
    converged(bound, a, b)
}

/// Selective-risk bound B*(k, m, δ) = B⁻¹(1 − δ; k + 1, m − k) for k errors among m accepted.
///
/// With probability at least 1 − δ the true risk is at most this; 1 when nothing is accepted.
///
/// # Errors
/// [`StatsError`] if `errors > accepted`, δ ∉ (0, 1), or the incomplete beta does not converge.
pub fn risk_upper_bound(errors: u64, accepted: u64, delta: f64) -> Result<f64, StatsError> {
    clopper_pearson_upper(errors, accepted, delta)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Asserts |got − want| ≤ rel·|want| (or ≤ rel when want = 0), printing both.
    fn close(got: f64, want: f64, rel: f64, what: &str) {
        let tol = if want == 0.0 { rel } else { rel * want.abs() };
        assert!(
            (got - want).abs() <= tol,
            "{what}: got {got:e}, want {want:e}, tol {tol:e}"
        );
    }

    #[test]
    fn ln_gamma_matches_scipy() {
        // METHODS.md 0.2; the rest scipy.special.gammaln(x) for the x named.
        close(ln_gamma(0.5), 0.5723649429247, 1e-14, "gammaln(0.5)");
        close(ln_gamma(10.3), 13.482036786138359, 1e-14, "gammaln(10.3)");
        close(ln_gamma(1e6), 12815504.569147611, 1e-14, "gammaln(1e6)");
        close(ln_gamma(1e-8), 18.42068073818021, 1e-14, "gammaln(1e-8)");
        close(ln_gamma(2.5), 0.2846828704729192, 1e-14, "gammaln(2.5)");
        close(ln_gamma(9.99), 12.779315214350195, 1e-14, "gammaln(9.99)");
        close(ln_gamma(10.01), 12.824350262448247, 1e-14, "gammaln(10.01)");
        close(
            ln_gamma(123.456),
            469.6055471299295,
            1e-14,
            "gammaln(123.456)",
        );
        assert!(ln_gamma(1.0).abs() < 1e-15 && ln_gamma(2.0).abs() < 1e-15);
        assert!(ln_gamma(0.0).is_nan() && ln_gamma(-1.5).is_nan() && ln_gamma(f64::NAN).is_nan());
    }

    #[test]
    fn ln_beta_matches_scipy() {
        // scipy.special.betaln(a, b)
        close(
            ln_beta(0.5, 0.5),
            1.1447298858494,
            1e-14,
            "betaln(0.5, 0.5)",
        );
        close(
            ln_beta(1e5, 2e5),
            -190958.8852791167,
            1e-14,
            "betaln(1e5, 2e5)",
        );
        // scipy.special.betaln(3, 1e6) = -40.75338749401271 is off by 7e-10; mpmath (40 digits):
        // mpmath.log(mpmath.beta(3, 10**6)) = -40.753387493330377005906...
        close(
            ln_beta(3.0, 1e6),
            -40.75338749333038,
            1e-14,
            "log(beta(3, 1e6))",
        );
        close(
            ln_beta(2.5, 7.25),
            -4.9053366188393035,
            1e-14,
            "betaln(2.5, 7.25)",
        );
    }

    #[test]
    fn beta_inc_matches_scipy() {
        // METHODS.md 0.2: scipy.special.betainc(95, 6, 0.9)
        close(
            beta_inc(95.0, 6.0, 0.9),
            0.05757688648703389,
            1e-12,
            "I_0.9(95,6)",
        );
        // scipy.special.betainc(a, b, x) with the arguments shown
        close(
            beta_inc(2.5, 3.5, 0.3),
            0.29675298929566646,
            1e-12,
            "betainc(2.5,3.5,.3)",
        );
        close(
            beta_inc(0.5, 0.5, 0.01),
            0.06376856085851985,
            1e-12,
            "betainc(.5,.5,.01)",
        );
        // Large shapes: scipy value first; mpmath (30 digits) binomial-tail sum P(Bin(a+b−1, x) ≥ a)
        // in brackets, which the tighter tolerance checks.
        // scipy.special.betainc(1e5, 1e5, 0.499) = 0.18554674455755774 [0.18554674455755675465]
        close(
            beta_inc(1e5, 1e5, 0.499),
            0.18554674455755675,
            1e-13,
            "betainc(1e5,1e5,.499)",
        );
        // scipy gives 0.49999999999999895; the exact value is 1/2 by symmetry.
        close(beta_inc(1e5, 1e5, 0.5), 0.5, 1e-13, "betainc(1e5,1e5,.5)");
        // scipy.special.betainc(1e5, 2e5, 0.335) = 0.9735241700254668 [0.9735241700254687592]
        close(
            beta_inc(1e5, 2e5, 0.335),
            0.9735241700254688,
            1e-14,
            "betainc(1e5,2e5,.335)",
        );
        // scipy.special.betainc(50001, 949999, 0.0505) = 0.9888068603922217 [0.98880686039222184967]
        let got = beta_inc(50001.0, 949999.0, 0.0505);
        close(
            got,
            0.9888068603922218,
            1e-14,
            "betainc(50001,949999,.0505)",
        );
        close(
            beta_inc(1.0, 1e5, 1e-7),
            0.009950166745856895,
            1e-12,
            "betainc(1,1e5,1e-7)",
        );
        close(
            beta_inc(30.0, 5.0, 0.999),
            0.9999999997283885,
            1e-14,
            "betainc(30,5,.999)",
        );
        // scipy.special.betainc(1e5, 1e5, 0.49) = 1.8571347290406343e-19 [1.8571347290404195842e-19]
        close(
            beta_inc(1e5, 1e5, 0.49),
            1.8571347290404196e-19,
            1e-12,
            "betainc(1e5,1e5,.49)",
        );
        assert_eq!(
            (beta_inc(2.0, 3.0, 0.0), beta_inc(2.0, 3.0, 1.0)),
            (0.0, 1.0)
        );
        assert!(beta_inc(0.0, 1.0, 0.5).is_nan() && beta_inc(1.0, 1.0, 1.5).is_nan());
    }

    #[test]
    fn beta_quantile_matches_scipy() {
        // scipy.stats.beta.ppf(u, a, b) with the arguments shown
        close(
            beta_quantile(0.05, 95.0, 6.0),
            0.8977466223567255,
            1e-13,
            "ppf(.05,95,6)",
        );
        close(
            beta_quantile(1e-10, 2.0, 1e5),
            1.4142131579348622e-10,
            1e-12,
            "ppf(1e-10,2,1e5)",
        );
        close(
            beta_quantile(1e-10, 1e5, 1e5),
            0.49288815551164356,
            1e-13,
            "ppf(1e-10,1e5,1e5)",
        );
        let got = beta_quantile(1.0 - 1e-10, 1e5, 2e5);
        close(got, 0.3388227489987116, 1e-13, "ppf(1-1e-10,1e5,2e5)");
        close(
            beta_quantile(0.3, 0.5, 0.5),
            0.2061073738537634,
            1e-13,
            "ppf(.3,.5,.5)",
        );
        close(
            beta_quantile(1e-10, 1.0, 1.0),
            1e-10,
            1e-13,
            "ppf(1e-10,1,1)",
        );
        close(
            beta_quantile(0.05, 1.0, 100.0),
            0.0005128014162622921,
            1e-13,
            "ppf(.05,1,100)",
        );
        assert_eq!(
            (beta_quantile(0.0, 2.0, 2.0), beta_quantile(1.0, 2.0, 2.0)),
            (0.0, 1.0)
        );
        assert!(beta_quantile(1.5, 2.0, 2.0).is_nan());
    }

    #[test]
    fn binomial_tails_match_scipy() {
        // METHODS.md E9: scipy.stats.binom.cdf(3, 100, 0.05)
        close(
            binom_cdf(3, 100, 0.05),
            0.2578386591160152,
            1e-12,
            "binom.cdf(3,100,.05)",
        );
        // METHODS.md 0.2: scipy.stats.binom.sf(94, 100, 0.9)
        close(
            binom_sf(94, 100, 0.9),
            0.05757688648703389,
            1e-12,
            "binom.sf(94,100,.9)",
        );
        // scipy.stats.binom.cdf / binom.sf with the arguments shown
        let got = binom_cdf(9800, 100_000, 0.1);
        close(got, 0.017525324737622874, 1e-11, "binom.cdf(9800,1e5,.1)");
        close(
            binom_cdf(0, 1000, 0.01),
            4.3171247410658195e-05,
            1e-12,
            "binom.cdf(0,1000,.01)",
        );
        let got = binom_sf(10300, 100_000, 0.1);
        close(got, 0.0008024250942704512, 1e-11, "binom.sf(10300,1e5,.1)");
        close(
            binom_cdf(5, 10, 0.5),
            0.623046875,
            1e-14,
            "binom.cdf(5,10,.5)",
        );
        assert_eq!((binom_cdf(10, 10, 0.3), binom_sf(10, 10, 0.3)), (1.0, 0.0));
        assert_eq!((binom_cdf(2, 10, 0.0), binom_cdf(2, 10, 1.0)), (1.0, 0.0));
    }

    #[test]
    fn binom_cdf_matches_direct_sum() {
        // Direct log-space sum of the pmf (METHODS.md 0.2) for every k at m = 40.
        for &p in &[0.03_f64, 0.3, 0.77] {
            let mut cdf = 0.0;
            for k in 0..40_u64 {
                let ln_choose =
                    ln_gamma(41.0) - ln_gamma(k as f64 + 1.0) - ln_gamma(40.0 - k as f64 + 1.0);
                cdf += (ln_choose + k as f64 * p.ln() + (40 - k) as f64 * (-p).ln_1p()).exp();
                close(binom_cdf(k, 40, p), cdf, 1e-11, "direct sum");
            }
        }
    }

    #[test]
    fn clopper_pearson_matches_methods_e2() {
        // METHODS.md E2 (scipy.stats.beta.ppf)
        let lower = clopper_pearson_lower(95, 100, 0.05).unwrap();
        close(lower, 0.8977466223567255, 1e-13, "beta.ppf(.05,95,6)");
        close(binom_sf(94, 100, lower), 0.05, 1e-12, "binom.sf(94,100,L)");
        close(
            clopper_pearson_lower(95, 100, 0.025).unwrap(),
            0.8871650888945373,
            1e-13,
            "two-sided lo",
        );
        close(
            clopper_pearson_upper(95, 100, 0.025).unwrap(),
            0.9835681208179479,
            1e-13,
            "two-sided hi",
        );
        close(
            clopper_pearson_lower(100, 100, 0.05).unwrap(),
            0.9704869503929601,
            1e-13,
            "100/100",
        );
        assert_eq!(clopper_pearson_lower(0, 100, 0.05).unwrap(), 0.0);
        close(
            risk_upper_bound(5, 100, 0.05).unwrap(),
            0.1022533776432745,
            1e-13,
            "B*(5,100)",
        );
        // scipy.stats.beta.ppf(1 - 0.05/20, 1001, 999000)
        let got = risk_upper_bound(1000, 1_000_000, 0.05 / 20.0).unwrap();
        close(got, 0.0010920553086748608, 1e-12, "B*(1000,1e6)");
    }

    #[test]
    fn clopper_pearson_edges_and_errors() {
        assert_eq!(clopper_pearson_upper(0, 0, 0.05), Ok(1.0));
        assert_eq!(clopper_pearson_lower(0, 0, 0.05), Ok(0.0));
        assert_eq!(clopper_pearson_upper(7, 7, 0.05), Ok(1.0));
        let err = StatsError::CountExceedsTrials {
            count: 8,
            trials: 7,
        };
        assert_eq!(risk_upper_bound(8, 7, 0.05), Err(err));
        assert_eq!(
            clopper_pearson_lower(1, 7, 1.0),
            Err(StatsError::Delta(1.0))
        );
        assert!(clopper_pearson_upper(1, 7, f64::NAN).is_err());
    }

    #[test]
    fn clopper_pearson_properties() {
        // Property (METHODS.md 5.5): lower bound increasing in successes; lower ≤ x/m ≤ upper.
        for &m in &[1_u64, 2, 7, 50, 333, 5000] {
            for &delta in &[0.2, 0.05, 1e-6] {
                let mut previous = -1.0;
                let step = (m / 40).max(1);
                for x in (0..=m).step_by(step as usize) {
                    let lo = clopper_pearson_lower(x, m, delta).unwrap();
                    let hi = clopper_pearson_upper(x, m, delta).unwrap();
                    let rate = x as f64 / m as f64;
                    assert!(
                        lo <= rate && rate <= hi,
                        "m {m} x {x} δ {delta}: {lo} {rate} {hi}"
                    );
                    assert!(
                        lo > previous,
                        "m {m} x {x} δ {delta}: {lo} after {previous}"
                    );
                    previous = lo;
                }
            }
        }
    }
}
