//! Reports: a metric as a time series over the whole population of its unit.
//!
//! Turns the long-format rows of the report query (one per metric, part, period and segment
//! value) into one row per metric, period and segment value, filling periods without data with
//! zero rows so a chart never hides a gap, and formats them as a table with a text chart, JSON
//! or CSV. The query itself is compiled by `plan::plan_report` and `render` from the same
//! metric definitions as the readout query.

use crate::error::{Error, Result};
use crate::execute::{Cell, NamedRow};
use crate::plan::{ReportMetricKind, ReportPlan};
use crate::time::Timestamp;
use serde::Serialize;
use std::collections::BTreeMap;

/// One period of one metric (and segment value).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ReportRow {
    pub metric: String,
    pub period_start: String,
    pub segment: Option<crate::stats::readout::SegmentRef>,
    /// Active units in the period.
    pub units: u64,
    /// Sum of the per-unit values; null for ratio metrics.
    pub total: Option<f64>,
    /// Per active unit (total / units); for ratio metrics numerator / denominator. Null when
    /// undefined (no units, or a zero denominator).
    pub mean: Option<f64>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub numerator: Option<f64>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub denominator: Option<f64>,
}

fn text(row: &NamedRow, col: &str) -> Option<String> {
    match row.get(col) {
        Some(Cell::Text(t)) => Some(t.clone()),
        Some(Cell::Number(x)) => Some(x.to_string()),
        _ => None,
    }
}

/// A number cell of a report row; NULL (no events) is 0, anything else that is not a number
/// is an error, never a silent 0.
fn number(row: &NamedRow, col: &str) -> Result<f64> {
    crate::execute::cell_number(row.get(col))
        .map(|x| x.unwrap_or(0.0))
        .map_err(|e| Error::data(format!("report column `{col}`: {e}")))
}

/// Period start of a result cell: seconds since the epoch or an ISO text.
fn period(row: &NamedRow) -> Result<Timestamp> {
    match row.get("period_start") {
        Some(Cell::Number(x)) => Ok(Timestamp(*x as i64)),
        Some(Cell::Text(t)) => Timestamp::parse(t.trim_end_matches(".000000").trim_end_matches("+00"))
            .map_err(|e| Error::data(format!("period_start: {e}"))),
        _ => Err(Error::data("the report result has no period_start")),
    }
}

/// Assembles report rows: every period from `from` to `to` for every metric and every segment
/// value seen (zero rows where a period has no data).
pub fn assemble(plan: &ReportPlan, rows: &[NamedRow]) -> Result<Vec<ReportRow>> {
    // (metric, segment value, period) -> part -> (units, total)
    type Key = (String, Option<String>, Timestamp);
    let mut cells: BTreeMap<Key, BTreeMap<String, (u64, f64)>> = BTreeMap::new();
    let mut segment_values: Vec<Option<String>> = Vec::new();
    for row in rows {
        let row: NamedRow = row
            .iter()
            .map(|(k, v)| (k.to_ascii_lowercase(), v.clone()))
            .collect();
        let metric = text(&row, "metric").ok_or_else(|| Error::data("a report row has no metric"))?;
        let part = text(&row, "part").unwrap_or_default();
        let segment = text(&row, "segment_value");
        if !segment_values.contains(&segment) {
            segment_values.push(segment.clone());
        }
        cells
            .entry((metric, segment, period(&row)?))
            .or_default()
            .insert(part, (number(&row, "units")? as u64, number(&row, "total")?));
    }
    if segment_values.is_empty() || plan.segment.is_none() {
        segment_values = vec![None];
    }
    segment_values.sort();
    let periods = plan.grain.periods(plan.from, plan.to);
    let mut out = Vec::new();
    for m in &plan.metrics {
        for seg in &segment_values {
            for p in &periods {
                let parts = cells.get(&(m.name.clone(), seg.clone(), *p));
                let get = |part: &str| parts.and_then(|c| c.get(part)).copied().unwrap_or((0, 0.0));
                let units = get("active").0;
                let segment = plan.segment.as_ref().map(|s| crate::stats::readout::SegmentRef {
                    name: s.name.clone(),
                    value: seg.clone(),
                });
                let row = match &m.kind {
                    ReportMetricKind::Value { .. } => {
                        let total = get("value").1;
                        ReportRow {
                            metric: m.name.clone(),
                            period_start: p.to_iso(),
                            segment,
                            units,
                            total: Some(total),
                            mean: (units > 0).then(|| total / units as f64),
                            numerator: None,
                            denominator: None,
                        }
                    }
                    ReportMetricKind::Ratio { .. } => {
                        let (n, d) = (get("numerator").1, get("denominator").1);
                        ReportRow {
                            metric: m.name.clone(),
                            period_start: p.to_iso(),
                            segment,
                            units,
                            total: None,
                            mean: (d != 0.0).then(|| n / d),
                            numerator: Some(n),
                            denominator: Some(d),
                        }
                    }
                };
                out.push(row);
            }
        }
    }
    Ok(out)
}

/// A one-line chart of `values` with eighth blocks; missing values are spaces.
pub fn sparkline(values: &[Option<f64>]) -> String {
    const BARS: [char; 8] = ['▁', '▂', '▃', '▄', '▅', '▆', '▇', '█'];
    let present: Vec<f64> = values
        .iter()
        .flatten()
        .copied()
        .filter(|v| v.is_finite())
        .collect();
    let (lo, hi) = present
        .iter()
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), v| {
            (a.min(*v), b.max(*v))
        });
    values
        .iter()
        .map(|v| match v {
            Some(v) if v.is_finite() => {
                let t = if hi > lo { (v - lo) / (hi - lo) } else { 0.5 };
                BARS[((t * 7.0).round() as usize).min(7)]
            }
            _ => ' ',
        })
        .collect()
}

/// The report as tables with a chart line per metric (and segment value).
pub fn text_output(rows: &[ReportRow]) -> String {
    use comfy_table::{Cell as C, CellAlignment, Table, presets};
    let mut out = String::new();
    let mut keys: Vec<(String, Option<String>)> = Vec::new();
    for r in rows {
        let k = (r.metric.clone(), r.segment.as_ref().and_then(|s| s.value.clone()));
        if !keys.contains(&k) {
            keys.push(k);
        }
    }
    for (metric, seg) in keys {
        let series: Vec<&ReportRow> = rows
            .iter()
            .filter(|r| r.metric == metric && r.segment.as_ref().and_then(|s| s.value.clone()) == seg)
            .collect();
        let label = match (series.first().and_then(|r| r.segment.as_ref()), &seg) {
            (Some(s), v) => format!("{metric} ({} = {})", s.name, v.as_deref().unwrap_or("(none)")),
            (None, _) => metric.clone(),
        };
        let means: Vec<Option<f64>> = series.iter().map(|r| r.mean).collect();
        out.push_str(&format!("{label}  {}\n", sparkline(&means)));
        let ratio = series.first().is_some_and(|r| r.numerator.is_some());
        let mut t = Table::new();
        t.load_preset(presets::UTF8_FULL_CONDENSED);
        if ratio {
            t.set_header(vec!["period", "units", "numerator", "denominator", "ratio"]);
        } else {
            t.set_header(vec!["period", "units", "total", "mean"]);
        }
        let num = |v: Option<f64>| v.map(|x| crate::output::sig(x, 5)).unwrap_or_else(|| "-".into());
        for r in &series {
            let mut cells = vec![
                C::new(&r.period_start),
                C::new(r.units).set_alignment(CellAlignment::Right),
            ];
            if ratio {
                cells.push(C::new(num(r.numerator)).set_alignment(CellAlignment::Right));
                cells.push(C::new(num(r.denominator)).set_alignment(CellAlignment::Right));
            } else {
                cells.push(C::new(num(r.total)).set_alignment(CellAlignment::Right));
            }
            cells.push(C::new(num(r.mean)).set_alignment(CellAlignment::Right));
            t.add_row(cells);
        }
        out.push_str(&t.to_string());
        out.push_str("\n\n");
    }
    out.push_str("units: active units in the period (any row of the metric's event table, or of the unit's `active` table); mean: total per active unit (ratio metrics: numerator / denominator).\n");
    out
}

/// The report as CSV: one header row, ISO timestamps, empty cells for missing values.
pub fn csv_output(rows: &[ReportRow]) -> String {
    let field = |s: &str| {
        if s.contains([',', '"', '\n']) {
            format!("\"{}\"", s.replace('"', "\"\""))
        } else {
            s.to_string()
        }
    };
    let num = |v: Option<f64>| v.map(|x| x.to_string()).unwrap_or_default();
    let mut out =
        String::from("metric,period_start,segment,segment_value,units,total,mean,numerator,denominator\n");
    for r in rows {
        let (sn, sv) = match &r.segment {
            Some(s) => (s.name.clone(), s.value.clone().unwrap_or_default()),
            None => (String::new(), String::new()),
        };
        out.push_str(&format!(
            "{},{},{},{},{},{},{},{},{}\n",
            field(&r.metric),
            r.period_start,
            field(&sn),
            field(&sv),
            r.units,
            num(r.total),
            num(r.mean),
            num(r.numerator),
            num(r.denominator)
        ));
    }
    out
}

#[cfg(test)]
mod tests {
    #[test]
    fn sparkline_scales_between_min_and_max() {
        assert_eq!(super::sparkline(&[Some(0.0), Some(1.0), None, Some(0.5)]), "▁█ ▅");
    }
}
