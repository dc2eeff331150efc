//! Assembling the report: everything the page shows, computed from the two sets of probabilities
//! (uncalibrated and calibrated) of the same labelled items and the map.

use super::policy::{self, PolicySection};
use super::{ReportError, ReportSettings};
use crate::eval::{
    reliability_diagram, risk_coverage, standard_metrics, standard_report, BootstrapInfo,
    EqualWidthBins, MetricSummary, Predictions, ReliabilityBin, StandardSettings,
};
use crate::mapfile::CalibrationMap;
use serde_json::{Map, Value};

/// Bins of the confidence histogram (finer than the reliability bins, to show the shape).
pub const HISTOGRAM_BINS: usize = 50;
/// Most points drawn on a risk–coverage curve; longer curves are sampled at evenly spaced
/// coverages (the last point, full coverage, always kept).
pub const RISK_COVERAGE_POINTS: usize = 400;
/// Most provenance lines shown; the rest are counted, not listed.
pub const MAX_PROVENANCE_LINES: usize = 60;
/// Longest provenance or method value shown, in characters; longer ones are cut with "…".
pub const MAX_VALUE_CHARS: usize = 240;

/// What the report is about: the map, the two sets of n×K probabilities (row-major) of the same
/// items, their labels, and where the items came from.
#[derive(Debug, Clone, Copy)]
pub struct ReportInput<'a> {
    /// The calibration map under review.
    pub map: &'a CalibrationMap,
    /// Probabilities before recalibration (softmax of the logits).
    pub uncalibrated: &'a [f64],
    /// Probabilities after applying the map.
    pub calibrated: &'a [f64],
    /// True class of each item.
    pub labels: &'a [u32],
    /// Where the items came from.
    pub data: &'a DataIdentity,
}

/// The evaluated data's name and fingerprint.
#[derive(Debug, Clone, PartialEq)]
pub struct DataIdentity {
    /// How the user named it (file paths).
    pub source: String,
    /// SHA-256 of the numbers (hex), as [`crate::dataset::LabelledSet::digest`] computes it.
    pub digest: String,
}

/// The map's identity as the page shows it.
#[derive(Debug, Clone, PartialEq)]
pub struct MapIdentity {
    /// Model name.
    pub model: String,
    /// Map version.
    pub map_version: String,
    /// `sha256:<hex>` digest of the map's canonical content.
    pub digest: String,
    /// Method kind, e.g. "temperature".
    pub method: String,
    /// The method's parameters as compact JSON, cut at [`MAX_VALUE_CHARS`].
    pub method_parameters: String,
    /// Input form name ("logits" or "binary_score").
    pub input: String,
    /// Class names (the map's, or "class 0", "class 1", …).
    pub class_names: Vec<String>,
    /// Provenance flattened to (dotted key, value) lines, in the file's order.
    pub provenance: Vec<(String, String)>,
    /// Provenance lines left out beyond [`MAX_PROVENANCE_LINES`].
    pub provenance_omitted: usize,
}

/// A metric's value with its bootstrap interval, when one was computed.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Summary {
    /// Value on all items.
    pub value: f64,
    /// Percentile bootstrap interval (low, high).
    pub interval: Option<(f64, f64)>,
}

/// One row of the metrics table.
#[derive(Debug, Clone, PartialEq)]
pub struct MetricRow {
    /// Metric name.
    pub name: &'static str,
    /// What it measures, in a few words (with its unit).
    pub meaning: &'static str,
    /// Before recalibration.
    pub uncalibrated: Summary,
    /// After recalibration.
    pub calibrated: Summary,
}

/// What the charts need of one set of probabilities.
#[derive(Debug, Clone, PartialEq)]
pub struct SetView {
    /// Reliability-diagram bins on the report's equal-width bins, empty bins included.
    pub reliability: Vec<ReliabilityBin>,
    /// Items per confidence-histogram bin ([`HISTOGRAM_BINS`] equal-width bins on [0, 1]).
    pub histogram: Vec<u64>,
    /// Sampled risk–coverage curve: (coverage, risk) pairs, coverage increasing.
    pub risk_coverage: Vec<(f64, f64)>,
    /// The policy's operating point on these confidences: (coverage, risk); risk is `None`
    /// when nothing is accepted.
    pub operating_point: (f64, Option<f64>),
}

/// Everything the page shows.
#[derive(Debug, Clone, PartialEq)]
pub struct Report {
    /// The map under review.
    pub map: MapIdentity,
    /// The evaluated data.
    pub data: DataIdentity,
    /// Whether the evaluated data is the map's own fit data (same digest): optimistic figures.
    pub in_sample: bool,
    /// Number of items n.
    pub n: usize,
    /// Number of equal-width bins M.
    pub n_bins: usize,
    /// Before recalibration.
    pub uncalibrated: SetView,
    /// After recalibration.
    pub calibrated: SetView,
    /// The metrics table.
    pub metrics: Vec<MetricRow>,
    /// How the intervals were made; `None` without a bootstrap.
    pub bootstrap: Option<BootstrapInfo>,
    /// The decision policy, its evidence and its outcome on these items.
    pub policy: PolicySection,
}

/// Evaluates both sets of probabilities and gathers the report.
///
/// # Errors
/// [`ReportError::Classes`] if the map's class count differs from the data's;
/// [`ReportError::Eval`] naming the set whose probabilities or labels are invalid;
/// [`ReportError::Bound`] if a binomial bound fails.
pub fn assemble(input: &ReportInput<'_>, settings: &ReportSettings) -> Result<Report, ReportError> {
    let map = input.map;
    let k = map.classes();
    if input.calibrated.len() != input.labels.len() * k {
        return Err(ReportError::Classes {
            data: input.calibrated.len() / input.labels.len().max(1),
            map: k,
            map_version: map.map_version().to_owned(),
        });
    }
    let eval_err = |which| move |source| ReportError::Eval { which, source };
    let before = Predictions::try_new(input.uncalibrated, k, input.labels)
        .map_err(eval_err("uncalibrated"))?;
    let after =
        Predictions::try_new(input.calibrated, k, input.labels).map_err(eval_err("calibrated"))?;
    let policy = policy::section(map, &before, &after, settings)?;
    let metric_threshold = map.policy().global_threshold().unwrap_or(f64::INFINITY);
    let m = settings.bins().n_bins();
    let standard =
        StandardSettings::try_new(m, m, metric_threshold).map_err(ReportError::Setting)?;
    let (rows, bootstrap) = metric_rows(&before, &after, &standard, settings)?;
    Ok(Report {
        map: map_identity(map),
        data: input.data.clone(),
        in_sample: fit_digest(map).is_some_and(|d| d == input.data.digest),
        n: after.n(),
        n_bins: settings.bins().n_bins(),
        uncalibrated: set_view(
            &before,
            settings.bins(),
            policy.uncalibrated.operating_point(),
        ),
        calibrated: set_view(&after, settings.bins(), policy.calibrated.operating_point()),
        metrics: rows,
        bootstrap,
        policy,
    })
}

/// Reliability bins, histogram and sampled risk–coverage curve of one set.
fn set_view(p: &Predictions<'_>, bins: &EqualWidthBins, operating: (f64, Option<f64>)) -> SetView {
    let mut histogram = vec![0u64; HISTOGRAM_BINS];
    for &c in p.confidence() {
        // Right-closed bins like the reliability bins: ⌈c·B⌉ − 1, with 0 in the first bin.
        let b = ((c * HISTOGRAM_BINS as f64).ceil() as usize).clamp(1, HISTOGRAM_BINS) - 1;
        histogram[b] += 1;
    }
    SetView {
        reliability: reliability_diagram(p, bins),
        histogram,
        risk_coverage: sample_curve(p),
        operating_point: operating,
    }
}

/// The risk–coverage curve at no more than [`RISK_COVERAGE_POINTS`] evenly spaced coverages:
/// point j covers the top ⌈j·n/P⌉ items.
fn sample_curve(p: &Predictions<'_>) -> Vec<(f64, f64)> {
    let curve = risk_coverage(p);
    let n = curve.risk.len();
    let points = n.min(RISK_COVERAGE_POINTS);
    (1..=points)
        .map(|j| {
            let k = (j * n).div_ceil(points);
            (curve.coverage[k - 1], curve.risk[k - 1])
        })
        .collect()
}

/// The metrics table, with intervals when a bootstrap is set.
fn metric_rows(
    before: &Predictions<'_>,
    after: &Predictions<'_>,
    standard: &StandardSettings,
    settings: &ReportSettings,
) -> Result<(Vec<MetricRow>, Option<BootstrapInfo>), ReportError> {
    type Get = fn(&Summaries) -> Summary;
    let (b, a, info) = match settings.bootstrap() {
        Some(config) => {
            let run = |p: &Predictions<'_>, which| {
                standard_report(p, standard, config)
                    .map_err(|source| ReportError::Eval { which, source })
            };
            let (b, a) = (run(before, "uncalibrated")?, run(after, "calibrated")?);
            let info = a.bootstrap.clone();
            (
                Summaries::from_report(&b),
                Summaries::from_report(&a),
                Some(info),
            )
        }
        None => (
            Summaries::from_point(before, standard),
            Summaries::from_point(after, standard),
            None,
        ),
    };
    let row = |name, meaning, get: Get| MetricRow {
        name,
        meaning,
        uncalibrated: get(&b),
        calibrated: get(&a),
    };
    let rows = vec![
        row(
            "Accuracy",
            "share of top-label predictions that are right (higher is better)",
            |s| s.accuracy,
        ),
        row(
            "ECE",
            "expected calibration error, top label, equal-width bins",
            |s| s.ece,
        ),
        row("Adaptive ECE", "ECE on equal-mass groups", |s| {
            s.adaptive_ece
        }),
        row("MCE", "largest bin gap |accuracy − confidence|", |s| {
            s.mce
        }),
        row("Classwise ECE", "mean one-vs-rest ECE over classes", |s| {
            s.classwise_ece
        }),
        row("NLL", "negative log-likelihood, nats per item", |s| s.nll),
        row(
            "Brier",
            "multi-class Brier score (sum over classes, not halved)",
            |s| s.brier,
        ),
        row("AURC", "area under the risk–coverage curve", |s| s.aurc),
    ];
    Ok((rows, info))
}

/// The metric summaries of one set.
struct Summaries {
    accuracy: Summary,
    ece: Summary,
    adaptive_ece: Summary,
    mce: Summary,
    classwise_ece: Summary,
    nll: Summary,
    brier: Summary,
    aurc: Summary,
}

impl Summaries {
    fn from_report(r: &crate::eval::StandardReport) -> Self {
        let s = |m: MetricSummary| Summary {
            value: m.value,
            interval: (m.low.is_finite() && m.high.is_finite()).then_some((m.low, m.high)),
        };
        Self {
            accuracy: s(r.accuracy),
            ece: s(r.ece),
            adaptive_ece: s(r.adaptive_ece),
            mce: s(r.mce),
            classwise_ece: s(r.classwise_ece),
            nll: s(r.nll),
            brier: s(r.brier),
            aurc: s(r.aurc),
        }
    }

    fn from_point(p: &Predictions<'_>, standard: &StandardSettings) -> Self {
        let m = standard_metrics(p, standard);
        let s = |value| Summary {
            value,
            interval: None,
        };
        Self {
            accuracy: s(m.accuracy),
            ece: s(m.ece),
            adaptive_ece: s(m.adaptive_ece),
            mce: s(m.mce),
            classwise_ece: s(m.classwise_ece),
            nll: s(m.nll),
            brier: s(m.brier),
            aurc: s(m.aurc),
        }
    }
}

/// The map's identity, its method parameters and its provenance flattened to lines.
fn map_identity(map: &CalibrationMap) -> MapIdentity {
    let doc: Value = serde_json::from_str(&map.to_json()).unwrap_or(Value::Null);
    let mut method = doc.get("method").cloned().unwrap_or(Value::Null);
    if let Value::Object(m) = &mut method {
        m.remove("kind");
    }
    let mut provenance = Vec::new();
    flatten(
        "",
        &Value::Object(map.provenance().clone()),
        &mut provenance,
    );
    let omitted = provenance.len().saturating_sub(MAX_PROVENANCE_LINES);
    provenance.truncate(MAX_PROVENANCE_LINES);
    let class_names = match map.class_names() {
        Some(names) => names.to_vec(),
        None => (0..map.classes()).map(|k| format!("class {k}")).collect(),
    };
    MapIdentity {
        model: map.model().to_owned(),
        map_version: map.map_version().to_owned(),
        digest: map.digest().to_owned(),
        method: map.method().kind().to_owned(),
        method_parameters: cut(&method.to_string()),
        input: map.input().name().to_owned(),
        class_names,
        provenance,
        provenance_omitted: omitted,
    }
}

/// Appends (dotted key, value) for every leaf of `value`; arrays are kept whole as JSON.
fn flatten(prefix: &str, value: &Value, out: &mut Vec<(String, String)>) {
    match value {
        Value::Object(fields) if !fields.is_empty() => {
            for (key, v) in fields {
                let path = if prefix.is_empty() {
                    key.clone()
                } else {
                    format!("{prefix}.{key}")
                };
                flatten(&path, v, out);
            }
        }
        Value::String(s) => out.push((prefix.to_owned(), cut(s))),
        other => out.push((prefix.to_owned(), cut(&other.to_string()))),
    }
}

/// `s` cut to [`MAX_VALUE_CHARS`] characters, with "…" when cut.
fn cut(s: &str) -> String {
    match s.char_indices().nth(MAX_VALUE_CHARS) {
        Some((at, _)) => format!("{}…", &s[..at]),
        None => s.to_owned(),
    }
}

/// The fit data's digest recorded in the provenance (`fit_data.sha256`), if any.
fn fit_digest(map: &CalibrationMap) -> Option<&str> {
    let fit: &Map<String, Value> = map.provenance().get("fit_data")?.as_object()?;
    fit.get("sha256")?.as_str()
}
