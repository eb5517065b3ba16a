//! Check-time probes of the local data: every catalog item bound against the real tables.
//!
//! Name checks against schemas ([`crate::resolve`]) see only bare column names. What else can
//! make a readout fail on the engine — a typo in a qualified name (`e.amout_cents`), an
//! aggregate inside `of`, a table that is not in the local data, a text or epoch-integer
//! column where a timestamp belongs, a `where` that is not true/false, unit ids of different
//! types in two tables — is found here, before anything runs: each item's own small statement
//! is *bound* by the engine (`DESCRIBE`, which reads no rows beyond what a CSV reader samples
//! for its types) and every failure becomes a located diagnostic naming the catalog item, the
//! key and the file. Last, each experiment's whole readout statement is bound as a backstop.
//!
//! Invariants: probes render fragments exactly as the plan does (bare names qualified with the
//! same aliases, re-emitted by the same dialect), so a probe binds iff that part of the real
//! statement binds; probes never scan a table, with two exceptions: one `LIMIT 1` existence
//! check for a column whose type could not be inferred, and the arm check, which reads the
//! distinct arms each experiment logged (one filtered `DISTINCT` over the exposure log) and
//! compares them with `split` — a typo there would otherwise pass `check` and turn up in
//! `analyze` as a sample-ratio mismatch.

use crate::diagnostics::Diagnostic;
use crate::diagnostics::did_you_mean;
use crate::ir::{Aggregation, Catalog, MetricKind, SegmentKind, Source};
use crate::load::Item;
use crate::plan::{EVENT_ALIAS, SEGMENT_ALIAS, qualify};
use crate::render::Dialect;
use crate::source::Span;
use crate::workspace::Workspace;
use sqlparser::ast::Expr;

/// An engine that can bind a statement without running it.
pub trait Binder {
    /// The result columns (name, engine type) of `sql`, or the engine's message.
    fn bind_columns(&self, sql: &str) -> Result<Vec<(String, String)>, String>;
    /// Whether `sql` returns at least one row (for a hint; `None` when that cannot be told).
    fn has_rows(&self, sql: &str) -> Option<bool>;
    /// The values of the one text column `sql` returns (`None` when that cannot be told).
    fn text_values(&self, _sql: &str) -> Option<Vec<String>> {
        None
    }
}

/// Most distinct arm values read per experiment by the arm check.
const MAX_ARMS_READ: usize = 100;

/// Broad classes of engine types, for the checks that only care about kinds.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Kind {
    Integer,
    Decimal,
    Float,
    Boolean,
    Text,
    Timestamp,
    Date,
    Null,
    Other,
}

fn kind(engine_type: &str) -> Kind {
    let t = engine_type.trim().to_ascii_uppercase();
    let base = t.split('(').next().unwrap_or("").trim();
    match base {
        "TINYINT" | "SMALLINT" | "INTEGER" | "BIGINT" | "HUGEINT" | "UTINYINT" | "USMALLINT" | "UINTEGER"
        | "UBIGINT" | "UHUGEINT" | "INT" | "INT2" | "INT4" | "INT8" => Kind::Integer,
        "DECIMAL" | "NUMERIC" => Kind::Decimal,
        "FLOAT" | "DOUBLE" | "REAL" => Kind::Float,
        "BOOLEAN" | "BOOL" => Kind::Boolean,
        "VARCHAR" | "TEXT" | "STRING" => Kind::Text,
        "TIMESTAMP"
        | "TIMESTAMP_S"
        | "TIMESTAMP_MS"
        | "TIMESTAMP_NS"
        | "DATETIME"
        | "TIMESTAMP WITH TIME ZONE"
        | "TIMESTAMPTZ" => Kind::Timestamp,
        "DATE" => Kind::Date,
        "\"NULL\"" | "NULL" => Kind::Null,
        _ => Kind::Other,
    }
}

fn numeric(k: Kind) -> bool {
    matches!(
        k,
        Kind::Integer | Kind::Decimal | Kind::Float | Kind::Boolean | Kind::Null
    )
}

/// Where an item's key is written, or the item itself.
fn at<T>(item: &Item<T>, key: &str) -> Span {
    item.value_span(key).unwrap_or_else(|| item.span())
}

/// The first line of an engine message (its position excerpt is about the probe, not the
/// user's file); the lock-down's refusal in plumb's words.
fn first_line(message: &str) -> String {
    if message.contains("disabled by configuration") {
        return "it reaches for a file, folder or address outside the workspace's data; plumb's local engine reads only the tables and database named under `local:` in plumb.yaml".into();
    }
    let line = message.lines().next().unwrap_or(message).trim();
    line.strip_suffix('!').unwrap_or(line).to_string()
}

/// One unit id column, for the check that all tables of a unit store ids alike.
struct UnitId {
    unit: usize,
    what: String,
    engine_type: String,
    span: Span,
}

struct Prober<'a> {
    ws: &'a Workspace,
    dialect: &'a Dialect,
    binder: &'a dyn Binder,
    /// Local table names, for did-you-mean hints.
    tables: Vec<String>,
    diags: Vec<Diagnostic>,
    ids: Vec<UnitId>,
}

/// Binds every event table, metric, exposure log and segment of the workspace against the
/// local data (`tables`: the local table names), then each experiment's readout statement.
pub fn probe(ws: &Workspace, dialect: &Dialect, binder: &dyn Binder, tables: Vec<String>) -> Vec<Diagnostic> {
    let mut p = Prober {
        ws,
        dialect,
        binder,
        tables,
        diags: Vec::new(),
        ids: Vec::new(),
    };
    p.event_tables();
    p.exposure_logs();
    p.segments();
    p.unit_ids();
    if p.diags.is_empty() {
        crate::timing::stage("probe arms", || p.arms());
    }
    if !p.diags.iter().any(Diagnostic::is_error) {
        crate::timing::stage("probe readouts", || p.experiments());
    }
    p.diags
}

impl Prober<'_> {
    fn catalog(&self) -> &Catalog {
        &self.ws.catalog
    }

    /// `SELECT <exprs> FROM <source> AS <alias>`, described.
    fn bind(&self, source: &str, alias: &str, exprs: &[String]) -> Result<Vec<(String, String)>, String> {
        let list = exprs
            .iter()
            .enumerate()
            .map(|(i, e)| format!("{e} AS c{i}"))
            .collect::<Vec<_>>()
            .join(", ");
        self.binder
            .bind_columns(&format!("SELECT {list} FROM {source} AS {alias}"))
    }

    fn column(&self, alias: &str, name: &str) -> String {
        format!("{alias}.{}", self.dialect.ident(name))
    }

    /// Binds the source alone: its text and column names, or `None` (reported) when it cannot
    /// be read.
    fn source<T>(&mut self, item: &Item<T>, what: &str, source: &Source) -> Option<(String, Vec<String>)> {
        let text = self.dialect.source(source);
        match self.binder.bind_columns(&format!("SELECT * FROM {text} AS t")) {
            Ok(cols) => Some((text, cols.into_iter().map(|(name, _)| name).collect())),
            Err(message) => {
                let d = match source {
                    Source::Table(parts) => {
                        let name = parts.join(".");
                        let hint = did_you_mean(&name, self.tables.iter().map(String::as_str))
                            .unwrap_or_else(|| {
                                if self.tables.is_empty() {
                                    "declare the table's file under `local: tables:` in plumb.yaml".into()
                                } else {
                                    format!(
                                        "local tables: {}; or declare the table's file under `local: tables:` in plumb.yaml",
                                        self.tables.join(", ")
                                    )
                                }
                            });
                        Diagnostic::error(
                            "E022",
                            format!(
                                "{what} reads table `{name}`, which the local data cannot give: {}",
                                first_line(&message)
                            ),
                        )
                        .at(Some(at(item, "table")))
                        .hint(hint)
                    }
                    Source::Query(_) => Diagnostic::error(
                        "E022",
                        format!(
                            "the `sql` of {what} does not run on the local data: {}",
                            first_line(&message)
                        ),
                    )
                    .at(Some(at(item, "sql")))
                    .hint("fix the query; it may read only the tables declared under `local:`"),
                };
                self.diags.push(d);
                None
            }
        }
    }

    /// A `time` column: it must hold timestamps or dates.
    fn time<T>(&mut self, item: &Item<T>, what: &str, source: &str, alias: &str, column: &str) {
        let Ok(cols) = self.bind(source, alias, &[self.column(alias, column)]) else {
            return; // unknown names are reported by the resolver's column check
        };
        let engine_type = &cols[0].1;
        let k = kind(engine_type);
        if matches!(k, Kind::Timestamp | Kind::Date) {
            return;
        }
        let hint = match k {
            Kind::Integer | Kind::Decimal | Kind::Float => format!(
                "numbers are not times: if `{column}` holds epoch seconds, read the table with `sql: SELECT *, to_timestamp({column}) AS {column}_at FROM ...` and set `time: {column}_at`"
            ),
            Kind::Text if self.empty(source) => {
                "the table has no rows, so the reader could not tell the column types; a table with a header only cannot be analysed".into()
            }
            Kind::Text => format!(
                "some value of `{column}` is not a timestamp (write them as 2026-03-01 12:00:00, or parse them in `sql:` with strptime)"
            ),
            _ => format!("`{column}` must hold timestamps or dates"),
        };
        self.diags.push(
            Diagnostic::error(
                "E023",
                format!("`time` column `{column}` of {what} is {engine_type}, not a timestamp"),
            )
            .at(Some(at(item, "time")))
            .hint(hint),
        );
    }

    fn empty(&self, source: &str) -> bool {
        self.binder
            .has_rows(&format!("SELECT 1 FROM {source} AS t LIMIT 1"))
            == Some(false)
    }

    /// Records a unit id column's type.
    fn id<T>(&mut self, item: &Item<T>, unit: usize, what: String, source: &str, alias: &str, column: &str) {
        if let Ok(cols) = self.bind(source, alias, &[self.column(alias, column)]) {
            self.ids.push(UnitId {
                unit,
                what,
                engine_type: cols[0].1.clone(),
                span: at(item, "id"),
            });
        }
    }

    /// A fragment: it must bind, and its type must pass `ok`.
    #[allow(clippy::too_many_arguments)]
    fn fragment<T>(
        &mut self,
        item: &Item<T>,
        key: &str,
        what: &str,
        source: &str,
        alias: &str,
        expr: &Expr,
        ok: fn(Kind) -> bool,
        wanted: &str,
    ) -> bool {
        let text = self.dialect.fragment(&qualify(expr, alias));
        match self.bind(source, alias, std::slice::from_ref(&text)) {
            Ok(cols) => {
                let engine_type = &cols[0].1;
                if ok(kind(engine_type)) {
                    return true;
                }
                self.diags.push(
                    Diagnostic::error(
                        "E023",
                        format!("`{key}` of {what} is {engine_type}, not {wanted}"),
                    )
                    .at(Some(at(item, key)))
                    .hint(format!("write `{key}` so that it gives {wanted}")),
                );
                false
            }
            Err(message) => {
                self.diags.push(
                    Diagnostic::error(
                        "E024",
                        format!(
                            "`{key}` of {what} does not bind on the local data: {}",
                            first_line(&message)
                        ),
                    )
                    .at(Some(at(item, key)))
                    .hint(format!(
                        "`{key}` is an expression over one row of the table (alias `{alias}`)"
                    )),
                );
                false
            }
        }
    }

    /// Whether `expr` holds an aggregate or window function (it must be one value per row).
    fn aggregate<T>(
        &mut self,
        item: &Item<T>,
        key: &str,
        what: &str,
        source: &str,
        alias: &str,
        expr: &Expr,
    ) {
        let text = self.dialect.fragment(&qualify(expr, alias));
        if let Err(message) = self.bind(source, alias, &[format!("count({text})")]) {
            let lower = message.to_ascii_lowercase();
            if lower.contains("aggregate") || lower.contains("window") {
                self.diags.push(
                    Diagnostic::error(
                        "E024",
                        format!("`{key}` of {what} holds an aggregate or window function"),
                    )
                    .at(Some(at(item, key)))
                    .hint("`of` is a value per event row; plumb aggregates it per unit as `per_unit:` says (e.g. `of: amount_cents` with `per_unit: sum`)"),
                );
            }
        }
    }

    fn event_tables(&mut self) {
        let ws = self.ws;
        for (t, item) in ws.raw.event_tables.iter().enumerate() {
            let table = &ws.catalog.event_tables[t];
            let what = format!("event table `{}`", table.name);
            let Some((source, _)) = self.source(item, &what, &table.source) else {
                continue;
            };
            self.id(item, table.unit, what.clone(), &source, EVENT_ALIAS, &table.id);
            self.time(item, &what, &source, EVENT_ALIAS, &table.time);
            if let Some(f) = &table.filter {
                self.fragment(
                    item,
                    "where",
                    &what,
                    &source,
                    EVENT_ALIAS,
                    f,
                    boolean,
                    "true/false",
                );
            }
            for (m, mitem) in ws.raw.metrics.iter().enumerate() {
                let metric = &ws.catalog.metrics[m];
                let MetricKind::Events {
                    table: mt,
                    aggregation,
                    value,
                    filter,
                    ..
                } = &metric.kind
                else {
                    continue;
                };
                if *mt != t {
                    continue;
                }
                let what = format!("metric `{}`", metric.name);
                if let Some(v) = value {
                    let ok: fn(Kind) -> bool = if *aggregation == Aggregation::Distinct {
                        |_| true
                    } else {
                        numeric
                    };
                    if self.fragment(mitem, "of", &what, &source, EVENT_ALIAS, v, ok, "a number") {
                        self.aggregate(mitem, "of", &what, &source, EVENT_ALIAS, v);
                    }
                }
                if let Some(f) = filter {
                    self.fragment(
                        mitem,
                        "where",
                        &what,
                        &source,
                        EVENT_ALIAS,
                        f,
                        boolean,
                        "true/false",
                    );
                }
            }
        }
    }

    fn exposure_logs(&mut self) {
        let ws = self.ws;
        for (l, item) in ws.raw.exposure_logs.iter().enumerate() {
            let log = &ws.catalog.exposure_logs[l];
            let what = format!("exposure log `{}`", log.name);
            let Some((source, columns)) = self.source(item, &what, &log.source) else {
                continue;
            };
            let alias = "t";
            self.id(item, log.unit, what.clone(), &source, alias, &log.id);
            self.time(item, &what, &source, alias, &log.time);
            let missing = |column: &str| !columns.iter().any(|c| c.eq_ignore_ascii_case(column));
            let hint = |column: &str| {
                did_you_mean(column, columns.iter().map(String::as_str))
                    .unwrap_or_else(|| format!("columns of {what}: {}", columns.join(", ")))
            };
            for (key, column) in [("experiment", &log.experiment), ("arm", &log.arm)] {
                if missing(column) {
                    self.diags.push(
                        Diagnostic::error("E021", format!("unknown column `{column}` in `{key}` ({what})"))
                            .at(Some(at(item, key)))
                            .hint(hint(column)),
                    );
                }
            }
            // Segments recorded on the exposure rows, of the experiments that read this log.
            for (s, sitem) in ws.raw.segments.iter().enumerate() {
                let seg = &ws.catalog.segments[s];
                if let SegmentKind::FromExposure(column) = &seg.kind
                    && ws
                        .catalog
                        .experiments
                        .iter()
                        .any(|e| e.exposures == l && e.segments.contains(&s))
                    && missing(column)
                {
                    self.diags.push(
                        Diagnostic::error(
                            "E021",
                            format!(
                                "segment `{}` reads column `{column}` of {what}, which it does not have",
                                seg.name
                            ),
                        )
                        .at(Some(at(sitem, "from_exposure")))
                        .hint(hint(column)),
                    );
                }
            }
        }
    }

    fn segments(&mut self) {
        let ws = self.ws;
        for (s, item) in ws.raw.segments.iter().enumerate() {
            let seg = &ws.catalog.segments[s];
            let SegmentKind::Attribute {
                unit,
                source,
                id,
                value,
                time,
            } = &seg.kind
            else {
                continue;
            };
            let what = format!("segment `{}`", seg.name);
            let Some((source, _)) = self.source(item, &what, source) else {
                continue;
            };
            self.id(item, *unit, what.clone(), &source, SEGMENT_ALIAS, id);
            if let Some(time) = time {
                self.time(item, &what, &source, SEGMENT_ALIAS, time);
            }
            self.fragment(
                item,
                "value",
                &what,
                &source,
                SEGMENT_ALIAS,
                value,
                |_| true,
                "a value",
            );
        }
    }

    /// Every table of a unit must store its ids alike (all integers, or all text, ...): a
    /// join of text ids with integer ids fails or matches nothing.
    fn unit_ids(&mut self) {
        let class = |t: &str| match kind(t) {
            Kind::Integer => "integers".to_string(),
            Kind::Text => "text".to_string(),
            _ => t.to_ascii_uppercase(),
        };
        for unit in 0..self.catalog().units.len() {
            let ids: Vec<&UnitId> = self.ids.iter().filter(|i| i.unit == unit).collect();
            let Some(first) = ids.first() else { continue };
            let reference = class(&first.engine_type);
            let mut found = Vec::new();
            for other in &ids[1..] {
                if class(&other.engine_type) != reference {
                    found.push(
                        Diagnostic::error(
                            "E023",
                            format!(
                                "ids of unit `{}` are {} ({}) in {} but {} ({}) in {}",
                                self.catalog().units[unit].name,
                                class(&other.engine_type),
                                other.engine_type,
                                other.what,
                                reference,
                                first.engine_type,
                                first.what
                            ),
                        )
                        .at(Some(other.span.clone()))
                        .label(Some(first.span.clone()), format!("ids of {} are {}", first.what, reference))
                        .hint("store the unit's ids alike in every table, or cast one side in `sql:` (e.g. `SELECT *, CAST(shopper_id AS VARCHAR) AS shopper_key FROM ...`)"),
                    );
                }
            }
            self.diags.extend(found);
        }
    }

    /// The arms each experiment logged in the local data against its `split`: a split arm
    /// never logged while a logged arm is not in the split is a typo (E025); a logged arm
    /// outside the split, a split arm never logged, or no exposures of the experiment's key at
    /// all are warnings (W002–W004), because the data may simply not cover them yet.
    fn arms(&mut self) {
        let ws = self.ws;
        for (e, item) in ws.raw.experiments.iter().enumerate() {
            let exp = &ws.catalog.experiments[e];
            let log = &ws.catalog.exposure_logs[exp.exposures];
            let source = self.dialect.source(&log.source);
            let col = |c: &str| self.column("t", c);
            let distinct = |what: &str, filter: String| {
                format!(
                    "SELECT DISTINCT CAST({what} AS VARCHAR) AS v FROM {source} AS t WHERE {filter} ORDER BY 1 LIMIT {}",
                    MAX_ARMS_READ + 1
                )
            };
            let key = self.dialect.literal(&exp.key);
            let filter = format!(
                "CAST({} AS VARCHAR) = {key} AND {} IS NOT NULL",
                col(&log.experiment),
                col(&log.arm)
            );
            let Some(logged) = self.binder.text_values(&distinct(&col(&log.arm), filter)) else {
                continue;
            };
            if logged.len() > MAX_ARMS_READ {
                continue; // an id-like column, not arms; the readout reports it
            }
            if logged.is_empty() {
                let keys = self
                    .binder
                    .text_values(&distinct(&col(&log.experiment), "TRUE".into()))
                    .unwrap_or_default();
                let hint = did_you_mean(&exp.key, keys.iter().map(String::as_str)).unwrap_or_else(|| {
                    "the readout will have no units until exposures of this key are logged".into()
                });
                self.diags.push(
                    Diagnostic::warning(
                        "W004",
                        format!(
                            "experiment `{}`: exposure log `{}` has no exposures with `{}` = `{}` in the local data",
                            exp.name, log.name, log.experiment, exp.key
                        ),
                    )
                    .at(Some(if item.value.logged_as.is_some() || item.value.key.is_none() {
                        at(item, "logged_as")
                    } else {
                        at(item, "key")
                    }))
                    .hint(hint),
                );
                continue;
            }
            let planned: Vec<&str> = exp.arms.iter().map(|a| a.name.as_str()).collect();
            let stray: Vec<&str> = logged
                .iter()
                .map(String::as_str)
                .filter(|a| !planned.contains(a))
                .collect();
            let absent: Vec<&str> = planned
                .iter()
                .copied()
                .filter(|a| !logged.iter().any(|l| l == a))
                .collect();
            let split_at = Some(at(item, "split"));
            for arm in &absent {
                if stray.is_empty() {
                    self.diags.push(
                        Diagnostic::warning(
                            "W003",
                            format!(
                                "experiment `{}`: arm `{arm}` of `split` has no exposures in the local data",
                                exp.name
                            ),
                        )
                        .at(split_at.clone())
                        .hint("the readout will report a sample-ratio mismatch until the arm is logged"),
                    );
                } else {
                    let hint = did_you_mean(arm, stray.iter().copied())
                        .unwrap_or_else(|| format!("arms logged for this experiment: {}", logged.join(", ")));
                    self.diags.push(
                        Diagnostic::error(
                            "E025",
                            format!(
                                "experiment `{}`: arm `{arm}` of `split` is never logged, while the exposure log has arm{} {} that `split` does not name",
                                exp.name,
                                if stray.len() == 1 { "" } else { "s" },
                                stray.iter().map(|s| format!("`{s}`")).collect::<Vec<_>>().join(", ")
                            ),
                        )
                        .at(split_at.clone())
                        .hint(format!(
                            "{hint} `split` names the arms exactly as `{}` logs them; otherwise analyze excludes those units and calls the rest a sample-ratio mismatch",
                            log.arm
                        )),
                    );
                }
            }
            if absent.is_empty() {
                for arm in &stray {
                    self.diags.push(
                        Diagnostic::warning(
                            "W002",
                            format!(
                                "experiment `{}`: the exposure log has arm `{arm}`, which `split` does not name",
                                exp.name
                            ),
                        )
                        .at(split_at.clone())
                        .hint("its units are excluded from the readout and counted under `unknown_arm`"),
                    );
                }
            }
        }
    }

    /// The backstop: each experiment's readout statement binds as a whole.
    fn experiments(&mut self) {
        let ws = self.ws;
        for (e, item) in ws.raw.experiments.iter().enumerate() {
            let plan = crate::plan::plan_experiment(&ws.catalog, e, &[]);
            let Ok(sql) = self.dialect.render_experiment(&plan) else {
                continue; // rendering errors are reported by the command itself
            };
            if let Err(message) = self.binder.bind_columns(&sql) {
                self.diags.push(
                    Diagnostic::error(
                        "E024",
                        format!(
                            "the readout query of experiment `{}` does not bind on the local data: {}",
                            ws.catalog.experiments[e].name,
                            first_line(&message)
                        ),
                    )
                    .at(Some(item.span()))
                    .hint("every item it uses bound on its own; run `plumb sql` on the experiment and the engine's message points at the part that fails"),
                );
            }
        }
    }
}

fn boolean(k: Kind) -> bool {
    matches!(k, Kind::Boolean | Kind::Null)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn kinds_of_engine_types() {
        assert_eq!(kind("BIGINT"), Kind::Integer);
        assert_eq!(kind("DECIMAL(18,3)"), Kind::Decimal);
        assert_eq!(kind("TIMESTAMP WITH TIME ZONE"), Kind::Timestamp);
        assert_eq!(kind("varchar"), Kind::Text);
        assert_eq!(kind("\"NULL\""), Kind::Null);
        assert_eq!(kind("STRUCT(a INTEGER)"), Kind::Other);
        assert!(numeric(kind("DOUBLE")) && !numeric(kind("VARCHAR")));
    }

    #[test]
    fn first_line_drops_the_excerpt() {
        assert_eq!(
            first_line("Binder Error: Referenced column \"x\" not found!\nLINE 1: SELECT ..."),
            "Binder Error: Referenced column \"x\" not found"
        );
    }
}
