//! Reviewing a catalog change: what changed between two versions of the catalog, which
//! experiments and reports it touches (also indirectly, through ratio parts, event tables and
//! exposure logs), and how their SQL and numbers move.
//!
//! Pure comparison of two loaded catalogs; reading them from git and running queries is the
//! command line's job. Output as text, Markdown for a pull request, or JSON.

use crate::ir::{Catalog, MetricKind};
use crate::load::{Item, RawCatalog};
use serde::Serialize;
use std::collections::{BTreeMap, BTreeSet};

/// One declaration added, removed or changed.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Change {
    /// `unit`, `event_table`, `exposure_log`, `segment`, `metric` or `experiment`.
    pub kind: &'static str,
    pub name: String,
    /// `added`, `removed` or `changed`.
    pub change: &'static str,
    /// For `changed`: the keys whose values differ.
    pub fields: Vec<String>,
}

/// An experiment the change touches, and why.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Affected {
    pub experiment: String,
    pub reasons: Vec<String>,
    /// Unified diff of the readout SQL (empty when the SQL is identical or a side is missing).
    pub sql_diff: String,
    /// Before/after numbers, when computed (`--data`).
    pub numbers: Vec<NumberChange>,
}

/// One readout row before and after.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct NumberChange {
    pub metric: String,
    pub arm: String,
    pub before: Option<RowNumbers>,
    pub after: Option<RowNumbers>,
    pub verdict_changed: bool,
}

#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct RowNumbers {
    pub control_mean: Option<f64>,
    pub treatment_mean: Option<f64>,
    pub difference: Option<f64>,
    pub ci_low: Option<f64>,
    pub ci_high: Option<f64>,
    pub verdict: String,
}

#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Diff {
    pub base: String,
    pub head: String,
    pub changes: Vec<Change>,
    pub affected_experiments: Vec<Affected>,
    /// Metrics whose report numbers change (directly, through a ratio part or an event table).
    pub affected_reports: Vec<String>,
}

impl Diff {
    pub fn verdict_flips(&self) -> usize {
        self.affected_experiments
            .iter()
            .flat_map(|a| &a.numbers)
            .filter(|n| n.verdict_changed)
            .count()
    }
}

fn by_name<T: Serialize>(
    items: &[Item<T>],
    name: impl Fn(&T) -> Option<&String>,
) -> BTreeMap<String, serde_json::Value> {
    items
        .iter()
        .filter_map(|i| Some((name(&i.value)?.clone(), serde_json::to_value(&i.value).ok()?)))
        .collect()
}

fn compare(
    kind: &'static str,
    base: BTreeMap<String, serde_json::Value>,
    head: BTreeMap<String, serde_json::Value>,
    out: &mut Vec<Change>,
) {
    let names: BTreeSet<&String> = base.keys().chain(head.keys()).collect();
    for name in names {
        let change = |change, fields| Change {
            kind,
            name: name.clone(),
            change,
            fields,
        };
        match (base.get(name), head.get(name)) {
            (None, Some(_)) => out.push(change("added", vec![])),
            (Some(_), None) => out.push(change("removed", vec![])),
            (Some(a), Some(b)) if a != b => {
                let empty = serde_json::Map::new();
                let (a, b) = (a.as_object().unwrap_or(&empty), b.as_object().unwrap_or(&empty));
                let keys: BTreeSet<&String> = a.keys().chain(b.keys()).collect();
                let fields = keys
                    .into_iter()
                    .filter(|k| {
                        a.get(*k).unwrap_or(&serde_json::Value::Null)
                            != b.get(*k).unwrap_or(&serde_json::Value::Null)
                    })
                    .cloned()
                    .collect();
                out.push(change("changed", fields));
            }
            _ => {}
        }
    }
}

/// Every declaration added, removed or changed between `base` and `head`.
pub fn changes(base: &RawCatalog, head: &RawCatalog) -> Vec<Change> {
    let mut out = Vec::new();
    compare(
        "unit",
        by_name(&base.units, |v| v.name.as_ref()),
        by_name(&head.units, |v| v.name.as_ref()),
        &mut out,
    );
    compare(
        "event_table",
        by_name(&base.event_tables, |v| v.name.as_ref()),
        by_name(&head.event_tables, |v| v.name.as_ref()),
        &mut out,
    );
    compare(
        "exposure_log",
        by_name(&base.exposure_logs, |v| v.name.as_ref()),
        by_name(&head.exposure_logs, |v| v.name.as_ref()),
        &mut out,
    );
    compare(
        "segment",
        by_name(&base.segments, |v| v.name.as_ref()),
        by_name(&head.segments, |v| v.name.as_ref()),
        &mut out,
    );
    compare(
        "metric",
        by_name(&base.metrics, |v| v.name.as_ref()),
        by_name(&head.metrics, |v| v.name.as_ref()),
        &mut out,
    );
    compare(
        "experiment",
        by_name(&base.experiments, |v| v.name.as_ref()),
        by_name(&head.experiments, |v| v.name.as_ref()),
        &mut out,
    );
    out
}

/// Names of the metrics an experiment reads (its metrics and their ratio parts), with the event
/// tables they scan.
fn dependencies(
    c: &Catalog,
    experiment: &str,
) -> (
    BTreeSet<String>,
    BTreeSet<String>,
    Option<String>,
    BTreeSet<String>,
) {
    let (mut metrics, mut tables, mut segments) = (BTreeSet::new(), BTreeSet::new(), BTreeSet::new());
    let Some(id) = c.experiment(experiment) else {
        return (metrics, tables, None, segments);
    };
    let e = &c.experiments[id];
    let add = |m: usize, metrics: &mut BTreeSet<String>, tables: &mut BTreeSet<String>| {
        metrics.insert(c.metrics[m].name.clone());
        if let MetricKind::Events { table, .. } = c.metrics[m].kind {
            tables.insert(c.event_tables[table].name.clone());
        }
    };
    for &(m, _) in &e.metrics {
        add(m, &mut metrics, &mut tables);
        if let MetricKind::Ratio {
            numerator,
            denominator,
        } = c.metrics[m].kind
        {
            add(numerator, &mut metrics, &mut tables);
            add(denominator, &mut metrics, &mut tables);
        }
    }
    for &s in &e.segments {
        segments.insert(c.segments[s].name.clone());
    }
    (
        metrics,
        tables,
        Some(c.exposure_logs[e.exposures].name.clone()),
        segments,
    )
}

/// Experiments (in either version) that the changes touch, with the reasons.
pub fn affected_experiments(
    base: &Catalog,
    head: &Catalog,
    changes: &[Change],
) -> Vec<(String, Vec<String>)> {
    let changed = |kind: &str, name: &str| changes.iter().find(|c| c.kind == kind && c.name == name);
    let names: BTreeSet<String> = base
        .experiments
        .iter()
        .chain(&head.experiments)
        .map(|e| e.name.clone())
        .collect();
    let mut out = Vec::new();
    for name in names {
        let mut reasons = BTreeSet::new();
        if let Some(c) = changed("experiment", &name) {
            reasons.insert(match c.change {
                "changed" => format!("the experiment changed ({})", c.fields.join(", ")),
                other => format!("the experiment was {other}"),
            });
        }
        for side in [base, head] {
            let (metrics, tables, log, segments) = dependencies(side, &name);
            for m in &metrics {
                if let Some(c) = changed("metric", m) {
                    reasons.insert(format!("metric `{m}` {}", describe(c)));
                }
            }
            for t in &tables {
                if let Some(c) = changed("event_table", t) {
                    reasons.insert(format!("event table `{t}` {} (read by its metrics)", describe(c)));
                }
            }
            if let Some(l) = log
                && let Some(c) = changed("exposure_log", &l)
            {
                reasons.insert(format!("exposure log `{l}` {}", describe(c)));
            }
            for s in &segments {
                if let Some(c) = changed("segment", s) {
                    reasons.insert(format!("segment `{s}` {}", describe(c)));
                }
            }
        }
        if !reasons.is_empty() {
            out.push((name, reasons.into_iter().collect()));
        }
    }
    out
}

fn describe(c: &Change) -> String {
    match c.change {
        "changed" => format!("changed ({})", c.fields.join(", ")),
        other => format!("was {other}"),
    }
}

/// Metrics (in the head version) whose report numbers change.
pub fn affected_reports(base: &Catalog, head: &Catalog, changes: &[Change]) -> Vec<String> {
    let changed = |kind: &str, name: &str| changes.iter().any(|c| c.kind == kind && c.name == name);
    let mut out = BTreeSet::new();
    for c in [base, head] {
        for m in &c.metrics {
            let parts: Vec<usize> = match m.kind {
                MetricKind::Ratio {
                    numerator,
                    denominator,
                } => vec![numerator, denominator],
                MetricKind::Events { .. } => vec![],
            };
            let table_changed = |mm: &crate::ir::Metric| match mm.kind {
                MetricKind::Events { table, .. } => changed("event_table", &c.event_tables[table].name),
                MetricKind::Ratio { .. } => false,
            };
            if changed("metric", &m.name)
                || table_changed(m)
                || parts
                    .iter()
                    .any(|&p| changed("metric", &c.metrics[p].name) || table_changed(&c.metrics[p]))
            {
                out.insert(m.name.clone());
            }
        }
    }
    out.into_iter().collect()
}

/// A unified diff of two texts (`similar`), empty when they are equal.
pub fn text_diff(before: &str, after: &str, before_name: &str, after_name: &str) -> String {
    if before == after {
        return String::new();
    }
    similar::TextDiff::from_lines(before, after)
        .unified_diff()
        .context_radius(2)
        .header(before_name, after_name)
        .to_string()
}

fn num(v: Option<f64>) -> String {
    v.map(|x| crate::output::sig(x, 4)).unwrap_or_else(|| "-".into())
}

fn numbers_line(n: &Option<RowNumbers>) -> String {
    match n {
        None => "-".into(),
        Some(r) => format!(
            "{} vs {}: {} [{}, {}] {}",
            num(r.control_mean),
            num(r.treatment_mean),
            num(r.difference),
            num(r.ci_low),
            num(r.ci_high),
            r.verdict
        ),
    }
}

/// The diff as text for a terminal (`color`: ANSI colours on +/- lines).
pub fn text_output(d: &Diff, color: bool) -> String {
    use crate::output::mark;
    let paint = |line: &str| -> String {
        if !color {
            return line.to_string();
        }
        match line.chars().next() {
            Some('+') if !line.starts_with("+++") => format!("{}{line}{}", mark::GREEN, mark::RESET),
            Some('-') if !line.starts_with("---") => format!("{}{line}{}", mark::RED, mark::RESET),
            Some('@') => format!("{}{line}{}", mark::CYAN, mark::RESET),
            _ => line.to_string(),
        }
    };
    let mut out = format!("Catalog changes from {} to {}:\n", d.base, d.head);
    if d.changes.is_empty() {
        out.push_str("  no definition changed\n");
    }
    for c in &d.changes {
        let fields = if c.fields.is_empty() {
            String::new()
        } else {
            format!(" ({})", c.fields.join(", "))
        };
        out.push_str(&format!(
            "  {} {} `{}`{fields}\n",
            c.change,
            c.kind.replace('_', " "),
            c.name
        ));
    }
    if !d.affected_reports.is_empty() {
        out.push_str(&format!(
            "Reports that change: {}\n",
            d.affected_reports.join(", ")
        ));
    }
    for a in &d.affected_experiments {
        out.push_str(&format!("\nExperiment {}:\n", a.experiment));
        for r in &a.reasons {
            out.push_str(&format!("  - {r}\n"));
        }
        for n in &a.numbers {
            out.push_str(&format!(
                "  {} ({}): {}  ->  {}{}\n",
                n.metric,
                n.arm,
                numbers_line(&n.before),
                numbers_line(&n.after),
                if n.verdict_changed {
                    "  VERDICT CHANGED"
                } else {
                    ""
                }
            ));
        }
        if !a.sql_diff.is_empty() {
            out.push_str("  SQL diff:\n");
            for line in a.sql_diff.lines() {
                out.push_str(&format!("    {}\n", paint(line)));
            }
        }
    }
    out
}

/// The diff as Markdown for a pull request: lists, a numbers table, collapsible SQL diffs.
pub fn markdown_output(d: &Diff) -> String {
    let mut out = format!("### plumb: catalog changes (`{}` → `{}`)\n\n", d.base, d.head);
    if d.changes.is_empty() {
        out.push_str("No definition changed.\n");
    }
    for c in &d.changes {
        let fields = if c.fields.is_empty() {
            String::new()
        } else {
            format!(": {}", c.fields.join(", "))
        };
        out.push_str(&format!(
            "- **{}** {} `{}`{fields}\n",
            c.change,
            c.kind.replace('_', " "),
            c.name
        ));
    }
    if !d.affected_reports.is_empty() {
        out.push_str(&format!(
            "\nReports that change: {}\n",
            d.affected_reports
                .iter()
                .map(|m| format!("`{m}`"))
                .collect::<Vec<_>>()
                .join(", ")
        ));
    }
    for a in &d.affected_experiments {
        out.push_str(&format!("\n#### Experiment `{}`\n\n", a.experiment));
        for r in &a.reasons {
            out.push_str(&format!("- {r}\n"));
        }
        if !a.numbers.is_empty() {
            out.push_str("\n| metric | arm | before | after | verdict |\n|---|---|---|---|---|\n");
            for n in &a.numbers {
                out.push_str(&format!(
                    "| `{}` | {} | {} | {} | {} |\n",
                    n.metric,
                    n.arm,
                    numbers_line(&n.before),
                    numbers_line(&n.after),
                    if n.verdict_changed { "**changed**" } else { "same" }
                ));
            }
        }
        if !a.sql_diff.is_empty() {
            out.push_str(&format!(
                "\n<details><summary>SQL diff of <code>{}</code></summary>\n\n```diff\n{}```\n\n</details>\n",
                a.experiment, a.sql_diff
            ));
        }
    }
    out
}
