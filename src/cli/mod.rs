//! The command line: raw arguments (clap) -> resolved settings -> one pipeline run -> exit code.
//!
//! The only module that prints, reads the environment or decides exit codes:
//! 0 success, 1 catalog errors (diagnostics printed), 2 usage or internal errors, 3 a readout
//! that must not be acted on (sample-ratio mismatch or a failed guardrail).
//! Output to a closed pipe (`plumb sql ... | head`) ends quietly.

use crate::diagnostics::{self, Diagnostic, did_you_mean};
use crate::render::Dialect;
use crate::source::SourceMap;
use crate::workspace::{self, Opened, Workspace};
use clap::{Parser, Subcommand, ValueEnum};
use std::io::Write;
use std::path::{Path, PathBuf};
use std::process::ExitCode;

/// Exit code: catalog errors.
pub const EXIT_CATALOG: u8 = 1;
/// Exit code: the readout is void (sample-ratio mismatch) or a guardrail failed.
pub const EXIT_CHECKS: u8 = 3;
/// Exit code (`plumb diff`): definitions changed.
pub const EXIT_DEFINITIONS_CHANGED: u8 = 4;
/// Exit code (`plumb diff --fail-on-verdict-change`): a readout verdict changed.
pub const EXIT_VERDICT_CHANGED: u8 = 5;
/// Exit code: usage errors (bad flags, unknown experiment, missing workspace) and internal errors.
pub const EXIT_USAGE: u8 = 2;

#[derive(Debug, Parser)]
#[command(
    name = "plumb",
    version,
    about = "Metric definitions declared once in YAML, compiled to warehouse SQL, analysed as experiment readouts."
)]
pub struct Args {
    /// Workspace folder (holding plumb.yaml); default: the current folder.
    #[arg(long, global = true, value_name = "DIR")]
    pub workspace: Option<PathBuf>,
    /// Extra dialect folders, searched before the built-in ones.
    #[arg(long, global = true, value_name = "DIR")]
    pub dialects_dir: Option<PathBuf>,
    #[command(subcommand)]
    pub command: Command,
}

#[derive(Debug, Clone, Copy, ValueEnum, PartialEq, Eq)]
pub enum Format {
    Table,
    Json,
}

#[derive(Debug, Clone, Copy, ValueEnum, PartialEq, Eq)]
pub enum DiffFormat {
    Table,
    Markdown,
    Json,
}

#[derive(Debug, Clone, Copy, ValueEnum, PartialEq, Eq)]
pub enum ReportFormat {
    Table,
    Json,
    Csv,
}

#[derive(Debug, Clone, Copy, ValueEnum, PartialEq, Eq)]
pub enum GrainArg {
    Hour,
    Day,
    Week,
    Month,
}

/// Periods and population of a report.
#[derive(Debug, clap::Args)]
pub struct ReportWindow {
    #[arg(long, value_enum, default_value = "day")]
    pub grain: GrainArg,
    /// First day (or timestamp) of the report, UTC.
    #[arg(long)]
    pub from: Option<String>,
    /// End of the report (excluded), UTC.
    #[arg(long)]
    pub to: Option<String>,
    /// Only the units exposed in this experiment, with metric windows from first exposure.
    #[arg(long, value_name = "EXPERIMENT")]
    pub exposed_in: Option<String>,
}

#[derive(Debug, Subcommand)]
pub enum Command {
    /// Check the workspace: load, resolve and compile every experiment.
    Check {
        #[arg(long, value_enum, default_value = "table")]
        format: Format,
        /// `--deny warnings`: lint warnings fail the check (exit code 1), for CI.
        #[arg(long, value_parser = ["warnings"], value_name = "warnings")]
        deny: Option<String>,
    },
    /// Print the readout SQL of an experiment (or, with --report, a report's SQL).
    Sql {
        /// The experiment (omit with --report).
        #[arg(required_unless_present = "report")]
        experiment: Option<String>,
        /// Print the report query of these metrics instead (comma-separated).
        #[arg(long, value_delimiter = ',', value_name = "METRIC,...")]
        report: Vec<String>,
        #[command(flatten)]
        window: ReportWindow,
        /// Target dialect (default: the workspace's `dialect`).
        #[arg(long)]
        dialect: Option<String>,
        /// Extra segments to slice by, comma-separated (besides the experiment's `segments`).
        #[arg(long, value_delimiter = ',', value_name = "SEGMENT,...")]
        by: Vec<String>,
    },
    /// Run an experiment's SQL on the local data and print its readout.
    Analyze {
        experiment: String,
        /// Significance level for tests and 1 - confidence of intervals.
        #[arg(long, default_value_t = 0.05)]
        alpha: f64,
        #[arg(long, value_enum, default_value = "table")]
        format: Format,
        /// Extra segments to slice by, comma-separated (shown as exploratory rows).
        #[arg(long, value_delimiter = ',', value_name = "SEGMENT,...")]
        by: Vec<String>,
        /// Do not adjust metrics with their pre-exposure covariates (CUPED).
        #[arg(long)]
        no_cuped: bool,
        /// Always-valid p-values and intervals (mixture SPRT), for looking every day.
        #[arg(long)]
        sequential: bool,
        /// Read the statistics table from FILE (CSV or JSON exported from a warehouse run of
        /// `plumb sql EXPERIMENT --dialect D`) instead of running SQL locally.
        #[arg(long, value_name = "FILE", conflicts_with = "by")]
        stats: Option<PathBuf>,
        /// Run the postgres-dialect SQL on a PostgreSQL server instead of the local data:
        /// `postgres://USER@HOST:PORT/DB`. Missing parts and the password come from PGHOST,
        /// PGPORT, PGUSER, PGDATABASE, PGPASSWORD or the password file (PGPASSFILE, ~/.pgpass).
        #[arg(long, value_name = "URL", conflicts_with = "stats")]
        engine: Option<String>,
    },
    /// What a catalog change does: definitions, affected experiments and reports, SQL and numbers.
    Diff {
        /// Base revision (default: the merge base with the default branch, else HEAD).
        #[arg(long)]
        base: Option<String>,
        /// Head revision (default: the working tree).
        #[arg(long)]
        head: Option<String>,
        /// Dialect of the SQL diff (default: the workspace's).
        #[arg(long)]
        dialect: Option<String>,
        /// Also run both versions on the local data and compare the numbers.
        #[arg(long)]
        data: bool,
        #[arg(long, value_enum, default_value = "table")]
        format: DiffFormat,
        /// Exit with 5 when any readout verdict changes (needs --data).
        #[arg(long)]
        fail_on_verdict_change: bool,
    },
    /// Print the JSON Schema of catalog files (for editors and YAML language servers).
    Schema,
    /// A metric as a time series over the whole population of its unit.
    Report {
        #[arg(required = true)]
        metrics: Vec<String>,
        /// Slice by this segment (an exposure-row segment needs --exposed-in).
        #[arg(long, value_name = "SEGMENT")]
        by: Option<String>,
        #[command(flatten)]
        window: ReportWindow,
        #[arg(long, value_enum, default_value = "table")]
        format: ReportFormat,
    },
    /// Units and days an experiment needs to detect a change in a metric, from history.
    Power {
        metric: String,
        /// Smallest relative change worth detecting, e.g. `2%`.
        #[arg(long)]
        mde: String,
        #[arg(long, default_value_t = 0.05)]
        alpha: f64,
        /// Target power.
        #[arg(long, default_value_t = 0.8)]
        power: f64,
        /// Planned split, control first, e.g. `50,50` or `34,33,33`.
        #[arg(long, value_delimiter = ',', default_value = "50,50")]
        split: Vec<f64>,
        /// Also report what an experiment of this many days could detect.
        #[arg(long)]
        days: Option<f64>,
        /// Units entering per day (default: measured from the exposure log's history).
        #[arg(long)]
        units_per_day: Option<f64>,
        /// Length of the history window, in days.
        #[arg(long, default_value_t = 14)]
        history_days: i64,
        /// End of the history window (default: the latest experiment end on this exposure log).
        #[arg(long)]
        until: Option<String>,
        /// Exposure log whose units form the population (default: the first of the metric's unit).
        #[arg(long)]
        exposures: Option<String>,
        #[arg(long, value_enum, default_value = "table")]
        format: Format,
    },
    /// Write the plant-shop demo workspace and print its main readout.
    Demo {
        /// Folder to write (default: ./plumb-demo).
        #[arg(default_value = "plumb-demo")]
        dir: PathBuf,
        /// Seed of the data generator; the same seed gives identical files.
        #[arg(long, default_value_t = 20_260_302)]
        seed: u64,
        /// Number of shoppers to generate.
        #[arg(long, default_value_t = 100_000)]
        shoppers: usize,
        /// Only write the files; do not print the readout.
        #[arg(long)]
        no_readout: bool,
    },
}

/// A command's failure, already carrying what to print and the exit code.
pub enum Failure {
    /// Catalog diagnostics (exit 1).
    Catalog(SourceMap, Vec<Diagnostic>),
    /// A usage or internal problem (exit 2).
    Usage(String),
    /// Already reported on stdout (e.g. `check --format json`); only the exit code remains.
    Reported(u8),
}

fn usage(msg: impl Into<String>) -> Failure {
    Failure::Usage(msg.into())
}

/// Writes to stdout; a closed pipe ends the program quietly with success.
fn emit(text: &str) {
    let mut out = std::io::stdout().lock();
    if let Err(e) = out.write_all(text.as_bytes()).and_then(|_| out.flush()) {
        if e.kind() == std::io::ErrorKind::BrokenPipe {
            std::process::exit(0);
        }
        eprintln!("plumb: cannot write output: {e}");
        std::process::exit(i32::from(EXIT_USAGE));
    }
}

/// Entry point of the binary.
pub fn run() -> ExitCode {
    let args = match Args::try_parse() {
        Ok(a) => a,
        Err(e) => {
            let _ = e.print();
            return ExitCode::from(if e.use_stderr() { EXIT_USAGE } else { 0 });
        }
    };
    match dispatch(&args) {
        Ok(()) => ExitCode::SUCCESS,
        Err(Failure::Catalog(sources, diags)) => {
            eprint!("{}", diagnostics::render_plain(&sources, &diags));
            let errors = diags.iter().filter(|d| d.is_error()).count();
            eprintln!(
                "plumb: {errors} error{} in the catalog",
                if errors == 1 { "" } else { "s" }
            );
            ExitCode::from(EXIT_CATALOG)
        }
        Err(Failure::Reported(code)) => ExitCode::from(code),
        Err(Failure::Usage(msg)) => {
            eprintln!("plumb: {msg}");
            ExitCode::from(EXIT_USAGE)
        }
    }
}

fn workspace_dir(args: &Args) -> PathBuf {
    args.workspace.clone().unwrap_or_else(|| PathBuf::from("."))
}

/// Loads and resolves the workspace, turning diagnostics into a failure.
fn open(dir: &Path, sources: &mut SourceMap) -> Result<(Workspace, Vec<Diagnostic>), Failure> {
    match workspace::open(dir, sources) {
        Err(e) => Err(usage(e.to_string())),
        Ok(Opened::Invalid(diags)) => Err(Failure::Catalog(std::mem::take(sources), diags)),
        Ok(Opened::Ok(ws, warnings)) => Ok((*ws, warnings)),
    }
}

fn find_experiment(ws: &Workspace, name: &str) -> Result<usize, Failure> {
    ws.catalog.experiment(name).ok_or_else(|| {
        let names: Vec<&str> = ws.catalog.experiments.iter().map(|e| e.name.as_str()).collect();
        let hint = did_you_mean(name, names.iter().copied())
            .unwrap_or_else(|| format!("experiments in this catalog: {}", names.join(", ")));
        usage(format!("unknown experiment `{name}`; {hint}"))
    })
}

fn find_segments(ws: &Workspace, names: &[String]) -> Result<Vec<usize>, Failure> {
    names
        .iter()
        .map(|name| {
            ws.catalog
                .segments
                .iter()
                .position(|s| &s.name == name)
                .ok_or_else(|| {
                    let names: Vec<&str> = ws.catalog.segments.iter().map(|s| s.name.as_str()).collect();
                    let hint = did_you_mean(name, names.iter().copied())
                        .unwrap_or_else(|| format!("segments in this catalog: {}", names.join(", ")));
                    usage(format!("unknown segment `{name}`; {hint}"))
                })
        })
        .collect()
}

fn load_dialect(args: &Args, name: &str) -> Result<Dialect, Failure> {
    Dialect::load(name, args.dialects_dir.as_deref()).map_err(|e| usage(e.to_string()))
}

fn dispatch(args: &Args) -> Result<(), Failure> {
    match &args.command {
        Command::Check { format, deny } => check(args, *format, deny.is_some()),
        Command::Sql {
            experiment,
            report,
            window,
            dialect,
            by,
        } => {
            let mut sources = SourceMap::new();
            let (ws, _) = open(&workspace_dir(args), &mut sources)?;
            if !report.is_empty() {
                let plan = report_plan(&ws, report, window, by)?;
                let dialect = load_dialect(args, dialect.as_deref().unwrap_or(&ws.dialect))?;
                let sql = crate::compile_report(&plan, &dialect).map_err(|e| usage(e.to_string()))?;
                emit(&sql);
                return Ok(());
            }
            let experiment = experiment.as_deref().unwrap_or_default();
            let id = find_experiment(&ws, experiment)?;
            let by = find_segments(&ws, by)?;
            let dialect = load_dialect(args, dialect.as_deref().unwrap_or(&ws.dialect))?;
            let (_, sql) = crate::compile_experiment(&ws.catalog, id, &by, &dialect)
                .map_err(|e| usage(e.to_string()))?;
            emit(&sql);
            Ok(())
        }
        Command::Analyze {
            experiment,
            alpha,
            format,
            by,
            no_cuped,
            sequential,
            stats,
            engine,
        } => {
            if !(*alpha > 0.0 && *alpha < 1.0) {
                return Err(usage(format!("--alpha must be between 0 and 1, got {alpha}")));
            }
            let options = crate::ReadoutOptions {
                alpha: *alpha,
                cuped: !no_cuped,
                sequential: *sequential,
            };
            let (text, blocked) = match (stats, engine) {
                (Some(file), _) => analyze_stats(args, experiment, file, options, *format)?,
                (None, Some(url)) => analyze_postgres(args, experiment, by, url, options, *format)?,
                (None, None) => analyze(args, &workspace_dir(args), experiment, by, options, *format)?,
            };
            emit(&text);
            if blocked {
                return Err(Failure::Reported(EXIT_CHECKS));
            }
            Ok(())
        }
        Command::Diff { .. } => diff(args),
        Command::Schema => {
            let schema = crate::load::syntax::catalog_schema();
            emit(&(serde_json::to_string_pretty(&schema).expect("json") + "\n"));
            Ok(())
        }
        Command::Report {
            metrics,
            by,
            window,
            format,
        } => {
            let by: Vec<String> = by.iter().cloned().collect();
            let text = report(args, metrics, &by, window, *format)?;
            emit(&text);
            Ok(())
        }
        Command::Power { .. } => {
            let text = power(args)?;
            emit(&text);
            Ok(())
        }
        Command::Demo {
            dir,
            seed,
            shoppers,
            no_readout,
        } => {
            let started = std::time::Instant::now();
            let config = crate::demo::DemoConfig {
                seed: *seed,
                shoppers: *shoppers,
            };
            let summary = crate::demo::write_demo(dir, &config)
                .map_err(|e| usage(format!("cannot write the demo into {}: {e}", dir.display())))?;
            eprintln!(
                "plumb: wrote the plant-shop demo to {} ({} shoppers, {} page views, {} orders, {} exposure rows) in {:.1}s",
                dir.display(),
                summary.shoppers,
                summary.visits,
                summary.orders,
                summary.exposures,
                started.elapsed().as_secs_f64()
            );
            if !no_readout {
                let (text, _) = analyze(
                    args,
                    dir,
                    crate::demo::MAIN_EXPERIMENT,
                    &[],
                    crate::ReadoutOptions::default(),
                    Format::Table,
                )?;
                emit(&text);
                eprintln!(
                    "plumb: next, try `plumb --workspace {} analyze care_guide_banner` (an A/A test) or `plumb --workspace {} sql {}`",
                    dir.display(),
                    dir.display(),
                    crate::demo::MAIN_EXPERIMENT
                );
            }
            Ok(())
        }
    }
}

fn check(args: &Args, format: Format, deny_warnings: bool) -> Result<(), Failure> {
    let mut sources = SourceMap::new();
    let dir = workspace_dir(args);
    let result = workspace::open(&dir, &mut sources).map_err(|e| usage(e.to_string()))?;
    let (ws, diags) = match result {
        Opened::Ok(ws, d) => (Some(ws), d),
        Opened::Invalid(d) => (None, d),
    };
    if format == Format::Json {
        let json = serde_json::json!({
            "ok": ws.is_some(),
            "diagnostics": diagnostics::to_json(&sources, &diags),
        });
        emit(&(serde_json::to_string_pretty(&json).expect("json") + "\n"));
        return match ws {
            Some(_) if !deny_warnings || diags.is_empty() => Ok(()),
            _ => Err(Failure::Reported(EXIT_CATALOG)),
        };
    }
    let Some(ws) = ws else {
        return Err(Failure::Catalog(sources, diags));
    };
    // Every experiment must also compile in the workspace dialect.
    let dialect = load_dialect(args, &ws.dialect)?;
    for id in 0..ws.catalog.experiments.len() {
        crate::compile_experiment(&ws.catalog, id, &[], &dialect).map_err(|e| usage(e.to_string()))?;
    }
    if !diags.is_empty() {
        eprint!("{}", diagnostics::render_plain(&sources, &diags));
        if deny_warnings {
            eprintln!("plumb: {} lint warnings (denied by --deny warnings)", diags.len());
            return Err(Failure::Reported(EXIT_CATALOG));
        }
    }
    let c = &ws.catalog;
    let warnings = match diags.len() {
        0 => String::new(),
        1 => ", 1 lint warning".into(),
        n => format!(", {n} lint warnings"),
    };
    emit(&format!(
        "ok: {} files, {} units, {} event tables, {} exposure logs, {} segments, {} metrics, {} experiments (dialect {}{warnings})\n",
        ws.files,
        c.units.len(),
        c.event_tables.len(),
        c.exposure_logs.len(),
        c.segments.len(),
        c.metrics.len(),
        c.experiments.len(),
        ws.dialect
    ));
    Ok(())
}

/// Connection settings for `--engine`: the URL, completed from libpq's environment variables
/// and password file. Reading the environment is the command line's job.
#[cfg(feature = "postgres")]
fn postgres_config(url: &str) -> Result<postgres::Config, Failure> {
    let mut config: postgres::Config = url.parse().map_err(|e| {
        usage(format!(
            "--engine: not a PostgreSQL URL ({e}); write postgres://USER@HOST:PORT/DB"
        ))
    })?;
    let env = |k: &str| std::env::var(k).ok().filter(|v| !v.is_empty());
    if config.get_hosts().is_empty() {
        config.host(&env("PGHOST").unwrap_or_else(|| "localhost".into()));
    }
    if config.get_ports().is_empty()
        && let Some(p) = env("PGPORT").and_then(|p| p.parse::<u16>().ok())
    {
        config.port(p);
    }
    if config.get_user().is_none() {
        let user = env("PGUSER")
            .or_else(|| env("USER"))
            .unwrap_or_else(|| "postgres".into());
        config.user(&user);
    }
    if config.get_dbname().is_none()
        && let Some(db) = env("PGDATABASE")
    {
        config.dbname(&db);
    }
    if config.get_password().is_none() {
        if let Some(pw) = env("PGPASSWORD") {
            config.password(pw);
        } else if let Some(pw) = password_from_file(&config, env("PGPASSFILE"), env("HOME")) {
            config.password(pw);
        }
    }
    Ok(config)
}

/// The first matching line `host:port:database:user:password` of the password file
/// (`*` matches anything; `\:` and `\\` are escapes), as libpq reads it.
#[cfg(feature = "postgres")]
fn password_from_file(
    config: &postgres::Config,
    file: Option<String>,
    home: Option<String>,
) -> Option<String> {
    let path = file
        .map(PathBuf::from)
        .or_else(|| home.map(|h| PathBuf::from(h).join(".pgpass")))?;
    let text = std::fs::read_to_string(path).ok()?;
    let host = match config.get_hosts().first() {
        Some(postgres::config::Host::Tcp(h)) => h.clone(),
        _ => "localhost".into(),
    };
    let port = config.get_ports().first().copied().unwrap_or(5432).to_string();
    let db = config.get_dbname().unwrap_or("").to_string();
    let user = config.get_user().unwrap_or("").to_string();
    for line in text.lines().filter(|l| !l.trim_start().starts_with('#')) {
        let mut fields = Vec::new();
        let mut field = String::new();
        let mut chars = line.chars();
        while let Some(c) = chars.next() {
            match c {
                '\\' => field.extend(chars.next()),
                ':' if fields.len() < 4 => fields.push(std::mem::take(&mut field)),
                c => field.push(c),
            }
        }
        fields.push(field);
        if fields.len() != 5 {
            continue;
        }
        let ok = |pattern: &str, value: &str| pattern == "*" || pattern == value;
        if ok(&fields[0], &host) && ok(&fields[1], &port) && ok(&fields[2], &db) && ok(&fields[3], &user) {
            return Some(fields[4].clone());
        }
    }
    None
}

#[cfg(not(feature = "postgres"))]
fn analyze_postgres(
    _: &Args,
    _: &str,
    _: &[String],
    _: &str,
    _: crate::ReadoutOptions,
    _: Format,
) -> Result<(String, bool), Failure> {
    Err(usage("this plumb was built without the `postgres` feature"))
}

/// The readout with the postgres-dialect SQL run on a PostgreSQL server (`--engine`).
#[cfg(feature = "postgres")]
fn analyze_postgres(
    args: &Args,
    experiment: &str,
    by: &[String],
    url: &str,
    options: crate::ReadoutOptions,
    format: Format,
) -> Result<(String, bool), Failure> {
    let mut sources = SourceMap::new();
    let (ws, _) = open(&workspace_dir(args), &mut sources)?;
    let id = find_experiment(&ws, experiment)?;
    let by = find_segments(&ws, by)?;
    let dialect = load_dialect(args, "postgres")?;
    let (plan, sql) =
        crate::compile_experiment(&ws.catalog, id, &by, &dialect).map_err(|e| usage(e.to_string()))?;
    let config = postgres_config(url)?;
    let rows = crate::execute::postgres::Server::connect(&config)
        .and_then(|mut server| server.query(&sql))
        .map_err(|e| usage(e.to_string()))?;
    let table = crate::execute::stats_table(&plan, &rows).map_err(|e| usage(e.to_string()))?;
    let spec = crate::readout_spec(&ws.catalog, id, &plan, options);
    Ok(format_readout(
        &crate::stats::readout::build(&spec, &table),
        format,
    ))
}

/// The readout as text or JSON, and whether it must block a decision (exit code 3).
fn format_readout(readout: &crate::stats::readout::Readout, format: Format) -> (String, bool) {
    let blocked = readout.void || !readout.guardrails_failed.is_empty();
    let text = match format {
        Format::Table => crate::output::readout_text(readout),
        Format::Json => crate::output::readout_json(readout),
    };
    (text, blocked)
}

/// The readout from a statistics table exported from a warehouse (`analyze --stats FILE`).
fn analyze_stats(
    args: &Args,
    experiment: &str,
    file: &Path,
    options: crate::ReadoutOptions,
    format: Format,
) -> Result<(String, bool), Failure> {
    let mut sources = SourceMap::new();
    let (ws, _) = open(&workspace_dir(args), &mut sources)?;
    let id = find_experiment(&ws, experiment)?;
    let plan = crate::plan::plan_experiment(&ws.catalog, id, &[]);
    let rows = crate::execute::read_stats_file(file).map_err(|e| usage(e.to_string()))?;
    crate::execute::check_fingerprint(&plan, &rows).map_err(|e| usage(e.to_string()))?;
    let table = crate::execute::stats_table(&plan, &rows).map_err(|e| usage(e.to_string()))?;
    let spec = crate::readout_spec(&ws.catalog, id, &plan, options);
    Ok(format_readout(
        &crate::stats::readout::build(&spec, &table),
        format,
    ))
}

#[cfg(not(feature = "engine"))]
fn analyze(
    _: &Args,
    _: &Path,
    _: &str,
    _: &[String],
    _: crate::ReadoutOptions,
    _: Format,
) -> Result<(String, bool), Failure> {
    Err(usage(
        "this plumb was built without the `engine` feature, so it cannot run SQL locally",
    ))
}

#[cfg(feature = "engine")]
fn analyze(
    args: &Args,
    dir: &Path,
    experiment: &str,
    by: &[String],
    options: crate::ReadoutOptions,
    format: Format,
) -> Result<(String, bool), Failure> {
    use crate::execute::duckdb::Engine;
    let mut sources = SourceMap::new();
    let (ws, _) = open(dir, &mut sources)?;
    let id = find_experiment(&ws, experiment)?;
    let by = find_segments(&ws, by)?;
    // Local execution is DuckDB, whatever the workspace's warehouse dialect.
    let dialect = load_dialect(args, "duckdb")?;
    let (plan, sql) =
        crate::compile_experiment(&ws.catalog, id, &by, &dialect).map_err(|e| usage(e.to_string()))?;
    let rows = run_local(&ws, &sql, &format!("running {experiment} on local DuckDB"))?;
    let table = crate::execute::stats_table(&plan, &rows).map_err(|e| usage(e.to_string()))?;
    let spec = crate::readout_spec(&ws.catalog, id, &plan, options);
    let mut readout = crate::stats::readout::build(&spec, &table);
    // Whole-population impact: daily totals of the experiment's (non-ratio) metrics over the
    // whole population in the experiment's period, from the report query of the same metrics.
    let exp = &ws.catalog.experiments[id];
    let metric_ids: Vec<usize> = exp
        .metrics
        .iter()
        .map(|(m, _)| *m)
        // Only additive per-unit values (count, sum) have a meaningful population total.
        .filter(|m| {
            matches!(
                ws.catalog.metrics[*m].kind,
                crate::ir::MetricKind::Events {
                    aggregation: crate::ir::Aggregation::Count | crate::ir::Aggregation::Sum,
                    ..
                }
            )
        })
        .collect();
    if !metric_ids.is_empty() {
        let rplan = crate::plan::plan_report(
            &ws.catalog,
            &metric_ids,
            crate::time::Grain::Day,
            exp.start,
            exp.end,
            None,
            None,
        );
        let days = (exp.end.0 - exp.start.0) as f64 / 86_400.0;
        let rsql = crate::compile_report(&rplan, &dialect).map_err(|e| usage(e.to_string()))?;
        let rows = Engine::open(ws.local_database.as_deref(), &ws.local_tables)
            .and_then(|engine| engine.query(&rsql))
            .and_then(|rows| crate::report::assemble(&rplan, &rows))
            .map_err(|e| usage(e.to_string()))?;
        let mut population = std::collections::BTreeMap::new();
        for r in &rows {
            *population.entry(r.metric.clone()).or_insert(0.0) += r.total.unwrap_or(0.0) / days;
        }
        let triggered = table
            .rows
            .iter()
            .filter(|r| r.segment.is_none())
            .map(|r| r.units)
            .sum::<u64>() as f64
            / days;
        crate::stats::readout::add_population_impact(&mut readout, triggered, &population);
    }
    Ok(format_readout(&readout, format))
}

/// Runs git in `dir`; its failure is a usage error.
fn git(dir: &Path, args: &[&str]) -> Result<String, Failure> {
    let out = std::process::Command::new("git")
        .arg("-C")
        .arg(dir)
        .args(args)
        .output()
        .map_err(|e| usage(format!("cannot run git: {e}")))?;
    if !out.status.success() {
        return Err(usage(format!(
            "git {} failed: {}",
            args.join(" "),
            String::from_utf8_lossy(&out.stderr).trim()
        )));
    }
    Ok(String::from_utf8_lossy(&out.stdout).into_owned())
}

/// The merge base of HEAD with the default branch (origin's HEAD, main or master), else HEAD.
fn default_base(top: &Path) -> String {
    let candidates = ["refs/remotes/origin/HEAD", "refs/heads/main", "refs/heads/master"];
    for c in candidates {
        if git(top, &["rev-parse", "--verify", "--quiet", c]).is_ok()
            && let Ok(mb) = git(top, &["merge-base", "HEAD", c])
        {
            let mb = mb.trim().to_string();
            if !mb.is_empty() {
                return mb;
            }
        }
    }
    "HEAD".into()
}

/// The catalog files at a git revision, read from git objects (the working tree is untouched).
fn catalog_at(top: &Path, rev: &str, catalog_rel: &str) -> Result<Vec<(String, String)>, Failure> {
    let list = git(top, &["ls-tree", "-r", "--name-only", rev, "--", catalog_rel])?;
    let mut files = Vec::new();
    for path in list
        .lines()
        .filter(|p| p.ends_with(".yaml") || p.ends_with(".yml"))
    {
        let text = git(top, &["show", &format!("{rev}:{path}")])?;
        files.push((format!("{rev}:{path}"), text));
    }
    files.sort();
    Ok(files)
}

/// Loads and resolves catalog files; diagnostics become a catalog failure.
fn resolve_files(
    files: &[(String, String)],
) -> Result<(crate::load::RawCatalog, crate::ir::Catalog), Failure> {
    let mut sources = SourceMap::new();
    let refs: Vec<(&str, &str)> = files.iter().map(|(p, t)| (p.as_str(), t.as_str())).collect();
    let (raw, mut diags) = crate::load::load_catalog_texts(&refs, &mut sources);
    match crate::resolve::resolve(&sources, &raw) {
        Ok(c) if !diags.iter().any(Diagnostic::is_error) => Ok((raw, c)),
        Ok(_) => Err(Failure::Catalog(sources, diags)),
        Err(more) => {
            diags.extend(more);
            Err(Failure::Catalog(sources, diags))
        }
    }
}

fn diff(args: &Args) -> Result<(), Failure> {
    let Command::Diff {
        base,
        head,
        dialect,
        data,
        format,
        fail_on_verdict_change,
    } = &args.command
    else {
        unreachable!("dispatched on Command::Diff");
    };
    let dir = workspace_dir(args);
    let mut sources = SourceMap::new();
    let (raw_ws, head_raw, diags) =
        crate::load::load_workspace(&dir, &mut sources).map_err(|e| usage(e.to_string()))?;
    if diags.iter().any(Diagnostic::is_error) {
        return Err(Failure::Catalog(sources, diags));
    }
    let top = PathBuf::from(git(&dir, &["rev-parse", "--show-toplevel"])?.trim());
    let prefix = git(&dir, &["rev-parse", "--show-prefix"])?.trim().to_string();
    let catalog_rel = format!("{prefix}{}", raw_ws.value.catalog.as_deref().unwrap_or("metrics"));
    let base_rev = base.clone().unwrap_or_else(|| default_base(&top));
    let (base_raw, base_ir) = resolve_files(&catalog_at(&top, &base_rev, &catalog_rel)?)?;
    let (head_raw, head_ir, head_name) = match head {
        Some(rev) => {
            let (r, c) = resolve_files(&catalog_at(&top, rev, &catalog_rel)?)?;
            (r, c, rev.clone())
        }
        None => match crate::resolve::resolve(&sources, &head_raw) {
            Ok(c) => (head_raw, c, "working tree".to_string()),
            Err(d) => return Err(Failure::Catalog(sources, d)),
        },
    };
    let changes = crate::diff::changes(&base_raw, &head_raw);
    let dialect_name = dialect
        .clone()
        .or(raw_ws.value.dialect.clone())
        .unwrap_or_else(|| "duckdb".into());
    let dialect = load_dialect(args, &dialect_name)?;
    let mut affected = Vec::new();
    for (name, reasons) in crate::diff::affected_experiments(&base_ir, &head_ir, &changes) {
        let sql = |c: &crate::ir::Catalog| -> Result<String, Failure> {
            match c.experiment(&name) {
                Some(id) => crate::compile_experiment(c, id, &[], &dialect)
                    .map(|(_, s)| s)
                    .map_err(|e| usage(e.to_string())),
                None => Ok(String::new()),
            }
        };
        let sql_diff = crate::diff::text_diff(&sql(&base_ir)?, &sql(&head_ir)?, &base_rev, &head_name);
        let numbers = if *data {
            diff_numbers(&dir, &name, &base_ir, &head_ir)?
        } else {
            Vec::new()
        };
        affected.push(crate::diff::Affected {
            experiment: name,
            reasons,
            sql_diff,
            numbers,
        });
    }
    let d = crate::diff::Diff {
        base: base_rev,
        head: head_name,
        affected_reports: crate::diff::affected_reports(&base_ir, &head_ir, &changes),
        changes,
        affected_experiments: affected,
    };
    use std::io::IsTerminal;
    emit(&match format {
        DiffFormat::Table => crate::diff::text_output(&d, std::io::stdout().is_terminal()),
        DiffFormat::Markdown => crate::diff::markdown_output(&d),
        DiffFormat::Json => serde_json::to_string_pretty(&d).expect("json") + "\n",
    });
    if *fail_on_verdict_change && d.verdict_flips() > 0 {
        return Err(Failure::Reported(EXIT_VERDICT_CHANGED));
    }
    if !d.changes.is_empty() {
        return Err(Failure::Reported(EXIT_DEFINITIONS_CHANGED));
    }
    Ok(())
}

#[cfg(not(feature = "engine"))]
fn diff_numbers(
    _: &Path,
    _: &str,
    _: &crate::ir::Catalog,
    _: &crate::ir::Catalog,
) -> Result<Vec<crate::diff::NumberChange>, Failure> {
    Err(usage("--data needs the `engine` feature"))
}

/// Readout rows of one experiment before and after, on the working tree's local data.
#[cfg(feature = "engine")]
fn diff_numbers(
    dir: &Path,
    experiment: &str,
    base: &crate::ir::Catalog,
    head: &crate::ir::Catalog,
) -> Result<Vec<crate::diff::NumberChange>, Failure> {
    use crate::diff::{NumberChange, RowNumbers};
    let mut sources = SourceMap::new();
    let (ws, _) = open(dir, &mut sources)?;
    let engine = crate::execute::duckdb::Engine::open(ws.local_database.as_deref(), &ws.local_tables)
        .map_err(|e| usage(e.to_string()))?;
    let dialect = crate::render::Dialect::load("duckdb", None).map_err(|e| usage(e.to_string()))?;
    let rows = |c: &crate::ir::Catalog| -> Result<std::collections::BTreeMap<(String, String), RowNumbers>, Failure> {
        let mut out = std::collections::BTreeMap::new();
        let Some(id) = c.experiment(experiment) else {
            return Ok(out);
        };
        let (plan, sql) =
            crate::compile_experiment(c, id, &[], &dialect).map_err(|e| usage(e.to_string()))?;
        let result = engine.query(&sql).map_err(|e| usage(e.to_string()))?;
        let table = crate::execute::stats_table(&plan, &result).map_err(|e| usage(e.to_string()))?;
        let spec = crate::readout_spec(c, id, &plan, crate::ReadoutOptions::default());
        let readout = crate::stats::readout::build(&spec, &table);
        for r in readout.results.iter().filter(|r| r.segment.is_none()) {
            out.insert(
                (r.metric.clone(), r.arm.clone()),
                RowNumbers {
                    control_mean: r.control.mean,
                    treatment_mean: r.treatment.mean,
                    difference: r.difference.as_ref().map(|d| d.estimate),
                    ci_low: r.difference.as_ref().map(|d| d.ci_low),
                    ci_high: r.difference.as_ref().map(|d| d.ci_high),
                    verdict: r.verdict.to_string(),
                },
            );
        }
        Ok(out)
    };
    let (before, after) = (rows(base)?, rows(head)?);
    let keys: std::collections::BTreeSet<&(String, String)> = before.keys().chain(after.keys()).collect();
    Ok(keys
        .into_iter()
        .filter(|k| before.get(*k) != after.get(*k))
        .map(|k| {
            let (b, a) = (before.get(k).cloned(), after.get(k).cloned());
            NumberChange {
                metric: k.0.clone(),
                arm: k.1.clone(),
                verdict_changed: b.as_ref().map(|x| &x.verdict) != a.as_ref().map(|x| &x.verdict),
                before: b,
                after: a,
            }
        })
        .collect())
}

/// Resolves report arguments into a report plan.
fn report_plan(
    ws: &Workspace,
    metrics: &[String],
    window: &ReportWindow,
    by: &[String],
) -> Result<crate::plan::ReportPlan, Failure> {
    use crate::time::{Grain, Timestamp};
    let ids = metrics
        .iter()
        .map(|m| {
            ws.catalog.metric(m).ok_or_else(|| {
                let names: Vec<&str> = ws.catalog.metrics.iter().map(|m| m.name.as_str()).collect();
                let hint = did_you_mean(m, names.iter().copied())
                    .unwrap_or_else(|| format!("metrics in this catalog: {}", names.join(", ")));
                usage(format!("unknown metric `{m}`; {hint}"))
            })
        })
        .collect::<Result<Vec<_>, _>>()?;
    let exposed = window
        .exposed_in
        .as_deref()
        .map(|e| find_experiment(ws, e))
        .transpose()?;
    let exp = exposed.map(|id| &ws.catalog.experiments[id]);
    let parse = |flag: &str, v: &Option<String>, default: Option<Timestamp>| -> Result<Timestamp, Failure> {
        match (v, default) {
            (Some(t), _) => Timestamp::parse(t).map_err(|e| usage(format!("{flag}: {e}"))),
            (None, Some(d)) => Ok(d),
            (None, None) => Err(usage(format!("{flag} is required (e.g. {flag} 2026-03-01)"))),
        }
    };
    let from = parse("--from", &window.from, exp.map(|e| e.start))?;
    let to = parse("--to", &window.to, exp.map(|e| e.end))?;
    if to <= from {
        return Err(usage("--to must be after --from"));
    }
    let grain = match window.grain {
        GrainArg::Hour => Grain::Hour,
        GrainArg::Day => Grain::Day,
        GrainArg::Week => Grain::Week,
        GrainArg::Month => Grain::Month,
    };
    let periods = grain.periods(from, to).len();
    if periods > 100_000 {
        return Err(usage(format!(
            "{periods} periods is too many; use a coarser --grain"
        )));
    }
    let segments = find_segments(ws, by)?;
    if segments.len() > 1 {
        return Err(usage("a report slices by one segment at a time"));
    }
    let segment = segments.first().copied();
    if let Some(s) = segment
        && matches!(
            ws.catalog.segments[s].kind,
            crate::ir::SegmentKind::FromExposure(_)
        )
        && exposed.is_none()
    {
        return Err(usage(format!(
            "segment `{}` is read from the exposure log, so it needs --exposed-in EXPERIMENT",
            ws.catalog.segments[s].name
        )));
    }
    Ok(crate::plan::plan_report(
        &ws.catalog,
        &ids,
        grain,
        from,
        to,
        segment,
        exposed,
    ))
}

#[cfg(not(feature = "engine"))]
fn report(
    _: &Args,
    _: &[String],
    _: &[String],
    _: &ReportWindow,
    _: ReportFormat,
) -> Result<String, Failure> {
    Err(usage(
        "this plumb was built without the `engine` feature, so it cannot run SQL locally",
    ))
}

#[cfg(feature = "engine")]
fn report(
    args: &Args,
    metrics: &[String],
    by: &[String],
    window: &ReportWindow,
    format: ReportFormat,
) -> Result<String, Failure> {
    let mut sources = SourceMap::new();
    let (ws, _) = open(&workspace_dir(args), &mut sources)?;
    let plan = report_plan(&ws, metrics, window, by)?;
    let dialect = load_dialect(args, "duckdb")?;
    let sql = crate::compile_report(&plan, &dialect).map_err(|e| usage(e.to_string()))?;
    let rows = run_local(&ws, &sql, "running the report on local DuckDB")?;
    let rows = crate::report::assemble(&plan, &rows).map_err(|e| usage(e.to_string()))?;
    Ok(match format {
        ReportFormat::Table => crate::report::text_output(&rows),
        ReportFormat::Json => serde_json::to_string_pretty(&rows).expect("json") + "\n",
        ReportFormat::Csv => crate::report::csv_output(&rows),
    })
}

#[cfg(not(feature = "engine"))]
fn power(_: &Args) -> Result<String, Failure> {
    Err(usage(
        "this plumb was built without the `engine` feature, so it cannot read history locally",
    ))
}

/// `plumb power`: the metric's per-unit mean and sd over a past window, computed by the same
/// compiled readout SQL (a one-arm pseudo-experiment of every unit exposed in the window), then
/// the units and days needed for the MDE under the planned split, and under other splits.
#[cfg(feature = "engine")]
fn power(args: &Args) -> Result<String, Failure> {
    use crate::ir::{self, Role, Source};
    use crate::stats::power as pw;
    use crate::time::Timestamp;
    let Command::Power {
        metric,
        mde,
        alpha,
        power,
        split,
        days,
        units_per_day,
        history_days,
        until,
        exposures,
        format,
    } = &args.command
    else {
        unreachable!("dispatched on Command::Power");
    };
    let mde_rel = mde
        .trim()
        .strip_suffix('%')
        .and_then(|p| p.trim().parse::<f64>().ok())
        .filter(|p| *p > 0.0)
        .map(|p| p / 100.0)
        .ok_or_else(|| {
            usage(format!(
                "--mde must be a positive percentage such as 2%, got `{mde}`"
            ))
        })?;
    if !(*alpha > 0.0 && *alpha < 1.0 && *power > 0.0 && *power < 1.0) {
        return Err(usage("--alpha and --power must be between 0 and 1"));
    }
    if split.len() < 2 || split.iter().any(|s| !s.is_finite() || *s <= 0.0) {
        return Err(usage(
            "--split needs at least two positive shares, control first, e.g. 50,50",
        ));
    }
    if *history_days < 1 {
        return Err(usage("--history-days must be at least 1"));
    }
    let mut sources = SourceMap::new();
    let (ws, _) = open(&workspace_dir(args), &mut sources)?;
    let mut catalog = ws.catalog.clone();
    let metric_id = catalog.metric(metric).ok_or_else(|| {
        let names: Vec<&str> = catalog.metrics.iter().map(|m| m.name.as_str()).collect();
        let hint = did_you_mean(metric, names.iter().copied())
            .unwrap_or_else(|| format!("metrics in this catalog: {}", names.join(", ")));
        usage(format!("unknown metric `{metric}`; {hint}"))
    })?;
    let unit = catalog.metrics[metric_id].unit;
    let log_id = match exposures {
        Some(name) => catalog
            .exposure_logs
            .iter()
            .position(|l| &l.name == name)
            .ok_or_else(|| usage(format!("unknown exposure log `{name}`")))?,
        None => catalog
            .exposure_logs
            .iter()
            .position(|l| l.unit == unit)
            .ok_or_else(|| {
                usage(format!(
                    "no exposure log counts {}s; pass --exposures NAME",
                    catalog.units[unit].name
                ))
            })?,
    };
    let end = match until {
        Some(t) => Timestamp::parse(t).map_err(usage)?,
        None => catalog
            .experiments
            .iter()
            .filter(|e| e.exposures == log_id)
            .map(|e| e.end)
            .max()
            .ok_or_else(|| usage("no experiment uses this exposure log; pass --until DATE"))?,
    };
    let start = end.plus(-history_days * 86_400);
    let log = catalog.exposure_logs[log_id].clone();
    let dialect = load_dialect(args, "duckdb")?;
    // Every unit's first exposure in the window, as one arm of a pseudo-experiment.
    let q = |c: &str| format!("\"{}\"", c.replace('"', "\"\""));
    let from = match &log.source {
        Source::Table(parts) => parts.iter().map(|p| q(p)).collect::<Vec<_>>().join("."),
        Source::Query(query) => format!("({query}) AS history_source"),
    };
    let history_sql = format!(
        "SELECT {id} AS unit_key, 'history' AS experiment_key, 'all' AS arm_key, min({time}) AS first_time \
         FROM {from} WHERE {time} >= TIMESTAMP '{s}' AND {time} < TIMESTAMP '{e}' GROUP BY {id}",
        id = q(&log.id),
        time = q(&log.time),
        s = start.to_sql_string(),
        e = end.to_sql_string(),
    );
    let query = crate::resolve::sql::parse_query(&history_sql).map_err(|e| usage(e.message))?;
    catalog.exposure_logs.push(ir::ExposureLog {
        name: "history".into(),
        unit,
        source: Source::Query(query),
        id: "unit_key".into(),
        time: "first_time".into(),
        experiment: "experiment_key".into(),
        arm: "arm_key".into(),
    });
    catalog.experiments.push(ir::Experiment {
        name: "history".into(),
        description: None,
        exposures: catalog.exposure_logs.len() - 1,
        key: "history".into(),
        control: "all".into(),
        arms: vec![ir::Arm {
            name: "all".into(),
            share: 1.0,
        }],
        start,
        end,
        metrics: vec![(metric_id, Role::Primary)],
        covariate_window: 0,
        segments: vec![],
        mde: None,
    });
    let exp_id = catalog.experiments.len() - 1;
    let (plan, sql) =
        crate::compile_experiment(&catalog, exp_id, &[], &dialect).map_err(|e| usage(e.to_string()))?;
    let rows = run_local(
        &ws,
        &sql,
        &format!("reading {history_days} days of history for {metric}"),
    )?;
    let table = crate::execute::stats_table(&plan, &rows).map_err(|e| usage(e.to_string()))?;
    let row = table.rows.iter().find(|r| r.arm == "all").ok_or_else(|| {
        usage(format!(
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
                cov: row.covariances[&crate::plan::covariance_name(numerator, denominator)],
            };
            (
                r.ratio(),
                (r.var_of_ratio() * r.numerator.n as f64).sqrt(),
                r.numerator.n,
            )
        }
    };
    if !(mean.is_finite() && sd.is_finite() && mean != 0.0) {
        return Err(usage(format!(
            "{metric} has mean {mean} and sd {sd} over the history window; a relative MDE needs a nonzero mean"
        )));
    }
    let measured_per_day = row.units as f64 / *history_days as f64;
    let per_day = units_per_day.unwrap_or(measured_per_day);
    let delta = mde_rel * mean.abs();
    let main = pw::plan(delta, sd, *alpha, *power, split, Some(per_day))
        .ok_or_else(|| usage("cannot plan with these inputs"))?;
    let alternatives: Vec<(String, pw::Plan)> = [
        vec![50.0, 50.0],
        vec![60.0, 40.0],
        vec![80.0, 20.0],
        vec![90.0, 10.0],
    ]
    .into_iter()
    .filter(|s| split.len() == 2 && s != split)
    .filter_map(|s| {
        let label = format!("{}/{}", s[0], s[1]);
        pw::plan(delta, sd, *alpha, *power, &s, Some(per_day)).map(|p| (label, p))
    })
    .collect();
    let detectable = days.map(|d| pw::detectable(d * per_day, mean, sd, *alpha, *power, split));
    if *format == Format::Json {
        let json = serde_json::json!({
            "metric": metric,
            "history": {"start": start.to_iso(), "end": end.to_iso(), "units": n, "mean": mean, "sd": sd},
            "units_per_day": per_day,
            "units_per_day_measured": measured_per_day,
            "mde": mde_rel, "alpha": alpha, "power": power, "split": split,
            "units_per_arm": main.units_per_arm, "total_units": main.total_units, "days": main.days,
            "other_splits": alternatives.iter().map(|(l, p)| serde_json::json!({"split": l, "total_units": p.total_units, "days": p.days})).collect::<Vec<_>>(),
            "detectable_mde_in_days": detectable,
        });
        return Ok(serde_json::to_string_pretty(&json).expect("json") + "\n");
    }
    let mut out = format!(
        "Metric {metric}: mean {} and sd {} per unit over {} units exposed {} to {} (same SQL as a readout).\n",
        crate::output::sig(mean, 4),
        crate::output::sig(sd, 4),
        n,
        start.to_iso(),
        end.to_iso()
    );
    out += &format!(
        "Traffic: {} units per day{}.\n",
        crate::output::sig(per_day, 4),
        if units_per_day.is_some() {
            " (given)"
        } else {
            " (measured from the exposure log)"
        }
    );
    let arms: Vec<String> = main
        .units_per_arm
        .iter()
        .map(|u| format!("{:.0}", u.ceil()))
        .collect();
    out += &format!(
        "To detect a {}% change (alpha {alpha}, power {power}) with split {}: {} units per arm ({} in all), about {:.1} days.\n",
        crate::output::sig(mde_rel * 100.0, 3),
        split.iter().map(|s| s.to_string()).collect::<Vec<_>>().join("/"),
        arms.join(" / "),
        main.total_units.ceil(),
        main.days.unwrap_or(f64::NAN)
    );
    for (label, p) in &alternatives {
        out += &format!(
            "  with a {label} split instead: {:.0} units in all, about {:.1} days.\n",
            p.total_units.ceil(),
            p.days.unwrap_or(f64::NAN)
        );
    }
    if let (Some(d), Some(m)) = (days, detectable) {
        out += &format!(
            "In {d} days ({:.0} units) it could detect changes of {}% or more.\n",
            d * per_day,
            crate::output::sig(m * 100.0, 3)
        );
    }
    out += "Assumes the history window is typical of the experiment period, units independent, and a normal approximation for the difference (enough units per arm). Uneven splits need more units in all because the smaller arm dominates the variance.\n";
    Ok(out)
}

/// Runs `sql` on the workspace's local data with a spinner on a terminal.
#[cfg(feature = "engine")]
fn run_local(ws: &Workspace, sql: &str, message: &str) -> Result<Vec<crate::execute::NamedRow>, Failure> {
    use crate::execute::duckdb::Engine;
    let spinner = progress(message);
    let rows =
        Engine::open(ws.local_database.as_deref(), &ws.local_tables).and_then(|engine| engine.query(sql));
    if let Some(s) = spinner {
        s.finish_and_clear();
    }
    rows.map_err(|e| usage(e.to_string()))
}

/// A spinner on stderr while a query runs, only when stderr is a terminal.
#[cfg(feature = "engine")]
fn progress(msg: &str) -> Option<indicatif::ProgressBar> {
    use std::io::IsTerminal;
    if !std::io::stderr().is_terminal() {
        return None;
    }
    let bar = indicatif::ProgressBar::new_spinner();
    bar.set_message(msg.to_string());
    bar.enable_steady_tick(std::time::Duration::from_millis(100));
    Some(bar)
}
