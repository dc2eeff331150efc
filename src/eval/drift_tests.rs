//! Tests of the drift statistics against METHODS.md E12 and scipy.stats.ks_2samp (kept apart
//! from drift.rs for length). Python names (`P`, `z`, `conf`) are those of fixtures.rs; the
//! extra helpers are
//! ```text
//! def ks(x1, x2):
//!     r = stats.ks_2samp(x1, x2); return float(r.statistic), float(r.pvalue)
//! def stephens(x1, x2):
//!     D = stats.ks_2samp(x1, x2, method='asymp').statistic
//!     ne = len(x1) * len(x2) / (len(x1) + len(x2))
//!     return float(special.kolmogorov((np.sqrt(ne) + 0.12 + 0.11 / np.sqrt(ne)) * D))
//! def psi_ref(ref, cur, B=10, eps=1e-4):
//!     edges = np.unique(np.quantile(ref, np.arange(1, B) / B))
//!     e = np.bincount(np.searchsorted(edges, ref, side='left'), minlength=len(edges) + 1) / len(ref)
//!     a = np.bincount(np.searchsorted(edges, cur, side='left'), minlength=len(edges) + 1) / len(cur)
//!     if (e == 0).any() or (a == 0).any():
//!         e = (e + eps) / (e + eps).sum(); a = (a + eps) / (a + eps).sum()
//!     return np.sum((a - e) * np.log(a / e)), edges, e, a
//! ```

use super::super::fixtures::{RANDOM_LABELS, RANDOM_LOGITS, RANDOM_PROBS};
use super::super::Predictions;
use super::*;

fn close(got: f64, want: f64, rel: f64) {
    assert!(
        (got - want).abs() <= rel * want.abs().max(1e-300),
        "got {got}, want {want}"
    );
}

fn conf() -> Vec<f64> {
    let p = Predictions::try_new(&RANDOM_PROBS, 3, &RANDOM_LABELS).unwrap();
    p.confidence().to_vec()
}

#[test]
fn e12_ks_and_psi() {
    // METHODS.md E12: ks_2samp(x1, x2) → D = 0.5, p = 0.2826728826728826 (exact).
    let x1 = [0.91, 0.85, 0.97, 0.62, 0.78, 0.88, 0.95, 0.70];
    let x2 = [0.81, 0.66, 0.72, 0.93, 0.59, 0.77, 0.69, 0.74];
    let t = ks_two_sample(&x1, &x2).unwrap();
    assert_eq!((t.statistic, t.method), (0.5, KsMethod::Exact));
    close(t.p_value, 0.2826728826728826, 1e-13);
    // METHODS.md E12: PSI of e = [0.1, 0.2, 0.4, 0.3], a = [0.15, 0.25, 0.35, 0.25].
    let v = psi_from_proportions(
        &[0.1, 0.2, 0.4, 0.3],
        &[0.15, 0.25, 0.35, 0.25],
        PSI_EPSILON,
    );
    close(v.unwrap(), 0.04722308044204256, 1e-13);
}

#[test]
fn exact_ks_matches_scipy() {
    let c = conf();
    let p0: Vec<f64> = RANDOM_PROBS.iter().step_by(3).copied().collect();
    let p1: Vec<f64> = RANDOM_PROBS.iter().skip(1).step_by(3).copied().collect();
    let cases: [(&[f64], &[f64], f64, f64); 4] = [
        // ks(conf[:15], conf[15:])
        (&c[..15], &c[15..], 0.25333333333333335, 0.5163966899744871),
        // ks(P[:, 0], P[:, 1])
        (&p0, &p1, 0.4, 0.003018184077228396),
        // ks(P.ravel(), z.ravel()[:90])
        (
            &RANDOM_PROBS,
            &RANDOM_LOGITS[..90],
            0.5777777777777777,
            2.20110545966611e-16,
        ),
        // ks([0.25, 0.5, 0.5, 0.75, 1.0, 0.5], [0.5, 0.75, 0.75, 1.0, 1.0, 1.0, 0.75, 0.25]): ties
        (
            &[0.25, 0.5, 0.5, 0.75, 1.0, 0.5],
            &[0.5, 0.75, 0.75, 1.0, 1.0, 1.0, 0.75, 0.25],
            0.4166666666666667,
            0.4602064602064602,
        ),
    ];
    for (x1, x2, d, p) in cases {
        let t = ks_two_sample(x1, x2).unwrap();
        assert_eq!(t.method, KsMethod::Exact);
        close(t.statistic, d, 1e-15);
        close(t.p_value, p, 1e-10);
        let swapped = ks_two_sample(x2, x1).unwrap();
        close(swapped.p_value, p, 1e-10);
    }
    let same = ks_two_sample(&c, &c).unwrap();
    assert_eq!((same.statistic, same.p_value), (0.0, 1.0));
}

#[test]
fn exact_ks_on_medium_unequal_samples() {
    // x1 = (np.arange(700) * 0.7548776662466927) % 1.0
    // x2 = ((np.arange(1300) * 0.5698402909980532) % 1.0) * 0.9 + 0.1
    // ks(x1, x2) = (0.10318681318681319, 0.00011321041568328938)
    let x1: Vec<f64> = (0..700)
        .map(|i| (f64::from(i) * 0.7548776662466927) % 1.0)
        .collect();
    let x2: Vec<f64> = (0..1300)
        .map(|j| ((f64::from(j) * 0.5698402909980532) % 1.0) * 0.9 + 0.1)
        .collect();
    let t = ks_two_sample(&x1, &x2).unwrap();
    assert_eq!(t.method, KsMethod::Exact);
    close(t.statistic, 0.10318681318681319, 1e-15);
    close(t.p_value, 0.00011321041568328938, 1e-12);
}

#[test]
fn large_samples_use_stephens() {
    // x1 = (np.arange(12000) * 0.7548776662466927) % 1.0
    // x2 = ((np.arange(9000) * 0.5698402909980532) % 1.0) * 0.98 + 0.01
    // ks(x1, x2)[0] = 0.010222222222222244; stephens(x1, x2) = 0.65360711597229
    // (scipy's asymptotic p, kstwo.sf(D, round(ne)), is 0.6517902520123284)
    let x1: Vec<f64> = (0..12000)
        .map(|i| (f64::from(i) * 0.7548776662466927) % 1.0)
        .collect();
    let x2: Vec<f64> = (0..9000)
        .map(|j| ((f64::from(j) * 0.5698402909980532) % 1.0) * 0.98 + 0.01)
        .collect();
    let t = ks_two_sample(&x1, &x2).unwrap();
    assert_eq!(t.method, KsMethod::Asymptotic);
    close(t.statistic, 0.010222222222222244, 1e-12);
    close(t.p_value, 0.65360711597229, 1e-12);
    // x3 = x2[:2000] * 0.9: ks(x1, x3)[0] = 0.10966666666666669, stephens = 1.935449678893323e-18
    let x3: Vec<f64> = x2[..2000].iter().map(|v| v * 0.9).collect();
    let t = ks_two_sample(&x1, &x3).unwrap();
    close(t.statistic, 0.10966666666666669, 1e-12);
    close(t.p_value, 1.935449678893323e-18, 1e-9);
}

#[test]
fn psi_on_reference_quantile_bins() {
    let c = conf();
    // psi_ref(conf[:20], conf[20:], B=4) → 0.3151995829778439, edges
    // [0.7068899714762295, 0.7953840078446366, 0.8811020793391756], e = 0.25 each,
    // a = [0.45, 0.1, 0.15, 0.3]; no empty bin, so no smoothing.
    let config = PsiConfig {
        n_bins: 4,
        ..PsiConfig::default()
    };
    let r = psi(&c[..20], &c[20..], &config).unwrap();
    close(r.value, 0.3151995829778439, 1e-12);
    assert_eq!(
        r.edges,
        [0.7068899714762295, 0.7953840078446366, 0.8811020793391756]
    );
    assert_eq!(r.reference, [0.25; 4]);
    assert_eq!(r.current, [0.45, 0.1, 0.15, 0.3]);
    assert!(!r.smoothed);
    // hi = conf[conf > 0.8] (18 items); psi_ref(conf[:20], hi, B=4) → 4.29453321429207 with two
    // empty current bins smoothed to 9.99600160e-05.
    let hi: Vec<f64> = c.iter().copied().filter(|&v| v > 0.8).collect();
    assert_eq!(hi.len(), 18);
    let r = psi(&c[..20], &hi, &config).unwrap();
    assert!(r.smoothed);
    close(r.value, 4.29453321429207, 1e-12);
    close(r.current[0], 9.99600160e-05, 1e-8);
}

#[test]
fn psi_and_ks_reject_bad_input() {
    assert!(ks_two_sample(&[], &[0.5]).is_err());
    let e = ks_two_sample(&[0.5], &[0.2, f64::NAN]).unwrap_err();
    assert!(
        matches!(
            e,
            EvalError::NonFinite {
                what: "current sample",
                item: 1,
                ..
            }
        ),
        "{e}"
    );
    assert!(psi(
        &[0.5],
        &[0.5],
        &PsiConfig {
            n_bins: 0,
            epsilon: 1e-4
        }
    )
    .is_err());
    assert!(psi(
        &[0.5],
        &[0.5],
        &PsiConfig {
            n_bins: 4,
            epsilon: -1.0
        }
    )
    .is_err());
    assert!(psi_from_proportions(&[0.5, 0.5], &[0.5], 1e-4).is_err());
    assert!(psi_from_proportions(&[0.5, 0.6], &[0.5, 0.5], 1e-4).is_err());
    // ε = 0 with a bin empty on one side only: infinite PSI; identical samples: 0.
    assert_eq!(
        psi_from_proportions(&[0.5, 0.5], &[1.0, 0.0], 0.0).unwrap(),
        f64::INFINITY
    );
    let same = psi(
        &[0.1, 0.5, 0.9, 0.7],
        &[0.1, 0.5, 0.9, 0.7],
        &PsiConfig::default(),
    )
    .unwrap();
    assert_eq!(same.value, 0.0);
}
