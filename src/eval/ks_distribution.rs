//! Null distribution of the two-sided two-sample Kolmogorov–Smirnov statistic (Kolmogorov 1933;
//! Smirnov 1948): exact lattice-path probabilities for small samples and the asymptotic
//! Kolmogorov distribution with Stephens' small-sample correction (as given in Numerical
//! Recipes) for large ones. METHODS.md 4.4.
//!
//! D·lcm(n1, n2) is an integer h. Under the null, the merged sorted sample is a uniformly random
//! arrangement of n1 steps in x and n2 steps in y, and D ≥ h/lcm iff the path from (0, 0) to
//! (n1, n2) touches a point with |i·n2/g − j·n1/g| ≥ h (g = gcd).

use std::f64::consts::PI;

/// Largest sample size for which exact p-values are computed (scipy.stats.ks_2samp's 'auto'
/// mode uses the same limit); the lattice computation costs at most n1·n2 steps.
pub(crate) const KS_EXACT_MAX_N: usize = 10_000;

/// Most series terms summed for the Kolmogorov distribution; both series used converge in
/// fewer than ten terms on their range.
const KOLMOGOROV_MAX_TERMS: usize = 100;

/// A series stops once a term is below this fraction of the partial sum.
const KOLMOGOROV_REL_TOL: f64 = 1e-17;

/// Below this λ the survival function is computed from the theta-function form of the CDF
/// (fast convergence for small λ), above it from the alternating series.
const KOLMOGOROV_SWITCH: f64 = 1.0;

/// Greatest common divisor.
pub(crate) fn gcd(mut a: u64, mut b: u64) -> u64 {
    while b != 0 {
        (a, b) = (b, a % b);
    }
    a
}

/// Exact two-sided p-value P(D ≥ h/lcm) for sample sizes n1, n2 ≥ 1 and 1 ≤ h; `None` if the
/// computation does not give a probability (then the caller falls back to the asymptotic form).
pub(crate) fn exact_p_value(n1: usize, n2: usize, h: u64) -> Option<f64> {
    let p = if n1 == n2 {
        equal_sizes(n1 as u64, h)
    } else {
        lattice_outside(n1, n2, h)
    };
    (p.is_finite() && (0.0..=1.0 + 1e-12).contains(&p)).then(|| p.min(1.0))
}

/// P(D_{n,n} ≥ h/n) by the reflection principle, 2 Σ_{k≥1} (−1)^{k−1} C(2n, n−kh)/C(2n, n),
/// evaluated from the innermost term outwards, 2·r₁(1 − r₂(1 − r₃(…))) with
/// r_k = C(2n, n−kh)/C(2n, n−(k−1)h), so no large binomials and no cancellation.
pub(crate) fn equal_sizes(n: u64, h: u64) -> f64 {
    let mut nested = 0.0;
    for k in (1..=n / h).rev() {
        let start = (k - 1) * h;
        let ratio: f64 = (start..start + h)
            .map(|j| (n - j) as f64 / (n + j + 1) as f64)
            .product();
        nested = ratio * (1.0 - nested);
    }
    2.0 * nested
}

/// Probability that a random lattice path from (0, 0) to (n1, n2) touches |i·a − j·b| ≥ h
/// (a = n2/g, b = n1/g), by forward propagation of the probability of staying inside, column by
/// column; the mass leaving the band is summed directly (positive terms, so small p-values keep
/// their relative accuracy).
pub(crate) fn lattice_outside(n1: usize, n2: usize, h: u64) -> f64 {
    let g = gcd(n1 as u64, n2 as u64);
    let (a, b, h) = (
        (n2 as u64 / g) as i128,
        (n1 as u64 / g) as i128,
        i128::from(h),
    );
    // Inside band of column i: (i·a − h)/b < j < (i·a + h)/b, clipped to 0..=n2.
    let band = |i: usize| {
        let c = i as i128 * a;
        let lo = (c - h).div_euclid(b) + 1;
        let hi = (c + h + b - 1).div_euclid(b) - 1;
        (lo.max(0) as usize, hi.min(n2 as i128) as usize)
    };
    let step_x = |i: usize, j: usize| (n1 - i) as f64 / (n1 - i + n2 - j) as f64;
    let step_y = |i: usize, j: usize| (n2 - j) as f64 / (n1 - i + n2 - j) as f64;
    let mut prev = vec![0.0f64; n2 + 1];
    let mut cur = vec![0.0f64; n2 + 1];
    let mut outside = 0.0;
    let (mut prev_lo, mut prev_hi) = (0usize, 0usize);
    for i in 0..=n1 {
        let (lo, hi) = band(i);
        let first = if i == 0 { 0 } else { prev_lo };
        let last = (hi + 1).min(n2);
        for j in first..=last {
            let mut mass = if i == 0 {
                f64::from(u8::from(j == 0))
            } else {
                0.0
            };
            if i > 0 {
                mass += prev[j] * step_x(i - 1, j);
            }
            if j > first && j > 0 {
                mass += cur[j - 1] * step_y(i, j - 1);
            }
            if (lo..=hi).contains(&j) {
                cur[j] = mass;
            } else {
                outside += mass;
                cur[j] = 0.0;
            }
        }
        prev[prev_lo..=prev_hi].iter_mut().for_each(|v| *v = 0.0);
        std::mem::swap(&mut prev, &mut cur);
        (prev_lo, prev_hi) = (first, last);
    }
    outside
}

/// Survival function Q(λ) = P(K > λ) of the Kolmogorov distribution,
/// 2 Σ_{j≥1} (−1)^{j−1} e^{−2j²λ²}; for λ < 1 computed as 1 − (√(2π)/λ) Σ_{j≥1}
/// e^{−(2j−1)²π²/(8λ²)}.
pub(crate) fn kolmogorov_sf(lambda: f64) -> f64 {
    if lambda.is_nan() || lambda <= 0.0 {
        return 1.0;
    }
    if lambda < KOLMOGOROV_SWITCH {
        let c = -PI * PI / (8.0 * lambda * lambda);
        let mut sum = 0.0;
        for j in 1..=KOLMOGOROV_MAX_TERMS {
            let odd = (2 * j - 1) as f64;
            let term = (c * odd * odd).exp();
            sum += term;
            if term <= KOLMOGOROV_REL_TOL * sum || term == 0.0 {
                break;
            }
        }
        return (1.0 - (2.0 * PI).sqrt() / lambda * sum).clamp(0.0, 1.0);
    }
    let mut sum = 0.0;
    let mut sign = 1.0;
    for j in 1..=KOLMOGOROV_MAX_TERMS {
        let jf = j as f64;
        let term = (-2.0 * jf * jf * lambda * lambda).exp();
        sum += sign * term;
        sign = -sign;
        if term <= KOLMOGOROV_REL_TOL * sum.abs() {
            break;
        }
    }
    (2.0 * sum).clamp(0.0, 1.0)
}

/// Asymptotic p-value Q(λ), λ = (√n_e + 0.12 + 0.11/√n_e)·D with n_e = n1·n2/(n1 + n2)
/// (Stephens' correction).
pub(crate) fn stephens_p_value(n1: usize, n2: usize, d: f64) -> f64 {
    let ne = (n1 as f64 * n2 as f64) / (n1 as f64 + n2 as f64);
    let s = ne.sqrt();
    kolmogorov_sf((s + 0.12 + 0.11 / s) * d)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn kolmogorov_survival_matches_scipy() {
        // float(scipy.special.kolmogorov(lam)) for each lam.
        let cases = [
            (0.05, 1.0),
            (0.3, 0.9999906941986655),
            (0.8, 0.5441424115741981),
            (1.0, 0.26999967167735456),
            (1.5, 0.022217962616525127),
            (3.0, 3.045995948942526e-08),
        ];
        for (lambda, want) in cases {
            let got = kolmogorov_sf(lambda);
            assert!(
                (got - want).abs() <= 1e-13 * want,
                "λ = {lambda}: {got} vs {want}"
            );
        }
        assert_eq!(kolmogorov_sf(0.0), 1.0);
    }

    #[test]
    fn lattice_and_reflection_agree_on_equal_sizes() {
        // METHODS.md E12: n1 = n2 = 8, D = 0.5 → h = 4, p = 0.2826728826728826.
        assert!((equal_sizes(8, 4) - 0.2826728826728826).abs() < 1e-15);
        assert!((lattice_outside(8, 8, 4) - 0.2826728826728826).abs() < 1e-15);
        for (n, h) in [(40, 16), (40, 3), (25, 25), (30, 1)] {
            let (r, l) = (
                equal_sizes(n, h),
                lattice_outside(n as usize, n as usize, h),
            );
            assert!(
                (r - l).abs() <= 1e-13 * r.max(1e-300),
                "n = {n}, h = {h}: {r} vs {l}"
            );
        }
        // h = 1 means D ≥ 1/n, which always holds.
        assert!((equal_sizes(30, 1) - 1.0).abs() < 1e-14);
    }
}
