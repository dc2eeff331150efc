//! The input flags every offline command shares, and turning a data set into probabilities.

use crate::dataset::{self, LabelNeed, LabelledSet, LogitsView, Source};
use crate::mapfile::CalibrationMap;
use crate::method::{InputForm, Method, Workspace};
use crate::numeric::Logit;
use anyhow::Context;
use std::path::PathBuf;

/// `--logits X.npy [--labels y.npy]` or `--data FILE.csv|FILE.jsonl`.
#[derive(Debug, Clone, clap::Args)]
pub struct InputArgs {
    /// Logits as .npy, float32 or float64, shape N × K (or N, or N × 1: one binary log-odds
    /// score per row).
    #[arg(long, value_name = "X.npy", conflicts_with = "data")]
    pub logits: Option<PathBuf>,
    /// Integer labels as .npy, shape N (with --logits).
    #[arg(long, value_name = "Y.npy", requires = "logits")]
    pub labels: Option<PathBuf>,
    /// Logits and labels as CSV (header; a `label` column, every other column a logit) or JSON
    /// Lines (`{"logits": [...], "label": k}` per line).
    #[arg(long, value_name = "FILE")]
    pub data: Option<PathBuf>,
}

impl InputArgs {
    /// Where the data comes from.
    ///
    /// # Errors
    /// An unknown `--data` extension.
    pub fn source(&self) -> anyhow::Result<Source> {
        match (&self.logits, &self.data) {
            (Some(l), _) => Ok(Source::Npy {
                logits: l.clone(),
                labels: self.labels.clone(),
            }),
            (None, Some(d)) => Ok(Source::from_data_path(d)?),
            (None, None) => anyhow::bail!("give --logits X.npy [--labels y.npy] or --data FILE"),
        }
    }

    /// Reads and validates the data.
    ///
    /// # Errors
    /// Any [`dataset::DatasetError`], naming file and row.
    pub fn read(&self, need: LabelNeed) -> anyhow::Result<LabelledSet> {
        let source = self.source()?;
        Ok(dataset::read(&source, need)?)
    }
}

/// The input form a data set with `k` values per row has (METHODS.md 0.3).
pub fn input_form(k: usize) -> InputForm {
    if k == 1 {
        InputForm::BinaryScore
    } else {
        InputForm::Logits
    }
}

/// Applies `method` to every row: n × classes probabilities, row-major.
pub fn apply_rows(method: &Method, set: &LabelledSet) -> Vec<f64> {
    fn run<L: Logit>(method: &Method, values: &[L], k: usize, classes: usize) -> Vec<f64> {
        let form = input_form(k);
        let mut ws = Workspace::new();
        let mut out = Vec::with_capacity(values.len() / k * classes);
        for row in values.chunks_exact(k) {
            out.extend_from_slice(ws.apply(method, form, classes, row));
        }
        out
    }
    match set.view() {
        LogitsView::F32(v) => run(method, v, set.k(), set.classes()),
        LogitsView::F64(v) => run(method, v, set.k(), set.classes()),
    }
}

/// Checks that `set` fits `map` (values per row and classes) and applies it.
///
/// # Errors
/// A data set whose shape does not match the map's.
pub fn calibrate(map: &CalibrationMap, set: &LabelledSet) -> anyhow::Result<Vec<f64>> {
    let want = map.input_len();
    anyhow::ensure!(
        set.k() == want && set.classes() == map.classes(),
        "the data has {} value(s) per row for {} classes, but map {} (model {}) expects {} for {} classes",
        set.k(),
        set.classes(),
        map.map_version(),
        map.model(),
        want,
        map.classes()
    );
    Ok(apply_rows(map.method(), set))
}

/// Applies a fitted `method` (for data with `k` values per row and `classes` classes) to another
/// data set, checking the shape.
///
/// # Errors
/// A data set with a different number of values per row.
pub fn calibrate_set(
    method: &Method,
    k: usize,
    classes: usize,
    other: &LabelledSet,
) -> anyhow::Result<Vec<f64>> {
    anyhow::ensure!(
        other.k() == k,
        "the certification data has {} value(s) per row, the fit data {k}",
        other.k()
    );
    debug_assert_eq!(other.classes(), classes);
    Ok(apply_rows(method, other))
}

/// Plain softmax of every row (the uncalibrated baseline).
pub fn uncalibrated(set: &LabelledSet) -> Vec<f64> {
    apply_rows(&Method::Identity, set)
}

/// The labels, with context for the error.
///
/// # Errors
/// When the data has no labels.
pub fn labels(set: &LabelledSet) -> anyhow::Result<&[u32]> {
    set.require_labels().context("this command needs labels")
}
