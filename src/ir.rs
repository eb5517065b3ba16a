//! The typed intermediate representation: a catalog whose names are resolved and checked.
//!
//! Produced by `resolve`, consumed by `plan`. References between declarations are indexes into
//! the vectors of [`Catalog`], so a plan can never point at something that does not exist. SQL
//! fragments are parsed expressions, already known to be syntactically valid. These types do
//! not derive `Serialize`: the YAML-facing structs in `load::syntax` are the boundary types.

use crate::time::Timestamp;
use sqlparser::ast::{Expr, Query};

pub type UnitId = usize;
pub type EventTableId = usize;
pub type ExposureLogId = usize;
pub type SegmentId = usize;
pub type MetricId = usize;
pub type ExperimentId = usize;

#[derive(Debug, Clone, Default)]
pub struct Catalog {
    pub units: Vec<Unit>,
    pub event_tables: Vec<EventTable>,
    pub exposure_logs: Vec<ExposureLog>,
    pub segments: Vec<Segment>,
    pub metrics: Vec<Metric>,
    pub experiments: Vec<Experiment>,
}

impl Catalog {
    pub fn metric(&self, name: &str) -> Option<MetricId> {
        self.metrics.iter().position(|m| m.name == name)
    }
    pub fn experiment(&self, name: &str) -> Option<ExperimentId> {
        self.experiments.iter().position(|e| e.name == name)
    }
}

#[derive(Debug, Clone)]
pub struct Unit {
    pub name: String,
    pub description: Option<String>,
    /// Event table whose rows make a unit active in a report period (`active: {events: t}`);
    /// `None`: the metric's own event table.
    pub active: Option<EventTableId>,
}

/// Where rows come from: a table (possibly `schema.table`) or a query.
#[derive(Debug, Clone)]
pub enum Source {
    /// Parts of a dotted name, each quoted separately when rendered.
    Table(Vec<String>),
    Query(Box<Query>),
}

#[derive(Debug, Clone)]
pub struct EventTable {
    pub name: String,
    pub unit: UnitId,
    pub source: Source,
    pub id: String,
    pub time: String,
    pub filter: Option<Expr>,
    /// Declared columns (`columns:`), when given; fragments are checked against them.
    pub columns: Option<Vec<String>>,
}

#[derive(Debug, Clone)]
pub struct ExposureLog {
    pub name: String,
    pub unit: UnitId,
    pub source: Source,
    pub id: String,
    pub time: String,
    pub experiment: String,
    pub arm: String,
}

#[derive(Debug, Clone)]
pub enum SegmentKind {
    /// A unit attribute read from a table keyed by the unit.
    Attribute {
        unit: UnitId,
        source: Source,
        id: String,
        value: Box<Expr>,
        /// When set, the value as of the unit's first exposure.
        time: Option<String>,
    },
    /// A column of the exposure row itself.
    FromExposure(String),
}

#[derive(Debug, Clone)]
pub struct Segment {
    pub name: String,
    pub kind: SegmentKind,
}

/// How events become one number per unit.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Aggregation {
    Count,
    Sum,
    Distinct,
    Any,
    Min,
    Max,
    AtLeast(u64),
}

impl Aggregation {
    /// The `per_unit` spelling, `at_least(N)` with its count (part of the readout query's
    /// fingerprint: do not change it).
    pub fn text(self) -> String {
        match self {
            Aggregation::Count => "count".into(),
            Aggregation::Sum => "sum".into(),
            Aggregation::Distinct => "distinct".into(),
            Aggregation::Any => "any".into(),
            Aggregation::Min => "min".into(),
            Aggregation::Max => "max".into(),
            Aggregation::AtLeast(n) => format!("at_least({n})"),
        }
    }

    /// Units without events get 0, except for min/max which stay NULL.
    pub fn zero_fill(self) -> bool {
        !matches!(self, Aggregation::Min | Aggregation::Max)
    }
    pub fn needs_value(self) -> bool {
        matches!(
            self,
            Aggregation::Sum | Aggregation::Distinct | Aggregation::Min | Aggregation::Max
        )
    }
}

/// A window relative to first exposure, in seconds: `start <= t - exposure < end`.
/// `end = None` means "until the experiment's end".
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Window {
    pub start: i64,
    pub end: Option<i64>,
}

/// A cap on per-unit values (`winsorize`).
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Cap {
    /// At this quantile (0..1) of the per-unit values of all exposed units, computed in the
    /// same query.
    Percentile(f64),
    /// At this absolute value.
    Absolute(f64),
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Direction {
    Increase,
    Decrease,
}

#[derive(Debug, Clone)]
pub enum MetricKind {
    Events {
        table: EventTableId,
        aggregation: Aggregation,
        value: Option<Box<Expr>>,
        filter: Option<Box<Expr>>,
        window: Window,
        cap: Option<Cap>,
    },
    Ratio {
        numerator: MetricId,
        denominator: MetricId,
    },
}

#[derive(Debug, Clone)]
pub struct Metric {
    pub name: String,
    pub description: Option<String>,
    pub owner: Option<String>,
    pub unit: UnitId,
    pub kind: MetricKind,
    pub direction: Option<Direction>,
    /// Declared minimum detectable effect, relative (`mde: 2%` -> 0.02).
    pub mde: Option<f64>,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
pub enum Role {
    Primary,
    Secondary,
    Guardrail,
}

impl Role {
    pub fn as_str(self) -> &'static str {
        match self {
            Role::Primary => "primary",
            Role::Secondary => "secondary",
            Role::Guardrail => "guardrail",
        }
    }
}

#[derive(Debug, Clone)]
pub struct Arm {
    pub name: String,
    /// Planned share, normalised so the shares of all arms sum to 1.
    pub share: f64,
}

#[derive(Debug, Clone)]
pub struct Experiment {
    pub name: String,
    pub description: Option<String>,
    pub exposures: ExposureLogId,
    pub key: String,
    pub control: String,
    /// Control first, then the other arms in the order of `split`.
    pub arms: Vec<Arm>,
    pub start: Timestamp,
    pub end: Timestamp,
    /// Metrics with their role, primary first, in declaration order, without repeats.
    pub metrics: Vec<(MetricId, Role)>,
    pub covariate_window: i64,
    pub segments: Vec<SegmentId>,
    /// Declared minimum detectable effect for metrics without their own, relative.
    pub mde: Option<f64>,
}
