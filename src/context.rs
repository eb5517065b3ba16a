//! The context of one command: a workspace opened once, and everything asked of it.
//!
//! Every command opens one [`Context`] and asks it for what it needs: an experiment by name
//! (with did-you-mean), a dialect (built in or from `--dialects-dir`, loaded once), a compiled
//! readout or report, a readout computed on the engine. No command wires the stages itself.
//! The engine (local DuckDB or a PostgreSQL server) is opened lazily, at most once: for a
//! local workspace it is the very DuckDB that read the local tables' schemas for the column
//! checks, so a command opens DuckDB once however many queries it runs.

use crate::diagnostics::{Diagnostic, did_you_mean};
use crate::error::{Error, Result};
use crate::execute::{self, Engine, NamedRow};
use crate::ir::{Catalog, ExperimentId, ExposureLogId, MetricId, SegmentId};
use crate::plan::{ExperimentPlan, ReportPlan};
use crate::render::Dialect;
use crate::source::SourceMap;
use crate::stats::readout::Readout;
use crate::time::Timestamp;
use crate::workspace::{self, Opened, Schemas, Workspace};
use crate::{ReadoutOptions, compile};
use std::cell::RefCell;
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::rc::Rc;

/// Where a context's queries run.
pub enum EngineChoice {
    /// The embedded DuckDB over the workspace's `local:` data.
    Local,
    /// A PostgreSQL server (connection settings already completed by the caller).
    #[cfg(feature = "postgres")]
    Postgres(Box<postgres::Config>),
    /// A command-line client (a named engine with `command:`).
    Command(Box<crate::engines::CommandSpec>),
    /// `--engine NAME`: one of plumb.yaml's `engines:`, resolved when the context opens.
    Named(String),
    /// No `--engine`: plumb.yaml's `default_engine:`, else the local DuckDB.
    Default,
}

impl EngineChoice {
    /// Who will compute the numbers, for messages.
    pub fn describe(&self) -> String {
        match self {
            EngineChoice::Local => "local DuckDB".into(),
            #[cfg(feature = "postgres")]
            EngineChoice::Postgres(_) => "PostgreSQL".into(),
            EngineChoice::Command(c) => {
                format!("engine `{}` ({}, {} dialect)", c.name, c.argv[0], c.dialect)
            }
            EngineChoice::Named(n) => format!("engine `{n}`"),
            EngineChoice::Default => "the default engine".into(),
        }
    }

    /// The dialect the engine speaks (known before connecting).
    pub fn dialect(&self) -> &str {
        match self {
            EngineChoice::Local | EngineChoice::Named(_) | EngineChoice::Default => "duckdb",
            #[cfg(feature = "postgres")]
            EngineChoice::Postgres(_) => "postgres",
            EngineChoice::Command(c) => &c.dialect,
        }
    }

    /// A named engine or the default one, looked up in `engines`; `url` turns a `url:` engine
    /// into a connection (the command line completes it from the environment).
    fn resolve(self, engines: &crate::engines::Engines, url: UrlEngine) -> Result<EngineChoice> {
        use crate::engines::EngineSpec;
        let name = match self {
            EngineChoice::Named(n) => n,
            EngineChoice::Default => match &engines.default {
                Some(n) => n.clone(),
                None => return Ok(EngineChoice::Local),
            },
            other => return Ok(other),
        };
        match engines.get(&name) {
            Some(EngineSpec::Duckdb) => Ok(EngineChoice::Local),
            Some(EngineSpec::Url { url: u, .. }) => url(u),
            Some(EngineSpec::Command(c)) => Ok(EngineChoice::Command(Box::new(c.clone()))),
            None if name == "local" => Ok(EngineChoice::Local),
            None => {
                let names: Vec<&str> = engines.named.iter().map(|(n, _)| n.as_str()).collect();
                let hint = did_you_mean(&name, names.iter().copied()).unwrap_or_else(|| {
                    if names.is_empty() {
                        "plumb.yaml declares no `engines:`; `local` is the local DuckDB, and --engine also takes a postgres:// URL".into()
                    } else {
                        format!("engines in plumb.yaml: {} (and `local`)", names.join(", "))
                    }
                });
                Err(Error::usage(format!("unknown engine `{name}`; {hint}")))
            }
        }
    }
}

/// Turns a PostgreSQL URL into an engine choice.
pub type UrlEngine = fn(&str) -> Result<EngineChoice>;

/// The URL as written, without the environment (the command line passes its own).
fn url_as_written(url: &str) -> Result<EngineChoice> {
    #[cfg(feature = "postgres")]
    {
        let config: postgres::Config = url.parse().map_err(|e| {
            Error::usage(format!(
                "not a PostgreSQL URL ({e}); write postgres://USER@HOST:PORT/DB"
            ))
        })?;
        Ok(EngineChoice::Postgres(Box::new(config)))
    }
    #[cfg(not(feature = "postgres"))]
    {
        let _ = url;
        Err(Error::usage(
            "this plumb was built without the `postgres` feature",
        ))
    }
}

/// How to open a context.
pub struct Options {
    /// Extra dialect folders, searched before the built-in ones.
    pub dialects_dir: Option<PathBuf>,
    pub engine: EngineChoice,
    /// Where the local engine spills when `local.temp_directory` is not set.
    pub spill_dir: Option<PathBuf>,
    /// How a named engine's `url:` becomes a connection.
    pub url_engine: UrlEngine,
}

impl Default for Options {
    fn default() -> Self {
        Options {
            dialects_dir: None,
            engine: EngineChoice::Local,
            spill_dir: None,
            url_engine: url_as_written,
        }
    }
}

/// A per-unit mean and spread measured over a past window (`plumb power`).
#[derive(Debug, Clone, Copy)]
pub struct History {
    /// Units first exposed in the window.
    pub units: u64,
    /// Units with a value of the metric.
    pub n: u64,
    pub mean: f64,
    pub sd: f64,
}

/// One command's workspace, dialects and engine.
pub struct Context {
    workspace: Workspace,
    sources: SourceMap,
    warnings: Vec<Diagnostic>,
    dialects_dir: Option<PathBuf>,
    dialects: RefCell<BTreeMap<String, Rc<Dialect>>>,
    choice: EngineChoice,
    engine: RefCell<Option<Box<dyn Engine>>>,
    /// Told about each step that may take a while (a query), for a status line.
    progress: RefCell<Option<ProgressFn>>,
}

/// The progress callback of a [`Context`].
type ProgressFn = Box<dyn FnMut(&str)>;

impl Context {
    /// Calls `f` with a short description before each step that may take a while (each query
    /// the context runs). The library never prints; the command line shows these on stderr.
    pub fn on_progress(&self, f: impl FnMut(&str) + 'static) {
        *self.progress.borrow_mut() = Some(Box::new(f));
    }

    /// Who computes the numbers: `local DuckDB`, `PostgreSQL`, `engine \`spark\` (...)`.
    pub fn engine_name(&self) -> String {
        self.choice.describe()
    }

    /// The engine the context runs on.
    pub fn engine_choice(&self) -> &EngineChoice {
        &self.choice
    }

    /// Reports a step to the progress callback, if any.
    pub fn step(&self, what: &str) {
        if let Some(f) = self.progress.borrow_mut().as_mut() {
            f(what);
        }
    }

    /// Loads and resolves the workspace in `dir` (catalog errors: [`crate::ErrorKind::Catalog`]).
    pub fn open(dir: &Path, mut options: Options) -> Result<Context> {
        let mut sources = SourceMap::new();
        let mut loaded = crate::timing::stage("load workspace", || workspace::load(dir, &mut sources))?;
        // A named engine is looked up now; when plumb.yaml itself has errors, they are what
        // the user needs to see, so the lookup waits for them to be fixed.
        let choice = std::mem::replace(&mut options.engine, EngineChoice::Local);
        options.engine = match choice.resolve(&loaded.engines, options.url_engine) {
            Ok(c) => c,
            Err(_) if loaded.diagnostics.iter().any(Diagnostic::is_error) => EngineChoice::Local,
            Err(e) => return Err(e),
        };
        if loaded.local.settings.temp_directory.is_none() {
            loaded.local.settings.temp_directory = options.spill_dir.clone();
        }
        let mut engine: Option<Box<dyn Engine>> = None;
        let schemas = match crate::timing::stage("open engine, read schemas", || {
            local_schemas(&loaded.local, &options.engine, &mut engine)
        }) {
            Ok(s) => s,
            Err(e) => {
                loaded
                    .diagnostics
                    .push(workspace::unreadable_local_data(&loaded.raw_ws, &e));
                Schemas::new()
            }
        };
        match crate::timing::stage("resolve", || loaded.resolve(&sources, &schemas)) {
            Opened::Invalid(diags) => Err(Error::catalog(sources, diags)),
            Opened::Ok(ws, mut warnings) => {
                // The local data's types, bound item by item (see `probe`); its errors fail the
                // open, its warnings join the lint warnings.
                if let Some(binder) = engine.as_deref().and_then(|e| e.binder()) {
                    let dialect = Dialect::load("duckdb", options.dialects_dir.as_deref())?;
                    let tables: Vec<String> = schemas.keys().cloned().collect();
                    let found = crate::timing::stage("probe local data", || {
                        crate::probe::probe(&ws, &dialect, binder, tables)
                    });
                    let failed = found.iter().any(Diagnostic::is_error);
                    warnings.extend(found);
                    if failed {
                        return Err(Error::catalog(sources, warnings));
                    }
                }
                Ok(Context {
                    workspace: *ws,
                    sources,
                    warnings,
                    dialects_dir: options.dialects_dir,
                    dialects: RefCell::new(BTreeMap::new()),
                    choice: options.engine,
                    engine: RefCell::new(engine),
                    progress: RefCell::new(None),
                })
            }
        }
    }

    pub fn workspace(&self) -> &Workspace {
        &self.workspace
    }

    pub fn catalog(&self) -> &Catalog {
        &self.workspace.catalog
    }

    pub fn sources(&self) -> &SourceMap {
        &self.sources
    }

    /// Lint and workspace warnings (the catalog resolved without errors).
    pub fn warnings(&self) -> &[Diagnostic] {
        &self.warnings
    }

    pub fn dialects_dir(&self) -> Option<&Path> {
        self.dialects_dir.as_deref()
    }

    /// The experiment called `name`, or a usage error with a did-you-mean hint.
    pub fn experiment(&self, name: &str) -> Result<ExperimentId> {
        let names = self.catalog().experiments.iter().map(|e| e.name.as_str());
        self.catalog()
            .experiment(name)
            .ok_or_else(|| unknown("experiment", "experiments", name, names))
    }

    pub fn metric(&self, name: &str) -> Result<MetricId> {
        let names = self.catalog().metrics.iter().map(|m| m.name.as_str());
        self.catalog()
            .metric(name)
            .ok_or_else(|| unknown("metric", "metrics", name, names))
    }

    pub fn segments(&self, names: &[String]) -> Result<Vec<SegmentId>> {
        let c = self.catalog();
        names
            .iter()
            .map(|name| {
                c.segments.iter().position(|s| &s.name == name).ok_or_else(|| {
                    unknown(
                        "segment",
                        "segments",
                        name,
                        c.segments.iter().map(|s| s.name.as_str()),
                    )
                })
            })
            .collect()
    }

    pub fn exposure_log(&self, name: &str) -> Result<ExposureLogId> {
        let c = self.catalog();
        c.exposure_logs
            .iter()
            .position(|l| l.name == name)
            .ok_or_else(|| {
                unknown(
                    "exposure log",
                    "exposure logs",
                    name,
                    c.exposure_logs.iter().map(|l| l.name.as_str()),
                )
            })
    }

    /// Dialect `name` (None: the workspace's), loaded once per context.
    pub fn dialect(&self, name: Option<&str>) -> Result<Rc<Dialect>> {
        let name = name.unwrap_or(&self.workspace.dialect).to_string();
        if let Some(d) = self.dialects.borrow().get(&name) {
            return Ok(d.clone());
        }
        let d = Rc::new(Dialect::load(&name, self.dialects_dir.as_deref())?);
        self.dialects.borrow_mut().insert(name, d.clone());
        Ok(d)
    }

    /// The dialect of the context's engine.
    pub fn engine_dialect(&self) -> Result<Rc<Dialect>> {
        self.dialect(Some(self.choice.dialect()))
    }

    /// The readout query of `experiment` (plus segments `by`) in `dialect`.
    pub fn compile_readout(
        &self,
        experiment: ExperimentId,
        by: &[SegmentId],
        dialect: &Dialect,
    ) -> Result<(ExperimentPlan, String)> {
        self.check_grouping_sets(experiment, dialect)?;
        compile::compile_experiment(self.catalog(), experiment, by, dialect)
    }

    /// A report query in `dialect`.
    pub fn compile_report(&self, plan: &ReportPlan, dialect: &Dialect) -> Result<String> {
        compile::compile_report(plan, dialect)
    }

    /// Segments need GROUPING SETS: a located catalog error when the experiment declares them.
    fn check_grouping_sets(&self, experiment: ExperimentId, dialect: &Dialect) -> Result<()> {
        if dialect.caps.grouping_sets {
            return Ok(());
        }
        let exp = &self.catalog().experiments[experiment];
        if exp.segments.is_empty() {
            return Ok(());
        }
        let span = self
            .workspace
            .raw
            .experiments
            .iter()
            .find(|e| e.value.name.as_deref() == Some(exp.name.as_str()))
            .and_then(|e| e.key_span("segments"));
        let diag = Diagnostic::error(
            "E017",
            format!(
                "experiment `{}` declares segments, but dialect {} has no GROUPING SETS",
                exp.name, dialect.caps.name
            ),
        )
        .at(span)
        .hint("segments are computed in one statement with GROUPING SETS: use a dialect with `grouping_sets: true`, or remove `segments:`");
        Err(Error::catalog(self.sources.clone(), vec![diag]))
    }

    /// Runs `sql` on the context's engine, opening it on first use.
    pub fn query(&self, sql: &str) -> Result<Vec<NamedRow>> {
        self.with_engine(|e| e.query(sql))
    }

    /// Runs the readout statement of `plan` (see [`Engine::readout`]).
    pub fn query_readout(&self, plan: &ExperimentPlan, sql: &str) -> Result<Vec<NamedRow>> {
        self.with_engine(|e| e.readout(plan, sql))
    }

    fn with_engine<T>(&self, f: impl FnOnce(&mut dyn Engine) -> Result<T>) -> Result<T> {
        let mut slot = self.engine.borrow_mut();
        if slot.is_none() {
            *slot = Some(open_engine(&self.choice, &self.workspace)?);
        }
        f(slot.as_mut().expect("opened above").as_mut())
    }

    /// The readout of `experiment` computed on the context's engine.
    pub fn readout(
        &self,
        experiment: ExperimentId,
        by: &[SegmentId],
        options: ReadoutOptions,
    ) -> Result<Readout> {
        self.check_grouping_sets(experiment, &*self.engine_dialect()?)?;
        self.readout_of(self.catalog(), experiment, by, options)
    }

    /// The readout of an experiment of `catalog` (e.g. another revision's, for `diff --data`),
    /// computed on this context's engine and data.
    pub fn readout_of(
        &self,
        catalog: &Catalog,
        experiment: ExperimentId,
        by: &[SegmentId],
        options: ReadoutOptions,
    ) -> Result<Readout> {
        let dialect = self.engine_dialect()?;
        let (plan, sql) = compile::compile_experiment(catalog, experiment, by, &dialect)?;
        if plan.metrics.len() > options.max_metrics {
            return Err(Error::usage(format!(
                "experiment `{}` has {} metrics; plumb computes at most {} metrics of one readout on an engine, because the readout is one statement whose per-unit table grows with units x metrics (measured locally: 500 metrics on 36,000 units took 6.7 GB, 2,000 ran out of memory). Split the metric lists into several experiments' readouts, raise the limit with --max-metrics if the engine has the memory, or run the statement from `plumb sql` in the warehouse and read it back with `analyze --stats FILE`",
                plan.experiment,
                plan.metrics.len(),
                options.max_metrics
            )));
        }
        self.step(&format!(
            "{}: readout query ({} metrics) on {}",
            plan.experiment,
            plan.metrics.len(),
            self.choice.describe()
        ));
        let rows = crate::timing::stage("readout query", || self.query_readout(&plan, &sql))?;
        let table = execute::stats_table(&plan, &rows)?;
        check_segment_sizes(&table, options.max_segment_values)?;
        let spec = compile::readout_spec(catalog, experiment, &plan, options);
        let mut readout = crate::stats::readout::build(&spec, &table);
        readout.computed_on = Some(self.engine_name());
        self.add_daily_sample_ratio(&plan, &dialect, &mut readout)?;
        if options.population_impact {
            self.add_population_impact(catalog, experiment, &table, &dialect, &mut readout)?;
        }
        Ok(readout)
    }

    /// The readout from a statistics table exported from a warehouse (`analyze --stats FILE`),
    /// checked against the fingerprint of the query this catalog compiles to.
    pub fn readout_from_stats_file(
        &self,
        experiment: ExperimentId,
        file: &Path,
        options: ReadoutOptions,
    ) -> Result<Readout> {
        let plan = crate::plan::plan_experiment(self.catalog(), experiment, &[]);
        let rows = execute::read_stats_file(file)?;
        execute::check_fingerprint(&plan, &rows)?;
        let table = execute::stats_table(&plan, &rows)?;
        check_segment_sizes(&table, options.max_segment_values)?;
        let spec = compile::readout_spec(self.catalog(), experiment, &plan, options);
        let mut readout = crate::stats::readout::build(&spec, &table);
        let name = file.file_name().map_or_else(
            || file.display().to_string(),
            |n| n.to_string_lossy().into_owned(),
        );
        readout.computed_on = Some(format!("statistics file {name}"));
        Ok(readout)
    }

    /// The per-day sample-ratio check: one small query over the exposure log (arms per day of
    /// first exposure, under the readout's exposure rules).
    fn add_daily_sample_ratio(
        &self,
        plan: &ExperimentPlan,
        dialect: &Dialect,
        readout: &mut Readout,
    ) -> Result<()> {
        let sql = dialect.render_daily(plan)?;
        self.step(&format!("{}: arms per day", plan.experiment));
        let rows = crate::timing::stage("daily arms query", || self.query(&sql))?;
        let text = |c: Option<&execute::Cell>| match c {
            Some(execute::Cell::Text(t)) => Some(t.clone()),
            Some(execute::Cell::Number(x)) => Some(x.to_string()),
            _ => None,
        };
        let mut days: Vec<(String, BTreeMap<String, u64>)> = Vec::new();
        for row in &rows {
            let get = |k: &str| {
                row.iter()
                    .find(|(name, _)| name.eq_ignore_ascii_case(k))
                    .map(|(_, v)| v)
            };
            let units = execute::cell_number(get("units"))
                .map_err(|e| Error::data(format!("the per-day arms query returned units {e}")))?;
            if get("exposure_day").is_none() || get("arm").is_none() || get("units").is_none() {
                return Err(Error::data(
                    "the per-day arms query returned no exposure_day, arm or units column",
                ));
            }
            let (Some(day), Some(arm), Some(n)) = (text(get("exposure_day")), text(get("arm")), units) else {
                continue;
            };
            let n = &n;
            // `2026-03-02 00:00:00` (or with a zone) is shown as its date.
            let day = if day.len() >= 10 && day.as_bytes()[4] == b'-' {
                day[..10].to_string()
            } else {
                day
            };
            match days.last_mut() {
                Some((d, counts)) if *d == day => {
                    counts.insert(arm, *n as u64);
                }
                _ => days.push((day, BTreeMap::from([(arm, *n as u64)]))),
            }
        }
        crate::stats::readout::add_daily_sample_ratio(readout, &days);
        Ok(())
    }

    /// Whole-population impact: the totals of the experiment's count and sum metrics over the
    /// whole population in the experiment's period (one cheap aggregate per event table, no
    /// grouping by unit), per day, beside the effect per unit times the triggered units per day.
    fn add_population_impact(
        &self,
        catalog: &Catalog,
        experiment: ExperimentId,
        table: &crate::stats::readout::StatsTable,
        dialect: &Dialect,
        readout: &mut Readout,
    ) -> Result<()> {
        let exp = &catalog.experiments[experiment];
        let metric_ids: Vec<MetricId> = exp.metrics.iter().map(|(m, _)| *m).collect();
        let plan = crate::plan::plan_totals(catalog, &metric_ids, exp.start, exp.end);
        if plan.metrics.is_empty() {
            return Ok(());
        }
        let days = (exp.end.0 - exp.start.0) as f64 / 86_400.0;
        let sql = compile::compile_totals(&plan, dialect)?;
        self.step(&format!("{}: population totals for the impact", exp.name));
        let rows = crate::timing::stage("population totals query", || self.query(&sql))?;
        let [row] = rows.as_slice() else {
            return Err(Error::data(format!(
                "the totals query returned {} rows, not 1",
                rows.len()
            )));
        };
        let row: BTreeMap<String, execute::Cell> = row
            .iter()
            .map(|(k, v)| (k.to_ascii_lowercase(), v.clone()))
            .collect();
        let mut population = BTreeMap::new();
        for (metric, _, column) in &plan.metrics {
            let total = match row.get(&column.to_ascii_lowercase()) {
                None => {
                    return Err(Error::data(format!(
                        "the totals query returned no total of `{metric}`"
                    )));
                }
                // No event in the period (NULL): the total is zero.
                cell => execute::cell_number(cell)
                    .map_err(|e| Error::data(format!("the total of `{metric}`: {e}")))?
                    .unwrap_or(0.0),
            };
            population.insert(metric.clone(), total / days);
        }
        let triggered = table
            .rows
            .iter()
            .filter(|r| r.segment.is_none())
            .map(|r| r.units)
            .sum::<u64>() as f64
            / days;
        crate::stats::readout::add_population_impact(readout, triggered, &population);
        Ok(())
    }

    /// A report computed on the context's engine.
    pub fn report(&self, plan: &ReportPlan) -> Result<Vec<crate::report::ReportRow>> {
        let sql = compile::compile_report(plan, &*self.engine_dialect()?)?;
        self.step("report query");
        crate::report::assemble(plan, &self.query(&sql)?)
    }

    /// The first and last exposure time in exposure log `log` (any experiment), on any
    /// engine; `None` for an empty log. Locally as seconds since the epoch; elsewhere `min` /
    /// `max` of the column as the engine prints it (UTC sessions), read back as timestamps.
    pub fn exposure_span(&self, log: ExposureLogId) -> Result<Option<(Timestamp, Timestamp)>> {
        let dialect = self.engine_dialect()?;
        let l = &self.catalog().exposure_logs[log];
        let time = format!("t.{}", dialect.ident(&l.time));
        let sql = if matches!(self.choice, EngineChoice::Local) {
            format!(
                "SELECT CAST(floor(epoch(min({time}))) AS DOUBLE) AS first, CAST(floor(epoch(max({time}))) AS DOUBLE) AS last FROM {} AS t",
                dialect.source(&l.source)
            )
        } else {
            format!(
                "SELECT min({time}) AS first, max({time}) AS last FROM {} AS t",
                dialect.source(&l.source)
            )
        };
        self.step("exposure log span");
        let rows = self.query(&sql)?;
        let get = |k: &str| -> Result<Option<Timestamp>> {
            let cell = rows
                .first()
                .and_then(|r| r.iter().find(|(n, _)| n.eq_ignore_ascii_case(k)).map(|(_, v)| v));
            match cell {
                Some(execute::Cell::Number(x)) if x.is_finite() => Ok(Some(Timestamp(*x as i64))),
                Some(execute::Cell::Text(t)) => engine_time(t).map(Some).ok_or_else(|| {
                    Error::data(format!("the exposure log's {k} time `{t}` is not a timestamp"))
                }),
                _ => Ok(None),
            }
        };
        Ok(get("first")?.zip(get("last")?))
    }

    /// The per-unit mean and sd of `metric` over units of exposure log `log` first exposed in
    /// `[start, end)`, from the readout SQL of a one-arm history plan (`plan::plan_history`).
    pub fn history(
        &self,
        metric: MetricId,
        log: ExposureLogId,
        start: Timestamp,
        end: Timestamp,
    ) -> Result<History> {
        let plan = crate::plan::plan_history(self.catalog(), metric, log, start, end);
        let sql = compile::compile_plan(&plan, &*self.engine_dialect()?)?;
        self.step("history query");
        let table = execute::stats_table(&plan, &self.query_readout(&plan, &sql)?)?;
        let row = table
            .rows
            .iter()
            .find(|r| r.arm == crate::plan::HISTORY_ARM)
            .ok_or_else(|| {
                Error::data(format!(
                    "no exposed units between {} and {}",
                    start.to_iso(),
                    end.to_iso()
                ))
            })?;
        let (mean, sd, n) = match &plan.metrics[0].kind {
            crate::plan::PlannedKind::Mean { column } => {
                let m = row.columns[column];
                (m.mean, m.sd(), m.n)
            }
            crate::plan::PlannedKind::Ratio {
                numerator,
                denominator,
            } => {
                let r = crate::stats::RatioMoments {
                    numerator: row.columns[numerator],
                    denominator: row.columns[denominator],
                    cov: row.covariances[&crate::columns::covariance(numerator, denominator)],
                };
                (
                    r.ratio(),
                    (r.var_of_ratio() * r.numerator.n as f64).sqrt(),
                    r.numerator.n,
                )
            }
        };
        Ok(History {
            units: row.units,
            n,
            mean,
            sd,
        })
    }
}

/// A timestamp as engines print one: `2026-03-02 08:12:33[.123456][+00]`, fractions of a
/// second dropped (the span is used in whole days).
fn engine_time(text: &str) -> Option<Timestamp> {
    let t = text.trim();
    let t = match t.get(19..).filter(|rest| rest.starts_with('.')) {
        Some(rest) => {
            let digits = rest[1..].bytes().take_while(u8::is_ascii_digit).count();
            format!("{}{}", &t[..19], &rest[1 + digits..])
        }
        None => t.to_string(),
    };
    Timestamp::parse(t.trim_end_matches(" UTC")).ok()
}

/// A usage error for an unknown name, with a did-you-mean hint or the list of names.
fn unknown<'a>(kind: &str, plural: &str, name: &str, names: impl Iterator<Item = &'a str>) -> Error {
    let names: Vec<&str> = names.collect();
    let hint = did_you_mean(name, names.iter().copied())
        .unwrap_or_else(|| format!("{plural} in this catalog: {}", names.join(", ")));
    Error::usage(format!("unknown {kind} `{name}`; {hint}"))
}

/// Schemas of the local tables. When every declared file exists and the context runs locally,
/// the DuckDB that reads them is kept as the context's engine.
fn local_schemas(
    local: &workspace::LocalData,
    choice: &EngineChoice,
    engine: &mut Option<Box<dyn Engine>>,
) -> Result<Schemas> {
    #[cfg(feature = "engine")]
    if !local.is_empty() && local.complete() && matches!(choice, EngineChoice::Local) {
        let duck = execute::duckdb::LocalEngine::open_with(
            local.database.as_deref(),
            &local.tables,
            &local.settings.checked(),
        )?;
        let schemas = duck.schemas()?;
        *engine = Some(Box::new(duck));
        return Ok(schemas);
    }
    let _ = (choice, &engine);
    workspace::local_schemas(&local.present())
}

/// Stops before the statistics when a segment has more values than `max` (counted over every
/// arm), naming the segment and its size.
fn check_segment_sizes(table: &crate::stats::readout::StatsTable, max: usize) -> Result<()> {
    let mut values: BTreeMap<&str, std::collections::BTreeSet<Option<&str>>> = BTreeMap::new();
    for row in &table.rows {
        if let Some((name, value)) = &row.segment {
            values.entry(name).or_default().insert(value.as_deref());
        }
    }
    match values.iter().find(|(_, v)| v.len() > max) {
        Some((name, v)) => Err(Error::data(format!(
            "segment `{name}` has {} values in this readout, more than the limit of {max}: a segment with that many values is usually an id rather than a grouping; slice by a coarser attribute, or raise the limit with --max-segment-values",
            v.len()
        ))),
        None => Ok(()),
    }
}

fn open_engine(choice: &EngineChoice, ws: &Workspace) -> Result<Box<dyn Engine>> {
    match choice {
        #[cfg(feature = "engine")]
        EngineChoice::Local => Ok(Box::new(execute::duckdb::LocalEngine::open_with(
            ws.local_database.as_deref(),
            &ws.local_tables,
            &ws.local_settings,
        )?)),
        #[cfg(not(feature = "engine"))]
        EngineChoice::Local => {
            let _ = ws;
            Err(Error::usage(
                "this plumb was built without the `engine` feature, so it cannot run SQL locally",
            ))
        }
        #[cfg(feature = "postgres")]
        EngineChoice::Postgres(config) => Ok(Box::new(execute::postgres::PostgresEngine::connect(config)?)),
        EngineChoice::Command(spec) => Ok(Box::new(execute::command::CommandEngine::new((**spec).clone()))),
        EngineChoice::Named(_) | EngineChoice::Default => Err(Error::bug("an engine name was not resolved")),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn engine_times_read_as_engines_print_them() {
        let want = Timestamp::parse("2026-03-02T08:12:33Z").unwrap();
        for t in [
            "2026-03-02 08:12:33",
            "2026-03-02 08:12:33.123456",
            "2026-03-02 08:12:33+00",
            "2026-03-02 08:12:33.5+00",
            "2026-03-02T08:12:33Z",
        ] {
            assert_eq!(engine_time(t), Some(want), "{t}");
        }
        assert_eq!(engine_time("yesterday"), None);
    }
}
