//! Gauges of the live quality windows (see [`crate::live`]), one series per model and map version.

use crate::live::{LiveQuality, Promise};
use prometheus_client::encoding::{DescriptorEncoder, EncodeMetric};
use prometheus_client::metrics::gauge::ConstGauge;
use prometheus_client::metrics::MetricType;

type Pick = fn(&LiveQuality) -> Option<f64>;

/// (name, help, value) of every per-window gauge; a window without a value has no sample.
const GAUGES: [(&str, &str, Pick); 12] = [
    ("live_window_decisions", "Decisions in the live window.", |q| Some(q.window_decisions as f64)),
    ("live_automation_rate", "Share of the live window's items accepted.", |q| q.automation_rate),
    ("live_audit_rate", "Audit rate applied to accepted items of this version.", |q| Some(q.audit_rate)),
    ("live_audited_labels", "Audited accepted items with a label in the window.", |q| Some(q.accepted_accuracy.map_or(0.0, |a| a.n as f64))),
    ("live_accepted_accuracy", "Accuracy of accepted items estimated from the audit sample (Hájek).", |q| q.accepted_accuracy.map(|a| a.estimate)),
    ("live_accepted_accuracy_lower", "Lower end of the accepted accuracy's exact interval.", |q| q.accepted_accuracy.map(|a| a.lower)),
    ("live_accepted_accuracy_upper", "Upper end of the accepted accuracy's exact interval.", |q| q.accepted_accuracy.map(|a| a.upper)),
    ("live_deferred_accuracy", "Accuracy of the labelled deferred items.", |q| q.deferred_accuracy.map(|a| a.estimate)),
    ("live_deferred_labels", "Labelled deferred items in the window.", |q| Some(q.deferred_accuracy.map_or(0.0, |a| a.n as f64))),
    ("live_weighted_ece", "Top-label ECE of labelled items, audited ones weighted by 1/audit rate.", |q| q.weighted_ece),
    ("live_drift_psi", "Population Stability Index of the window's confidences against the map's fit-time reference.", |q| q.drift.map(|d| d.psi)),
    ("live_drift_ks_binned", "KS statistic of the binned confidences against the reference (a lower bound on the unbinned one).", |q| q.drift.map(|d| d.ks_binned)),
];

/// Encodes the live gauges of `windows`.
pub(super) fn encode(
    encoder: &mut DescriptorEncoder,
    windows: &[LiveQuality],
) -> Result<(), std::fmt::Error> {
    if windows.is_empty() {
        return Ok(());
    }
    for (name, help, pick) in GAUGES {
        let rows: Vec<_> = windows
            .iter()
            .filter_map(|q| pick(q).map(|v| (q, v)))
            .collect();
        if rows.is_empty() {
            continue;
        }
        let mut f = encoder.encode_descriptor(name, help, None, MetricType::Gauge)?;
        for (q, v) in rows {
            let labels = [
                ("model", q.model.as_str()),
                ("map_version", q.map_version.as_str()),
            ];
            ConstGauge::new(v).encode(f.encode_family(&labels)?)?;
        }
    }
    let mut f = encoder.encode_descriptor(
        "live_promise",
        "1 for the state of the map's accuracy promise by the audit sample, 0 for the others.",
        None,
        MetricType::Gauge,
    )?;
    for q in windows {
        for p in Promise::ALL {
            let labels = [
                ("model", q.model.as_str()),
                ("map_version", q.map_version.as_str()),
                ("state", p.name()),
            ];
            ConstGauge::new(i64::from(q.promise == p)).encode(f.encode_family(&labels)?)?;
        }
    }
    let mut f = encoder.encode_descriptor(
        "live_drift_flagged",
        "1 when the confidence distribution has moved from the fit-time reference (PSI ≥ 0.1 over enough items).",
        None,
        MetricType::Gauge,
    )?;
    for q in windows {
        let labels = [
            ("model", q.model.as_str()),
            ("map_version", q.map_version.as_str()),
        ];
        ConstGauge::new(i64::from(q.drift_level.flagged())).encode(f.encode_family(&labels)?)?;
    }
    Ok(())
}
