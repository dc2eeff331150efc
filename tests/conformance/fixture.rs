//! Reading the fixtures of tests/data/conformance and comparing numbers with stated tolerances.

use candor::method::{InputForm, Method, Workspace};
use serde::de::DeserializeOwned;
use serde::Deserialize;
use std::collections::BTreeMap;
use std::fmt;
use std::path::PathBuf;

/// Library versions a fixture was generated with, for failure messages.
#[derive(Debug, Deserialize)]
pub struct Versions(pub BTreeMap<String, String>);

impl fmt::Display for Versions {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let parts: Vec<String> = self.0.iter().map(|(k, v)| format!("{k} {v}")).collect();
        write!(f, "{}", parts.join(", "))
    }
}

/// A reference file: what was computed, how, and one entry per case.
#[derive(Debug, Deserialize)]
pub struct References<C> {
    pub reference: String,
    pub cases: Vec<C>,
    pub versions: Versions,
}

/// One part (calibration or test) of a score set.
#[derive(Debug, Deserialize)]
pub struct Part {
    pub labels: Vec<u32>,
    /// n rows of `columns` logits; one column is a binary score f, read as (0, f).
    pub logits: Vec<Vec<f64>>,
}

impl Part {
    /// Row-major logits as stored (`columns` per row).
    pub fn flat(&self) -> Vec<f64> {
        self.logits.iter().flatten().copied().collect()
    }

    /// Row-major logits with K per row: a one-column binary score f becomes the pair (0, f).
    pub fn flat_classes(&self) -> Vec<f64> {
        self.logits
            .iter()
            .flat_map(|row| match row.as_slice() {
                [f] => vec![0.0, *f],
                all => all.to_vec(),
            })
            .collect()
    }
}

/// Held-out scores of one model on one data set (scores_*.json).
#[derive(Debug, Deserialize)]
pub struct ScoreSet {
    pub classes: usize,
    pub columns: usize,
    pub calibration: Part,
    pub test: Part,
}

impl ScoreSet {
    /// How a row of this set's logits is read.
    pub fn form(&self) -> InputForm {
        if self.columns == 1 {
            InputForm::BinaryScore
        } else {
            InputForm::Logits
        }
    }

    /// Calibrated probabilities of every test row under `method`.
    pub fn apply_test(&self, method: &Method) -> Vec<Vec<f64>> {
        let mut ws = Workspace::new();
        let form = self.form();
        self.test
            .logits
            .iter()
            .map(|row| ws.apply(method, form, self.classes, row).to_vec())
            .collect()
    }
}

/// Path of a fixture file.
fn path(name: &str) -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("tests/data/conformance")
        .join(name)
}

/// Parses a fixture file (a missing or malformed fixture fails the test with its path).
pub fn load<T: DeserializeOwned>(name: &str) -> T {
    let p = path(name);
    let text = std::fs::read_to_string(&p).unwrap_or_else(|e| {
        panic!(
            "cannot read {}: {e} (regenerate: see tests/data/README.md)",
            p.display()
        )
    });
    serde_json::from_str(&text).unwrap_or_else(|e| panic!("cannot parse {}: {e}", p.display()))
}

/// The score set a reference case names.
pub fn scores(name: &str) -> ScoreSet {
    load(&format!("scores_{name}.json"))
}

/// How close a computed value must be to its reference.
#[derive(Debug, Clone, Copy)]
pub enum Tolerance {
    /// |got − want| ≤ tol · |want|.
    Relative(f64),
    /// |got − want| ≤ tol.
    Absolute(f64),
}

impl Tolerance {
    /// The difference measured the way the tolerance is stated, and the tolerance.
    fn measure(self, got: f64, want: f64) -> (f64, f64) {
        let diff = (got - want).abs();
        match self {
            Tolerance::Relative(t) if want != 0.0 => (diff / want.abs(), t),
            Tolerance::Relative(t) | Tolerance::Absolute(t) => (diff, t),
        }
    }
}

impl fmt::Display for Tolerance {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Tolerance::Relative(t) => write!(f, "{t:e} relative"),
            Tolerance::Absolute(t) => write!(f, "{t:e} absolute"),
        }
    }
}

/// Collects every comparison of a test, then fails once listing each value outside its
/// tolerance with expected and got; prints the largest difference seen per quantity (measured
/// as its tolerance is stated, relative or absolute) and the largest share of a tolerance used.
pub struct Checker {
    context: String,
    reference: String,
    failures: Vec<String>,
    /// Per quantity: the largest difference, and the largest share of its tolerance used.
    worst: BTreeMap<String, (f64, f64)>,
}

impl Checker {
    /// A checker whose messages start with `context` (the fixture and its versions).
    pub fn new<C>(file: &str, refs: &References<C>) -> Checker {
        Checker {
            context: format!("{file} ({})", refs.versions),
            reference: refs.reference.clone(),
            failures: Vec::new(),
            worst: BTreeMap::new(),
        }
    }

    /// Compares one value; `what` names the case and quantity, `kind` groups the summary.
    pub fn close(&mut self, kind: &str, what: &str, got: f64, want: f64, tol: Tolerance) {
        let (diff, limit) = tol.measure(got, want);
        let entry = self.worst.entry(kind.to_string()).or_insert((0.0, 0.0));
        entry.0 = if diff.is_nan() {
            diff
        } else {
            entry.0.max(diff)
        };
        entry.1 = entry.1.max(diff / limit);
        // NaN (a failed computation) must fail too, so test for "within" and negate.
        let within = diff <= limit;
        if !within {
            self.failures.push(format!(
                "{what}: expected {want:e}, got {got:e}, difference {diff:e} exceeds {tol}"
            ));
        }
    }

    /// Compares two equally long sequences element by element.
    pub fn all_close(&mut self, kind: &str, what: &str, got: &[f64], want: &[f64], tol: Tolerance) {
        if got.len() != want.len() {
            self.failures.push(format!(
                "{what}: expected {} values, got {}",
                want.len(),
                got.len()
            ));
            return;
        }
        for (i, (&g, &w)) in got.iter().zip(want).enumerate() {
            self.close(kind, &format!("{what}[{i}]"), g, w, tol);
        }
    }

    /// Compares rows of probabilities.
    pub fn rows_close(
        &mut self,
        kind: &str,
        what: &str,
        got: &[Vec<f64>],
        want: &[Vec<f64>],
        tol: Tolerance,
    ) {
        if got.len() != want.len() {
            self.failures.push(format!(
                "{what}: expected {} rows, got {}",
                want.len(),
                got.len()
            ));
            return;
        }
        for (i, (g, w)) in got.iter().zip(want).enumerate() {
            self.all_close(kind, &format!("{what} row {i}"), g, w, tol);
        }
    }

    /// Records a failure that is not a numeric comparison (e.g. a fit error).
    pub fn fail(&mut self, message: String) {
        self.failures.push(message);
    }

    /// Prints the largest differences and fails with every mismatch, if any.
    pub fn finish(self) {
        for (kind, (diff, share)) in &self.worst {
            println!(
                "{}: {kind}: largest difference {diff:.2e}, at most {:.1}% of its tolerance",
                self.context,
                100.0 * share
            );
        }
        if !self.failures.is_empty() {
            panic!(
                "{}: {} value(s) outside tolerance:\n  {}\nreference: {}",
                self.context,
                self.failures.len(),
                self.failures.join("\n  "),
                self.reference
            );
        }
    }
}
