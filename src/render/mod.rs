//! Stage 4, `render`: query plan + dialect -> SQL text.
//!
//! A dialect is data: a capabilities file (`dialect.yaml`) read into one typed
//! [`Capabilities`] struct whose defaults are the generic dialect, plus minijinja templates.
//! `dialects/generic/` holds the baseline; `dialects/<name>/` overrides single keys or single
//! templates. The built-in folders are embedded in the binary, and a user folder given with
//! `--dialects-dir` is searched first, so a dialect can be added without recompiling.
//!
//! Invariant: render never reports semantic errors (those belong to resolve). The only
//! failures here are a broken dialect folder or template, which are the user's dialect files
//! or a bug in plumb. Every identifier and literal that comes from users goes through
//! [`Dialect::ident`] / [`Dialect::literal`]; templates never quote by hand.

use crate::columns;
use crate::error::{Error, Result};
use crate::ir::{Aggregation, Cap, Source};
use crate::plan::{
    Aggregate, EventScan, ExperimentPlan, PlannedSegmentKind, ReportMetricKind, ReportPlan, TotalsPlan,
};
use crate::time::Timestamp;
use minijinja::{Environment, UndefinedBehavior, context};
use serde::{Deserialize, Serialize};
use sqlparser::ast::{Expr, Ident, Value, ValueWithSpan, VisitMut, VisitorMut};
use std::collections::BTreeMap;
use std::ops::ControlFlow;
use std::path::{Path, PathBuf};

/// Built-in dialect files, embedded at compile time: (dialect, file name, text).
const BUILTIN: &[(&str, &str, &str)] = &[
    (
        "generic",
        "dialect.yaml",
        include_str!("../../dialects/generic/dialect.yaml"),
    ),
    (
        "generic",
        "experiment.sql.j2",
        include_str!("../../dialects/generic/experiment.sql.j2"),
    ),
    (
        "generic",
        "exposures.sql.j2",
        include_str!("../../dialects/generic/exposures.sql.j2"),
    ),
    (
        "generic",
        "report.sql.j2",
        include_str!("../../dialects/generic/report.sql.j2"),
    ),
    (
        "generic",
        "totals.sql.j2",
        include_str!("../../dialects/generic/totals.sql.j2"),
    ),
    (
        "generic",
        "daily.sql.j2",
        include_str!("../../dialects/generic/daily.sql.j2"),
    ),
    (
        "duckdb",
        "dialect.yaml",
        include_str!("../../dialects/duckdb/dialect.yaml"),
    ),
    (
        "postgres",
        "dialect.yaml",
        include_str!("../../dialects/postgres/dialect.yaml"),
    ),
    (
        "bigquery",
        "dialect.yaml",
        include_str!("../../dialects/bigquery/dialect.yaml"),
    ),
    (
        "snowflake",
        "dialect.yaml",
        include_str!("../../dialects/snowflake/dialect.yaml"),
    ),
    (
        "spark",
        "dialect.yaml",
        include_str!("../../dialects/spark/dialect.yaml"),
    ),
    (
        "trino",
        "dialect.yaml",
        include_str!("../../dialects/trino/dialect.yaml"),
    ),
    (
        "redshift",
        "dialect.yaml",
        include_str!("../../dialects/redshift/dialect.yaml"),
    ),
];

/// Templates a dialect consists of; each falls back to the generic one.
const TEMPLATES: &[&str] = &[
    "experiment.sql.j2",
    "exposures.sql.j2",
    "report.sql.j2",
    "totals.sql.j2",
    "daily.sql.j2",
];

/// Names of the built-in target dialects (the generic baseline excluded).
pub fn builtin_dialects() -> Vec<&'static str> {
    let mut names: Vec<&str> = BUILTIN
        .iter()
        .map(|(d, _, _)| *d)
        .filter(|d| *d != "generic")
        .collect();
    names.dedup();
    names
}

/// A plain lowercase name (`[a-z_][a-z0-9_]*`): what an upper-case-folding engine stores in
/// upper case when it is written bare.
fn folds(name: &str) -> bool {
    name.starts_with(|c: char| c.is_ascii_lowercase() || c == '_')
        && name
            .chars()
            .all(|c| c.is_ascii_lowercase() || c.is_ascii_digit() || c == '_')
}

/// How identifiers from the catalog are quoted.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum IdentifierQuoting {
    /// Every identifier is quoted.
    Always,
    /// For engines that fold unquoted names to upper case: plain lowercase names
    /// (`[a-z_][a-z0-9_]*`) stay bare, or are quoted in upper case when they are keywords;
    /// others are quoted as written.
    WhenNeeded,
}

/// What differs between SQL engines, as data. Field docs are in `dialects/generic/dialect.yaml`.
#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Capabilities {
    pub name: String,
    pub sqlparser: String,
    pub identifier_quote: String,
    pub identifier_quoting: IdentifierQuoting,
    pub identifier_backslash_escapes: bool,
    pub float_type: String,
    pub string_type: String,
    pub filter_clause: bool,
    pub grouping_sets: bool,
    pub timestamp_literal: String,
    pub add_interval: String,
    pub covar_samp: String,
    pub percentile: String,
    pub sum_input: String,
    pub backslash_escapes: bool,
    pub doubled_quotes: bool,
    pub utc_session: String,
    pub per_unit_joins: bool,
    pub date_trunc: String,
}

/// Partial capabilities as a dialect folder writes them.
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
struct CapabilitiesOverride {
    name: Option<String>,
    sqlparser: Option<String>,
    identifier_quote: Option<String>,
    identifier_quoting: Option<IdentifierQuoting>,
    identifier_backslash_escapes: Option<bool>,
    float_type: Option<String>,
    string_type: Option<String>,
    filter_clause: Option<bool>,
    grouping_sets: Option<bool>,
    timestamp_literal: Option<String>,
    add_interval: Option<String>,
    covar_samp: Option<String>,
    percentile: Option<String>,
    sum_input: Option<String>,
    backslash_escapes: Option<bool>,
    doubled_quotes: Option<bool>,
    utc_session: Option<String>,
    per_unit_joins: Option<bool>,
    date_trunc: Option<String>,
}

/// A loaded dialect: capabilities and the templates, overrides applied.
#[derive(Debug, Clone)]
pub struct Dialect {
    pub caps: Capabilities,
    /// Some file came from a user's `--dialects-dir` (so a broken template is theirs, not a bug).
    pub from_user_dir: bool,
    templates: BTreeMap<String, String>,
    /// The capability snippets, compiled once.
    snippets: Environment<'static>,
}

/// A dialect file's text, and whether it came from the user's folder.
fn read_file(user_dir: Option<&Path>, dialect: &str, file: &str) -> Result<Option<(String, bool)>> {
    if let Some(dir) = user_dir {
        let path: PathBuf = dir.join(dialect).join(file);
        if path.is_file() {
            return std::fs::read_to_string(&path)
                .map(|t| Some((t, true)))
                .map_err(|e| Error::dialect(format!("cannot read {}: {e}", path.display())).with_source(e));
        }
    }
    Ok(BUILTIN
        .iter()
        .find(|(d, f, _)| *d == dialect && *f == file)
        .map(|(_, _, t)| (t.to_string(), false)))
}

fn dialect_exists(user_dir: Option<&Path>, name: &str) -> bool {
    BUILTIN.iter().any(|(d, _, _)| *d == name) || user_dir.is_some_and(|d| d.join(name).is_dir())
}

/// Rewrites the literals and quoted names of a parsed user fragment into the target
/// dialect's own spelling (see [`Dialect::fragment`]): each becomes text that sqlparser
/// prints verbatim.
struct Reemit<'a>(&'a Dialect);

impl VisitorMut for Reemit<'_> {
    type Break = ();

    fn pre_visit_value(&mut self, value: &mut ValueWithSpan) -> ControlFlow<()> {
        if let Some(text) = crate::resolve::sql::string_content(&value.value) {
            let literal = self.0.literal(&text);
            value.value = Value::Placeholder(literal);
        }
        ControlFlow::Continue(())
    }

    fn pre_visit_ident(&mut self, ident: &mut Ident) -> ControlFlow<()> {
        if ident.quote_style.is_some() {
            ident.value = self.0.quoted(&ident.value);
            ident.quote_style = None;
        }
        ControlFlow::Continue(())
    }
}

impl Dialect {
    /// Loads dialect `name`, looking in `user_dir` first, then the built-in folders.
    pub fn load(name: &str, user_dir: Option<&Path>) -> Result<Dialect> {
        // A name is a folder name, never a path: `../evil` must not load files from outside
        // the dialect folders.
        if name.is_empty()
            || !name
                .chars()
                .all(|c| c.is_ascii_alphanumeric() || c == '_' || c == '-')
        {
            return Err(Error::usage(format!(
                "`{name}` is not a dialect name; names are letters, digits, `_` and `-` (built in: {}), and --dialects-dir adds folders of that name",
                builtin_dialects().join(", ")
            )));
        }
        if !dialect_exists(user_dir, name) {
            return Err(Error::usage(format!(
                "unknown dialect `{name}`; built in: {}",
                builtin_dialects().join(", ")
            )));
        }
        let (base_text, mut from_user_dir) = read_file(user_dir, "generic", "dialect.yaml")?
            .ok_or_else(|| Error::bug("generic/dialect.yaml is missing"))?;
        let mut caps: Capabilities = serde_yaml::from_str(&base_text)
            .map_err(|e| Error::dialect(format!("generic/dialect.yaml: {e}")))?;
        if name != "generic"
            && let Some((text, user)) = read_file(user_dir, name, "dialect.yaml")?
        {
            from_user_dir |= user;
            let o: CapabilitiesOverride = serde_yaml::from_str(&text)
                .map_err(|e| Error::dialect(format!("{name}/dialect.yaml: {e}")))?;
            macro_rules! apply {
                ($($f:ident),*) => { $(if let Some(v) = o.$f { caps.$f = v; })* };
            }
            apply!(
                name,
                sqlparser,
                identifier_quote,
                identifier_quoting,
                identifier_backslash_escapes,
                float_type,
                string_type,
                filter_clause,
                grouping_sets,
                timestamp_literal,
                add_interval,
                covar_samp,
                percentile,
                sum_input,
                backslash_escapes,
                doubled_quotes,
                utc_session,
                per_unit_joins,
                date_trunc
            );
        }
        caps.name = name.to_string();
        // Printed inside a `--` comment of every query header: a line break would end the
        // comment and make the rest SQL.
        if caps.utc_session.chars().any(char::is_control) {
            return Err(Error::dialect(format!(
                "dialect {name}: `utc_session` must be one line without control characters"
            )));
        }
        if !caps.doubled_quotes && !caps.backslash_escapes {
            return Err(Error::dialect(format!(
                "dialect {name}: `doubled_quotes: false` needs `backslash_escapes: true` (a quote inside a literal is then escaped with a backslash)"
            )));
        }
        let mut templates = BTreeMap::new();
        for file in TEMPLATES {
            let (text, user) = match read_file(user_dir, name, file)? {
                Some(t) => t,
                None => read_file(user_dir, "generic", file)?
                    .ok_or_else(|| Error::bug(format!("generic/{file} is missing")))?,
            };
            from_user_dir |= user;
            templates.insert(file.to_string(), text);
        }
        let mut snippets = Environment::new();
        snippets.set_undefined_behavior(UndefinedBehavior::Strict);
        for (key, text) in [
            ("timestamp_literal", &caps.timestamp_literal),
            ("add_interval", &caps.add_interval),
            ("covar_samp", &caps.covar_samp),
            ("sum_input", &caps.sum_input),
            ("date_trunc", &caps.date_trunc),
        ] {
            snippets
                .add_template_owned(key, text.clone())
                .map_err(|e| Error::dialect(format!("dialect {name}: capability `{key}`: {e}")))?;
        }
        Ok(Dialect {
            caps,
            from_user_dir,
            templates,
            snippets,
        })
    }

    /// Quotes an identifier, doubling any quote character inside it. With
    /// `identifier_quoting: when_needed` (engines that fold unquoted names to upper case),
    /// plain lowercase names stay bare, and a plain name that must be quoted because it is a
    /// keyword is quoted the way such an engine stores it, in upper case (`at` → `"AT"`), so it
    /// still names the column created as `at`.
    pub fn ident(&self, name: &str) -> String {
        if self.caps.identifier_quoting == IdentifierQuoting::WhenNeeded
            && folds(name)
            && sqlparser::keywords::ALL_KEYWORDS
                .binary_search(&name.to_ascii_uppercase().as_str())
                .is_err()
        {
            return name.to_string();
        }
        self.quoted(name)
    }

    /// `name` always quoted: the quote character doubled (and a backslash escaped where quoted
    /// names read backslash escapes), and a plain lowercase name in upper case for an
    /// upper-case-folding engine.
    pub fn quoted(&self, name: &str) -> String {
        let q = self.caps.identifier_quote.as_str();
        if self.caps.identifier_quoting == IdentifierQuoting::WhenNeeded && folds(name) {
            return format!("{q}{}{q}", name.to_ascii_uppercase());
        }
        // A quote inside is doubled: where names read backslash escapes (BigQuery), a doubled
        // quote is no escape and ends the name, which makes the statement fail, never
        // changes it; a backslash is escaped there so that it cannot escape the closing quote.
        let mut body = name.to_string();
        if self.caps.identifier_backslash_escapes {
            body = body.replace('\\', "\\\\");
        }
        let body = body.replace(q, &format!("{q}{q}"));
        format!("{q}{body}{q}")
    }

    /// A string literal: single quotes doubled, or — for engines that read backslash escapes
    /// inside literals — backslashes and quotes escaped with a backslash.
    pub fn literal(&self, value: &str) -> String {
        let mut body = value.to_string();
        if self.caps.backslash_escapes {
            body = body.replace('\\', "\\\\");
        }
        // Where two adjacent quotes are two literals (concatenated), a quote is escaped with a
        // backslash instead.
        let body = if self.caps.doubled_quotes {
            body.replace('\'', "''")
        } else {
            body.replace('\'', "\\'")
        };
        format!("'{body}'")
    }

    /// Re-emits a user fragment for this dialect. Every string literal and quoted name inside
    /// it is written again by [`Dialect::literal`] and [`Dialect::quoted`], so that what the
    /// user wrote as one literal stays one literal on every engine (`'it''s'` is two adjacent
    /// literals on engines that read backslash escapes, and `'x\'` ends early there); bare
    /// names stay bare.
    pub fn fragment(&self, expr: &Expr) -> String {
        let mut expr = expr.clone();
        let _ = expr.visit(&mut Reemit(self));
        expr.to_string()
    }

    /// A table name or `(query)`, re-emitted for this dialect.
    pub fn source(&self, source: &Source) -> String {
        match source {
            Source::Table(parts) => parts.iter().map(|p| self.ident(p)).collect::<Vec<_>>().join("."),
            Source::Query(q) => {
                let mut q = q.clone();
                let _ = q.visit(&mut Reemit(self));
                format!("({q})")
            }
        }
    }

    /// Renders the capability snippet `key` (compiled once, in [`Dialect::load`]).
    fn snippet(&self, key: &str, ctx: minijinja::Value) -> Result<String> {
        self.snippets
            .get_template(key)
            .and_then(|t| t.render(ctx))
            .map_err(|e| self.broken(format!("dialect {}: capability `{key}`: {e}", self.caps.name)))
    }

    /// A failure of this dialect's files: the user's, or a bug when they are all built in.
    pub fn broken(&self, message: String) -> Error {
        if self.from_user_dir {
            Error::dialect(message)
        } else {
            Error::bug(message)
        }
    }

    pub fn timestamp(&self, ts: Timestamp) -> Result<String> {
        self.snippet("timestamp_literal", context! { ts => ts.to_sql_string() })
    }

    /// `expr` plus `seconds` (possibly negative), in the largest whole unit.
    pub fn add_seconds(&self, expr: &str, seconds: i64) -> Result<String> {
        if seconds == 0 {
            return Ok(expr.to_string());
        }
        let (n, unit) = if seconds % 86_400 == 0 {
            (seconds / 86_400, "day")
        } else if seconds % 3600 == 0 {
            (seconds / 3600, "hour")
        } else {
            (seconds, "second")
        };
        self.snippet("add_interval", context! { expr => expr, n => n, unit => unit })
    }

    fn covar_samp(&self, a: &str, b: &str) -> Result<String> {
        let cast = |x: &str| format!("CAST({x} AS {})", self.caps.float_type);
        self.snippet("covar_samp", context! { a => cast(a), b => cast(b) })
    }

    /// A conditional aggregate: `agg` over rows where `cond` holds.
    fn aggregate(&self, agg: &Aggregate, cond: Option<&str>) -> Result<String> {
        let mut value = agg.value.as_ref().map(|v| self.fragment(v)).unwrap_or_default();
        if agg.aggregation == Aggregation::Sum {
            value = self.snippet("sum_input", context! { expr => value })?;
        }
        let f = self.caps.filter_clause;
        let count = match cond {
            None => "count(*)".to_string(),
            Some(c) if f => format!("count(*) FILTER (WHERE {c})"),
            Some(c) => format!("sum(CASE WHEN {c} THEN 1 ELSE 0 END)"),
        };
        let over = |func: &str, distinct: bool| {
            let d = if distinct { "DISTINCT " } else { "" };
            match cond {
                None => format!("{func}({d}{value})"),
                Some(c) if f => format!("{func}({d}{value}) FILTER (WHERE {c})"),
                Some(c) => format!("{func}({d}CASE WHEN {c} THEN {value} END)"),
            }
        };
        Ok(match agg.aggregation {
            Aggregation::Count => count,
            Aggregation::Sum => over("sum", false),
            Aggregation::Distinct => over("count", true),
            Aggregation::Min => over("min", false),
            Aggregation::Max => over("max", false),
            Aggregation::Any => format!("CASE WHEN {count} > 0 THEN 1 ELSE 0 END"),
            Aggregation::AtLeast(n) => format!("CASE WHEN {count} >= {n} THEN 1 ELSE 0 END"),
        })
    }

    /// The aggregate of `agg` in `scan`; `windowed`: only events inside the window relative to
    /// the unit's first exposure count (readouts, and reports restricted to an experiment).
    fn scan_aggregate(&self, scan: &EventScan, agg: &Aggregate, windowed: bool) -> Result<String> {
        let t = format!("e.{}", self.ident(&scan.time));
        let mut conds = Vec::new();
        if windowed {
            conds.push(format!(
                "{t} >= {}",
                self.add_seconds("x.first_exposed_at", agg.window.start)?
            ));
            if let Some(w_end) = agg.window.end {
                conds.push(format!(
                    "{t} < {}",
                    self.add_seconds("x.first_exposed_at", w_end)?
                ));
            }
        }
        // The experiment cut-off is applied once, in the scan's WHERE.
        if let Some(f) = &agg.filter {
            conds.push(format!("({})", self.fragment(f)));
        }
        let cond = conds.join(" AND ");
        self.aggregate(agg, (!conds.is_empty()).then_some(cond.as_str()))
    }

    /// Renders the readout query of one experiment.
    pub fn render_experiment(&self, plan: &ExperimentPlan) -> Result<String> {
        if !plan.segments.is_empty() && !self.caps.grouping_sets {
            // `compile_experiment` checks this first, with a located message.
            return Err(Error::bug(format!(
                "dialect {} has no GROUPING SETS but segments were planned",
                self.caps.name
            )));
        }
        let end = self.timestamp(plan.end)?;
        let mut scans = Vec::new();
        for scan in &plan.scans {
            let mut aggregates = Vec::new();
            for agg in &scan.aggregates {
                aggregates.push(context! {
                    sql => self.scan_aggregate(scan, agg, true)?,
                    column => self.ident(&agg.column),
                });
            }
            scans.push(context! {
                name => scan.name,
                source => self.source(&scan.source),
                id => self.ident(&scan.id),
                time => self.ident(&scan.time),
                lower_bound => self.timestamp(plan.start.plus(scan.earliest_offset))?,
                filter => scan.filter.as_ref().map(|f| self.fragment(f)),
                aggregates => aggregates,
            });
        }
        let mut caps = Vec::new();
        let mut columns = Vec::new();
        let third = crate::plan::third_moment_columns(plan);
        let mut third_moments = Vec::new();
        for c in &plan.columns {
            let scan = &plan.scans[c.scan].name;
            let m3 = third.contains(&c.column.as_str()).then(|| {
                let centre = self.ident(&columns::centre(&c.column));
                let col = self.ident(&c.column);
                let d = format!("(CAST({col} AS {}) - {centre})", self.caps.float_type);
                let cube = format!("avg({d} * {d} * {d})");
                // Overall rows only: every segment column rolled up.
                let sql = if plan.segments.is_empty() {
                    cube
                } else {
                    let overall: Vec<String> = plan
                        .segments
                        .iter()
                        .map(|s| format!("GROUPING({}) = 1", self.ident(&s.column)))
                        .collect();
                    format!("CASE WHEN {} THEN {cube} END", overall.join(" AND "))
                };
                third_moments.push(context! { column => col, centre => centre });
                context! { name => self.ident(&columns::stat(&c.column, columns::Stat::M3)), sql => sql }
            });
            let col = self.ident(&c.column);
            let capped = match c.cap {
                None => format!("r.{col}"),
                Some(Cap::Absolute(v)) => {
                    format!("CASE WHEN r.{col} > {v} THEN {v} ELSE r.{col} END")
                }
                Some(Cap::Percentile(p)) => {
                    let part = |suffix: &str| self.ident(&format!("{}_{suffix}", columns::cap(&c.column)));
                    let (low, high, position) = (part("low"), part("high"), part("position"));
                    let cap =
                        format!("r.{low} + (r.{high} - r.{low}) * (r.{position} - floor(r.{position}))");
                    caps.push(context! {
                        column => col,
                        p => format!("{p}"),
                        rank => part("rank"),
                        position => position,
                        low => low,
                        high => high,
                    });
                    format!("CASE WHEN r.{col} > {cap} THEN {cap} ELSE r.{col} END")
                }
            };
            columns.push(context! {
                column => col,
                scan => scan,
                zero_fill => c.zero_fill,
                capped => capped,
                n => self.ident(&columns::stat(&c.column, columns::Stat::N)),
                mean => self.ident(&columns::stat(&c.column, columns::Stat::Mean)),
                var => self.ident(&columns::stat(&c.column, columns::Stat::Var)),
                m3 => m3,
            });
        }
        let mut covariances = Vec::new();
        for c in &plan.covariances {
            covariances.push(context! {
                name => self.ident(&c.name),
                sql => self.covar_samp(&self.ident(&c.a), &self.ident(&c.b))?,
            });
        }
        let mut segments = Vec::new();
        let mut exposure_segments = Vec::new();
        let mut attribute_segments = Vec::new();
        for seg in &plan.segments {
            let column = self.ident(&seg.column);
            let cte = match &seg.kind {
                PlannedSegmentKind::Exposure { column: source } => {
                    exposure_segments.push(context! {
                        column => column,
                        source_column => self.ident(source),
                    });
                    None
                }
                PlannedSegmentKind::Attribute {
                    source,
                    id,
                    value,
                    time,
                } => {
                    let cte = columns::segment_cte(&seg.name);
                    attribute_segments.push(self.segment_context(&cte, source, id, value, time.as_ref()));
                    Some(cte)
                }
            };
            segments.push(context! {
                column => column,
                name => self.literal(&seg.name),
                exposure => cte.is_none(),
                cte => cte,
            });
        }
        let x = &plan.exposures;
        let ctx = context! {
            experiment => plan.experiment,
            dialect => self.caps.name,
            utc_session => self.caps.utc_session,
            per_unit_joins => self.caps.per_unit_joins,
            float_type => self.caps.float_type,
            string_type => self.caps.string_type,
            start => self.timestamp(plan.start)?,
            end => end,
            exposures => self.exposures_context(x),
            scans => scans,
            columns => columns,
            caps => caps,
            covariances => covariances,
            third_moments => third_moments,
            segments => segments,
            exposure_segments => exposure_segments,
            attribute_segments => attribute_segments,
            fingerprint => self.literal(&crate::plan::fingerprint(plan)),
            layout => crate::plan::STATS_LAYOUT,
        };
        self.render_template("experiment.sql.j2", ctx)
    }

    /// Renders a report query (long format: metric, part, period_start, segment_value, units,
    /// total). Parts: `value`, `numerator`, `denominator`, and `active` (units active in the
    /// period, whose `total` counts their event rows).
    pub fn render_report(&self, plan: &ReportPlan) -> Result<String> {
        let windowed = plan.exposed.is_some();
        let mut scans = Vec::new();
        for scan in &plan.scans {
            let mut aggregates = Vec::new();
            for agg in &scan.aggregates {
                aggregates.push(context! {
                    sql => self.scan_aggregate(scan, agg, windowed)?,
                    column => self.ident(&agg.column),
                });
            }
            let time = self.ident(&scan.time);
            scans.push(context! {
                name => scan.name,
                source => self.source(&scan.source),
                id => self.ident(&scan.id),
                time => time,
                period => self.snippet("date_trunc", context! { grain => plan.grain.as_str(), expr => format!("e.{time}") })?,
                filter => scan.filter.as_ref().map(|f| self.fragment(f)),
                aggregates => aggregates,
            });
        }
        let mut rows = Vec::new();
        let mut names = Vec::new();
        for m in &plan.metrics {
            names.push(m.name.clone());
            let mut row = |part: &str, scan: usize, column: String| {
                rows.push(context! {
                    metric => self.literal(&m.name),
                    part => self.literal(part),
                    scan => plan.scans[scan].name.clone(),
                    column => column,
                });
            };
            match &m.kind {
                ReportMetricKind::Value { scan, column } => row("value", *scan, self.ident(column)),
                ReportMetricKind::Ratio {
                    numerator,
                    denominator,
                } => {
                    row("numerator", numerator.0, self.ident(&numerator.1));
                    row("denominator", denominator.0, self.ident(&denominator.1));
                }
            }
            row("active", m.active_scan, "event_rows".into());
        }
        let mut exposure_segments = Vec::new();
        let mut attribute_segments = Vec::new();
        let segment = plan.segment.as_ref().map(|seg| context! { sql => match &seg.kind {
                PlannedSegmentKind::Exposure { column: source } => {
                    let column = self.ident(&seg.column);
                    exposure_segments.push(context! { column => column, source_column => self.ident(source) });
                    format!("x.{column}")
                }
                PlannedSegmentKind::Attribute { source, id, value, time } => {
                    let cte = columns::segment_cte(&seg.name);
                    // Without exposures there is no "as of exposure": the smallest value is used.
                    let time = if windowed { time.as_ref() } else { None };
                    attribute_segments.push(self.segment_context(&cte, source, id, value, time));
                    format!("{cte}.segment_value")
                }
            }});
        let exposures = plan
            .exposed
            .as_ref()
            .map(|x| self.exposures_context(&x.exposures));
        let (start, end) = match &plan.exposed {
            Some(x) => (Some(self.timestamp(x.start)?), Some(self.timestamp(x.end)?)),
            None => (None, None),
        };
        let ctx = context! {
            metric_names => names.join(", "),
            grain => plan.grain.as_str(),
            dialect => self.caps.name,
            utc_session => self.caps.utc_session,
            float_type => self.caps.float_type,
            string_type => self.caps.string_type,
            from => self.timestamp(plan.from)?,
            to => self.timestamp(plan.to)?,
            start => start,
            end => end,
            exposures => exposures,
            exposure_segments => exposure_segments,
            attribute_segments => attribute_segments,
            segment => segment,
            scans => scans,
            rows => rows,
        };
        self.render_template("report.sql.j2", ctx)
    }

    /// Renders a population-totals query (one row, one column per metric).
    pub fn render_totals(&self, plan: &TotalsPlan) -> Result<String> {
        let mut scans = Vec::new();
        for scan in &plan.scans {
            let mut aggregates = Vec::new();
            for agg in &scan.aggregates {
                aggregates.push(context! {
                    sql => self.scan_aggregate(scan, agg, false)?,
                    column => self.ident(&agg.column),
                });
            }
            scans.push(context! {
                name => scan.name,
                source => self.source(&scan.source),
                time => self.ident(&scan.time),
                filter => scan.filter.as_ref().map(|f| self.fragment(f)),
                aggregates => aggregates,
            });
        }
        let rows: Vec<minijinja::Value> = plan
            .metrics
            .iter()
            .map(|(_, scan, column)| {
                context! {
                    scan => plan.scans[*scan].name.clone(),
                    column => self.ident(column),
                }
            })
            .collect();
        let ctx = context! {
            metric_names => plan.metrics.iter().map(|m| m.0.as_str()).collect::<Vec<_>>().join(", "),
            dialect => self.caps.name,
            utc_session => self.caps.utc_session,
            float_type => self.caps.float_type,
            from => self.timestamp(plan.from)?,
            to => self.timestamp(plan.to)?,
            scans => scans,
            rows => rows,
        };
        self.render_template("totals.sql.j2", ctx)
    }

    /// Renders the daily arm sizes of an experiment: per day of first exposure and arm, the
    /// exposed units under the readout's exposure rules (for the per-day sample-ratio check).
    pub fn render_daily(&self, plan: &ExperimentPlan) -> Result<String> {
        let ctx = context! {
            experiment => plan.experiment,
            dialect => self.caps.name,
            utc_session => self.caps.utc_session,
            string_type => self.caps.string_type,
            start => self.timestamp(plan.start)?,
            end => self.timestamp(plan.end)?,
            exposures => self.exposures_context(&plan.exposures),
            exposure_segments => Vec::<minijinja::Value>::new(),
            day => self.snippet("date_trunc", context! { grain => "day", expr => "first_exposed_at" })?,
        };
        self.render_template("daily.sql.j2", ctx)
    }

    /// Template context of the exposure log part shared by readout and report queries.
    fn exposures_context(&self, x: &crate::plan::ExposureScan) -> minijinja::Value {
        context! {
            source => self.source(&x.source),
            id => self.ident(&x.id),
            time => self.ident(&x.time),
            // A history plan reads every row of the log as one arm.
            arm => match &x.key {
                Some(_) => self.ident(&x.arm_column),
                None => self.literal(crate::plan::HISTORY_ARM),
            },
            experiment => self.ident(&x.experiment_column),
            key => x.key.as_ref().map(|k| self.literal(k)),
        }
    }

    /// Template context of a unit-attribute segment's CTE.
    fn segment_context(
        &self,
        cte: &str,
        source: &Source,
        id: &str,
        value: &Expr,
        time: Option<&String>,
    ) -> minijinja::Value {
        context! {
            cte => cte,
            source => self.source(source),
            id => self.ident(id),
            value => self.fragment(value),
            time => time.map(|t| self.ident(t)),
        }
    }

    fn render_template(&self, name: &str, ctx: minijinja::Value) -> Result<String> {
        let mut env = Environment::new();
        env.set_undefined_behavior(UndefinedBehavior::Strict);
        env.set_trim_blocks(true);
        env.set_lstrip_blocks(true);
        env.set_keep_trailing_newline(true);
        for (file, text) in &self.templates {
            env.add_template(file, text)
                .map_err(|e| self.broken(format!("dialect {}: template {file}: {e}", self.caps.name)))?;
        }
        let tmpl = env
            .get_template(name)
            .map_err(|e| self.broken(format!("dialect {}: {e}", self.caps.name)))?;
        let mut sql = tmpl
            .render(ctx)
            .map_err(|e| self.broken(format!("dialect {}: {name}: {e}", self.caps.name)))?;
        if !sql.ends_with('\n') {
            sql.push('\n');
        }
        Ok(sql)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn quoting_cannot_break_out() {
        let d = Dialect::load("duckdb", None).unwrap();
        assert_eq!(d.ident(r#"a"; drop table x; --"#), r#""a""; drop table x; --""#);
        assert_eq!(d.literal("it's"), "'it''s'");
    }

    #[test]
    fn literals_escape_quotes_the_way_each_engine_reads_them() {
        let duck = Dialect::load("duckdb", None).unwrap();
        assert_eq!(duck.literal(r"it's \n"), r"'it''s \n'");
        let spark = Dialect::load("spark", None).unwrap();
        assert_eq!(spark.literal(r"it's \n"), r"'it\'s \\n'");
    }

    #[test]
    fn bare_names_only_when_safe() {
        let d = Dialect::load("snowflake", None).unwrap();
        assert_eq!(d.ident("shopper_id"), "shopper_id");
        assert_eq!(
            d.ident("at"),
            "\"AT\"",
            "keywords are quoted as Snowflake stores them"
        );
        assert_eq!(d.ident("status"), "\"STATUS\"");
        assert_eq!(d.ident("Region"), "\"Region\"");
    }

    #[test]
    fn a_dialect_folder_cannot_break_out_of_the_header_comment() {
        let dir = tempfile::tempdir().unwrap();
        std::fs::create_dir_all(dir.path().join("evil")).unwrap();
        std::fs::write(
            dir.path().join("evil/dialect.yaml"),
            "utc_session: \"SET TIME ZONE 'UTC'\\nDROP TABLE orders; --\"\n",
        )
        .unwrap();
        let e = Dialect::load("evil", Some(dir.path())).unwrap_err();
        assert!(e.to_string().contains("utc_session"), "{e}");
    }

    #[test]
    fn redshift_segment_values_are_not_cut_at_256_characters() {
        // A bare VARCHAR is VARCHAR(256) on Redshift (its CREATE TABLE reference).
        let d = Dialect::load("redshift", None).unwrap();
        assert_eq!(d.caps.string_type, "VARCHAR(65535)");
    }

    #[test]
    fn dialect_overrides_fall_back_to_generic() {
        let d = Dialect::load("duckdb", None).unwrap();
        assert!(d.caps.filter_clause);
        assert_eq!(d.caps.identifier_quote, "\"");
        assert_eq!(d.add_seconds("t", 14 * 86_400).unwrap(), "t + INTERVAL '14' DAY");
        assert_eq!(d.add_seconds("t", 5400).unwrap(), "t + INTERVAL '5400' SECOND");
        assert!(Dialect::load("nope", None).is_err());
    }

    /// Redshift's covariance from variances must use the rows where both values are present,
    /// as `covar_samp` does; evaluated on DuckDB against `covar_samp` over data with NULLs.
    #[cfg(feature = "engine")]
    #[test]
    fn covariance_from_variances_skips_the_same_rows_as_covar_samp() {
        use crate::execute::Cell;
        use crate::execute::duckdb::LocalEngine;
        let engine = LocalEngine::open(None, &[]).unwrap();
        engine
            .execute_batch(
                "CREATE TABLE t AS SELECT CASE WHEN i % 3 = 0 THEN NULL ELSE i * 1.5 END AS a, \
                 CASE WHEN i % 5 = 0 THEN NULL ELSE (i * 7) % 11 END AS b FROM range(1, 200) AS r(i)",
            )
            .unwrap();
        let value = |sql: &str| match engine.query(&format!("SELECT {sql} AS v FROM t")).unwrap()[0]["v"] {
            Cell::Number(v) => v,
            ref other => panic!("{other:?}"),
        };
        let expected = value("covar_samp(a, b)");
        for name in ["redshift", "generic", "duckdb", "postgres"] {
            let d = Dialect::load(name, None).unwrap();
            let got = value(&d.covar_samp("a", "b").unwrap());
            assert!(
                (got - expected).abs() <= 1e-9 * expected.abs(),
                "{name}: {got} vs {expected}"
            );
        }
    }
}
