//! `plumb power`: units and days an experiment needs to detect a change in a metric, with the
//! metric's variance and the traffic measured from history by the readout SQL itself.

use super::{Format, Global, Outcome};
use crate::error::{Error, Result};
use crate::output::power::PowerReport;
use crate::stats::power::{Target, study};
use crate::time::Timestamp;

#[derive(Debug, clap::Args)]
pub struct PowerArgs {
    metric: String,
    /// Where the SQL runs: an engine under `engines:` in plumb.yaml, `local`, or a
    /// postgres:// URL (default: `default_engine:`, else local).
    #[arg(long, value_name = "NAME|URL")]
    engine: Option<String>,
    /// Smallest relative change worth detecting: `2%` or `0.02`.
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
}

/// Validated flags.
pub struct Settings {
    metric: String,
    /// Relative MDE (0.02 for `2%`).
    mde: f64,
    alpha: f64,
    power: f64,
    split: Vec<f64>,
    days: Option<f64>,
    units_per_day: Option<f64>,
    history_days: i64,
    until: Option<String>,
    exposures: Option<String>,
    format: Format,
    engine: Option<String>,
}

impl Settings {
    pub fn from_args(a: PowerArgs) -> Result<Settings> {
        let mde = super::parse_share(&a.mde).ok_or_else(|| {
            Error::usage(format!(
                "--mde must be a relative change such as 2% or 0.02, got `{}`",
                a.mde
            ))
        })?;
        super::check_alpha(a.alpha)?;
        if !(a.power > 0.0 && a.power < 1.0) {
            return Err(Error::usage("--power must be between 0 and 1, e.g. 0.8"));
        }
        if a.split.len() < 2 || a.split.iter().any(|s| !s.is_finite() || *s <= 0.0) {
            return Err(Error::usage(
                "--split needs at least two positive shares, control first, e.g. 50,50",
            ));
        }
        if a.history_days < 1 {
            return Err(Error::usage("--history-days must be at least 1"));
        }
        if let Some(d) = a.days.filter(|d| !(d.is_finite() && *d > 0.0)) {
            return Err(Error::usage(format!(
                "--days must be a positive number of days, got {d}"
            )));
        }
        if let Some(u) = a.units_per_day.filter(|u| !(u.is_finite() && *u > 0.0)) {
            return Err(Error::usage(format!(
                "--units-per-day must be a positive number, got {u}"
            )));
        }
        Ok(Settings {
            metric: a.metric,
            mde,
            alpha: a.alpha,
            power: a.power,
            split: a.split,
            days: a.days,
            units_per_day: a.units_per_day,
            history_days: a.history_days,
            until: a.until,
            exposures: a.exposures,
            format: a.format,
            engine: a.engine,
        })
    }
}

pub fn run(global: &Global, s: Settings) -> Result<Outcome> {
    let ctx = global.open(super::engine_arg(s.engine.as_deref())?)?;
    let catalog = ctx.catalog();
    let metric = ctx.metric(&s.metric)?;
    let unit = catalog.metrics[metric].unit;
    let log = match &s.exposures {
        Some(name) => ctx.exposure_log(name)?,
        None => catalog
            .exposure_logs
            .iter()
            .position(|l| l.unit == unit)
            .ok_or_else(|| {
                Error::usage(format!(
                    "no exposure log counts {}s; pass --exposures NAME",
                    catalog.units[unit].name
                ))
            })?,
    };
    let end = match &s.until {
        Some(t) => Timestamp::parse(t).map_err(Error::usage)?,
        None => catalog
            .experiments
            .iter()
            .filter(|e| e.exposures == log)
            .map(|e| e.end)
            .max()
            .ok_or_else(|| Error::usage("no experiment uses this exposure log; pass --until DATE"))?,
    };
    // The window asked for, bounded by the days the exposure log covers: units per day are
    // counted over days that could have had exposures, not over days before logging began.
    let asked = end.plus(-s.history_days * 86_400);
    let span = ctx.exposure_span(log)?;
    let (start, end, bounded) = match span {
        Some((first, last)) => {
            let first_day = Timestamp(first.0.div_euclid(86_400) * 86_400);
            let after_last_day = Timestamp((last.0.div_euclid(86_400) + 1) * 86_400);
            let (lo, hi) = (asked.max(first_day), end.min(after_last_day));
            if lo >= hi {
                return Err(Error::usage(format!(
                    "exposure log `{}` has no exposures between {} and {}; it covers {} to {}. Pass --until inside that range",
                    catalog.exposure_logs[log].name,
                    asked.to_iso(),
                    end.to_iso(),
                    first_day.to_iso(),
                    after_last_day.to_iso()
                )));
            }
            (lo, hi, lo != asked || hi != end)
        }
        None => (asked, end, false),
    };
    let window_days = (end.0 - start.0) as f64 / 86_400.0;
    let message = format!("reading {} days of history for {}", s.history_days, s.metric);
    let history = super::with_progress(&message, || ctx.history(metric, log, start, end))?;
    let (mean, sd) = (history.mean, history.sd);
    if !(mean.is_finite() && sd.is_finite() && mean != 0.0) {
        return Err(Error::usage(format!(
            "{} has mean {mean} and sd {sd} over the history window; a relative MDE needs a nonzero mean",
            s.metric
        )));
    }
    let measured = history.units as f64 / window_days;
    let per_day = s.units_per_day.unwrap_or(measured);
    let target = Target {
        mde: s.mde,
        alpha: s.alpha,
        power: s.power,
        split: &s.split,
        units_per_day: per_day,
        days: s.days,
    };
    let study = study(mean, sd, &target).ok_or_else(|| Error::usage("cannot plan with these inputs"))?;
    let report = PowerReport {
        metric: &s.metric,
        start: start.to_iso(),
        end: end.to_iso(),
        history,
        units_per_day: per_day,
        units_per_day_measured: measured,
        units_per_day_given: s.units_per_day.is_some(),
        history_days_asked: s.history_days,
        history_days: window_days,
        bounded,
        mde: s.mde,
        alpha: s.alpha,
        power: s.power,
        split: &s.split,
        days: s.days,
        study,
    };
    Ok(Outcome::stdout(match s.format {
        Format::Json => crate::output::power::json(&report),
        Format::Table => crate::output::power::text(&report),
    }))
}
