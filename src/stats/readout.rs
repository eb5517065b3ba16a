//! Assembles a readout: the arm-level statistics table in, per metric and arm the effects,
//! the sample-ratio check, exclusions, and plain-words assumptions and cautions out.
//!
//! [`Readout`] is a boundary type: `--format json` serialises it, and its field names are a
//! contract with users' scripts (see README.md). Keys may be added, never renamed.

use super::{Estimate, Moments, RatioMoments, SampleRatio};
use crate::ir::Role;
use serde::Serialize;
use std::collections::BTreeMap;

/// One row of the arm-level statistics table returned by the readout query.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct ArmRow {
    pub arm: String,
    /// `None` for the overall row; `(segment name, value)` for a segment slice.
    pub segment: Option<(String, Option<String>)>,
    pub units: u64,
    /// Per-unit column -> moments.
    pub columns: BTreeMap<String, Moments>,
    /// Covariance column name (see `plan::covariance_name`) -> sample covariance.
    pub covariances: BTreeMap<String, f64>,
}

/// The whole statistics table: one row per arm, plus the exclusion counts.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct StatsTable {
    pub rows: Vec<ArmRow>,
    pub excluded_multiple_arms: u64,
    pub excluded_missing_arm: u64,
    pub excluded_rows_without_unit: u64,
}

/// What the readout needs to know about the experiment besides the numbers.
#[derive(Debug, Clone)]
pub struct ReadoutSpec {
    pub experiment: String,
    pub control: String,
    /// Arms with planned shares (control first).
    pub arms: Vec<(String, f64)>,
    pub metrics: Vec<MetricSpec>,
    pub alpha: f64,
    pub start: String,
    pub end: String,
    /// Segments sliced although the experiment did not declare them (e.g. `--by`).
    pub exploratory_segments: Vec<String>,
}

#[derive(Debug, Clone)]
pub struct MetricSpec {
    pub name: String,
    pub role: Role,
    pub kind: MetricShape,
    /// `Some(true)` when higher is better, `Some(false)` when lower is better.
    pub higher_is_better: Option<bool>,
}

#[derive(Debug, Clone)]
pub enum MetricShape {
    Mean {
        column: String,
    },
    Ratio {
        numerator: String,
        denominator: String,
        /// Key of their covariance in [`ArmRow::covariances`].
        covariance: String,
    },
}

#[derive(Debug, Clone, Serialize)]
pub struct Readout {
    pub experiment: String,
    pub control: String,
    pub alpha: f64,
    pub start: String,
    pub end: String,
    pub arms: Vec<ArmOut>,
    pub excluded: Excluded,
    pub sample_ratio: Option<SampleRatioOut>,
    pub results: Vec<ResultRow>,
    pub assumptions: Vec<String>,
    pub cautions: Vec<String>,
}

#[derive(Debug, Clone, Serialize)]
pub struct ArmOut {
    pub name: String,
    pub units: u64,
    pub planned_share: Option<f64>,
}

#[derive(Debug, Clone, Serialize)]
pub struct Excluded {
    /// Units exposed to more than one arm.
    pub multiple_arms: u64,
    /// Units whose exposure rows carry no arm.
    pub missing_arm: u64,
    /// Units exposed to an arm that is not in the experiment's `split`.
    pub unknown_arm: u64,
    /// Exposure rows without a unit key (not units, so not counted above).
    pub rows_without_unit: u64,
}

#[derive(Debug, Clone, Serialize)]
pub struct SampleRatioOut {
    pub chi_square: f64,
    pub df: u32,
    pub p_value: f64,
    pub mismatch: bool,
}

impl From<SampleRatio> for SampleRatioOut {
    fn from(s: SampleRatio) -> Self {
        SampleRatioOut {
            chi_square: s.chi_square,
            df: s.df,
            p_value: s.p_value,
            mismatch: s.mismatch,
        }
    }
}

#[derive(Debug, Clone, Serialize)]
pub struct ResultRow {
    pub metric: String,
    pub role: &'static str,
    pub arm: String,
    /// Null for the whole experiment; the segment and its value for a slice.
    pub segment: Option<SegmentRef>,
    pub control: ArmSummary,
    pub treatment: ArmSummary,
    pub difference: Option<DifferenceOut>,
    pub relative: Option<RelativeOut>,
    /// `increase`, `decrease`, `no detectable change`, or `not enough data`.
    pub change: &'static str,
    /// `better`, `worse` or null, from the metric's `direction`.
    pub verdict: Option<&'static str>,
}

#[derive(Debug, Clone, Serialize)]
pub struct SegmentRef {
    pub name: String,
    /// Null when the unit has no value for the segment.
    pub value: Option<String>,
}

#[derive(Debug, Clone, Serialize)]
pub struct ArmSummary {
    pub n: u64,
    pub mean: Option<f64>,
    pub sd: Option<f64>,
}

#[derive(Debug, Clone, Serialize)]
pub struct DifferenceOut {
    pub estimate: f64,
    pub ci_low: f64,
    pub ci_high: f64,
    pub p_value: Option<f64>,
    pub se: f64,
    /// Welch–Satterthwaite degrees of freedom; null for the normal (delta-method) reference.
    pub df: Option<f64>,
}

#[derive(Debug, Clone, Serialize)]
pub struct RelativeOut {
    pub estimate: f64,
    pub ci_low: f64,
    pub ci_high: f64,
}

fn finite(x: f64) -> Option<f64> {
    x.is_finite().then_some(x)
}

fn summary(m: Option<&Moments>) -> ArmSummary {
    match m {
        Some(m) => ArmSummary {
            n: m.n,
            mean: finite(m.mean),
            sd: finite(m.sd()),
        },
        None => ArmSummary {
            n: 0,
            mean: None,
            sd: None,
        },
    }
}

fn ratio_summary(r: Option<&RatioMoments>) -> ArmSummary {
    match r {
        Some(r) => ArmSummary {
            n: r.numerator.n,
            mean: finite(r.ratio()),
            // The sd of a ratio metric is that of its linearised per-unit value, so that
            // sd / sqrt(n) is the standard error of the arm's ratio (delta method).
            sd: finite((r.var_of_ratio() * r.numerator.n as f64).sqrt()),
        },
        None => ArmSummary {
            n: 0,
            mean: None,
            sd: None,
        },
    }
}

fn difference(e: &Estimate) -> DifferenceOut {
    DifferenceOut {
        estimate: e.estimate,
        ci_low: e.ci_low,
        ci_high: e.ci_high,
        p_value: e.p_value,
        se: e.se,
        df: finite(e.df),
    }
}

/// Builds the readout. Pure: the same table and spec always give the same readout.
pub fn build(spec: &ReadoutSpec, table: &StatsTable) -> Readout {
    let planned: BTreeMap<&str, f64> = spec.arms.iter().map(|(a, s)| (a.as_str(), *s)).collect();
    let row = |arm: &str| table.rows.iter().find(|r| r.arm == arm && r.segment.is_none());
    let mut arms: Vec<ArmOut> = spec
        .arms
        .iter()
        .map(|(name, share)| ArmOut {
            name: name.clone(),
            units: row(name).map(|r| r.units).unwrap_or(0),
            planned_share: Some(*share),
        })
        .collect();
    let mut unknown_arm = 0;
    for r in table.rows.iter().filter(|r| r.segment.is_none()) {
        if !planned.contains_key(r.arm.as_str()) {
            unknown_arm += r.units;
            arms.push(ArmOut {
                name: r.arm.clone(),
                units: r.units,
                planned_share: None,
            });
        }
    }
    let observed: Vec<u64> = spec
        .arms
        .iter()
        .map(|(a, _)| row(a).map(|r| r.units).unwrap_or(0))
        .collect();
    let shares: Vec<f64> = spec.arms.iter().map(|(_, s)| *s).collect();
    let srm = super::sample_ratio(&observed, &shares);

    let mut groups: Vec<Option<(String, Option<String>)>> = vec![None];
    for r in &table.rows {
        if r.segment.is_some() && !groups.contains(&r.segment) {
            groups.push(r.segment.clone());
        }
    }
    let mut results = Vec::new();
    for group in &groups {
        let rows: Vec<&ArmRow> = table.rows.iter().filter(|r| &r.segment == group).collect();
        let segment = group.as_ref().map(|(name, value)| SegmentRef {
            name: name.clone(),
            value: value.clone(),
        });
        results.extend(metric_rows(spec, &rows, segment));
    }
    let excluded = Excluded {
        multiple_arms: table.excluded_multiple_arms,
        missing_arm: table.excluded_missing_arm,
        unknown_arm,
        rows_without_unit: table.excluded_rows_without_unit,
    };
    let cautions = cautions(spec, srm.as_ref(), &excluded, &results);
    Readout {
        experiment: spec.experiment.clone(),
        control: spec.control.clone(),
        alpha: spec.alpha,
        start: spec.start.clone(),
        end: spec.end.clone(),
        arms,
        excluded,
        sample_ratio: srm.map(Into::into),
        results,
        assumptions: assumptions(spec),
        cautions,
    }
}

/// Result rows of every metric and non-control arm for one group of arm rows.
fn metric_rows(spec: &ReadoutSpec, rows: &[&ArmRow], segment: Option<SegmentRef>) -> Vec<ResultRow> {
    let row = |arm: &str| rows.iter().copied().find(|r| r.arm == arm);
    let mut results = Vec::new();
    for m in &spec.metrics {
        for (arm, _) in spec.arms.iter().skip(1) {
            let (c, t) = (row(&spec.control), row(arm));
            let (control, treatment, diff, rel) = match &m.kind {
                MetricShape::Mean { column } => {
                    let cm = c.and_then(|r| r.columns.get(column));
                    let tm = t.and_then(|r| r.columns.get(column));
                    let (d, r) = match (cm, tm) {
                        (Some(cm), Some(tm)) => (
                            super::welch(cm, tm, spec.alpha),
                            super::relative(cm, tm, spec.alpha),
                        ),
                        _ => (None, None),
                    };
                    (summary(cm), summary(tm), d, r)
                }
                MetricShape::Ratio {
                    numerator,
                    denominator,
                    covariance,
                } => {
                    let moments = |r: Option<&ArmRow>| -> Option<RatioMoments> {
                        let r = r?;
                        Some(RatioMoments {
                            numerator: *r.columns.get(numerator)?,
                            denominator: *r.columns.get(denominator)?,
                            cov: *r.covariances.get(covariance)?,
                        })
                    };
                    let (cm, tm) = (moments(c), moments(t));
                    let (d, r) = match (&cm, &tm) {
                        (Some(cm), Some(tm)) => (
                            super::ratio_difference(cm, tm, spec.alpha),
                            super::ratio_relative(cm, tm, spec.alpha),
                        ),
                        _ => (None, None),
                    };
                    (ratio_summary(cm.as_ref()), ratio_summary(tm.as_ref()), d, r)
                }
            };
            let change = match diff.as_ref().and_then(|d| d.p_value.map(|p| (d.estimate, p))) {
                None if diff.is_some() => "no detectable change",
                None => "not enough data",
                Some((_, p)) if p >= spec.alpha => "no detectable change",
                Some((e, _)) if e > 0.0 => "increase",
                Some(_) => "decrease",
            };
            let verdict = match (change, m.higher_is_better) {
                ("increase", Some(up)) | ("decrease", Some(up)) => Some(if (change == "increase") == up {
                    "better"
                } else {
                    "worse"
                }),
                _ => None,
            };
            results.push(ResultRow {
                metric: m.name.clone(),
                role: m.role.as_str(),
                arm: arm.clone(),
                segment: segment.clone(),
                control,
                treatment,
                difference: diff.as_ref().map(difference),
                relative: rel.map(|r| RelativeOut {
                    estimate: r.estimate,
                    ci_low: r.ci_low,
                    ci_high: r.ci_high,
                }),
                change,
                verdict,
            });
        }
    }
    results
}

fn assumptions(spec: &ReadoutSpec) -> Vec<String> {
    let conf = (1.0 - spec.alpha) * 100.0;
    vec![
        "Units are assigned to arms at random and independently; each unit is counted in the arm of its first exposure.".into(),
        format!(
            "Only events from a unit's first exposure (within the metric's window) up to the data cut-off {} count.",
            spec.end
        ),
        format!(
            "Differences are treatment minus control with {conf:.0}% intervals: Welch's t for means; the delta method (normal approximation) for relative differences and ratio metrics. Both rely on enough units per arm for averages to be approximately normal."
        ),
        "p-values are for one look at the data at the planned end; looking repeatedly and stopping on a good p-value inflates false positives.".into(),
    ]
}

fn cautions(
    spec: &ReadoutSpec,
    srm: Option<&SampleRatio>,
    ex: &Excluded,
    results: &[ResultRow],
) -> Vec<String> {
    let mut out = Vec::new();
    match srm {
        Some(s) if s.mismatch => out.push(format!(
            "Sample-ratio mismatch: the arm sizes are very unlikely under the planned split (chi-square p = {:.2e} < {}). Assignment or logging is broken; the readout is void until the cause is found.",
            s.p_value,
            super::SRM_THRESHOLD
        )),
        Some(_) => {}
        None => out.push("The sample-ratio check could not run (fewer than two arms with units).".into()),
    }
    if ex.multiple_arms > 0 {
        out.push(format!(
            "{} units were exposed to more than one arm and are excluded from every metric.",
            ex.multiple_arms
        ));
    }
    if ex.missing_arm > 0 {
        out.push(format!(
            "{} units had exposure rows without an arm and are excluded.",
            ex.missing_arm
        ));
    }
    if ex.unknown_arm > 0 {
        out.push(format!(
            "{} units were exposed to arms that are not in the planned split and are excluded.",
            ex.unknown_arm
        ));
    }
    if ex.rows_without_unit > 0 {
        out.push(format!(
            "{} exposure rows had no unit key and were ignored.",
            ex.rows_without_unit
        ));
    }
    if !spec.exploratory_segments.is_empty() {
        out.push(format!(
            "Segments {} were chosen after the fact (not declared on the experiment): their rows are exploratory; confirm any finding in a new experiment.",
            spec.exploratory_segments.join(", ")
        ));
    }
    if results.iter().any(|r| r.segment.is_some()) {
        out.push("Segment rows slice the same units many ways: expect some to differ by chance, and read them as a drill-down, not as separate results.".into());
    }
    let comparisons = results
        .iter()
        .filter(|r| r.segment.is_none() && r.difference.as_ref().is_some_and(|d| d.p_value.is_some()))
        .count();
    if comparisons > 1 {
        out.push(format!(
            "{comparisons} comparisons are shown and p-values are not adjusted for multiplicity: about {:.1} of them would look significant at alpha = {} by chance alone.",
            comparisons as f64 * spec.alpha,
            spec.alpha
        ));
    }
    let thin = results.iter().filter(|r| r.change == "not enough data").count();
    if thin > 0 {
        out.push(format!(
            "{thin} results have too few units (fewer than two per arm with a value) to compare."
        ));
    }
    if results.iter().any(|r| r.change == "no detectable change") {
        out.push("\"No detectable change\" is not evidence of no effect: the interval shows which effects the data cannot rule out.".into());
    }
    out
}
