//! The page: a maud template (every text escaped; only the charts' SVG goes in verbatim) with
//! the CSS inline, readable on screen and in print.

use super::charts::{self, Series};
use super::data::{MetricRow, Report, Summary};
use super::format::{count, fixed, percent, threshold, MISSING};
use super::policy::ClassRow;
use super::style::{hex, CALIBRATED, THRESHOLD, UNCALIBRATED};
use super::ReportError;
use crate::eval::DEFAULT_REPLICATES;
use maud::{html, Markup, PreEscaped, DOCTYPE};

/// Decimals of the metric values in the tables.
const METRIC_DECIMALS: usize = 3;

/// Renders the report as one self-contained HTML document.
///
/// # Errors
/// [`ReportError::Chart`] if a chart cannot be drawn.
pub fn render_html(r: &Report) -> Result<String, ReportError> {
    let before = charts::reliability(&r.uncalibrated, Series::Uncalibrated)?;
    let after = charts::reliability(&r.calibrated, Series::Calibrated)?;
    let histogram =
        charts::confidence_histogram(&r.uncalibrated, &r.calibrated, &r.policy.thresholds)?;
    let curve = charts::risk_coverage(&r.uncalibrated, &r.calibrated, r.policy.target_risk)?;
    let title = format!("Calibration report: {} {}", r.map.model, r.map.map_version);
    let page = html! {
        (DOCTYPE)
        html lang="en" {
            head {
                meta charset="utf-8";
                meta name="viewport" content="width=device-width, initial-scale=1";
                title { (title) }
                style { (PreEscaped(css())) }
            }
            body {
                header {
                    h1 { (title) }
                    p.lede {
                        "Recalibration map " code { (r.map.digest) } " evaluated on "
                        (count(r.n as u64)) " labelled items."
                    }
                    @if r.in_sample {
                        p.warning { "These items are the map's own fit data (same digest): every \
                                     figure below is in-sample and optimistic." }
                    }
                }
                (identity_section(r))
                (policy_section(r))
                section #reliability {
                    h2 { "Reliability before and after" }
                    p.note { "Bars: share of right predictions in each of " (r.n_bins)
                             " equal-width confidence bins; dots: the bin's mean confidence. A \
                             calibrated model's bars reach the dashed diagonal. Under each \
                             diagram: items per bin. Empty bins are left blank." }
                    div.pair {
                        figure {
                            figcaption { "Uncalibrated (softmax of the logits)" }
                            (PreEscaped(before))
                        }
                        figure {
                            figcaption { "Calibrated (" (r.map.method) ")" }
                            (PreEscaped(after))
                        }
                    }
                }
                section #histogram {
                    h2 { "Confidence histogram" }
                    figure { (PreEscaped(histogram)) }
                }
                section #risk-coverage {
                    h2 { "Risk–coverage" }
                    p.note { "Accepting the most confident items first: how many are wrong among \
                              the accepted, for every share accepted. The dot marks where the \
                              map's policy operates; the hollow dot, the same rule on \
                              uncalibrated confidences." }
                    figure { (PreEscaped(curve)) }
                }
                (metrics_section(r))
                (classes_section(r))
                (provenance_section(r))
                (signoff_section())
                (footer(r))
            }
        }
    };
    Ok(page.into_string())
}

fn policy_section(r: &Report) -> Markup {
    let p = &r.policy;
    html! {
        section #policy .evidence {
            h2 { "Decision policy" }
            @for s in &p.sentences {
                p { (s) }
            }
            @if p.certified { p.badge.ok { "Certified threshold" } }
            @else { p.badge.warn { "Threshold not certified" } }
        }
    }
}

fn identity_section(r: &Report) -> Markup {
    let m = &r.map;
    html! {
        section #identity {
            h2 { "The map" }
            table.kv {
                tr { th { "Model" } td { (m.model) } }
                tr { th { "Map version" } td { (m.map_version) } }
                tr { th { "Digest" } td { code { (m.digest) } } }
                tr { th { "Method" } td { (m.method) " " code.params { (m.method_parameters) } } }
                tr { th { "Input" } td { (m.input) } }
                tr { th { "Classes" } td { (m.class_names.len()) ": " (m.class_names.join(", ")) } }
                tr { th { "Evaluated on" } td { (r.data.source) } }
                tr { th { "Data digest" } td { code { "sha256:" (r.data.digest) } } }
            }
        }
    }
}

fn provenance_section(r: &Report) -> Markup {
    let m = &r.map;
    html! {
        section #provenance {
            h2 { "Provenance" }
            @if m.provenance.is_empty() {
                p { "The map records no provenance." }
            } @else {
                table.kv.provenance {
                    @for (key, value) in &m.provenance {
                        tr { th { code { (key) } } td { (value) } }
                    }
                }
            }
            @if m.provenance_omitted > 0 {
                p.note { (m.provenance_omitted) " further provenance entries not shown." }
            }
        }
    }
}

fn signoff_section() -> Markup {
    html! {
        section #signoff {
            h2 { "Sign-off" }
            div.signoff {
                span { "Reviewed by " span.blank {} }
                span { "Date " span.blank {} }
                span { "Approved: yes / no" }
            }
        }
    }
}

fn metrics_section(r: &Report) -> Markup {
    let level = r.bootstrap.as_ref().map(|b| percent(b.level, 0));
    html! {
        section #metrics {
            h2 { "Metrics" }
            table.data {
                thead { tr {
                    th { "Metric" } th.num { "Uncalibrated" } th.num { "Calibrated" }
                    th { "Meaning" }
                } }
                tbody {
                    @for row in &r.metrics { (metric_row(row)) }
                }
            }
            p.note {
                @match (&r.bootstrap, &level) {
                    (Some(b), Some(level)) => {
                        "Brackets: " (level) " percentile bootstrap intervals from "
                        (count(b.replicates as u64)) " replicates (seed "
                        (b.seed.map_or_else(|| MISSING.to_owned(), |s| s.to_string()))
                        "; " (b.rng) "). They describe the estimators' sampling variability on \
                        these items."
                        @if b.replicates < DEFAULT_REPLICATES {
                            " That is fewer than the usual " (count(DEFAULT_REPLICATES as u64))
                            ", so the ends of the intervals are rougher."
                        }
                    }
                    _ => { "No intervals: the bootstrap was switched off." }
                }
                " Lower is better for every metric except accuracy."
            }
        }
    }
}

fn metric_row(row: &MetricRow) -> Markup {
    html! {
        tr {
            th { (row.name) }
            td.num { (summary(row.uncalibrated)) }
            td.num { (summary(row.calibrated)) }
            td.meaning { (row.meaning) }
        }
    }
}

fn summary(s: Summary) -> Markup {
    html! {
        (fixed(s.value, METRIC_DECIMALS))
        @if let Some((lo, hi)) = s.interval {
            " " span.ci { "[" (fixed(lo, METRIC_DECIMALS)) ", " (fixed(hi, METRIC_DECIMALS)) "]" }
        }
    }
}

fn classes_section(r: &Report) -> Markup {
    html! {
        section #classes {
            h2 { "Per class" }
            table.data {
                thead { tr {
                    th { "Predicted class" } th.num { "Items" } th.num { "Accuracy" }
                    th.num { "ECE before" } th.num { "ECE after" } th.num { "Threshold" }
                    th.num { "Accepted" } th.num { "Coverage" } th.num { "Accepted accuracy" }
                } }
                tbody { @for row in &r.policy.classes { (class_row(row)) } }
            }
            p.note { "Items are grouped by their calibrated predicted class, the grouping \
                      per-class thresholds act on. ECE before/after: one-vs-rest ECE of the \
                      class's probability over all items (their mean is the classwise ECE)." }
        }
    }
}

fn class_row(row: &ClassRow) -> Markup {
    let o = &row.outcome;
    let opt = |v: Option<f64>| v.map_or_else(|| MISSING.to_owned(), |v| percent(v, 1));
    html! {
        tr {
            th { (row.name) }
            td.num { (count(o.items)) }
            td.num { (opt(row.accuracy())) }
            td.num { (fixed(row.ece_uncalibrated, METRIC_DECIMALS)) }
            td.num { (fixed(row.ece_calibrated, METRIC_DECIMALS)) }
            td.num { @if row.threshold.is_some() { (threshold(row.threshold)) } @else { "never" } }
            td.num { (count(o.accepted)) }
            td.num { (opt((o.items > 0).then(|| o.coverage()))) }
            td.num { (opt(o.accepted_accuracy())) }
        }
    }
}

fn footer(r: &Report) -> Markup {
    html! {
        footer {
            p { "Made by candor " (env!("CARGO_PKG_VERSION")) ". " (r.n_bins)
                " equal-width bins, right-closed; ECE and MCE are top-label. Binomial intervals \
                and bounds are Clopper–Pearson. Colours: Okabe–Ito palette (orange = \
                uncalibrated, dashed; blue = calibrated, solid; vermillion = thresholds; green = \
                target)." }
        }
    }
}

/// The page's stylesheet: screen and print.
fn css() -> String {
    format!(
        r#"
:root {{ --before: {before}; --after: {after}; --threshold: {threshold}; --ink: #222; --muted: #666; --rule: #ccc; }}
* {{ box-sizing: border-box; }}
body {{ font-family: system-ui, -apple-system, "Segoe UI", Roboto, "Helvetica Neue", Arial, sans-serif;
       color: var(--ink); background: #fff; max-width: 960px; margin: 0 auto; padding: 24px 28px 48px;
       line-height: 1.45; font-size: 15px; }}
h1 {{ font-size: 24px; margin: 0 0 4px; }}
h2 {{ font-size: 19px; margin: 28px 0 8px; padding-bottom: 4px; border-bottom: 2px solid var(--ink); }}
h3 {{ font-size: 15px; margin: 16px 0 6px; }}
code {{ font-family: ui-monospace, "SFMono-Regular", Menlo, Consolas, monospace; font-size: 13px; word-break: break-all; }}
.lede {{ color: var(--muted); margin: 0; }}
.note {{ color: var(--muted); font-size: 13px; }}
.warning {{ border-left: 4px solid var(--threshold); padding: 6px 10px; background: #fff4ec; }}
.evidence p {{ margin: 6px 0; }}
.badge {{ display: inline-block; font-weight: 600; padding: 3px 10px; border: 2px solid; border-radius: 3px; }}
.badge.ok {{ color: var(--after); }}
.badge.warn {{ color: var(--threshold); }}
.signoff {{ display: flex; flex-wrap: wrap; gap: 36px; margin-top: 18px; }}
.signoff .blank {{ display: inline-block; width: 200px; border-bottom: 1px solid var(--ink); }}
table {{ border-collapse: collapse; width: 100%; font-size: 14px; }}
th, td {{ text-align: left; padding: 4px 8px; border-bottom: 1px solid var(--rule); vertical-align: top; }}
thead th {{ border-bottom: 2px solid var(--ink); }}
table.data tbody th {{ white-space: nowrap; }}
.num {{ text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }}
.ci {{ color: var(--muted); font-size: 12px; }}
.meaning {{ color: var(--muted); font-size: 13px; }}
table.kv th {{ width: 22%; font-weight: 600; }}
table.provenance {{ font-size: 13px; }}
code.params {{ color: var(--muted); }}
figure {{ margin: 8px 0; }}
figcaption {{ font-weight: 600; font-size: 14px; margin-bottom: 2px; }}
figure svg {{ display: block; width: 100%; height: auto; }}
.pair {{ display: grid; grid-template-columns: 1fr 1fr; gap: 16px; }}
footer {{ margin-top: 32px; border-top: 1px solid var(--rule); color: var(--muted); font-size: 12px; }}
@media (max-width: 720px) {{ .pair {{ grid-template-columns: 1fr; }} }}
@media print {{
  @page {{ size: A4; margin: 14mm; }}
  body {{ max-width: none; padding: 0; font-size: 10pt; }}
  h2 {{ break-after: avoid; }}
  section, figure, table, tr {{ break-inside: avoid; }}
  .pair {{ grid-template-columns: 1fr 1fr; }}
  a {{ color: inherit; text-decoration: none; }}
}}
"#,
        before = hex(UNCALIBRATED),
        after = hex(CALIBRATED),
        threshold = hex(THRESHOLD),
    )
}
