//! `plumb list`: what the catalog declares — units, event tables, exposure logs, segments,
//! metrics and experiments — as a short table or JSON, so a user can find a name without
//! opening the YAML files.

use super::{Format, Global, Outcome};
use crate::context::EngineChoice;
use crate::error::Result;
use crate::ir::{Catalog, MetricKind, SegmentKind, Source};
use serde_json::json;

#[derive(Debug, clap::Args)]
pub struct ListArgs {
    #[arg(long, value_enum, default_value = "table")]
    format: Format,
}

fn source(s: &Source) -> String {
    match s {
        Source::Table(parts) => parts.join("."),
        Source::Query(_) => "(sql)".into(),
    }
}

fn metric_kind(c: &Catalog, kind: &MetricKind) -> String {
    match kind {
        MetricKind::Events {
            table,
            aggregation: a,
            ..
        } => format!("{} of {}", a.text(), c.event_tables[*table].name),
        MetricKind::Ratio {
            numerator,
            denominator,
        } => format!(
            "ratio {} / {}",
            c.metrics[*numerator].name, c.metrics[*denominator].name
        ),
    }
}

/// The catalog as JSON: one array per kind of item, in declaration order.
fn document(c: &Catalog) -> serde_json::Value {
    json!({
        "units": c.units.iter().map(|u| json!({"name": u.name, "description": u.description})).collect::<Vec<_>>(),
        "event_tables": c.event_tables.iter().map(|t| json!({
            "name": t.name, "unit": c.units[t.unit].name, "source": source(&t.source),
        })).collect::<Vec<_>>(),
        "exposure_logs": c.exposure_logs.iter().map(|l| json!({
            "name": l.name, "unit": c.units[l.unit].name, "source": source(&l.source),
        })).collect::<Vec<_>>(),
        "segments": c.segments.iter().map(|s| json!({
            "name": s.name,
            "from": match &s.kind {
                SegmentKind::Attribute { source: src, .. } => source(src),
                SegmentKind::FromExposure(column) => format!("exposure column {column}"),
            },
        })).collect::<Vec<_>>(),
        "metrics": c.metrics.iter().map(|m| json!({
            "name": m.name, "unit": c.units[m.unit].name, "kind": metric_kind(c, &m.kind),
            "owner": m.owner, "description": m.description,
        })).collect::<Vec<_>>(),
        "experiments": c.experiments.iter().map(|e| json!({
            "name": e.name, "start": e.start.to_iso(), "end": e.end.to_iso(),
            "arms": e.arms.iter().map(|a| a.name.clone()).collect::<Vec<_>>(),
            "metrics": e.metrics.len(),
            "exposure_log": c.exposure_logs[e.exposures].name,
        })).collect::<Vec<_>>(),
    })
}

fn text(c: &Catalog) -> String {
    let mut out = String::new();
    let mut section = |title: &str, rows: Vec<(String, String)>| {
        out.push_str(&format!("{title} ({}):\n", rows.len()));
        let w = rows.iter().map(|(n, _)| n.chars().count()).max().unwrap_or(0);
        for (name, about) in rows {
            let pad = w - name.chars().count();
            out.push_str(format!("  {name}{}  {about}", " ".repeat(pad)).trim_end());
            out.push('\n');
        }
        out.push('\n');
    };
    section(
        "Units",
        c.units
            .iter()
            .map(|u| (u.name.clone(), u.description.clone().unwrap_or_default()))
            .collect(),
    );
    section(
        "Event tables",
        c.event_tables
            .iter()
            .map(|t| {
                (
                    t.name.clone(),
                    format!("{}s, {}", c.units[t.unit].name, source(&t.source)),
                )
            })
            .collect(),
    );
    section(
        "Exposure logs",
        c.exposure_logs
            .iter()
            .map(|l| {
                (
                    l.name.clone(),
                    format!("{}s, {}", c.units[l.unit].name, source(&l.source)),
                )
            })
            .collect(),
    );
    section(
        "Segments",
        c.segments
            .iter()
            .map(|s| {
                let from = match &s.kind {
                    SegmentKind::Attribute { source: src, .. } => format!("attribute from {}", source(src)),
                    SegmentKind::FromExposure(column) => format!("exposure column {column}"),
                };
                (s.name.clone(), from)
            })
            .collect(),
    );
    section(
        "Metrics",
        c.metrics
            .iter()
            .map(|m| {
                let owner = m
                    .owner
                    .as_deref()
                    .map(|o| format!(", owner {o}"))
                    .unwrap_or_default();
                (
                    m.name.clone(),
                    format!("per {}: {}{owner}", c.units[m.unit].name, metric_kind(c, &m.kind)),
                )
            })
            .collect(),
    );
    section(
        "Experiments",
        c.experiments
            .iter()
            .map(|e| {
                let arms: Vec<&str> = e.arms.iter().map(|a| a.name.as_str()).collect();
                (
                    e.name.clone(),
                    format!(
                        "{} to {}, arms {}, {} metric{}",
                        e.start.to_iso(),
                        e.end.to_iso(),
                        arms.join("/"),
                        e.metrics.len(),
                        if e.metrics.len() == 1 { "" } else { "s" }
                    ),
                )
            })
            .collect(),
    );
    out.pop();
    out
}

pub fn run(global: &Global, a: ListArgs) -> Result<Outcome> {
    let ctx = global.open(EngineChoice::Local)?;
    let c = ctx.catalog();
    Ok(Outcome::stdout(match a.format {
        Format::Table => text(c),
        Format::Json => super::json(&document(c))?,
    }))
}
