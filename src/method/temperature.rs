//! Temperature scaling: q = softmax(z / T), T > 0 (Guo, Pleiss, Sun & Weinberger 2017, ICML;
//! METHODS.md 2.1). Stored as T for people and applied as β = 1/T.

use super::Problems;
use crate::method::Problem;
#[cfg(test)]
use crate::numeric::softmax_in_place;
use crate::numeric::softmax_scaled_in_place;

/// A validated temperature: finite and > 0.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Temperature {
    temperature: f64,
    inverse: f64,
}

impl Temperature {
    /// Validates `temperature` (field name `field` in messages).
    ///
    /// # Errors
    /// A problem when `temperature` is not finite or not > 0.
    pub fn try_new(temperature: f64, field: &str) -> Result<Self, Vec<Problem>> {
        let mut problems = Problems::new();
        if !temperature.is_finite() || temperature <= 0.0 {
            problems.push(
                field,
                format!("temperature must be finite and > 0, got {temperature}"),
            );
        } else if !(1.0 / temperature).is_finite() {
            problems.push(field, format!("temperature {temperature} is too small"));
        }
        problems.finish(Temperature {
            temperature,
            inverse: 1.0 / temperature,
        })
    }

    /// T (> 0). T > 1 softens over-confident outputs.
    pub fn temperature(&self) -> f64 {
        self.temperature
    }

    /// β = 1/T.
    pub fn inverse(&self) -> f64 {
        self.inverse
    }

    /// Overwrites a row of logits with softmax(z / T).
    #[inline(always)]
    pub fn apply_in_place(&self, z: &mut [f64]) {
        softmax_scaled_in_place(z, self.inverse);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn rejects_non_positive_and_non_finite() {
        for t in [0.0, -1.0, f64::NAN, f64::INFINITY, 1e-320] {
            let err = Temperature::try_new(t, "method.temperature").unwrap_err();
            assert_eq!(err[0].field, "method.temperature", "{t}");
        }
        assert!(Temperature::try_new(1.5, "t").is_ok());
    }

    #[test]
    fn worked_example_e5_row_zero() {
        // METHODS.md E5: T = 1.7593009070740686, row [4, 1, 0]
        // → [0.778410207, 0.141461961, 0.080127832].
        let t = Temperature::try_new(1.7593009070740686, "t").unwrap();
        let mut z = [4.0, 1.0, 0.0];
        t.apply_in_place(&mut z);
        for (got, want) in z.iter().zip([0.778410207, 0.141461961, 0.080127832]) {
            assert!((got - want).abs() < 5e-10, "{got} vs {want}");
        }
    }

    #[test]
    fn worked_example_e5b_binary_pair() {
        // METHODS.md E5b: β = 2.140902607668856 on the pair (0, f); P(y=1 | f=1) = 0.89481559.
        let t = Temperature::try_new(1.0 / 2.140902607668856, "t").unwrap();
        let mut z = [0.0, 1.0];
        t.apply_in_place(&mut z);
        assert!((z[1] - 0.89481559).abs() < 5e-9, "{}", z[1]);
    }

    #[test]
    fn temperature_one_is_softmax_and_huge_temperature_is_uniform() {
        // Facts of the trade (common practice): T = 1 is plain softmax; T → ∞ tends to 1/K.
        let logits = [2.0, -1.0, 0.5, 3.0];
        let mut a = logits;
        Temperature::try_new(1.0, "t")
            .unwrap()
            .apply_in_place(&mut a);
        let mut b = logits;
        softmax_in_place(&mut b);
        assert_eq!(a, b);
        let mut c = logits;
        Temperature::try_new(1e9, "t")
            .unwrap()
            .apply_in_place(&mut c);
        for v in c {
            assert!((v - 0.25).abs() < 1e-8);
        }
    }
}
