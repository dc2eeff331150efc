//! Affine families on logits: vector scaling softmax(w ⊙ z + b), matrix scaling softmax(W z + b)
//! (both Guo, Pleiss, Sun & Weinberger 2017, ICML; METHODS.md 2.2–2.3) and Dirichlet calibration
//! softmax(W ln p + b) with p = softmax(z) clamped to [ε, 1] (Kull et al. 2019, NeurIPS; METHODS.md
//! 2.4).

use super::{Problem, Problems};
use crate::numeric::softmax_in_place;

/// Vector scaling parameters: one weight and one bias per class.
#[derive(Debug, Clone, PartialEq)]
pub struct VectorScaling {
    weights: Vec<f64>,
    biases: Vec<f64>,
}

impl VectorScaling {
    /// Validates K weights and K biases (`field` prefixes messages).
    ///
    /// # Errors
    /// Wrong lengths or non-finite entries, each named.
    pub fn try_new(
        classes: usize,
        weights: Vec<f64>,
        biases: Vec<f64>,
        field: &str,
    ) -> Result<Self, Vec<Problem>> {
        let mut p = Problems::new();
        p.check_len(&format!("{field}.weights"), weights.len(), classes);
        p.check_len(&format!("{field}.biases"), biases.len(), classes);
        p.check_finite(&format!("{field}.weights"), &weights);
        p.check_finite(&format!("{field}.biases"), &biases);
        p.finish(VectorScaling { weights, biases })
    }

    /// Per-class weights w.
    pub fn weights(&self) -> &[f64] {
        &self.weights
    }

    /// Per-class biases b.
    pub fn biases(&self) -> &[f64] {
        &self.biases
    }

    /// Overwrites a row of logits with softmax(w ⊙ z + b).
    pub fn apply_in_place(&self, z: &mut [f64]) {
        for ((v, w), b) in z.iter_mut().zip(&self.weights).zip(&self.biases) {
            *v = *v * w + b;
        }
        softmax_in_place(z);
    }
}

/// Matrix scaling parameters: W (K×K, row-major: row j gives output logit j) and b.
#[derive(Debug, Clone, PartialEq)]
pub struct MatrixScaling {
    classes: usize,
    weights: Vec<f64>,
    biases: Vec<f64>,
}

impl MatrixScaling {
    /// Validates W as K rows of K and b as K entries (`field` prefixes messages).
    ///
    /// # Errors
    /// Wrong shapes or non-finite entries, each named with its row and column.
    pub fn try_new(
        classes: usize,
        rows: Vec<Vec<f64>>,
        biases: Vec<f64>,
        field: &str,
    ) -> Result<Self, Vec<Problem>> {
        let mut p = Problems::new();
        let weights = flatten_square(classes, rows, &format!("{field}.weights"), &mut p);
        p.check_len(&format!("{field}.biases"), biases.len(), classes);
        p.check_finite(&format!("{field}.biases"), &biases);
        p.finish(MatrixScaling {
            classes,
            weights,
            biases,
        })
    }

    /// Number of classes K.
    pub fn classes(&self) -> usize {
        self.classes
    }

    /// W row-major (K·K entries).
    pub fn weights(&self) -> &[f64] {
        &self.weights
    }

    /// Biases b.
    pub fn biases(&self) -> &[f64] {
        &self.biases
    }

    /// Overwrites a row of logits with softmax(W z + b).
    pub fn apply_in_place(&self, z: &mut [f64], scratch: &mut Vec<f64>) {
        affine_in_place(&self.weights, &self.biases, z, scratch);
        softmax_in_place(z);
    }
}

/// Dirichlet calibration parameters: W, b and the clamp ε for ln p.
#[derive(Debug, Clone, PartialEq)]
pub struct Dirichlet {
    matrix: MatrixScaling,
    epsilon: f64,
}

impl Dirichlet {
    /// Validates W, b as for matrix scaling and ε in (0, 1) (METHODS.md 0.2 suggests 1e−12).
    ///
    /// # Errors
    /// Wrong shapes, non-finite entries, or ε outside (0, 1).
    pub fn try_new(
        classes: usize,
        rows: Vec<Vec<f64>>,
        biases: Vec<f64>,
        epsilon: f64,
        field: &str,
    ) -> Result<Self, Vec<Problem>> {
        let mut problems = match MatrixScaling::try_new(classes, rows, biases, field) {
            Ok(m) => return Self::with_epsilon(m, epsilon, field),
            Err(list) => list,
        };
        if !(epsilon > 0.0 && epsilon < 1.0) {
            problems.push(epsilon_problem(epsilon, field));
        }
        Err(problems)
    }

    fn with_epsilon(
        matrix: MatrixScaling,
        epsilon: f64,
        field: &str,
    ) -> Result<Self, Vec<Problem>> {
        if epsilon > 0.0 && epsilon < 1.0 {
            Ok(Dirichlet { matrix, epsilon })
        } else {
            Err(vec![epsilon_problem(epsilon, field)])
        }
    }

    /// The affine part (W, b).
    pub fn matrix(&self) -> &MatrixScaling {
        &self.matrix
    }

    /// Clamp for probabilities before the logarithm.
    pub fn epsilon(&self) -> f64 {
        self.epsilon
    }

    /// Overwrites a row of logits with softmax(W ln clamp(softmax(z), ε, 1) + b).
    pub fn apply_in_place(&self, z: &mut [f64], scratch: &mut Vec<f64>) {
        softmax_in_place(z);
        z.iter_mut().for_each(|v| *v = v.max(self.epsilon).ln());
        self.matrix.apply_in_place(z, scratch);
    }
}

fn epsilon_problem(epsilon: f64, field: &str) -> Problem {
    Problem {
        field: format!("{field}.epsilon"),
        message: format!("must lie in (0, 1), got {epsilon}"),
    }
}

/// Checks K rows of K finite numbers and flattens them row-major.
fn flatten_square(classes: usize, rows: Vec<Vec<f64>>, field: &str, p: &mut Problems) -> Vec<f64> {
    p.check_len(field, rows.len(), classes);
    let mut flat = Vec::with_capacity(classes * classes);
    for (j, row) in rows.into_iter().enumerate() {
        let name = format!("{field}[{j}]");
        p.check_len(&name, row.len(), classes);
        p.check_finite(&name, &row);
        flat.extend(row);
    }
    flat
}

/// z ← W z + b with W row-major K×K.
fn affine_in_place(weights: &[f64], biases: &[f64], z: &mut [f64], scratch: &mut Vec<f64>) {
    let k = z.len();
    scratch.clear();
    scratch.extend_from_slice(z);
    for (j, out) in z.iter_mut().enumerate() {
        let row = &weights[j * k..(j + 1) * k];
        *out = biases[j]
            + row
                .iter()
                .zip(scratch.iter())
                .map(|(w, x)| w * x)
                .sum::<f64>();
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn identity_rows(k: usize) -> Vec<Vec<f64>> {
        (0..k)
            .map(|j| (0..k).map(|i| if i == j { 1.0 } else { 0.0 }).collect())
            .collect()
    }

    #[test]
    fn identity_parameters_give_plain_softmax() {
        // Common practice: W = I, b = 0 (and w = 1) is the uncalibrated softmax.
        let z0 = [1.0, -2.0, 0.5];
        let mut want = z0;
        softmax_in_place(&mut want);
        let v = VectorScaling::try_new(3, vec![1.0; 3], vec![0.0; 3], "m").unwrap();
        let mut a = z0;
        v.apply_in_place(&mut a);
        let m = MatrixScaling::try_new(3, identity_rows(3), vec![0.0; 3], "m").unwrap();
        let mut b = z0;
        m.apply_in_place(&mut b, &mut Vec::new());
        // Dirichlet with W = I: softmax(ln p) = p.
        let d = Dirichlet::try_new(3, identity_rows(3), vec![0.0; 3], 1e-12, "m").unwrap();
        let mut c = z0;
        d.apply_in_place(&mut c, &mut Vec::new());
        for i in 0..3 {
            assert!((a[i] - want[i]).abs() < 1e-15);
            assert!((b[i] - want[i]).abs() < 1e-15);
            assert!((c[i] - want[i]).abs() < 1e-15);
        }
    }

    #[test]
    fn matrix_scaling_matches_hand_computation() {
        // W z + b for W = [[2, 0], [1, 1]], b = [0, -1], z = [1, 3] → [2, 3]; softmax([2, 3]) =
        // [1/(1+e), e/(1+e)] (closed form).
        let m = MatrixScaling::try_new(
            2,
            vec![vec![2.0, 0.0], vec![1.0, 1.0]],
            vec![0.0, -1.0],
            "m",
        )
        .unwrap();
        let mut z = [1.0, 3.0];
        m.apply_in_place(&mut z, &mut Vec::new());
        let e = std::f64::consts::E;
        assert!((z[0] - 1.0 / (1.0 + e)).abs() < 1e-15);
        assert!((z[1] - e / (1.0 + e)).abs() < 1e-15);
    }

    #[test]
    fn shape_and_value_problems_are_all_named() {
        let err =
            MatrixScaling::try_new(2, vec![vec![1.0, f64::NAN], vec![1.0]], vec![0.0], "method")
                .unwrap_err();
        let fields: Vec<_> = err.iter().map(|p| p.field.as_str()).collect();
        assert_eq!(
            fields,
            ["method.weights[0][1]", "method.weights[1]", "method.biases"]
        );
        let err =
            Dirichlet::try_new(2, identity_rows(2), vec![0.0, 0.0], 0.0, "method").unwrap_err();
        assert_eq!(err[0].field, "method.epsilon");
        let err = VectorScaling::try_new(2, vec![1.0], vec![0.0, f64::INFINITY], "m").unwrap_err();
        assert_eq!(err.len(), 2);
    }
}
