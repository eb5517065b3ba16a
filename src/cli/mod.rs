//! The command line: raw arguments (clap) -> resolved settings -> one call into the library ->
//! what to print and the exit code.
//!
//! The only module that prints, reads the environment or decides exit codes:
//! 0 success, 1 catalog errors (diagnostics printed), 2 usage, data, engine or internal
//! errors, 3 a readout that must not be acted on (sample-ratio mismatch or a failed
//! guardrail), 4 and 5 from `plumb diff`. Output to a closed pipe (`plumb sql ... | head`)
//! ends quietly.
//!
//! Each command lives in its own module: its clap arguments, a `Settings` struct holding the
//! validated values (every flag check of the command in one place), and a `run` that opens a
//! [`Context`] and returns an [`Outcome`]. This file maps [`ErrorKind`]s to exit codes once.

mod analyze;
mod check;
mod demo;
mod diff;
mod list;
#[cfg(feature = "postgres")]
mod pg;
mod power;
mod report;
mod sql;

use crate::context::{Context, EngineChoice, Options};
use crate::diagnostics;
use crate::error::{Error, ErrorKind, Result};
use clap::{Parser, Subcommand, ValueEnum};
use std::io::Write;
use std::path::PathBuf;
use std::process::ExitCode;

/// Exit code: catalog errors.
pub const EXIT_CATALOG: u8 = 1;
/// Exit code: usage errors (bad flags, unknown experiment, missing workspace), data, engine and
/// internal errors.
pub const EXIT_USAGE: u8 = 2;
/// Exit code: the readout is void (sample-ratio mismatch) or a guardrail failed.
pub const EXIT_CHECKS: u8 = 3;
/// Exit code (`plumb diff --exit-code`): definitions changed.
pub const EXIT_DEFINITIONS_CHANGED: u8 = 4;
/// Exit code (`plumb diff --fail-on-verdict-change`): a readout verdict changed.
pub const EXIT_VERDICT_CHANGED: u8 = 5;

#[derive(Debug, Parser)]
#[command(
    name = "plumb",
    version,
    about = "Metric definitions declared once in YAML, compiled to warehouse SQL, analysed as experiment readouts."
)]
pub struct Args {
    /// Workspace folder (holding plumb.yaml); default: the nearest folder holding a plumb.yaml,
    /// from the current folder upwards (as git and cargo find theirs).
    #[arg(long, global = true, value_name = "DIR")]
    pub workspace: Option<PathBuf>,
    /// Extra dialect folders, searched before the built-in ones.
    #[arg(long, global = true, value_name = "DIR")]
    pub dialects_dir: Option<PathBuf>,
    /// Colour on a terminal: `auto` (when the output is a terminal and NO_COLOR is not set),
    /// `always` or `never`.
    #[arg(long, global = true, value_enum, default_value = "auto")]
    pub color: ColorChoice,
    #[command(subcommand)]
    pub command: Command,
}

#[derive(Debug, Clone, Copy, ValueEnum, PartialEq, Eq)]
pub enum ColorChoice {
    Auto,
    Always,
    Never,
}

impl ColorChoice {
    /// Whether to colour a stream that is (or is not) a terminal; `auto` follows the NO_COLOR
    /// convention (any non-empty value turns colour off) and a `dumb` TERM.
    fn enabled(self, terminal: bool) -> bool {
        match self {
            ColorChoice::Always => true,
            ColorChoice::Never => false,
            ColorChoice::Auto => {
                terminal
                    && std::env::var_os("NO_COLOR").is_none_or(|v| v.is_empty())
                    && std::env::var_os("TERM").is_none_or(|t| t != "dumb")
            }
        }
    }
}

#[derive(Debug, Clone, Copy, ValueEnum, PartialEq, Eq)]
pub enum Format {
    Table,
    Json,
}

#[derive(Debug, Subcommand)]
pub enum Command {
    /// Check the workspace: load, resolve and compile every experiment, bind it to the local data.
    #[command(after_help = "Examples:
  plumb check                       # one-line summary, or every error located at file:line:column
  plumb check --format json         # diagnostics as data, for editors and bots
  plumb check --deny warnings       # CI: warnings fail too (exit 1)")]
    Check(check::CheckArgs),
    /// Print the readout SQL of an experiment (or, with --report, a report's SQL).
    #[command(after_help = "Examples:
  plumb sql one_page_checkout                       # the workspace's dialect
  plumb sql one_page_checkout --dialect bigquery --by region
  plumb sql --report orders,revenue --from 2026-01-01 --to 2026-04-01 --grain week")]
    Sql(sql::SqlArgs),
    /// Run an experiment's SQL on the local data and print its readout.
    #[command(after_help = "Examples:
  plumb analyze one_page_checkout                   # headline, table, cautions (100 columns)
  plumb analyze one_page_checkout --by region,device --sequential
  plumb analyze one_page_checkout --format json     # schema_version 2; see README
  plumb analyze one_page_checkout --stats stats.csv # numbers computed in a warehouse
  plumb analyze one_page_checkout --engine postgres://analyst@db:5432/shop

Exit codes: 0 ok, 2 usage/data/engine error, 3 void (sample-ratio mismatch) or a failed guardrail.")]
    Analyze(analyze::AnalyzeArgs),
    /// What a catalog change does: definitions, affected experiments and reports, SQL and numbers.
    #[command(after_help = "Examples:
  plumb diff                                        # working tree against the merge base
  plumb diff --base main --data --format markdown   # with readout numbers, for a pull request
  plumb diff --exit-code                            # exit 4 when definitions changed
  plumb diff --data --fail-on-verdict-change        # exit 5 when a verdict changed")]
    Diff(diff::DiffArgs),
    /// List the catalog's units, tables, exposure logs, segments, metrics and experiments.
    #[command(after_help = "Examples:
  plumb list
  plumb list --format json")]
    List(list::ListArgs),
    /// Print the JSON Schema of catalog files (for editors and YAML language servers).
    #[command(after_help = "Example:
  plumb schema > plumb-catalog.schema.json
  # then, first line of a catalog file:
  # yaml-language-server: $schema=../plumb-catalog.schema.json")]
    Schema,
    /// A metric as a time series over the whole population of its unit.
    #[command(after_help = "Examples:
  plumb report orders revenue --grain week --from 2026-02-09 --to 2026-03-30
  plumb report orders --by region --format csv")]
    Report(report::ReportArgs),
    /// Units and days an experiment needs to detect a change in a metric, from history.
    #[command(after_help = "Examples:
  plumb power orders --mde 5%                       # or --mde 0.05
  plumb power orders --mde 2% --split 34,33,33 --days 14
  plumb power revenue --mde 3% --history-days 28 --until 2026-03-01")]
    Power(power::PowerArgs),
    /// Write the plant-shop demo workspace and print its main readout.
    #[command(after_help = "Examples:
  plumb demo                         # writes ./plumb-demo and prints its readout
  plumb demo /tmp/shop --shoppers 20000 --no-readout
  plumb demo my-folder --force       # write into a folder that is not empty")]
    Demo(demo::DemoArgs),
}

/// Options every command shares.
pub struct Global {
    pub workspace: PathBuf,
    pub dialects_dir: Option<PathBuf>,
}

impl Global {
    /// Opens the workspace (or `dir`) with the given engine.
    fn open_at(&self, dir: &std::path::Path, engine: EngineChoice) -> Result<Context> {
        Context::open(
            dir,
            Options {
                dialects_dir: self.dialects_dir.clone(),
                engine,
                // The system's temporary folder (TMPDIR): reading the environment is ours.
                spill_dir: Some(std::env::temp_dir().join(format!("plumb-spill-{}", std::process::id()))),
                url_engine: postgres_engine,
            },
        )
    }

    fn open(&self, engine: EngineChoice) -> Result<Context> {
        self.open_at(&self.workspace, engine)
    }
}

/// The engine of `--engine ARG`: a PostgreSQL URL (`postgres://...`), the name of one of
/// plumb.yaml's `engines:` (or `local`), or without the flag the workspace's default engine.
pub fn engine_arg(arg: Option<&str>) -> Result<EngineChoice> {
    match arg {
        None => Ok(EngineChoice::Default),
        Some(a) if a.contains("://") => postgres_engine(a),
        Some(a) if a.trim().is_empty() => Err(crate::error::Error::usage(
            "--engine needs the name of an engine in plumb.yaml, `local`, or a postgres:// URL",
        )),
        Some(a) => Ok(EngineChoice::Named(a.to_string())),
    }
}

/// A PostgreSQL URL, completed from libpq's environment variables and password file.
#[cfg(feature = "postgres")]
fn postgres_engine(url: &str) -> Result<EngineChoice> {
    Ok(EngineChoice::Postgres(Box::new(pg::config(url)?)))
}

#[cfg(not(feature = "postgres"))]
fn postgres_engine(_: &str) -> Result<EngineChoice> {
    Err(crate::error::Error::usage(
        "this plumb was built without the `postgres` feature",
    ))
}

/// One piece of a command's output, in order.
pub enum Part {
    Stdout(String),
    Stderr(String),
}

/// What a command printed and how it ends.
pub struct Outcome {
    pub parts: Vec<Part>,
    pub code: u8,
}

impl Outcome {
    fn stdout(text: impl Into<String>) -> Outcome {
        Outcome {
            parts: vec![Part::Stdout(text.into())],
            code: 0,
        }
    }

    fn with_code(mut self, code: u8) -> Outcome {
        self.code = code;
        self
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
    let global = Global {
        workspace: args.workspace.clone().unwrap_or_else(find_workspace),
        dialects_dir: args.dialects_dir.clone(),
    };
    let result = match args.command {
        Command::Check(a) => check::run(&global, a),
        Command::Sql(a) => sql::Settings::from_args(a).and_then(|s| sql::run(&global, s)),
        Command::Analyze(a) => analyze::Settings::from_args(a).and_then(|s| analyze::run(&global, s)),
        Command::Diff(a) => diff::run(&global, a),
        Command::List(a) => list::run(&global, a),
        Command::Schema => {
            let schema = crate::load::syntax::catalog_schema();
            serde_json::to_string_pretty(&schema)
                .map(|s| Outcome::stdout(s + "\n"))
                .map_err(|e| Error::bug(format!("the catalog schema does not serialise: {e}")))
        }
        Command::Report(a) => report::run(&global, a),
        Command::Power(a) => power::Settings::from_args(a).and_then(|s| power::run(&global, s)),
        Command::Demo(a) => demo::run(&global, a),
    };
    use std::io::IsTerminal;
    let color_out = args.color.enabled(std::io::stdout().is_terminal());
    let color_err = args.color.enabled(std::io::stderr().is_terminal());
    match result {
        Ok(outcome) => {
            for part in outcome.parts {
                match part {
                    Part::Stdout(text) => emit(&crate::output::colorize(&terminal_safe(&text), color_out)),
                    Part::Stderr(text) => {
                        eprint!("{}", crate::output::colorize(&terminal_safe(&text), color_err))
                    }
                }
            }
            ExitCode::from(outcome.code)
        }
        Err(e) => ExitCode::from(report_error(&e)),
    }
}

/// The nearest folder holding a `plumb.yaml`, from the current folder upwards; `.` when there
/// is none (the "no plumb.yaml" error then names the current folder).
fn find_workspace() -> PathBuf {
    let Ok(here) = std::env::current_dir() else {
        return PathBuf::from(".");
    };
    here.ancestors()
        .find(|d| d.join(crate::load::WORKSPACE_FILE).is_file())
        .map(|d| {
            if d == here {
                PathBuf::from(".")
            } else {
                d.to_path_buf()
            }
        })
        .unwrap_or_else(|| PathBuf::from("."))
}

/// Prints an error and returns its exit code.
fn report_error(e: &Error) -> u8 {
    let (text, code) = render_error(e);
    eprint!("{}", terminal_safe(&text));
    code
}

/// Everything plumb prints passes through here: control characters other than newline and
/// tab (a segment value holding `ESC]0;...BEL` or `ESC[2J` once reached the terminal raw),
/// and the characters that reorder text on screen (bidirectional overrides), are written as
/// `\u001b`-style escapes. In JSON output (whose strings serde_json has already escaped,
/// except DEL and the C1 controls) that is the same value, spelled with a JSON escape.
pub fn terminal_safe(text: &str) -> std::borrow::Cow<'_, str> {
    let unsafe_char = |c: char| {
        (c.is_control() && c != '\n' && c != '\t')
            || matches!(c, '\u{202a}'..='\u{202e}' | '\u{2066}'..='\u{2069}')
    };
    if !text.chars().any(unsafe_char) {
        return std::borrow::Cow::Borrowed(text);
    }
    let mut out = String::with_capacity(text.len() + 16);
    for c in text.chars() {
        if unsafe_char(c) {
            out.push_str(&format!("\\u{:04x}", c as u32));
        } else {
            out.push(c);
        }
    }
    std::borrow::Cow::Owned(out)
}

/// What an error prints and its exit code: the one place that maps kinds to codes.
fn render_error(e: &Error) -> (String, u8) {
    let mut text = String::new();
    if let Some(c) = e.diagnostics() {
        text += &diagnostics::render_plain(&c.sources, &c.diagnostics);
    }
    text += &format!("plumb: {e}\n");
    let code = match e.kind() {
        ErrorKind::Catalog => EXIT_CATALOG,
        ErrorKind::Bug => {
            text += "plumb: this is a bug in plumb, not in your catalog or data. Please report it with the command you ran, `plumb --version` and the message above.\n";
            EXIT_USAGE
        }
        _ => EXIT_USAGE,
    };
    (text, code)
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

/// Runs `f` with a spinner on stderr when stderr is a terminal.
fn with_progress<T>(message: &str, f: impl FnOnce() -> T) -> T {
    let p = Progress::start(message);
    let out = f();
    p.bar.inspect(|b| b.finish_and_clear());
    out
}

/// A status line on stderr (only when stderr is a terminal): the current step of a command,
/// updated by the context before each query, and at the end of a run that took more than a
/// second a line saying what was done and how long it took.
struct Progress {
    bar: Option<indicatif::ProgressBar>,
    started: std::time::Instant,
    steps: std::rc::Rc<std::cell::Cell<usize>>,
}

impl Progress {
    fn start(message: &str) -> Progress {
        use std::io::IsTerminal;
        let bar = std::io::stderr().is_terminal().then(|| {
            let bar = indicatif::ProgressBar::new_spinner();
            bar.set_message(message.to_string());
            bar.enable_steady_tick(std::time::Duration::from_millis(100));
            bar
        });
        Progress {
            bar,
            started: std::time::Instant::now(),
            steps: Default::default(),
        }
    }

    /// Shows the context's steps on the status line.
    fn follow(&self, ctx: &Context) {
        let bar = self.bar.clone();
        let steps = self.steps.clone();
        ctx.on_progress(move |what| {
            steps.set(steps.get() + 1);
            if let Some(b) = &bar {
                b.set_message(what.to_string());
            }
        });
    }

    /// Clears the status line; a summary part for stderr when the run was long and shown.
    fn finish(self, what: &str) -> Option<Part> {
        let bar = self.bar?;
        bar.finish_and_clear();
        let secs = self.started.elapsed().as_secs_f64();
        let steps = self.steps.get();
        (secs > 1.0).then(|| {
            Part::Stderr(format!(
                "plumb: {what} in {secs:.1}s ({steps} {})\n",
                if steps == 1 { "query" } else { "queries" }
            ))
        })
    }
}

/// A relative change or share written as `5%` or `0.05` (positive; without `%` below 1, so
/// that `5` is not read as 500%).
fn parse_share(text: &str) -> Option<f64> {
    let t = text.trim();
    let value = match t.strip_suffix('%') {
        Some(p) => p.trim().parse::<f64>().ok()? / 100.0,
        None => t.parse::<f64>().ok().filter(|v| *v < 1.0)?,
    };
    (value.is_finite() && value > 0.0).then_some(value)
}

/// JSON text of a boundary value, pretty and newline-terminated.
fn json(value: &impl serde::Serialize) -> Result<String> {
    serde_json::to_string_pretty(value)
        .map(|s| s + "\n")
        .map_err(|e| Error::bug(format!("output does not serialise: {e}")))
}

/// Checks a significance level: `--alpha` from 1e-6 to 0.5. Smaller levels make intervals
/// overflow double precision (null intervals at 1e-300) and larger ones are not a test.
pub fn check_alpha(alpha: f64) -> crate::error::Result<()> {
    if (1e-6..=0.5).contains(&alpha) {
        Ok(())
    } else {
        Err(crate::error::Error::usage(format!(
            "--alpha must be between 0.000001 and 0.5 (e.g. 0.05 for 95% intervals), got {alpha}"
        )))
    }
}

#[cfg(test)]
mod tests {
    #[test]
    fn shares_take_percent_or_fraction() {
        assert_eq!(super::parse_share("5%"), Some(0.05));
        assert_eq!(super::parse_share("0.05"), Some(0.05));
        assert_eq!(super::parse_share(" 2.5 % "), Some(0.025));
        assert_eq!(super::parse_share("5"), None);
        assert_eq!(super::parse_share("-1%"), None);
        assert_eq!(super::parse_share("abc"), None);
    }

    #[test]
    fn control_characters_never_reach_the_terminal_raw() {
        let hostile = "north\u{1b}]0;pwned\u{7}\u{1b}[2J\r\u{9b}\u{202e}x\n\tok";
        let safe = super::terminal_safe(hostile);
        assert_eq!(
            safe,
            "north\\u001b]0;pwned\\u0007\\u001b[2J\\u000d\\u009b\\u202ex\n\tok"
        );
        // In JSON the escape is the same value.
        let json = serde_json::to_string(&"a\u{1b}b\u{7f}").unwrap();
        let back: String = serde_json::from_str(&super::terminal_safe(&json)).unwrap();
        assert_eq!(back, "a\u{1b}b\u{7f}");
        assert!(matches!(
            super::terminal_safe("plain"),
            std::borrow::Cow::Borrowed(_)
        ));
    }

    use super::*;

    /// The documented exit codes, one per error kind, decided in one place.
    #[test]
    fn every_error_kind_maps_to_its_documented_exit_code() {
        let catalog = Error::catalog(crate::source::SourceMap::new(), vec![]);
        assert_eq!(render_error(&catalog).1, EXIT_CATALOG);
        for e in [
            Error::usage("u"),
            Error::data("d"),
            Error::engine("e"),
            Error::dialect("x"),
            Error::bug("b"),
        ] {
            assert_eq!(render_error(&e).1, EXIT_USAGE, "{:?}", e.kind());
        }
    }

    #[test]
    fn an_internal_error_says_it_is_a_bug_and_how_to_report_it() {
        let (text, _) = render_error(&Error::bug("template broke"));
        assert!(text.starts_with("plumb: template broke\n"), "{text}");
        assert!(
            text.contains("this is a bug in plumb") && text.contains("plumb --version"),
            "{text}"
        );
        let (text, _) = render_error(&Error::usage("unknown experiment `x`"));
        assert_eq!(
            text, "plumb: unknown experiment `x`\n",
            "user errors are not called bugs"
        );
    }
}
