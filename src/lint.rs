//! Lint rules: a catalog that resolves can still be a catalog that misleads.
//!
//! Each rule has a stable code, a name and a one-line rationale (`plumb check` prints them as
//! warnings with a span). Codes group rules by what they look at: Q1xx a metric's definition,
//! Q2xx an experiment's design, Q3xx the catalog as a whole; the rule name is the primary id.
//! Severity per rule is configurable in `plumb.yaml` (`lint: {unused-metric: off, Q202:
//! error}`); the codes L001–L009 of earlier versions are still accepted there, with warning
//! W005 naming the new code. `plumb check --deny warnings` turns every warning into a failure
//! for CI. Rules read the resolved catalog and point at the YAML that triggered them.

use crate::diagnostics::{Diagnostic, Severity};
use crate::ir::{self, Aggregation, Catalog, MetricKind, Role};
use crate::load::RawCatalog;

/// A lint rule: stable code, name and why it matters.
pub struct Rule {
    pub code: &'static str,
    /// The code this rule had before codes were renumbered (accepted in `lint:` with warning
    /// W005).
    pub old_code: &'static str,
    pub name: &'static str,
    pub rationale: &'static str,
}

pub const RULES: &[Rule] = &[
    Rule {
        code: "Q101",
        old_code: "L001",
        name: "metric-without-description",
        rationale: "a metric nobody can explain gets misread; say what one unit's value means",
    },
    Rule {
        code: "Q102",
        old_code: "L002",
        name: "metric-without-owner",
        rationale: "someone must answer for a metric's definition when numbers look wrong",
    },
    Rule {
        code: "Q201",
        old_code: "L003",
        name: "window-longer-than-experiment",
        rationale: "units exposed late cannot complete the window, so the metric mixes complete and cut-off windows",
    },
    Rule {
        code: "Q301",
        old_code: "L004",
        name: "unused-metric",
        rationale: "a metric no experiment uses is untested by any readout; remove it or use it (reports may still use it)",
    },
    Rule {
        code: "Q202",
        old_code: "L005",
        name: "guardrail-without-direction",
        rationale: "a guardrail without `direction` can never fail the readout",
    },
    Rule {
        code: "Q203",
        old_code: "L006",
        name: "experiment-without-primary",
        rationale: "without primary metrics every result is secondary, and nothing decides the experiment",
    },
    Rule {
        code: "Q104",
        old_code: "L007",
        name: "ratio-denominator-often-zero",
        rationale: "a filtered or windowed denominator is zero for many units, so the ratio rests on few of them",
    },
    Rule {
        code: "Q103",
        old_code: "L008",
        name: "sum-without-winsorize",
        rationale: "sums of values (revenue, time) are usually heavy-tailed; a few extreme units can decide the result",
    },
    Rule {
        code: "Q105",
        old_code: "L009",
        name: "integer-division",
        rationale: "dividing by a whole number truncates on PostgreSQL, Redshift and Trino when the column is an integer (amount_cents / 100 gives 12, not 12.34), but not on DuckDB, Spark or BigQuery",
    },
];

/// The text of every division by a whole-number literal in `expr` (`amount_cents / 100`).
fn integer_divisions(expr: &sqlparser::ast::Expr) -> Vec<String> {
    use sqlparser::ast::{BinaryOperator, Expr, Value, visit_expressions};
    use std::ops::ControlFlow;
    let mut found = Vec::new();
    let _ = visit_expressions(expr, |e| {
        if let Expr::BinaryOp {
            op: BinaryOperator::Divide,
            right,
            ..
        } = e
            && let Expr::Value(v) = right.as_ref()
            && let Value::Number(n, _) = &v.value
            && n.chars().all(|c| c.is_ascii_digit())
        {
            found.push(e.to_string());
        }
        ControlFlow::<()>::Continue(())
    });
    found
}

fn rule(code: &str) -> &'static Rule {
    RULES.iter().find(|r| r.code == code).expect("a defined rule")
}

fn warn(code: &'static str, message: String) -> Diagnostic {
    let r = rule(code);
    Diagnostic {
        severity: Severity::Warning,
        code,
        message: format!("{message} [{}]", r.name),
        span: None,
        labels: Vec::new(),
        hints: vec![r.rationale.to_string()],
    }
}

/// Runs every rule. Indexes of `raw` and `catalog` correspond (resolve keeps the order).
pub fn lint(raw: &RawCatalog, catalog: &Catalog) -> Vec<Diagnostic> {
    let mut out = Vec::new();
    let mut used = vec![false; catalog.metrics.len()];
    for e in &catalog.experiments {
        for &(m, _) in &e.metrics {
            used[m] = true;
            if let MetricKind::Ratio {
                numerator,
                denominator,
            } = catalog.metrics[m].kind
            {
                used[numerator] = true;
                used[denominator] = true;
            }
        }
    }
    for (i, (item, m)) in raw.metrics.iter().zip(&catalog.metrics).enumerate() {
        if m.description.is_none() {
            out.push(warn("Q101", format!("metric `{}` has no description", m.name)).at(Some(item.span())));
        }
        if m.owner.is_none() {
            out.push(warn("Q102", format!("metric `{}` has no owner", m.name)).at(Some(item.span())));
        }
        if !used[i] {
            out.push(warn("Q301", format!("no experiment uses metric `{}`", m.name)).at(Some(item.span())));
        }
        if let MetricKind::Events {
            aggregation: Aggregation::Sum,
            cap: None,
            ..
        } = m.kind
            && used[i]
        {
            out.push(
                warn("Q103", format!("sum metric `{}` has no `winsorize`", m.name))
                    .at(item.key_span("per_unit"))
                    .hint("add e.g. `winsorize: 99.9%` after checking the tail of the per-unit values"),
            );
        }
        if let MetricKind::Events { value, filter, .. } = &m.kind {
            for (key, expr) in [("of", value), ("where", filter)] {
                for division in expr.iter().flat_map(|e| integer_divisions(e)) {
                    let fixed = division
                        .trim_end_matches(|c: char| c.is_ascii_digit())
                        .to_string();
                    let literal = &division[fixed.len()..];
                    out.push(
                        warn(
                            "Q105",
                            format!("metric `{}` divides by a whole number: `{division}`", m.name),
                        )
                        .at(item.value_span(key))
                        .hint(format!(
                            "write `{fixed}{literal}.0` to divide as a decimal on every engine"
                        )),
                    );
                }
            }
        }
        if let MetricKind::Ratio { denominator, .. } = m.kind
            && let MetricKind::Events { filter, window, .. } = &catalog.metrics[denominator].kind
            && (filter.is_some() || window.end.is_some())
        {
            out.push(
                warn(
                    "Q104",
                    format!(
                        "ratio `{}` divides by `{}`, which is filtered or windowed",
                        m.name, catalog.metrics[denominator].name
                    ),
                )
                .at(item.value_span("ratio")),
            );
        }
    }
    for (item, e) in raw.experiments.iter().zip(&catalog.experiments) {
        let length = e.end.0 - e.start.0;
        if !e.metrics.iter().any(|(_, r)| *r == Role::Primary) {
            out.push(
                warn("Q203", format!("experiment `{}` has no primary metric", e.name)).at(Some(item.span())),
            );
        }
        for &(m, role) in &e.metrics {
            let metric: &ir::Metric = &catalog.metrics[m];
            if role == Role::Guardrail && metric.direction.is_none() {
                out.push(
                    warn(
                        "Q202",
                        format!("guardrail `{}` of `{}` has no direction", metric.name, e.name),
                    )
                    .at(Some(item.value_span("guardrails").unwrap_or_else(|| item.span())))
                    .hint(format!(
                        "add `direction: decrease` (or increase) to metric `{}`",
                        metric.name
                    )),
                );
            }
            if let MetricKind::Events { window, .. } = &metric.kind
                && window.end.is_some_and(|end| end > length)
            {
                out.push(
                    warn(
                        "Q201",
                        format!(
                            "metric `{}` has a window of {}, longer than experiment `{}` ({})",
                            metric.name,
                            crate::time::format_duration(window.end.unwrap_or(0)),
                            e.name,
                            crate::time::format_duration(length)
                        ),
                    )
                    .at(Some(item.span())),
                );
            }
        }
    }
    out
}

/// Applies `lint:` settings from plumb.yaml: `off` drops a rule's diagnostics, `error` makes
/// them errors, `warning` keeps them. Returns the kept diagnostics.
pub fn apply_levels(diags: Vec<Diagnostic>, levels: &[(String, String)]) -> Vec<Diagnostic> {
    diags
        .into_iter()
        .filter_map(|mut d| {
            let name = rule(d.code).name;
            match levels
                .iter()
                .find(|(k, _)| k == d.code || k == name || k == rule(d.code).old_code)
                .map(|(_, v)| v.as_str())
            {
                Some("off") => None,
                Some("error") => {
                    d.severity = Severity::Error;
                    Some(d)
                }
                _ => Some(d),
            }
        })
        .collect()
}
