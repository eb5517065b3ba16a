//! `plumb analyze`: an experiment's readout, computed locally, on a PostgreSQL server
//! (`--engine`), or from a statistics table exported from a warehouse (`--stats`).

use super::{EXIT_CHECKS, Format, Global, Outcome};
use crate::ReadoutOptions;
use crate::context::EngineChoice;
use crate::error::Result;
use crate::stats::readout::Readout;
use std::path::PathBuf;

#[derive(Debug, clap::Args)]
pub struct AnalyzeArgs {
    experiment: String,
    /// Significance level for tests and 1 - confidence of intervals.
    #[arg(long, default_value_t = 0.05)]
    alpha: f64,
    #[arg(long, value_enum, default_value = "table")]
    format: Format,
    /// One line per result (about 190 columns) instead of intervals under the estimates.
    #[arg(long)]
    wide: bool,
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
    /// The most values one segment may have (more is usually an id, not a grouping).
    #[arg(long, value_name = "N", default_value_t = crate::compile::MAX_SEGMENT_VALUES)]
    max_segment_values: usize,
    /// Share of experiments like this one that truly work (0 to 1), for the false-positive
    /// risk stated beside a significant primary result.
    #[arg(long, value_name = "SHARE", default_value_t = crate::compile::PRIOR_SUCCESS)]
    prior_success: f64,
    /// The most metrics one readout computes on an engine (the per-unit table grows with
    /// units x metrics; raise it only where the engine has the memory).
    #[arg(long, value_name = "N", default_value_t = crate::compile::MAX_READOUT_METRICS)]
    max_metrics: usize,
}

/// Where the statistics table comes from.
pub enum Source {
    Engine(EngineChoice),
    StatsFile(PathBuf),
}

pub struct Settings {
    pub experiment: String,
    pub by: Vec<String>,
    pub options: ReadoutOptions,
    pub format: Format,
    pub style: crate::output::TextStyle,
    pub source: Source,
}

impl Settings {
    pub fn from_args(a: AnalyzeArgs) -> Result<Settings> {
        super::check_alpha(a.alpha)?;
        if !(a.prior_success > 0.0 && a.prior_success < 1.0) {
            return Err(crate::error::Error::usage(format!(
                "--prior-success must be a share between 0 and 1 (exclusive), e.g. 0.2; got {}",
                a.prior_success
            )));
        }
        let source = match (a.stats, a.engine) {
            (Some(file), _) => Source::StatsFile(file),
            (None, Some(url)) => Source::Engine(postgres_engine(&url)?),
            (None, None) => Source::Engine(EngineChoice::Local),
        };
        let local = matches!(source, Source::Engine(EngineChoice::Local));
        Ok(Settings {
            experiment: a.experiment,
            by: a.by,
            options: ReadoutOptions {
                alpha: a.alpha,
                cuped: !a.no_cuped,
                sequential: a.sequential,
                // Whole-population impact needs the population's data: local runs only, so far.
                population_impact: local,
                max_segment_values: a.max_segment_values,
                max_metrics: a.max_metrics,
                prior_success: a.prior_success,
            },
            format: a.format,
            style: crate::output::TextStyle { wide: a.wide },
            source,
        })
    }
}

#[cfg(feature = "postgres")]
fn postgres_engine(url: &str) -> Result<EngineChoice> {
    Ok(EngineChoice::Postgres(Box::new(super::pg::config(url)?)))
}

#[cfg(not(feature = "postgres"))]
fn postgres_engine(_: &str) -> Result<EngineChoice> {
    Err(crate::error::Error::usage(
        "this plumb was built without the `postgres` feature",
    ))
}

pub fn run(global: &Global, s: Settings) -> Result<Outcome> {
    let readout = match s.source {
        Source::StatsFile(file) => {
            let ctx = global.open(EngineChoice::Local)?;
            let id = ctx.experiment(&s.experiment)?;
            ctx.readout_from_stats_file(id, &file, s.options)?
        }
        Source::Engine(choice) => {
            let message = format!("running {} on {}", s.experiment, choice.describe());
            let progress = super::Progress::start(&message);
            let ctx = global.open(choice)?;
            progress.follow(&ctx);
            let id = ctx.experiment(&s.experiment)?;
            let by = ctx.segments(&s.by)?;
            let readout = ctx.readout(id, &by, s.options)?;
            let mut out = readout_outcome(&readout, s.format, &s.style);
            out.parts
                .extend(progress.finish(&format!("analyzed {} on {}", s.experiment, ctx.engine_name())));
            return Ok(out);
        }
    };
    Ok(readout_outcome(&readout, s.format, &s.style))
}

/// The readout as text or JSON; exit code 3 when it must block a decision.
pub fn readout_outcome(readout: &Readout, format: Format, style: &crate::output::TextStyle) -> Outcome {
    let blocked = readout.void || !readout.guardrails_failed.is_empty();
    let text = match format {
        Format::Table => crate::output::readout_text(readout, style),
        Format::Json => crate::output::readout_json(readout),
    };
    Outcome::stdout(text).with_code(if blocked { EXIT_CHECKS } else { 0 })
}
