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
    /// Where the SQL runs: the name of an engine under `engines:` in plumb.yaml, `local` (the
    /// embedded DuckDB), or a PostgreSQL URL `postgres://USER@HOST:PORT/DB` (missing parts
    /// and the password come from PGHOST, PGPORT, PGUSER, PGDATABASE, PGPASSWORD or the
    /// password file). Default: `default_engine:` in plumb.yaml, else local.
    #[arg(long, value_name = "NAME|URL", conflicts_with = "stats")]
    engine: Option<String>,
    /// Show how a command engine would be run (its argv and the statement's file, written
    /// there) without running it.
    #[arg(long, conflicts_with = "stats")]
    print_command: bool,
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
    /// `--print-command`: show the command engine's argv instead of running it.
    pub print_command: bool,
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
        let source = match a.stats {
            Some(file) => Source::StatsFile(file),
            None => Source::Engine(super::engine_arg(a.engine.as_deref())?),
        };
        let engine_run = matches!(source, Source::Engine(_));
        Ok(Settings {
            experiment: a.experiment,
            by: a.by,
            options: ReadoutOptions {
                alpha: a.alpha,
                cuped: !a.no_cuped,
                sequential: a.sequential,
                // Whole-population impact needs the population's event tables: any engine,
                // never a statistics file.
                population_impact: engine_run,
                max_segment_values: a.max_segment_values,
                max_metrics: a.max_metrics,
                prior_success: a.prior_success,
            },
            format: a.format,
            style: crate::output::TextStyle { wide: a.wide },
            source,
            print_command: a.print_command,
        })
    }
}

pub fn run(global: &Global, s: Settings) -> Result<Outcome> {
    let readout = match s.source {
        Source::StatsFile(file) => {
            let ctx = global.open(EngineChoice::Local)?;
            let id = ctx.experiment(&s.experiment)?;
            ctx.readout_from_stats_file(id, &file, s.options)?
        }
        Source::Engine(choice) if s.print_command => {
            let ctx = global.open(choice)?;
            return print_command(&ctx, &s.experiment, &s.by);
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

/// `--print-command`: the readout statement written where the command engine would read it,
/// and the argv that would run it (nothing runs).
fn print_command(ctx: &crate::context::Context, experiment: &str, by: &[String]) -> Result<Outcome> {
    let crate::context::EngineChoice::Command(spec) = ctx.engine_choice() else {
        return Err(crate::error::Error::usage(format!(
            "--print-command shows how a command engine runs; {} is not one (engines with `command:` in plumb.yaml are)",
            ctx.engine_name()
        )));
    };
    let id = ctx.experiment(experiment)?;
    let by = ctx.segments(by)?;
    let dialect = ctx.engine_dialect()?;
    let (_, sql) = ctx.compile_readout(id, &by, &dialect)?;
    let file = std::env::temp_dir().join(format!("plumb-{experiment}-readout.sql"));
    std::fs::write(&file, format!("{sql}\n"))
        .map_err(|e| crate::error::Error::usage(format!("cannot write {}: {e}", file.display())))?;
    let engine = crate::execute::command::CommandEngine::new((**spec).clone());
    let (argv, stdin) = engine.argv(&file.to_string_lossy());
    let quoted: Vec<String> = argv.iter().map(|a| shell_quote(a)).collect();
    let mut text = format!(
        "engine `{}` ({} dialect) would run the readout of {} as:\n  {}{}\nstatement: {}\n",
        spec.name,
        spec.dialect,
        experiment,
        quoted.join(" "),
        if stdin { " < statement" } else { "" },
        file.display()
    );
    text.push_str("and read its stdout as ");
    text.push_str(match spec.output {
        crate::engines::Output::Csv => "CSV",
        crate::engines::Output::Tsv => "tab-separated values",
    });
    text.push_str(" with a header row (then the per-day arms and the population totals, one run each).\n");
    Ok(Outcome::stdout(text))
}

/// A word as a POSIX shell would need it, for showing a command (plumb runs argv directly).
fn shell_quote(a: &str) -> String {
    if !a.is_empty()
        && a.chars()
            .all(|c| c.is_ascii_alphanumeric() || "-_./=:,@%+{}[]".contains(c))
    {
        a.to_string()
    } else {
        format!("'{}'", a.replace('\'', "'\\''"))
    }
}
