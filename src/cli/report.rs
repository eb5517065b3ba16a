//! `plumb report`: metrics as time series over the whole population (or one experiment's
//! units), from the same definitions as readouts. Also resolves report flags for `plumb sql
//! --report`.

use super::{Global, Outcome};
use crate::context::Context;
use crate::error::{Error, Result};
use crate::plan::ReportPlan;
use crate::time::{Grain, Timestamp};
use clap::ValueEnum;

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

#[derive(Debug, clap::Args)]
pub struct ReportArgs {
    #[arg(required = true)]
    metrics: Vec<String>,
    /// Where the SQL runs: an engine under `engines:` in plumb.yaml, `local`, or a
    /// postgres:// URL (default: `default_engine:`, else local).
    #[arg(long, value_name = "NAME|URL")]
    engine: Option<String>,
    /// Slice by this segment (an exposure-row segment needs --exposed-in). Comma lists are
    /// accepted like everywhere else; a report slices by one segment at a time.
    #[arg(long, value_name = "SEGMENT", value_delimiter = ',')]
    by: Vec<String>,
    #[command(flatten)]
    window: ReportWindow,
    #[arg(long, value_enum, default_value = "table")]
    format: ReportFormat,
}

/// Report flags with their values checked; names are looked up in [`Request::plan`].
pub struct Request {
    pub metrics: Vec<String>,
    pub by: Vec<String>,
    pub grain: Grain,
    pub from: Option<String>,
    pub to: Option<String>,
    pub exposed_in: Option<String>,
}

impl Request {
    pub fn new(metrics: Vec<String>, by: Vec<String>, window: ReportWindow) -> Request {
        Request {
            metrics,
            by,
            grain: match window.grain {
                GrainArg::Hour => Grain::Hour,
                GrainArg::Day => Grain::Day,
                GrainArg::Week => Grain::Week,
                GrainArg::Month => Grain::Month,
            },
            from: window.from,
            to: window.to,
            exposed_in: window.exposed_in,
        }
    }

    /// Resolves names against the catalog and plans the report query.
    pub fn plan(&self, ctx: &Context) -> Result<ReportPlan> {
        let ids = self
            .metrics
            .iter()
            .map(|m| ctx.metric(m))
            .collect::<Result<Vec<_>>>()?;
        let exposed = self
            .exposed_in
            .as_deref()
            .map(|e| ctx.experiment(e))
            .transpose()?;
        let exp = exposed.map(|id| &ctx.catalog().experiments[id]);
        let parse = |flag: &str, v: &Option<String>, default: Option<Timestamp>| -> Result<Timestamp> {
            match (v, default) {
                (Some(t), _) => Timestamp::parse(t).map_err(|e| Error::usage(format!("{flag}: {e}"))),
                (None, Some(d)) => Ok(d),
                (None, None) => Err(Error::usage(format!(
                    "{flag} is required (e.g. {flag} 2026-03-01)"
                ))),
            }
        };
        let from = parse("--from", &self.from, exp.map(|e| e.start))?;
        let to = parse("--to", &self.to, exp.map(|e| e.end))?;
        if to <= from {
            return Err(Error::usage("--to must be after --from"));
        }
        let periods = self.grain.periods(from, to).len();
        if periods > 100_000 {
            return Err(Error::usage(format!(
                "{periods} periods is too many; use a coarser --grain"
            )));
        }
        let segments = ctx.segments(&self.by)?;
        if segments.len() > 1 {
            return Err(Error::usage("a report slices by one segment at a time"));
        }
        let segment = segments.first().copied();
        if let Some(s) = segment
            && matches!(
                ctx.catalog().segments[s].kind,
                crate::ir::SegmentKind::FromExposure(_)
            )
            && exposed.is_none()
        {
            return Err(Error::usage(format!(
                "segment `{}` is read from the exposure log, so it needs --exposed-in EXPERIMENT",
                ctx.catalog().segments[s].name
            )));
        }
        Ok(crate::plan::plan_report(
            ctx.catalog(),
            &ids,
            self.grain,
            from,
            to,
            segment,
            exposed,
        ))
    }
}

pub fn run(global: &Global, args: ReportArgs) -> Result<Outcome> {
    let format = args.format;
    let request = Request::new(args.metrics, args.by, args.window);
    let ctx = global.open(super::engine_arg(args.engine.as_deref())?)?;
    let plan = request.plan(&ctx)?;
    let message = format!("running the report on {}", ctx.engine_name());
    let rows = super::with_progress(&message, || ctx.report(&plan))?;
    Ok(Outcome::stdout(match format {
        ReportFormat::Table => crate::report::text_output(&rows),
        ReportFormat::Json => super::json(&rows)?,
        ReportFormat::Csv => crate::report::csv_output(&rows),
    }))
}
