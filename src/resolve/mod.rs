//! Stage 2, `resolve`: syntax structs -> typed IR.
//!
//! Checks names (snake_case, unique per kind), references (units, event tables, exposure logs,
//! metrics, segments), units (an experiment's metrics must count the unit it randomises),
//! windows, timestamps, splits and SQL fragments. Every problem is reported, each at the key
//! or value it concerns, with a hint; the IR is returned only when there are no errors.
//! Invariant: resolve never emits SQL.

pub mod sql;

use crate::diagnostics::{Diagnostic, did_you_mean};
use crate::ir::{self, Aggregation, Direction, MetricKind, Role, Source, Window};
use crate::load::{Item, RawCatalog, syntax};
use crate::source::{SourceMap, Span};
use crate::time::{Timestamp, parse_duration};
use std::collections::BTreeMap;

/// Resolves a loaded catalog. `Err` holds every error found (at least one).
pub fn resolve(sources: &SourceMap, raw: &RawCatalog) -> Result<ir::Catalog, Vec<Diagnostic>> {
    resolve_with_schemas(sources, raw, &BTreeMap::new())
}

/// Like [`resolve`], also checking SQL fragments against known table schemas: `schemas` maps a
/// table name (as written in `table:`) to its columns, e.g. read from local data. An event
/// table's own `columns:` list takes precedence.
pub fn resolve_with_schemas(
    sources: &SourceMap,
    raw: &RawCatalog,
    schemas: &BTreeMap<String, Vec<String>>,
) -> Result<ir::Catalog, Vec<Diagnostic>> {
    let mut r = Resolver {
        sources,
        diags: Vec::new(),
    };
    let catalog = r.catalog(raw);
    r.check_columns(raw, &catalog, schemas);
    if r.diags.iter().any(Diagnostic::is_error) {
        Err(r.diags)
    } else {
        Ok(catalog)
    }
}

/// Bare column names an expression refers to.
fn column_refs(expr: &sqlparser::ast::Expr) -> Vec<String> {
    let mut out = Vec::new();
    let _ = sqlparser::ast::visit_expressions(expr, |e| {
        if let sqlparser::ast::Expr::Identifier(i) = e {
            out.push(i.value.clone());
        }
        std::ops::ControlFlow::<()>::Continue(())
    });
    out
}

struct Resolver<'a> {
    sources: &'a SourceMap,
    diags: Vec<Diagnostic>,
}

/// Name -> index for one kind of declaration.
type Names = BTreeMap<String, usize>;

fn is_snake_case(name: &str) -> bool {
    let mut chars = name.chars();
    matches!(chars.next(), Some('a'..='z'))
        && chars.all(|c| c.is_ascii_lowercase() || c.is_ascii_digit() || c == '_')
}

impl Resolver<'_> {
    /// Checks every column a fragment, `id` or `time` names against the table's known columns.
    fn check_columns(
        &mut self,
        raw: &RawCatalog,
        catalog: &ir::Catalog,
        schemas: &BTreeMap<String, Vec<String>>,
    ) {
        if self.diags.iter().any(Diagnostic::is_error) {
            return;
        }
        for (t, item) in raw.event_tables.iter().enumerate() {
            let table = &catalog.event_tables[t];
            let known: Option<Vec<String>> = table.columns.clone().or_else(|| match &table.source {
                Source::Table(parts) => schemas.get(&parts.join(".")).cloned(),
                Source::Query(_) => None,
            });
            let Some(known) = known else { continue };
            let lower: Vec<String> = known.iter().map(|c| c.to_ascii_lowercase()).collect();
            let check = |s: &mut Self, name: &str, span: Option<Span>, what: &str| {
                if lower.contains(&name.to_ascii_lowercase()) {
                    return;
                }
                let mut d = Diagnostic::error(
                    "E021",
                    format!("unknown column `{name}` in {what} (event table `{}`)", table.name),
                )
                .at(span);
                d = d.hint(
                    did_you_mean(name, known.iter().map(String::as_str))
                        .unwrap_or_else(|| format!("columns of `{}`: {}", table.name, known.join(", "))),
                );
                s.push(d);
            };
            check(self, &table.id, item.value_span("id"), "`id`");
            check(self, &table.time, item.value_span("time"), "`time`");
            if let Some(f) = &table.filter {
                for c in column_refs(f) {
                    let span = self.word_span(item, "where", &c);
                    check(self, &c, span, "`where`");
                }
            }
            for (m, mitem) in raw.metrics.iter().enumerate() {
                let MetricKind::Events {
                    table: mt,
                    value,
                    filter,
                    ..
                } = &catalog.metrics[m].kind
                else {
                    continue;
                };
                if *mt != t {
                    continue;
                }
                for (key, expr) in [("of", value), ("where", filter)] {
                    for c in expr.iter().flat_map(|e| column_refs(e)) {
                        let span = self.word_span(mitem, key, &c);
                        check(
                            self,
                            &c,
                            span,
                            &format!("`{key}` of metric `{}`", catalog.metrics[m].name),
                        );
                    }
                }
            }
        }
    }

    /// Reports a label (`key`) that YAML turned into a number whose text differs from what
    /// was written (`1.10` -> `1.1`, `007` -> `7`).
    fn label_as_written<T>(&mut self, item: &Item<T>, key: &str, read: Option<&str>) {
        let (Some(read), Some(node)) = (read, item.node.get(key)) else {
            return;
        };
        if let crate::load::yaml::NodeKind::Scalar(written) = &node.kind
            && written != read
        {
            let span = Span::new(item.file, node.range.clone());
            self.push(number_label(written, read, span, "an experiment key"));
        }
    }

    /// Span of `word` inside the value of `key`, or the whole value.
    fn word_span<T>(&self, item: &Item<T>, key: &str, word: &str) -> Option<Span> {
        let whole = item.value_span(key)?;
        let text = &self.sources.get(whole.file).text[whole.range.clone()];
        let bytes = text.as_bytes();
        let mut from = 0;
        while let Some(i) = text[from..].find(word) {
            let start = from + i;
            let end = start + word.len();
            let before =
                start == 0 || !(bytes[start - 1].is_ascii_alphanumeric() || bytes[start - 1] == b'_');
            let after = end >= bytes.len() || !(bytes[end].is_ascii_alphanumeric() || bytes[end] == b'_');
            if before && after {
                return Some(Span::new(
                    whole.file,
                    whole.range.start + start..whole.range.start + end,
                ));
            }
            from = end;
        }
        Some(whole)
    }

    fn push(&mut self, d: Diagnostic) {
        self.diags.push(d);
    }

    /// A required string key; reports it missing at the item otherwise.
    fn required<'v, T>(
        &mut self,
        item: &Item<T>,
        value: &'v Option<String>,
        key: &str,
        kind: &str,
        example: &str,
    ) -> Option<&'v str> {
        match value.as_deref() {
            Some(v) if !v.trim().is_empty() => Some(v),
            _ => {
                self.push(
                    Diagnostic::error("E010", format!("{kind} is missing `{key}`"))
                        .at(Some(item.value_span(key).unwrap_or_else(|| item.span())))
                        .hint(format!("add `{key}: {example}`")),
                );
                None
            }
        }
    }

    /// Collects names of one kind, reporting bad and duplicate names.
    fn names<T>(&mut self, items: &[Item<T>], name_of: impl Fn(&T) -> Option<&String>, kind: &str) -> Names {
        let mut names = Names::new();
        let mut first: BTreeMap<String, Span> = BTreeMap::new();
        for (i, item) in items.iter().enumerate() {
            let Some(name) = name_of(&item.value) else {
                self.push(
                    Diagnostic::error("E010", format!("{kind} without a `name`"))
                        .at(Some(item.span()))
                        .hint(
                            "add `name: some_name` (snake_case, unique among the {kind}s)"
                                .replace("{kind}", kind),
                        ),
                );
                continue;
            };
            if !is_snake_case(name) {
                self.push(
                    Diagnostic::error("E019", format!("{kind} name `{name}` is not snake_case"))
                        .at(item.value_span("name"))
                        .hint(format!(
                            "use lowercase letters, digits and underscores, starting with a letter, e.g. `{}`",
                            suggest_snake(name)
                        )),
                );
            }
            // Metric and segment names become per-unit columns, and plumb derives more columns
            // from them with `__` (`orders__pre`, `orders__n`, `segment__region`) beside fixed
            // ones (`arm`, `units`): a name that could equal a derived or fixed column would
            // silently read the other's values.
            if matches!(kind, "metric" | "segment") && name.contains("__") {
                let mut fixed = name.clone();
                while fixed.contains("__") {
                    fixed = fixed.replace("__", "_");
                }
                self.push(
                    Diagnostic::error("E019", format!("{kind} name `{name}` contains `__`"))
                        .at(item.value_span("name"))
                        .hint(format!(
                            "plumb reserves `__` for the columns it derives from names (such as `orders__pre`, `orders__n`); write `{fixed}`"
                        )),
                );
            }
            if kind == "metric" && crate::columns::RESERVED.contains(&name.as_str()) {
                self.push(
                    Diagnostic::error("E019", format!("metric name `{name}` is reserved"))
                        .at(item.value_span("name"))
                        .hint(format!(
                            "`{name}` is a column of plumb's own per-unit and statistics tables; rename the metric, e.g. `{name}_metric`"
                        )),
                );
            }
            if let Some(prev) = first.get(name) {
                self.push(
                    Diagnostic::error("E011", format!("duplicate {kind} name `{name}`"))
                        .at(item.value_span("name"))
                        .label(Some(prev.clone()), "first defined here")
                        .hint(format!("rename one of them; {kind} names must be unique")),
                );
                continue;
            }
            first.insert(name.clone(), item.span());
            names.insert(name.clone(), i);
        }
        names
    }

    /// Looks up a reference, reporting an unknown name with a did-you-mean.
    fn reference(&mut self, names: &Names, name: &str, kind: &str, span: Option<Span>) -> Option<usize> {
        if let Some(&i) = names.get(name) {
            return Some(i);
        }
        let mut d = Diagnostic::error("E012", format!("unknown {kind} `{name}`")).at(span);
        d = match did_you_mean(name, names.keys().map(String::as_str)) {
            Some(h) => d.hint(h),
            None if names.is_empty() => {
                d.hint(format!("declare it in a catalog file under the {kind}s list"))
            }
            None => d.hint(format!(
                "known {kind}s: {}",
                names.keys().cloned().collect::<Vec<_>>().join(", ")
            )),
        };
        self.push(d);
        None
    }

    fn fragment<T>(&mut self, item: &Item<T>, key: &str, text: &str) -> Option<sqlparser::ast::Expr> {
        match sql::parse_expr(text) {
            Ok(e) => Some(e),
            Err(e) => {
                let span = self.fragment_span(item, key, e.line, e.column);
                self.push(
                    Diagnostic::error("E016", format!("invalid SQL in `{key}`: {}", e.message))
                        .at(span)
                        .hint(
                            "write a single SQL expression over the table's columns, e.g. `status = 'paid'`",
                        ),
                );
                None
            }
        }
    }

    /// Maps a line/column inside a fragment to a span in the YAML file. sqlparser counts columns
    /// in characters while spans are byte ranges, so the column is walked character by
    /// character. Where the file's text is not the fragment's text one to one (multi-line
    /// scalars, escapes in quoted scalars) it falls back to the whole value.
    fn fragment_span<T>(&self, item: &Item<T>, key: &str, line: usize, column: usize) -> Option<Span> {
        let whole = item.value_span(key)?;
        let file = self.sources.get(whole.file);
        let raw = file.text.get(whole.range.clone())?;
        let quote = raw.chars().next().filter(|c| matches!(c, '\'' | '"'));
        let escaped = match quote {
            Some('"') => raw.contains('\\'),
            Some(_) => raw[1..].trim_end_matches('\'').contains("''"),
            None => false,
        };
        if line != 1 || raw.contains('\n') || escaped {
            return Some(whole);
        }
        let body = &raw[quote.map_or(0, char::len_utf8)..];
        let mut chars = body.char_indices().skip(column.saturating_sub(1));
        let Some((offset, c)) = chars.next() else {
            return Some(whole);
        };
        let start = whole.range.start + quote.map_or(0, char::len_utf8) + offset;
        Some(Span::new(whole.file, start..start + c.len_utf8()))
    }

    fn source<T>(
        &mut self,
        item: &Item<T>,
        table: &Option<String>,
        query: &Option<String>,
        kind: &str,
    ) -> Option<Source> {
        match (table.as_deref(), query.as_deref()) {
            (Some(_), Some(_)) => {
                self.push(
                    Diagnostic::error("E017", format!("{kind} has both `table` and `sql`"))
                        .at(item.key_span("sql"))
                        .hint("keep one: `table: name` for a table or view, `sql: select ...` for a query"),
                );
                None
            }
            (Some(t), None) => {
                let parts: Vec<String> = t.split('.').map(|p| p.trim().to_string()).collect();
                if parts.iter().any(|p| p.is_empty()) {
                    self.push(
                        Diagnostic::error("E017", format!("`{t}` is not a table name"))
                            .at(item.value_span("table"))
                            .hint("write `table: name` or `table: schema.name`"),
                    );
                    return None;
                }
                Some(Source::Table(parts))
            }
            (None, Some(q)) => match sql::parse_query(q) {
                Ok(q) => Some(Source::Query(q)),
                Err(e) => {
                    let span = self.fragment_span(item, "sql", e.line, e.column);
                    self.push(
                        Diagnostic::error("E016", format!("invalid SQL in `sql`: {}", e.message))
                            .at(span)
                            .hint("write one SELECT query returning the unit key and time columns"),
                    );
                    None
                }
            },
            (None, None) => {
                self.push(
                    Diagnostic::error("E010", format!("{kind} needs `table` or `sql`"))
                        .at(Some(item.span()))
                        .hint("add `table: name_of_table` or `sql: select ...`"),
                );
                None
            }
        }
    }

    /// `mde: 2%`: a relative minimum detectable effect.
    fn mde(&mut self, span: Option<Span>, text: &str) -> Option<f64> {
        let parsed = text
            .trim()
            .strip_suffix('%')
            .and_then(|p| p.trim().parse::<f64>().ok());
        match parsed {
            Some(p) if p > 0.0 && p.is_finite() => Some(p / 100.0),
            _ => {
                self.push(
                    Diagnostic::error("E017", format!("bad `mde` value `{text}`"))
                        .at(span)
                        .hint("write the smallest relative change worth detecting, e.g. `mde: 2%`"),
                );
                None
            }
        }
    }

    /// `winsorize: 99.9%` (a percentile of the exposed units' values) or `winsorize: 250`.
    fn cap(&mut self, item: &Item<syntax::Metric>, text: &str) -> Option<ir::Cap> {
        let t = text.trim();
        let bad = |s: &mut Self, msg: &str| {
            s.push(
                Diagnostic::error("E017", format!("bad `winsorize` value `{t}`: {msg}"))
                    .at(item.value_span("winsorize"))
                    .hint("write a percentile such as `99.9%` or an absolute cap such as `500`"),
            );
            None
        };
        if let Some(p) = t.strip_suffix('%') {
            match p.trim().parse::<f64>() {
                Ok(p) if p > 50.0 && p < 100.0 => Some(ir::Cap::Percentile(p / 100.0)),
                Ok(_) => bad(self, "the percentile must be above 50% and below 100%"),
                Err(_) => bad(self, "not a number"),
            }
        } else {
            match t.parse::<f64>() {
                Ok(c) if c.is_finite() => Some(ir::Cap::Absolute(c)),
                _ => bad(self, "not a number or a percentage"),
            }
        }
    }

    fn window(&mut self, item: &Item<syntax::Metric>) -> Option<Window> {
        let Some(parts) = &item.value.window else {
            return Some(Window { start: 0, end: None });
        };
        if parts.len() != 2 {
            self.push(
                Diagnostic::error("E014", "a window needs exactly a start and an end")
                    .at(item.value_span("window"))
                    .hint("write `window: [0d, 14d]` (from exposure to 14 days after, end excluded)"),
            );
            return None;
        }
        let mut bounds = [0i64; 2];
        let mut ok = true;
        for (i, p) in parts.iter().enumerate() {
            match parse_duration(&p.0) {
                Ok(s) => bounds[i] = s,
                Err(msg) => {
                    ok = false;
                    self.push(
                        Diagnostic::error("E014", format!("bad window bound: {msg}"))
                            .at(item.elem_span("window", i))
                            .hint("write `window: [0d, 14d]` or `window: [1h, 24h]`"),
                    );
                }
            }
        }
        if !ok {
            return None;
        }
        if bounds[1] <= bounds[0] {
            self.push(
                Diagnostic::error("E014", "the window ends before it starts")
                    .at(item.value_span("window"))
                    .hint("the first bound is the start, the second the (excluded) end: `[0d, 14d]`"),
            );
            return None;
        }
        if bounds[0] < 0 {
            self.push(
                Diagnostic::error("E014", "a metric window cannot start before exposure")
                    .at(item.elem_span("window", 0))
                    .hint("pre-exposure values are covariates: set `covariate_window` on the experiment instead"),
            );
            return None;
        }
        Some(Window {
            start: bounds[0],
            end: Some(bounds[1]),
        })
    }

    fn catalog(&mut self, raw: &RawCatalog) -> ir::Catalog {
        let unit_names = self.names(&raw.units, |u| u.name.as_ref(), "unit");
        let table_names = self.names(&raw.event_tables, |t| t.name.as_ref(), "event table");
        let log_names = self.names(&raw.exposure_logs, |t| t.name.as_ref(), "exposure log");
        let segment_names = self.names(&raw.segments, |t| t.name.as_ref(), "segment");
        let metric_names = self.names(&raw.metrics, |t| t.name.as_ref(), "metric");
        let _ = self.names(&raw.experiments, |t| t.name.as_ref(), "experiment");

        let mut out = ir::Catalog::default();
        for item in &raw.units {
            out.units.push(ir::Unit {
                name: item.value.name.clone().unwrap_or_default(),
                description: item.value.description.clone(),
                active: None,
            });
        }

        for item in &raw.event_tables {
            let v = &item.value;
            let unit = self
                .required(item, &v.unit, "unit", "an event table", "shopper")
                .and_then(|u| self.reference(&unit_names, u, "unit", item.value_span("unit")));
            let source = self.source(item, &v.table, &v.sql, "an event table");
            let id = self
                .required(item, &v.id, "id", "an event table", "shopper_id")
                .map(str::to_string);
            let time = self
                .required(item, &v.time, "time", "an event table", "happened_at")
                .map(str::to_string);
            let filter = v.where_.as_deref().and_then(|w| self.fragment(item, "where", w));
            out.event_tables.push(ir::EventTable {
                name: v.name.clone().unwrap_or_default(),
                unit: unit.unwrap_or(0),
                source: source.unwrap_or(Source::Table(vec![])),
                id: id.unwrap_or_default(),
                time: time.unwrap_or_default(),
                filter,
                columns: v.columns.clone(),
            });
        }

        for (u, item) in raw.units.iter().enumerate() {
            let Some(active) = &item.value.active else {
                continue;
            };
            let Some(events) = &active.events else {
                self.push(
                    Diagnostic::error("E010", "`active` needs `events`")
                        .at(item.value_span("active"))
                        .hint("write `active: {events: visits}`: any row of that event table makes a unit active"),
                );
                continue;
            };
            let span = item
                .node
                .at(&[
                    crate::load::yaml::Seg::Key("active".into()),
                    crate::load::yaml::Seg::Key("events".into()),
                ])
                .map(|n| Span::new(item.file, n.range.clone()));
            if let Some(t) = self.reference(&table_names, events, "event table", span.clone()) {
                if out.event_tables[t].unit != u {
                    self.push(
                        Diagnostic::error("E013", format!("event table `{events}` counts another unit"))
                            .at(span)
                            .hint("a unit's activity must come from an event table of that unit"),
                    );
                }
                out.units[u].active = Some(t);
            }
        }

        for item in &raw.exposure_logs {
            let v = &item.value;
            let unit = self
                .required(item, &v.unit, "unit", "an exposure log", "shopper")
                .and_then(|u| self.reference(&unit_names, u, "unit", item.value_span("unit")));
            let source = self.source(item, &v.table, &v.sql, "an exposure log");
            let mut col = |key: &str, val: &Option<String>, ex: &str| {
                self.required(item, val, key, "an exposure log", ex)
                    .map(str::to_string)
                    .unwrap_or_default()
            };
            let id = col("id", &v.id, "shopper_id");
            let time = col("time", &v.time, "exposed_at");
            let experiment = col("experiment", &v.experiment, "experiment");
            let arm = col("arm", &v.arm, "arm");
            out.exposure_logs.push(ir::ExposureLog {
                name: v.name.clone().unwrap_or_default(),
                unit: unit.unwrap_or(0),
                source: source.unwrap_or(Source::Table(vec![])),
                id,
                time,
                experiment,
                arm,
            });
        }

        for item in &raw.segments {
            let v = &item.value;
            let kind = if let Some(col) = &v.from_exposure {
                if let Some(k) = ["table", "unit", "id", "value", "time"]
                    .iter()
                    .find(|k| item.node.get(k).is_some())
                {
                    self.push(
                        Diagnostic::error("E017", format!("a segment with `from_exposure` cannot also have `{k}`"))
                            .at(item.key_span(k))
                            .hint("`from_exposure: column` reads the value from the exposure row; remove the other keys"),
                    );
                }
                ir::SegmentKind::FromExposure(col.clone())
            } else {
                let unit = self
                    .required(item, &v.unit, "unit", "a segment", "shopper")
                    .and_then(|u| self.reference(&unit_names, u, "unit", item.value_span("unit")));
                let source = self.source(item, &v.table, &None, "a segment");
                let id = self
                    .required(item, &v.id, "id", "a segment", "shopper_id")
                    .map(str::to_string);
                let value = self
                    .required(item, &v.value, "value", "a segment", "region")
                    .map(str::to_string)
                    .and_then(|t| self.fragment(item, "value", &t));
                ir::SegmentKind::Attribute {
                    unit: unit.unwrap_or(0),
                    source: source.unwrap_or(Source::Table(vec![])),
                    id: id.unwrap_or_default(),
                    value: Box::new(
                        value.unwrap_or(sqlparser::ast::Expr::Value(sqlparser::ast::Value::Null.into())),
                    ),
                    time: v.time.clone(),
                }
            };
            out.segments.push(ir::Segment {
                name: v.name.clone().unwrap_or_default(),
                kind,
            });
        }

        // Metrics: event metrics first need their table's unit; ratios need their parts.
        let event_units: Vec<Option<usize>> = raw
            .metrics
            .iter()
            .map(|m| {
                let t = table_names.get(m.value.events.as_deref()?)?;
                Some(out.event_tables[*t].unit)
            })
            .collect();
        for item in &raw.metrics {
            let metric = self.metric(item, raw, &table_names, &metric_names, &event_units, &out);
            out.metrics.push(metric);
        }

        for item in &raw.experiments {
            if let Some(e) = self.experiment(item, raw, &log_names, &metric_names, &segment_names, &out) {
                out.experiments.push(e);
            }
        }
        out
    }

    fn metric(
        &mut self,
        item: &Item<syntax::Metric>,
        raw: &RawCatalog,
        tables: &Names,
        metrics: &Names,
        event_units: &[Option<usize>],
        out: &ir::Catalog,
    ) -> ir::Metric {
        let v = &item.value;
        let direction = match v.direction.as_deref() {
            None => None,
            Some("increase") => Some(Direction::Increase),
            Some("decrease") => Some(Direction::Decrease),
            Some(other) => {
                self.push(
                    Diagnostic::error("E017", format!("unknown direction `{other}`"))
                        .at(item.value_span("direction"))
                        .hint("write `direction: increase` (higher is better) or `direction: decrease`"),
                );
                None
            }
        };
        let cap = v.winsorize.as_ref().and_then(|w| self.cap(item, &w.0));
        let mde = v
            .mde
            .as_ref()
            .and_then(|m| self.mde(item.value_span("mde"), &m.0));
        let mut metric = ir::Metric {
            name: v.name.clone().unwrap_or_default(),
            description: v.description.clone(),
            owner: v.owner.clone(),
            unit: 0,
            kind: MetricKind::Ratio {
                numerator: 0,
                denominator: 0,
            },
            direction,
            mde,
        };
        if let Some(parts) = &v.ratio {
            for key in [
                "events",
                "per_unit",
                "of",
                "where",
                "window",
                "at_least",
                "winsorize",
            ] {
                if item.node.get(key).is_some() {
                    self.push(
                        Diagnostic::error("E017", format!("a ratio metric cannot have `{key}`"))
                            .at(item.key_span(key))
                            .hint("put event settings on the numerator and denominator metrics"),
                    );
                }
            }
            if parts.len() != 2 {
                self.push(
                    Diagnostic::error("E017", "`ratio` needs exactly two metrics")
                        .at(item.value_span("ratio"))
                        .hint("write `ratio: [numerator_metric, denominator_metric]`"),
                );
                return metric;
            }
            let mut ids = [0usize; 2];
            for (i, name) in parts.iter().enumerate() {
                let span = item.elem_span("ratio", i);
                let Some(id) = self.reference(metrics, name, "metric", span.clone()) else {
                    return metric;
                };
                if raw.metrics[id].value.ratio.is_some() {
                    self.push(
                        Diagnostic::error("E020", format!("`{name}` is itself a ratio"))
                            .at(span)
                            .hint(
                                "a ratio's numerator and denominator must be event metrics (count, sum, ...)",
                            ),
                    );
                    return metric;
                }
                ids[i] = id;
            }
            let (un, ud) = (event_units[ids[0]], event_units[ids[1]]);
            if let (Some(un), Some(ud)) = (un, ud)
                && un != ud
            {
                self.push(
                    Diagnostic::error("E013", "numerator and denominator count different units")
                        .at(item.value_span("ratio"))
                        .hint("both metrics of a ratio must be per the same unit"),
                );
            }
            metric.unit = un.unwrap_or(0);
            metric.kind = MetricKind::Ratio {
                numerator: ids[0],
                denominator: ids[1],
            };
            return metric;
        }

        let table = self
            .required(item, &v.events, "events", "a metric", "orders")
            .and_then(|t| self.reference(tables, t, "event table", item.value_span("events")));
        let aggregation = match v.per_unit.as_deref() {
            None => {
                self.push(
                    Diagnostic::error("E010", "a metric needs `per_unit` (or `ratio`)")
                        .at(Some(item.span()))
                        .hint("add `per_unit: count` (or sum, distinct, any, min, max, at_least)"),
                );
                None
            }
            Some("count") => Some(Aggregation::Count),
            Some("sum") => Some(Aggregation::Sum),
            Some("distinct") => Some(Aggregation::Distinct),
            Some("any") => Some(Aggregation::Any),
            Some("min") => Some(Aggregation::Min),
            Some("max") => Some(Aggregation::Max),
            Some("at_least") => match v.at_least {
                Some(n) if n >= 1 => Some(Aggregation::AtLeast(n)),
                _ => {
                    self.push(
                        Diagnostic::error("E010", "`per_unit: at_least` needs `at_least: N` (N >= 1)")
                            .at(item.value_span("at_least").or(item.value_span("per_unit")))
                            .hint("add `at_least: 5` for \"1 if the unit has at least 5 matching events\""),
                    );
                    None
                }
            },
            Some(other) => {
                let kinds = crate::load::syntax::PER_UNIT.iter().copied();
                let mut d = Diagnostic::error("E017", format!("unknown per_unit `{other}`"))
                    .at(item.value_span("per_unit"));
                d =
                    d.hint(did_you_mean(other, kinds).unwrap_or_else(|| {
                        format!("use one of: {}", crate::load::syntax::PER_UNIT.join(", "))
                    }));
                self.push(d);
                None
            }
        };
        if v.at_least.is_some() && !matches!(aggregation, Some(Aggregation::AtLeast(_)) | None) {
            self.push(
                Diagnostic::error("E017", "`at_least` only applies to `per_unit: at_least`")
                    .at(item.key_span("at_least"))
                    .hint("remove `at_least`, or set `per_unit: at_least`"),
            );
        }
        let value = match (aggregation, &v.of) {
            (Some(a), None) if a.needs_value() => {
                self.push(
                    Diagnostic::error("E010", "this per_unit needs `of`: the value to aggregate")
                        .at(item.value_span("per_unit"))
                        .hint("add e.g. `of: amount_cents / 100.0`"),
                );
                None
            }
            (Some(a), Some(_)) if !a.needs_value() => {
                self.push(
                    Diagnostic::error("E017", "`of` only applies to sum, distinct, min and max")
                        .at(item.key_span("of"))
                        .hint("count, any and at_least count matching events; filter them with `where`"),
                );
                None
            }
            (_, Some(text)) => self.fragment(item, "of", text).map(Box::new),
            _ => None,
        };
        let filter = v
            .where_
            .as_deref()
            .and_then(|w| self.fragment(item, "where", w))
            .map(Box::new);
        let window = self.window(item);
        if let Some(t) = table {
            metric.unit = out.event_tables[t].unit;
        }
        if let (Some(table), Some(aggregation), Some(window)) = (table, aggregation, window) {
            if cap.is_some() && matches!(aggregation, Aggregation::Any | Aggregation::AtLeast(_)) {
                self.push(
                    Diagnostic::error(
                        "E017",
                        "`winsorize` does not apply to 0/1 metrics (any, at_least)",
                    )
                    .at(item.key_span("winsorize"))
                    .hint("remove `winsorize`; a 0/1 value cannot be an outlier"),
                );
            }
            metric.kind = MetricKind::Events {
                table,
                aggregation,
                value,
                filter,
                window,
                cap,
            };
        }
        metric
    }

    fn experiment(
        &mut self,
        item: &Item<syntax::Experiment>,
        raw: &RawCatalog,
        logs: &Names,
        metrics: &Names,
        segments: &Names,
        out: &ir::Catalog,
    ) -> Option<ir::Experiment> {
        let v = &item.value;
        let name = v.name.clone().unwrap_or_default();
        let log_key = if v.exposure_log.is_none() && v.exposures.is_some() {
            "exposures"
        } else {
            "exposure_log"
        };
        let exposures = self
            .required(item, &v.log().cloned(), log_key, "an experiment", "assignments")
            .and_then(|l| self.reference(logs, l, "exposure log", item.value_span(log_key)));
        let control = self
            .required(item, &v.control, "control", "an experiment", "control")
            .map(str::to_string);

        // Labels are text as written: YAML reads `key: 1.10` or an arm `007` as a number, which
        // would reach the SQL as '1.1' and '7' and match nothing.
        let logged_key = if v.logged_as.is_none() && v.key.is_some() {
            "key"
        } else {
            "logged_as"
        };
        self.label_as_written(item, logged_key, v.logged().map(|k| k.0.as_str()));
        if let (Some(split), Some(node)) = (&v.split, item.node.get("split"))
            && let crate::load::yaml::NodeKind::Map(entries) = &node.kind
        {
            for ((written, range, _), (read, _)) in entries.iter().zip(&split.0) {
                if written != read {
                    self.push(number_label(
                        written,
                        read,
                        Span::new(item.file, range.clone()),
                        "an arm",
                    ));
                }
            }
        }

        // Split: positive shares, control among them, at least two arms.
        let mut arms = Vec::new();
        match &v.split {
            None => self.push(
                Diagnostic::error("E010", "an experiment is missing `split`")
                    .at(Some(item.span()))
                    .hint("add the planned shares, e.g. `split: {control: 50, treatment: 50}`"),
            ),
            Some(split) => {
                let total: f64 = split.0.iter().map(|(_, s)| *s).sum();
                if !total.is_finite() && split.0.iter().all(|(_, s)| s.is_finite()) {
                    // Each share is a number but their sum overflows: every normalised share
                    // would be 0 and the sample-ratio check would be skipped.
                    self.push(
                        Diagnostic::error("E018", "the shares in `split` add up to more than a number can hold")
                            .at(item.value_span("split"))
                            .hint("write shares as percentages or small weights, e.g. `split: {control: 50, treatment: 50}`"),
                    );
                }
                for (arm, share) in &split.0 {
                    if !(share.is_finite() && *share > 0.0) {
                        self.push(
                            Diagnostic::error("E018", format!("arm `{arm}` has share {share}"))
                                .at(item.nested_key_span("split", arm))
                                .hint("shares are positive numbers; they are normalised to sum to 1"),
                        );
                    }
                    arms.push(ir::Arm {
                        name: arm.clone(),
                        share: share / total,
                    });
                }
                if arms.len() < 2 {
                    self.push(
                        Diagnostic::error("E018", "an experiment needs at least two arms in `split`")
                            .at(item.value_span("split"))
                            .hint("e.g. `split: {control: 50, treatment: 50}`"),
                    );
                }
                if let Some(c) = &control {
                    match arms.iter().position(|a| &a.name == c) {
                        Some(i) => {
                            let arm = arms.remove(i);
                            arms.insert(0, arm);
                        }
                        None => {
                            let names: Vec<&str> = arms.iter().map(|a| a.name.as_str()).collect();
                            let mut d =
                                Diagnostic::error("E018", format!("control arm `{c}` is not in `split`"))
                                    .at(item.value_span("control"));
                            d = d.hint(
                                did_you_mean(c, names.iter().copied())
                                    .unwrap_or_else(|| format!("arms in split: {}", names.join(", "))),
                            );
                            self.push(d);
                        }
                    }
                }
            }
        }

        let mut ts = |key: &str, val: &Option<syntax::Scalar>| -> Option<Timestamp> {
            let Some(text) = val else {
                self.push(
                    Diagnostic::error("E010", format!("an experiment is missing `{key}`"))
                        .at(Some(item.span()))
                        .hint(format!("add `{key}: 2026-03-02T00:00:00Z` (UTC)")),
                );
                return None;
            };
            match Timestamp::parse(&text.0) {
                Ok(t) => Some(t),
                Err(msg) => {
                    self.push(Diagnostic::error("E015", msg).at(item.value_span(key)).hint(
                        "quote the value if your editor reformats it: start: \"2026-03-02T00:00:00Z\"",
                    ));
                    None
                }
            }
        };
        let start = ts("start", &v.start);
        let end = ts("end", &v.end);
        if let (Some(s), Some(e)) = (start, end)
            && e <= s
        {
            self.push(
                Diagnostic::error("E015", "the experiment ends before it starts")
                    .at(item.value_span("end"))
                    .hint("`end` is the data cut-off and must be after `start`"),
            );
        }

        let covariate_window = match &v.covariate_window {
            None => 0,
            Some(text) => match parse_duration(&text.0) {
                Ok(s) if s >= 0 => s,
                Ok(_) => {
                    self.push(
                        Diagnostic::error("E014", "`covariate_window` is a length and cannot be negative")
                            .at(item.value_span("covariate_window"))
                            .hint("write e.g. `covariate_window: 14d` for the 14 days before exposure, or `0d` for none"),
                    );
                    0
                }
                Err(msg) => {
                    self.push(
                        Diagnostic::error("E014", msg)
                            .at(item.value_span("covariate_window"))
                            .hint("write e.g. `covariate_window: 14d`"),
                    );
                    0
                }
            },
        };

        let exposure_unit = exposures.map(|l| out.exposure_logs[l].unit);
        let mut roles = Vec::new();
        for (key, role) in [
            ("primary", Role::Primary),
            ("secondary", Role::Secondary),
            ("guardrails", Role::Guardrail),
        ] {
            let list = match key {
                "primary" => &v.primary,
                "secondary" => &v.secondary,
                _ => &v.guardrails,
            };
            for (i, m) in list.iter().flatten().enumerate() {
                let span = item.elem_span(key, i);
                let Some(id) = self.reference(metrics, m, "metric", span.clone()) else {
                    continue;
                };
                if let Some(u) = exposure_unit
                    && out.metrics[id].unit != u
                    && raw.metrics[id].value.events.is_some() | raw.metrics[id].value.ratio.is_some()
                {
                    let mu = &out.units[out.metrics[id].unit].name;
                    let eu = &out.units[u].name;
                    self.push(
                        Diagnostic::error(
                            "E013",
                            format!("metric `{m}` is per {mu}, but this experiment randomises {eu}s"),
                        )
                        .at(span.clone())
                        .hint(format!(
                            "use a metric whose event table has `unit: {eu}`, or an exposure log of {mu}s"
                        )),
                    );
                    continue;
                }
                if roles.iter().any(|(r, _)| *r == id) {
                    self.push(
                        Diagnostic::error("E011", format!("metric `{m}` is listed twice in this experiment"))
                            .at(span)
                            .hint("a metric has one role: primary, secondary or guardrail"),
                    );
                    continue;
                }
                roles.push((id, role));
            }
        }
        let mut segment_ids = Vec::new();
        for (i, s) in v.segments.iter().flatten().enumerate() {
            if let Some(id) = self.reference(segments, s, "segment", item.elem_span("segments", i)) {
                segment_ids.push(id);
            }
        }
        let key = v.logged().map(|k| k.0.clone()).unwrap_or_else(|| name.clone());
        let mde = v
            .mde
            .as_ref()
            .and_then(|m| self.mde(item.value_span("mde"), &m.0));
        Some(ir::Experiment {
            name,
            description: v.description.clone(),
            exposures: exposures?,
            key,
            control: control?,
            arms,
            start: start?,
            end: end?,
            metrics: roles,
            covariate_window,
            segments: segment_ids,
            mde,
        })
    }
}

/// A label YAML read as a number: refused, with the quoted spelling to write instead.
fn number_label(written: &str, read: &str, span: Span, what: &str) -> Diagnostic {
    Diagnostic::error(
        "E004",
        format!("`{written}` is {what}'s label, but YAML reads it as the number {read}"),
    )
    .at(Some(span))
    .hint(format!("quote it to keep the text as written: \"{written}\""))
}

fn suggest_snake(name: &str) -> String {
    let mut out = String::new();
    for (i, c) in name.chars().enumerate() {
        if c.is_ascii_uppercase() && i > 0 && !out.ends_with('_') {
            out.push('_');
        }
        if c.is_ascii_alphanumeric() {
            out.push(c.to_ascii_lowercase());
        } else if !out.ends_with('_') {
            out.push('_');
        }
    }
    let out = out.trim_matches('_').to_string();
    if out.starts_with(|c: char| c.is_ascii_digit()) || out.is_empty() {
        format!("m_{out}")
    } else {
        out
    }
}
