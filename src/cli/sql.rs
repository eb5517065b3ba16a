//! `plumb sql`: the readout query of an experiment, or a report query, in any dialect.

use super::report::{ReportWindow, Request};
use super::{Global, Outcome};
use crate::context::EngineChoice;
use crate::error::Result;

#[derive(Debug, clap::Args)]
pub struct SqlArgs {
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
}

/// What to print.
pub enum Settings {
    Readout {
        experiment: String,
        by: Vec<String>,
        dialect: Option<String>,
    },
    Report {
        request: Request,
        dialect: Option<String>,
    },
}

impl Settings {
    pub fn from_args(a: SqlArgs) -> Result<Settings> {
        Ok(if a.report.is_empty() {
            Settings::Readout {
                experiment: a.experiment.unwrap_or_default(),
                by: a.by,
                dialect: a.dialect,
            }
        } else {
            Settings::Report {
                request: Request::new(a.report, a.by, a.window),
                dialect: a.dialect,
            }
        })
    }
}

pub fn run(global: &Global, settings: Settings) -> Result<Outcome> {
    let ctx = global.open(EngineChoice::Local)?;
    let sql = match settings {
        Settings::Report { request, dialect } => {
            let plan = request.plan(&ctx)?;
            ctx.compile_report(&plan, &*ctx.dialect(dialect.as_deref())?)?
        }
        Settings::Readout {
            experiment,
            by,
            dialect,
        } => {
            let id = ctx.experiment(&experiment)?;
            let by = ctx.segments(&by)?;
            let dialect = ctx.dialect(dialect.as_deref())?;
            ctx.compile_readout(id, &by, &dialect)?.1
        }
    };
    Ok(Outcome::stdout(sql))
}
