//! Stage 3, `plan`: typed IR -> a dialect-free query plan.
//!
//! Decides the shape of the SQL without writing any: which exposure log and experiment key to
//! read, one scan per event table holding every per-unit column the experiment needs (metrics
//! and the parts of ratio metrics) as conditional aggregates, the range every scan can be cut
//! to before the join, and the arm-level statistics to compute. User fragments are qualified
//! here with the alias of the table they belong to, so no join can make them ambiguous.

use crate::ir::{self, Aggregation, Catalog, MetricKind, Role, Source};
use crate::time::Timestamp;
use sqlparser::ast::{Expr, Ident, visit_expressions_mut};
use std::ops::ControlFlow;

/// Alias of the event table inside each scan.
pub const EVENT_ALIAS: &str = "e";
/// Alias of the exposed units inside each scan.
pub const UNIT_ALIAS: &str = "x";

#[derive(Debug, Clone)]
pub struct ExperimentPlan {
    pub experiment: String,
    pub exposures: ExposureScan,
    pub start: Timestamp,
    pub end: Timestamp,
    pub scans: Vec<EventScan>,
    /// Every per-unit column, in output order.
    pub columns: Vec<UnitColumn>,
    /// Ratio metrics: numerator and denominator columns, for the covariance.
    pub ratios: Vec<RatioColumns>,
    /// The experiment's metrics with their role, in readout order.
    pub metrics: Vec<PlannedMetric>,
}

#[derive(Debug, Clone)]
pub struct ExposureScan {
    pub source: Source,
    pub id: String,
    pub time: String,
    pub experiment_column: String,
    pub arm_column: String,
    pub key: String,
}

/// One pass over one event table.
#[derive(Debug, Clone)]
pub struct EventScan {
    /// CTE name, e.g. `scan_orders`.
    pub name: String,
    pub table: String,
    pub source: Source,
    pub id: String,
    pub time: String,
    /// The table's own `where`, qualified.
    pub filter: Option<Expr>,
    /// Events before `start + earliest_offset` can never count: cut before the join.
    pub earliest_offset: i64,
    pub aggregates: Vec<Aggregate>,
}

/// One per-unit value computed in a scan.
#[derive(Debug, Clone)]
pub struct Aggregate {
    pub column: String,
    pub aggregation: Aggregation,
    pub value: Option<Expr>,
    pub filter: Option<Expr>,
    pub window: ir::Window,
}

/// A per-unit column of the experiment's unit table.
#[derive(Debug, Clone)]
pub struct UnitColumn {
    pub column: String,
    /// Index of the scan computing it.
    pub scan: usize,
    /// Units without events get 0 (count, sum, ...); min/max stay NULL.
    pub zero_fill: bool,
}

#[derive(Debug, Clone)]
pub struct RatioColumns {
    pub metric: String,
    pub numerator: String,
    pub denominator: String,
}

#[derive(Debug, Clone)]
pub struct PlannedMetric {
    pub name: String,
    pub role: Role,
    pub kind: PlannedKind,
}

#[derive(Debug, Clone)]
pub enum PlannedKind {
    /// A per-unit column analysed directly.
    Mean { column: String },
    /// Ratio of two per-unit columns' means, analysed with the delta method.
    Ratio { numerator: String, denominator: String },
}

/// Qualifies every bare column name in `expr` with `alias`.
pub fn qualify(expr: &Expr, alias: &str) -> Expr {
    let mut expr = expr.clone();
    let _ = visit_expressions_mut(&mut expr, |e| {
        if let Expr::Identifier(ident) = e {
            *e = Expr::CompoundIdentifier(vec![Ident::new(alias), ident.clone()]);
        }
        ControlFlow::<()>::Continue(())
    });
    expr
}

/// Plans the readout query of one experiment.
pub fn plan_experiment(catalog: &Catalog, experiment: ir::ExperimentId) -> ExperimentPlan {
    let exp = &catalog.experiments[experiment];
    let log = &catalog.exposure_logs[exp.exposures];
    let mut plan = ExperimentPlan {
        experiment: exp.name.clone(),
        exposures: ExposureScan {
            source: log.source.clone(),
            id: log.id.clone(),
            time: log.time.clone(),
            experiment_column: log.experiment.clone(),
            arm_column: log.arm.clone(),
            key: exp.key.clone(),
        },
        start: exp.start,
        end: exp.end,
        scans: Vec::new(),
        columns: Vec::new(),
        ratios: Vec::new(),
        metrics: Vec::new(),
    };
    for &(id, role) in &exp.metrics {
        let metric = &catalog.metrics[id];
        let kind = match &metric.kind {
            MetricKind::Events { .. } => {
                add_column(catalog, &mut plan, id);
                PlannedKind::Mean {
                    column: metric.name.clone(),
                }
            }
            MetricKind::Ratio {
                numerator,
                denominator,
            } => {
                add_column(catalog, &mut plan, *numerator);
                add_column(catalog, &mut plan, *denominator);
                let (n, d) = (
                    catalog.metrics[*numerator].name.clone(),
                    catalog.metrics[*denominator].name.clone(),
                );
                plan.ratios.push(RatioColumns {
                    metric: metric.name.clone(),
                    numerator: n.clone(),
                    denominator: d.clone(),
                });
                PlannedKind::Ratio {
                    numerator: n,
                    denominator: d,
                }
            }
        };
        plan.metrics.push(PlannedMetric {
            name: metric.name.clone(),
            role,
            kind,
        });
    }
    plan
}

/// Adds the per-unit column of an event metric to the scan of its table (once).
fn add_column(catalog: &Catalog, plan: &mut ExperimentPlan, metric: ir::MetricId) {
    let m = &catalog.metrics[metric];
    if plan.columns.iter().any(|c| c.column == m.name) {
        return;
    }
    let MetricKind::Events {
        table,
        aggregation,
        value,
        filter,
        window,
    } = &m.kind
    else {
        return;
    };
    let t = &catalog.event_tables[*table];
    let scan = match plan.scans.iter().position(|s| s.table == t.name) {
        Some(i) => i,
        None => {
            plan.scans.push(EventScan {
                name: format!("scan_{}", t.name),
                table: t.name.clone(),
                source: t.source.clone(),
                id: t.id.clone(),
                time: t.time.clone(),
                filter: t.filter.as_ref().map(|f| qualify(f, EVENT_ALIAS)),
                earliest_offset: window.start,
                aggregates: Vec::new(),
            });
            plan.scans.len() - 1
        }
    };
    let s = &mut plan.scans[scan];
    s.earliest_offset = s.earliest_offset.min(window.start);
    s.aggregates.push(Aggregate {
        column: m.name.clone(),
        aggregation: *aggregation,
        value: value.as_ref().map(|v| qualify(v, EVENT_ALIAS)),
        filter: filter.as_ref().map(|f| qualify(f, EVENT_ALIAS)),
        window: *window,
    });
    plan.columns.push(UnitColumn {
        column: m.name.clone(),
        scan,
        zero_fill: aggregation.zero_fill(),
    });
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn qualifies_bare_columns_only() {
        let e =
            crate::resolve::sql::parse_expr("status = 'paid' and lower(x.k) = 'a' and amount > 0").unwrap();
        assert_eq!(
            qualify(&e, "e").to_string(),
            "e.status = 'paid' AND lower(x.k) = 'a' AND e.amount > 0"
        );
    }
}
