//! Stage 3, `plan`: typed IR -> a dialect-free query plan.
//!
//! Decides the shape of the SQL without writing any: which exposure log and experiment key to
//! read, one scan per event table holding every per-unit column the experiment needs (metrics,
//! the parts of ratio metrics, and their pre-exposure covariates) as conditional aggregates,
//! the time range every scan can be cut to before the join, the caps of winsorized metrics,
//! the segments to slice by, and the arm-level moments to compute. User fragments are
//! qualified here with the alias of the table they belong to, so no join can make them
//! ambiguous.

use crate::columns;
use crate::ir::{self, Aggregation, Cap, Catalog, MetricKind, Role, SegmentKind, Source};
use crate::time::Timestamp;
use sqlparser::ast::{Expr, Ident, visit_expressions_mut};
use std::ops::ControlFlow;

/// Alias of the event table inside each scan.
pub const EVENT_ALIAS: &str = "e";
/// Alias of a segment's attribute table.
pub const SEGMENT_ALIAS: &str = "s";

#[derive(Debug, Clone)]
pub struct ExperimentPlan {
    pub experiment: String,
    pub exposures: ExposureScan,
    pub start: Timestamp,
    pub end: Timestamp,
    pub scans: Vec<EventScan>,
    /// Every per-unit column, in output order (covariates after their metric).
    pub columns: Vec<UnitColumn>,
    /// Covariances to compute per arm (ratio parts, covariates).
    pub covariances: Vec<Covariance>,
    /// Segments to slice by, each a grouping set besides the overall one.
    pub segments: Vec<PlannedSegment>,
    /// The experiment's metrics with their role, in readout order.
    pub metrics: Vec<PlannedMetric>,
    /// Length of the pre-exposure covariate window in seconds (0: none).
    pub covariate_window: i64,
}

#[derive(Debug, Clone)]
pub struct ExposureScan {
    pub source: Source,
    pub id: String,
    pub time: String,
    pub experiment_column: String,
    pub arm_column: String,
    /// Only the rows of this experiment (`experiment_column = key`). `None` reads every row of
    /// the log as one arm, [`HISTORY_ARM`] (the history of `plan_history`).
    pub key: Option<String>,
}

/// The one arm of a history plan: every unit exposed to anything in the window.
pub const HISTORY_ARM: &str = "all";

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
    /// Relative to first exposure; `end: None` means up to the experiment's end.
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
    pub cap: Option<Cap>,
}

/// `covar_samp(a, b)` per arm, output as column `name`.
#[derive(Debug, Clone)]
pub struct Covariance {
    pub name: String,
    pub a: String,
    pub b: String,
}

#[derive(Debug, Clone)]
pub struct PlannedSegment {
    pub name: String,
    /// Column of the per-unit table holding the segment value.
    pub column: String,
    pub kind: PlannedSegmentKind,
}

#[derive(Debug, Clone)]
pub enum PlannedSegmentKind {
    /// A column of the exposure row (at first exposure).
    Exposure { column: String },
    /// A unit attribute: one value per unit, as of first exposure when `time` is set.
    Attribute {
        source: Source,
        id: String,
        value: Box<Expr>,
        time: Option<String>,
    },
}

#[derive(Debug, Clone)]
pub struct PlannedMetric {
    pub id: ir::MetricId,
    pub name: String,
    pub role: Role,
    pub kind: PlannedKind,
    /// Pre-exposure covariate columns (`None` when the window is 0d).
    pub covariate: Option<PlannedKind>,
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

/// Plans the readout query of one experiment, sliced by the experiment's `segments` plus
/// `extra_segments` (e.g. from `--by`).
pub fn plan_experiment(
    catalog: &Catalog,
    experiment: ir::ExperimentId,
    extra_segments: &[ir::SegmentId],
) -> ExperimentPlan {
    let exp = &catalog.experiments[experiment];
    plan_for(catalog, exp, exposure_scan(catalog, experiment), extra_segments)
}

/// Plans the history query of `plumb power`: the same readout query over a past window, as a
/// one-arm pseudo-experiment of every unit of exposure log `log` first exposed (to anything)
/// in `[start, end)`, with `metric` measured from each unit's first exposure. Variance and
/// traffic for planning thus come from the very SQL a readout runs.
pub fn plan_history(
    catalog: &Catalog,
    metric: ir::MetricId,
    log: ir::ExposureLogId,
    start: Timestamp,
    end: Timestamp,
) -> ExperimentPlan {
    let l = &catalog.exposure_logs[log];
    let exposures = ExposureScan {
        source: l.source.clone(),
        id: l.id.clone(),
        time: l.time.clone(),
        experiment_column: l.experiment.clone(),
        arm_column: l.arm.clone(),
        key: None,
    };
    let history = ir::Experiment {
        name: "history".into(),
        description: None,
        exposures: log,
        key: String::new(),
        control: HISTORY_ARM.into(),
        arms: vec![ir::Arm {
            name: HISTORY_ARM.into(),
            share: 1.0,
        }],
        start,
        end,
        metrics: vec![(metric, Role::Primary)],
        covariate_window: 0,
        segments: vec![],
        mde: None,
    };
    plan_for(catalog, &history, exposures, &[])
}

fn plan_for(
    catalog: &Catalog,
    exp: &ir::Experiment,
    exposures: ExposureScan,
    extra_segments: &[ir::SegmentId],
) -> ExperimentPlan {
    let mut plan = ExperimentPlan {
        experiment: exp.name.clone(),
        exposures,
        start: exp.start,
        end: exp.end,
        scans: Vec::new(),
        columns: Vec::new(),
        covariances: Vec::new(),
        segments: Vec::new(),
        metrics: Vec::new(),
        covariate_window: exp.covariate_window,
    };
    let with_covariates = exp.covariate_window > 0;
    for &(id, role) in &exp.metrics {
        let metric = &catalog.metrics[id];
        let (kind, covariate) = match &metric.kind {
            MetricKind::Events { .. } => {
                let column = add_column(catalog, &mut plan, id);
                let covariate = with_covariates.then(|| {
                    let pre = add_covariate(catalog, &mut plan, id);
                    add_covariance(&mut plan, &column, &pre);
                    PlannedKind::Mean { column: pre }
                });
                (PlannedKind::Mean { column }, covariate)
            }
            MetricKind::Ratio {
                numerator,
                denominator,
            } => {
                let n = add_column(catalog, &mut plan, *numerator);
                let d = add_column(catalog, &mut plan, *denominator);
                add_covariance(&mut plan, &n, &d);
                let covariate = with_covariates.then(|| {
                    let np = add_covariate(catalog, &mut plan, *numerator);
                    let dp = add_covariate(catalog, &mut plan, *denominator);
                    // Every pair of the four columns: what CUPED on a linearised ratio needs.
                    for (a, b) in [(&n, &np), (&n, &dp), (&d, &np), (&d, &dp), (&np, &dp)] {
                        add_covariance(&mut plan, a, b);
                    }
                    PlannedKind::Ratio {
                        numerator: np,
                        denominator: dp,
                    }
                });
                (
                    PlannedKind::Ratio {
                        numerator: n,
                        denominator: d,
                    },
                    covariate,
                )
            }
        };
        plan.metrics.push(PlannedMetric {
            id,
            name: metric.name.clone(),
            role,
            kind,
            covariate,
        });
    }
    let mut segment_ids: Vec<ir::SegmentId> = exp.segments.clone();
    for s in extra_segments {
        if !segment_ids.contains(s) {
            segment_ids.push(*s);
        }
    }
    for id in segment_ids {
        plan.segments.push(planned_segment(catalog, id));
    }
    plan
}

/// How to read an experiment's exposures: its exposure log's columns and its key.
fn exposure_scan(catalog: &Catalog, experiment: ir::ExperimentId) -> ExposureScan {
    let exp = &catalog.experiments[experiment];
    let log = &catalog.exposure_logs[exp.exposures];
    ExposureScan {
        source: log.source.clone(),
        id: log.id.clone(),
        time: log.time.clone(),
        experiment_column: log.experiment.clone(),
        arm_column: log.arm.clone(),
        key: Some(exp.key.clone()),
    }
}

/// A segment as the plan needs it: its per-unit column and where its value comes from.
fn planned_segment(catalog: &Catalog, id: ir::SegmentId) -> PlannedSegment {
    let s = &catalog.segments[id];
    let kind = match &s.kind {
        SegmentKind::FromExposure(column) => PlannedSegmentKind::Exposure {
            column: column.clone(),
        },
        SegmentKind::Attribute {
            source,
            id,
            value,
            time,
            ..
        } => PlannedSegmentKind::Attribute {
            source: source.clone(),
            id: id.clone(),
            value: Box::new(qualify(value, SEGMENT_ALIAS)),
            time: time.clone(),
        },
    };
    PlannedSegment {
        name: s.name.clone(),
        column: columns::segment(&s.name),
        kind,
    }
}

fn add_covariance(plan: &mut ExperimentPlan, a: &str, b: &str) {
    let name = columns::covariance(a, b);
    if !plan.covariances.iter().any(|c| c.name == name) {
        plan.covariances.push(Covariance {
            name,
            a: a.to_string(),
            b: b.to_string(),
        });
    }
}

/// Adds the per-unit column of an event metric to the scan of its table (once); returns its name.
fn add_column(catalog: &Catalog, plan: &mut ExperimentPlan, metric: ir::MetricId) -> String {
    let m = &catalog.metrics[metric];
    if let MetricKind::Events { window, cap, .. } = &m.kind {
        push_aggregate(catalog, plan, metric, columns::metric(&m.name), *window, *cap);
    }
    columns::metric(&m.name)
}

/// Adds the pre-exposure covariate `[-covariate_window, 0)` of an event metric.
fn add_covariate(catalog: &Catalog, plan: &mut ExperimentPlan, metric: ir::MetricId) -> String {
    let m = &catalog.metrics[metric];
    let name = columns::covariate(&columns::metric(&m.name));
    if let MetricKind::Events { cap, .. } = &m.kind {
        let window = ir::Window {
            start: -plan.covariate_window,
            end: Some(0),
        };
        push_aggregate(catalog, plan, metric, name.clone(), window, *cap);
    }
    name
}

fn push_aggregate(
    catalog: &Catalog,
    plan: &mut ExperimentPlan,
    metric: ir::MetricId,
    column: String,
    window: ir::Window,
    cap: Option<Cap>,
) {
    if plan.columns.iter().any(|c| c.column == column) {
        return;
    }
    let MetricKind::Events {
        table,
        aggregation,
        value,
        filter,
        ..
    } = &catalog.metrics[metric].kind
    else {
        return;
    };
    let t = &catalog.event_tables[*table];
    let scan = match plan.scans.iter().position(|s| s.table == t.name) {
        Some(i) => i,
        None => {
            plan.scans.push(EventScan {
                name: columns::scan(&t.name),
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
        column: column.clone(),
        aggregation: *aggregation,
        value: value.as_deref().map(|v| qualify(v, EVENT_ALIAS)),
        filter: filter.as_deref().map(|f| qualify(f, EVENT_ALIAS)),
        window,
    });
    plan.columns.push(UnitColumn {
        column,
        scan,
        zero_fill: aggregation.zero_fill(),
        cap,
    });
}

/// Version of the statistics table's column layout (see README, "Statistics table"). Layout 2
/// added the third moments (`<column>__m3`, see [`third_moment_columns`]); tables of layout 1
/// are still read (the heavy-tails check then does not run).
pub const STATS_LAYOUT: u32 = 2;

/// The oldest statistics layout this plumb still reads.
pub const OLDEST_STATS_LAYOUT: u32 = 1;

/// The per-unit columns whose third central moment the statistics table carries (overall rows
/// only): the columns of metrics analysed as a mean of a per-unit value, except 0/1 columns
/// (whose skewness follows from the rate, and whose small samples the exact methods handle).
/// The heavy-tails check reads the skewness of these.
pub fn third_moment_columns(plan: &ExperimentPlan) -> Vec<&str> {
    let binary = |column: &str| {
        plan.scans.iter().flat_map(|s| &s.aggregates).any(|a| {
            a.column == column && matches!(a.aggregation, Aggregation::Any | Aggregation::AtLeast(_))
        })
    };
    let wanted: std::collections::BTreeSet<&str> = plan
        .metrics
        .iter()
        .filter_map(|m| match &m.kind {
            PlannedKind::Mean { column } if !binary(column) => Some(column.as_str()),
            _ => None,
        })
        .collect();
    plan.columns
        .iter()
        .map(|c| c.column.as_str())
        .filter(|c| wanted.contains(c))
        .collect()
}

fn source_text(source: &Source) -> String {
    match source {
        Source::Table(parts) => parts.join("."),
        Source::Query(q) => q.to_string(),
    }
}

fn kind_text(kind: &PlannedKind) -> String {
    match kind {
        PlannedKind::Mean { column } => format!("mean({column})"),
        PlannedKind::Ratio {
            numerator,
            denominator,
        } => format!("ratio({numerator}, {denominator})"),
    }
}

/// The canonical text of what a readout query computes, from which [`fingerprint`] is hashed.
///
/// One line per fact, in plan order, with every value written explicitly (never a `Debug`
/// form of an internal struct, so renaming a Rust field cannot change a fingerprint). SQL
/// fragments appear as sqlparser prints them in its generic form, times as seconds since the
/// epoch, windows and offsets as seconds. Its format is part of the statistics-table contract
/// (README, "Statistics table"): change it only together with [`STATS_LAYOUT`] or with a note
/// that exported tables must be recomputed. Dialects do not enter it.
pub fn canonical_text(plan: &ExperimentPlan) -> String {
    canonical_text_at(plan, STATS_LAYOUT)
}

/// [`canonical_text`] as statistics layout `layout` wrote it (the text differs only in its
/// first line), so that a table exported under an older layout is still recognised.
pub fn canonical_text_at(plan: &ExperimentPlan, layout: u32) -> String {
    use std::fmt::Write as _;
    let expr = |e: &Option<Expr>| e.as_ref().map(|e| e.to_string()).unwrap_or_default();
    let x = &plan.exposures;
    let mut text = String::new();
    let _ = writeln!(text, "plumb readout query, layout {layout}");
    let _ = writeln!(text, "experiment {}", plan.experiment);
    let _ = writeln!(
        text,
        "exposures source={} id={} time={} experiment={} arm={} key={}",
        source_text(&x.source),
        x.id,
        x.time,
        x.experiment_column,
        x.arm_column,
        x.key
            .as_deref()
            .map_or_else(|| format!("(every row, arm {HISTORY_ARM})"), str::to_string)
    );
    let _ = writeln!(
        text,
        "period start={} end={} covariate_window={}",
        plan.start.0, plan.end.0, plan.covariate_window
    );
    for s in &plan.scans {
        let _ = writeln!(
            text,
            "scan {} source={} id={} time={} where={} earliest_offset={}",
            s.table,
            source_text(&s.source),
            s.id,
            s.time,
            expr(&s.filter),
            s.earliest_offset
        );
        for a in &s.aggregates {
            let _ = writeln!(
                text,
                "  aggregate {} {} value={} where={} window=[{}, {})",
                a.column,
                a.aggregation.text(),
                expr(&a.value),
                expr(&a.filter),
                a.window.start,
                a.window.end.map_or_else(|| "end".to_string(), |e| e.to_string())
            );
        }
    }
    for c in &plan.columns {
        let cap = match c.cap {
            None => "none".to_string(),
            Some(Cap::Percentile(p)) => format!("percentile {p}"),
            Some(Cap::Absolute(v)) => format!("absolute {v}"),
        };
        let _ = writeln!(
            text,
            "column {} scan={} zero_fill={} cap={cap}",
            c.column, plan.scans[c.scan].table, c.zero_fill
        );
    }
    for c in &plan.covariances {
        let _ = writeln!(text, "covariance {} of {} and {}", c.name, c.a, c.b);
    }
    for m in &plan.metrics {
        let _ = writeln!(
            text,
            "metric {} role={} {} covariate={}",
            m.name,
            m.role.as_str(),
            kind_text(&m.kind),
            m.covariate.as_ref().map_or_else(|| "none".to_string(), kind_text)
        );
    }
    for seg in &plan.segments {
        let _ = match &seg.kind {
            PlannedSegmentKind::Exposure { column } => {
                writeln!(text, "segment {} from_exposure={column}", seg.name)
            }
            PlannedSegmentKind::Attribute {
                source,
                id,
                value,
                time,
            } => writeln!(
                text,
                "segment {} source={} id={id} value={value} time={}",
                seg.name,
                source_text(source),
                time.as_deref().unwrap_or("")
            ),
        };
    }
    text
}

/// A fingerprint of the compiled query, independent of the dialect: `fp` and 16 hex digits of
/// FNV-1a (64 bit) over [`canonical_text`]. Another experiment, another catalog version or
/// another plumb layout gives another fingerprint, so a statistics table exported from a
/// warehouse can be matched to the query that produced it.
pub fn fingerprint(plan: &ExperimentPlan) -> String {
    fingerprint_at(plan, STATS_LAYOUT)
}

/// [`fingerprint`] as statistics layout `layout` computed it.
pub fn fingerprint_at(plan: &ExperimentPlan, layout: u32) -> String {
    let mut hash: u64 = 0xcbf2_9ce4_8422_2325;
    for b in canonical_text_at(plan, layout).bytes() {
        hash ^= u64::from(b);
        hash = hash.wrapping_mul(0x0000_0100_0000_01b3);
    }
    format!("fp{hash:016x}")
}

/// The experiment whose exposed units a report is restricted to (`--exposed-in`).
#[derive(Debug, Clone)]
pub struct ExposedIn {
    pub experiment: String,
    pub exposures: ExposureScan,
    pub start: Timestamp,
    pub end: Timestamp,
}

/// A metric of a report: which scan columns give its per-unit, per-period values.
#[derive(Debug, Clone)]
pub enum ReportMetricKind {
    Value {
        scan: usize,
        column: String,
    },
    Ratio {
        numerator: (usize, String),
        denominator: (usize, String),
    },
}

#[derive(Debug, Clone)]
pub struct ReportMetric {
    pub name: String,
    pub kind: ReportMetricKind,
    /// Scan whose (unit, period) groups are the metric's active units.
    pub active_scan: usize,
}

/// A time series query over the whole population of a unit (or the units exposed in one
/// experiment): per period, active units and the metric totals. Built from the same metric
/// definitions, scans and aggregates as the readout query.
#[derive(Debug, Clone)]
pub struct ReportPlan {
    pub metrics: Vec<ReportMetric>,
    pub scans: Vec<EventScan>,
    pub grain: crate::time::Grain,
    pub from: Timestamp,
    pub to: Timestamp,
    pub exposed: Option<ExposedIn>,
    pub segment: Option<PlannedSegment>,
}

/// Plans a report of `metrics` from `from` to `to` by `grain`, optionally sliced by a segment
/// and restricted to the units exposed in an experiment (then metric windows apply relative to
/// each unit's first exposure, as in the readout).
pub fn plan_report(
    catalog: &Catalog,
    metrics: &[ir::MetricId],
    grain: crate::time::Grain,
    from: Timestamp,
    to: Timestamp,
    segment: Option<ir::SegmentId>,
    exposed_in: Option<ir::ExperimentId>,
) -> ReportPlan {
    let exposed = exposed_in.map(|id| {
        let exp = &catalog.experiments[id];
        ExposedIn {
            experiment: exp.name.clone(),
            exposures: exposure_scan(catalog, id),
            start: exp.start,
            end: exp.end,
        }
    });
    let mut plan = ReportPlan {
        metrics: Vec::new(),
        scans: Vec::new(),
        grain,
        from,
        to,
        exposed,
        segment: None,
    };
    for &id in metrics {
        let m = &catalog.metrics[id];
        let unit = &catalog.units[m.unit];
        let (kind, default_active) = match &m.kind {
            MetricKind::Events { table, .. } => {
                let scan = report_column(catalog, &mut plan, id);
                (
                    ReportMetricKind::Value {
                        scan,
                        column: columns::metric(&m.name),
                    },
                    *table,
                )
            }
            MetricKind::Ratio {
                numerator,
                denominator,
            } => {
                let ns = report_column(catalog, &mut plan, *numerator);
                let ds = report_column(catalog, &mut plan, *denominator);
                let table = match &catalog.metrics[*numerator].kind {
                    MetricKind::Events { table, .. } => *table,
                    MetricKind::Ratio { .. } => 0,
                };
                (
                    ReportMetricKind::Ratio {
                        numerator: (ns, columns::metric(&catalog.metrics[*numerator].name)),
                        denominator: (ds, columns::metric(&catalog.metrics[*denominator].name)),
                    },
                    table,
                )
            }
        };
        let active_table = unit.active.unwrap_or(default_active);
        let active_scan = report_scan(catalog, &mut plan, active_table);
        plan.metrics.push(ReportMetric {
            name: m.name.clone(),
            kind,
            active_scan,
        });
    }
    if let Some(id) = segment {
        plan.segment = Some(planned_segment(catalog, id));
    }
    plan
}

/// The scan of event table `table` in a report (created on first use).
fn report_scan(catalog: &Catalog, plan: &mut ReportPlan, table: ir::EventTableId) -> usize {
    let t = &catalog.event_tables[table];
    if let Some(i) = plan.scans.iter().position(|s| s.table == t.name) {
        return i;
    }
    plan.scans.push(EventScan {
        name: columns::scan(&t.name),
        table: t.name.clone(),
        source: t.source.clone(),
        id: t.id.clone(),
        time: t.time.clone(),
        filter: t.filter.as_ref().map(|f| qualify(f, EVENT_ALIAS)),
        earliest_offset: 0,
        aggregates: Vec::new(),
    });
    plan.scans.len() - 1
}

/// Adds an event metric's aggregate to its table's report scan; returns the scan index.
fn report_column(catalog: &Catalog, plan: &mut ReportPlan, metric: ir::MetricId) -> usize {
    let m = &catalog.metrics[metric];
    let MetricKind::Events {
        table,
        aggregation,
        value,
        filter,
        window,
        ..
    } = &m.kind
    else {
        return 0;
    };
    let scan = report_scan(catalog, plan, *table);
    let column = columns::metric(&m.name);
    if !plan.scans[scan].aggregates.iter().any(|a| a.column == column) {
        plan.scans[scan].aggregates.push(Aggregate {
            column,
            aggregation: *aggregation,
            value: value.as_deref().map(|v| qualify(v, EVENT_ALIAS)),
            filter: filter.as_deref().map(|f| qualify(f, EVENT_ALIAS)),
            window: *window,
        });
    }
    scan
}

/// Whole-population totals of count and sum metrics over `[from, to)`: the denominator of
/// whole-population impact. One pass per event table, no grouping by unit: every metric of a
/// table is one conditional aggregate over its rows (metric windows do not apply: the
/// population is every unit, in calendar time, as in a report without `--exposed-in`).
#[derive(Debug, Clone)]
pub struct TotalsPlan {
    pub scans: Vec<EventScan>,
    /// `(metric name, scan index, column)` in request order.
    pub metrics: Vec<(String, usize, String)>,
    pub from: Timestamp,
    pub to: Timestamp,
}

/// Plans the totals of `metrics`; metrics other than count and sum are left out (their
/// per-unit values do not add up to a population total).
pub fn plan_totals(
    catalog: &Catalog,
    metrics: &[ir::MetricId],
    from: Timestamp,
    to: Timestamp,
) -> TotalsPlan {
    let mut report = ReportPlan {
        metrics: Vec::new(),
        scans: Vec::new(),
        grain: crate::time::Grain::Day,
        from,
        to,
        exposed: None,
        segment: None,
    };
    let mut out = Vec::new();
    for &id in metrics {
        let m = &catalog.metrics[id];
        if matches!(
            m.kind,
            MetricKind::Events {
                aggregation: Aggregation::Count | Aggregation::Sum,
                ..
            }
        ) {
            let scan = report_column(catalog, &mut report, id);
            out.push((m.name.clone(), scan, columns::metric(&m.name)));
        }
    }
    TotalsPlan {
        scans: report.scans,
        metrics: out,
        from,
        to,
    }
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
