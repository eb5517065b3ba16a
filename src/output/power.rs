//! `plumb power` as text or JSON: the measured history, the traffic, the plan and alternatives.
//!
//! Formatting only: the numbers come from `Context::history` and `stats::power::study`.

use super::sig;
use crate::context::History;
use crate::stats::power::Study;

/// What the power command was asked and what it measured.
pub struct PowerReport<'a> {
    pub metric: &'a str,
    pub start: String,
    pub end: String,
    pub history: History,
    pub units_per_day: f64,
    pub units_per_day_measured: f64,
    /// The traffic was given on the command line, not measured.
    pub units_per_day_given: bool,
    /// `--history-days` as asked.
    pub history_days_asked: i64,
    /// Days of the window actually used (the asked window within the exposure log's days).
    pub history_days: f64,
    /// The window was cut to the days the exposure log covers.
    pub bounded: bool,
    pub mde: f64,
    pub alpha: f64,
    pub power: f64,
    pub split: &'a [f64],
    pub days: Option<f64>,
    pub study: Study,
}

pub fn json(r: &PowerReport) -> String {
    let h = &r.history;
    let s = &r.study;
    let json = serde_json::json!({
        "metric": r.metric,
        "history": {"start": r.start, "end": r.end, "units": h.n, "mean": h.mean, "sd": h.sd,
                    "days": r.history_days, "days_asked": r.history_days_asked, "bounded_by_exposure_log": r.bounded},
        "units_per_day": r.units_per_day,
        "units_per_day_measured": r.units_per_day_measured,
        "mde": r.mde, "alpha": r.alpha, "power": r.power, "split": r.split,
        "units_per_arm": s.main.units_per_arm, "total_units": s.main.total_units, "days": s.main.days,
        "other_splits": s.alternatives.iter().map(|(l, p)| serde_json::json!({"split": l, "total_units": p.total_units, "days": p.days})).collect::<Vec<_>>(),
        "detectable_mde_in_days": s.detectable,
    });
    serde_json::to_string_pretty(&json).expect("plain JSON values") + "\n"
}

pub fn text(r: &PowerReport) -> String {
    let h = &r.history;
    let main = &r.study.main;
    let mut out = format!(
        "Metric {}: mean {} and sd {} per unit over {} units exposed {} to {} (same SQL as a readout).\n",
        r.metric,
        sig(h.mean, 4),
        sig(h.sd, 4),
        h.n,
        r.start,
        r.end
    );
    if r.bounded {
        out += &format!(
            "History: {} of the {} days asked for, because the exposure log covers only those.\n",
            sig(r.history_days, 3),
            r.history_days_asked
        );
    }
    out += &format!(
        "Traffic: {} units per day{}.\n",
        sig(r.units_per_day, 4),
        if r.units_per_day_given {
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
        "To detect a {}% change (alpha {}, power {}) with split {}: {} units per arm ({} in all), about {:.1} days.\n",
        sig(r.mde * 100.0, 3),
        r.alpha,
        r.power,
        r.split
            .iter()
            .map(|s| s.to_string())
            .collect::<Vec<_>>()
            .join("/"),
        arms.join(" / "),
        main.total_units.ceil(),
        main.days.unwrap_or(f64::NAN)
    );
    for (label, p) in &r.study.alternatives {
        out += &format!(
            "  with a {label} split instead: {:.0} units in all, about {:.1} days.\n",
            p.total_units.ceil(),
            p.days.unwrap_or(f64::NAN)
        );
    }
    if let (Some(d), Some(m)) = (r.days, r.study.detectable) {
        out += &format!(
            "In {d} days ({:.0} units) it could detect changes of {}% or more.\n",
            d * r.units_per_day,
            sig(m * 100.0, 3)
        );
    }
    out += "Assumes the history window is typical of the experiment period, units independent, and a normal approximation for the difference (enough units per arm). Uneven splits need more units in all because the smaller arm dominates the variance.\n";
    out
}
