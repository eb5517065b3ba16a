//! Assembles a readout: the arm-level statistics table in, per metric and arm the effects,
//! the sample-ratio check, exclusions, and plain-words assumptions and cautions out.
//!
//! [`Readout`] is a boundary type: `--format json` serialises it, and its field names are a
//! contract with users' scripts (see README.md). Keys may be added, never renamed.

use super::analysis::{self, ArmMoments, Options, RatioCovariate};
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
    /// Apply CUPED where covariate moments are present.
    pub cuped: bool,
    /// Always-valid (mSPRT) p-values and intervals instead of fixed-sample ones.
    pub sequential: bool,
}

#[derive(Debug, Clone)]
pub struct MetricSpec {
    pub name: String,
    pub role: Role,
    pub kind: MetricShape,
    /// `Some(true)` when higher is better, `Some(false)` when lower is better.
    pub higher_is_better: Option<bool>,
    /// A 0/1 metric (any, at_least): compared as two proportions.
    pub binary: bool,
    /// Declared minimum detectable effect, relative (0.02 for `2%`).
    pub mde: Option<f64>,
    /// Pre-exposure covariate columns, when the experiment has a covariate window.
    pub covariate: Option<CovariateShape>,
}

/// Where a metric's covariate moments are in the statistics table.
#[derive(Debug, Clone)]
pub enum CovariateShape {
    Mean {
        column: String,
        /// Key of cov(metric, covariate).
        covariance: String,
    },
    Ratio {
        numerator: String,
        denominator: String,
        /// Keys of cov(num_pre, den_pre), cov(num, num_pre), cov(num, den_pre),
        /// cov(den, num_pre), cov(den, den_pre).
        pre: String,
        n_np: String,
        n_dp: String,
        d_np: String,
        d_dp: String,
    },
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
    /// Guardrail rows (overall) that moved the wrong way significantly.
    pub guardrails_failed: Vec<GuardrailFailure>,
    /// True when the readout must not be used for a decision (sample-ratio mismatch).
    pub void: bool,
    pub cuped: bool,
    pub sequential: bool,
    pub assumptions: Vec<String>,
    pub cautions: Vec<String>,
}

#[derive(Debug, Clone, Serialize)]
pub struct GuardrailFailure {
    pub metric: String,
    pub arm: String,
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

/// Which way a metric moved, from the adjusted p-value of its family.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub enum Change {
    #[serde(rename = "increase")]
    Increase,
    #[serde(rename = "decrease")]
    Decrease,
    #[serde(rename = "no detectable change")]
    NoDetectableChange,
    #[serde(rename = "not enough data")]
    NotEnoughData,
}

impl Change {
    /// The documented JSON and table wording.
    pub fn as_str(self) -> &'static str {
        match self {
            Change::Increase => "increase",
            Change::Decrease => "decrease",
            Change::NoDetectableChange => "no detectable change",
            Change::NotEnoughData => "not enough data",
        }
    }

    /// A significant move either way.
    pub fn is_significant(self) -> bool {
        matches!(self, Change::Increase | Change::Decrease)
    }
}

/// What the change means given the metric's `direction`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub enum Verdict {
    #[serde(rename = "better")]
    Better,
    #[serde(rename = "worse")]
    Worse,
    /// A significant change of a metric without `direction`.
    #[serde(rename = "changed")]
    Changed,
    #[serde(rename = "no detectable change")]
    NoDetectableChange,
    #[serde(rename = "not enough data")]
    NotEnoughData,
}

impl Verdict {
    /// The documented JSON and table wording.
    pub fn as_str(self) -> &'static str {
        match self {
            Verdict::Better => "better",
            Verdict::Worse => "worse",
            Verdict::Changed => "changed",
            Verdict::NoDetectableChange => "no detectable change",
            Verdict::NotEnoughData => "not enough data",
        }
    }

    /// The verdict of `change` for a metric where higher is better (`Some(true)`), lower is
    /// better (`Some(false)`), or no direction is declared (`None`).
    pub fn of(change: Change, higher_is_better: Option<bool>) -> Verdict {
        match (change, higher_is_better) {
            (Change::Increase, Some(up)) => {
                if up {
                    Verdict::Better
                } else {
                    Verdict::Worse
                }
            }
            (Change::Decrease, Some(up)) => {
                if up {
                    Verdict::Worse
                } else {
                    Verdict::Better
                }
            }
            (Change::Increase | Change::Decrease, None) => Verdict::Changed,
            (Change::NoDetectableChange, _) => Verdict::NoDetectableChange,
            (Change::NotEnoughData, _) => Verdict::NotEnoughData,
        }
    }
}

impl std::fmt::Display for Verdict {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(self.as_str())
    }
}

impl std::fmt::Display for Change {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(self.as_str())
    }
}

/// The multiple-testing family of a result row.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub enum Family {
    /// Primary metrics, overall rows: Holm (family-wise error).
    #[serde(rename = "primary (Holm)")]
    Primary,
    /// Secondary metrics, overall rows: Benjamini-Hochberg (false discovery rate).
    #[serde(rename = "secondary (Benjamini-Hochberg)")]
    Secondary,
    /// Every segment row: Benjamini-Hochberg.
    #[serde(rename = "segment (Benjamini-Hochberg)")]
    Segment,
    /// Guardrails: unadjusted, so they fail more readily.
    #[serde(rename = "guardrail (unadjusted)")]
    Guardrail,
}

impl Family {
    fn of(segment: bool, role: Role) -> Family {
        match (segment, role) {
            (true, _) => Family::Segment,
            (false, Role::Primary) => Family::Primary,
            (false, Role::Secondary) => Family::Secondary,
            (false, Role::Guardrail) => Family::Guardrail,
        }
    }
}

fn role_str<S: serde::Serializer>(role: &Role, s: S) -> Result<S::Ok, S::Error> {
    s.serialize_str(role.as_str())
}

#[derive(Debug, Clone, Serialize)]
pub struct ResultRow {
    pub metric: String,
    /// `primary`, `secondary` or `guardrail`.
    #[serde(serialize_with = "role_str")]
    pub role: Role,
    pub arm: String,
    /// Null for the whole experiment; the segment and its value for a slice.
    pub segment: Option<SegmentRef>,
    pub control: ArmSummary,
    pub treatment: ArmSummary,
    pub difference: Option<DifferenceOut>,
    pub relative: Option<RelativeOut>,
    /// `increase`, `decrease`, `no detectable change`, or `not enough data` (from the adjusted
    /// p-value of the row's family).
    pub change: Change,
    /// `better`, `worse`, `no detectable change` or `not enough data`; `changed` for a
    /// significant change of a metric without `direction`.
    pub verdict: Verdict,
    /// The multiple-testing family: `primary (Holm)`, `secondary (Benjamini-Hochberg)`,
    /// `segment (Benjamini-Hochberg)` or `guardrail (unadjusted)`.
    pub family: Family,
    pub cuped: Option<CupedOut>,
    pub power: PowerOut,
    /// The effect if the arm were shipped to every unit that would trigger it (overall rows of
    /// non-ratio metrics, when population totals are known).
    pub population_impact: Option<PopulationImpact>,
}

#[derive(Debug, Clone, Serialize)]
pub struct PopulationImpact {
    /// Effect per unit × triggered units per day.
    pub absolute_per_day: f64,
    /// `absolute_per_day` relative to the metric's population total per day.
    pub relative: f64,
    /// Relative impact at the effect interval's bounds.
    pub ci_low: f64,
    pub ci_high: f64,
}

/// Adds whole-population impact to the overall rows: effect per unit × `triggered_per_day`,
/// relative to `population_per_day[metric]` (the metric's total over all units per day, from
/// the report query over the experiment's period). Assumes the triggered population stays as
/// measured and the effect on units that would not trigger is zero.
pub fn add_population_impact(
    readout: &mut Readout,
    triggered_per_day: f64,
    population_per_day: &BTreeMap<String, f64>,
) {
    for r in readout.results.iter_mut().filter(|r| r.segment.is_none()) {
        let (Some(d), Some(pop)) = (r.difference.as_ref(), population_per_day.get(&r.metric)) else {
            continue;
        };
        if *pop == 0.0 || !pop.is_finite() {
            continue;
        }
        let absolute = d.estimate * triggered_per_day;
        r.population_impact = Some(PopulationImpact {
            absolute_per_day: absolute,
            relative: absolute / pop,
            ci_low: d.ci_low * triggered_per_day / pop,
            ci_high: d.ci_high * triggered_per_day / pop,
        });
    }
    readout.assumptions.push(format!(
        "Population impact: the effect per unit times the {triggered_per_day:.0} units per day that triggered the experiment (all arms), relative to the metric's daily total over the whole population in the same period. It assumes the triggered population stays as measured, the experiment saw every triggering unit, and the effect on units that would not trigger is zero."
    ));
}

#[derive(Debug, Clone, Serialize)]
pub struct CupedOut {
    pub theta: f64,
    /// Share of the variance of the difference removed by the covariate (1 - Var_adj/Var_raw).
    pub variance_reduction: f64,
}

#[derive(Debug, Clone, Serialize)]
pub struct PowerOut {
    /// Minimum detectable effect (absolute) at the current sample size, alpha and 80% power.
    pub mde: Option<f64>,
    /// The same relative to the control value.
    pub mde_relative: Option<f64>,
    /// The declared `mde` (relative), if any.
    pub declared_mde: Option<f64>,
    /// Power to detect the declared MDE at the current sample size.
    pub power_at_declared_mde: Option<f64>,
}

#[derive(Debug, Clone, PartialEq, Serialize)]
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
    /// The p-value adjusted within the row's family (Holm / Benjamini-Hochberg).
    pub adjusted_p_value: Option<f64>,
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
        adjusted_p_value: e.p_value,
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

    // Rows grouped by segment value in order of first appearance (the whole population first),
    // in one pass: a segment may have tens of thousands of values, so no per-group rescans.
    type Key<'a> = Option<&'a (String, Option<String>)>;
    let mut groups: Vec<(Key, Vec<&ArmRow>)> = vec![(None, Vec::new())];
    let mut index: std::collections::HashMap<Key, usize> = std::collections::HashMap::from([(None, 0)]);
    for r in &table.rows {
        let key = r.segment.as_ref();
        let i = *index.entry(key).or_insert_with(|| {
            groups.push((key, Vec::new()));
            groups.len() - 1
        });
        groups[i].1.push(r);
    }
    let mut results = Vec::new();
    for (group, rows) in &groups {
        let segment = group.map(|(name, value)| SegmentRef {
            name: name.clone(),
            value: value.clone(),
        });
        results.extend(metric_rows(spec, rows, segment));
    }
    adjust_and_judge(spec, &mut results);
    let guardrails_failed: Vec<GuardrailFailure> = results
        .iter()
        .filter(|r| r.segment.is_none() && r.role == Role::Guardrail && r.verdict == Verdict::Worse)
        .map(|r| GuardrailFailure {
            metric: r.metric.clone(),
            arm: r.arm.clone(),
        })
        .collect();
    let excluded = Excluded {
        multiple_arms: table.excluded_multiple_arms,
        missing_arm: table.excluded_missing_arm,
        unknown_arm,
        rows_without_unit: table.excluded_rows_without_unit,
    };
    let cautions = cautions(spec, srm.as_ref(), &excluded, &results, &guardrails_failed);
    Readout {
        experiment: spec.experiment.clone(),
        control: spec.control.clone(),
        alpha: spec.alpha,
        start: spec.start.clone(),
        end: spec.end.clone(),
        arms,
        excluded,
        sample_ratio: srm.map(Into::into),
        void: srm.is_some_and(|s| s.mismatch),
        results,
        guardrails_failed,
        cuped: spec.cuped,
        sequential: spec.sequential,
        assumptions: assumptions(spec),
        cautions,
    }
}

fn arm_moments(m: &MetricSpec, r: &ArmRow) -> Option<ArmMoments> {
    let col = |c: &str| r.columns.get(c).copied();
    let cov = |c: &str| r.covariances.get(c).copied();
    Some(match &m.kind {
        MetricShape::Mean { column } => ArmMoments::Mean {
            y: col(column)?,
            covariate: match &m.covariate {
                Some(CovariateShape::Mean { column, covariance }) => col(column)
                    .zip(cov(covariance))
                    .filter(|(x, c)| x.n > 1 && c.is_finite()),
                _ => None,
            },
        },
        MetricShape::Ratio {
            numerator,
            denominator,
            covariance,
        } => ArmMoments::Ratio {
            r: RatioMoments {
                numerator: col(numerator)?,
                denominator: col(denominator)?,
                cov: cov(covariance)?,
            },
            covariate: match &m.covariate {
                Some(CovariateShape::Ratio {
                    numerator,
                    denominator,
                    pre,
                    n_np,
                    n_dp,
                    d_np,
                    d_dp,
                }) => (|| {
                    Some(RatioCovariate {
                        numerator: col(numerator)?,
                        denominator: col(denominator)?,
                        pre: cov(pre)?,
                        n_np: cov(n_np)?,
                        n_dp: cov(n_dp)?,
                        d_np: cov(d_np)?,
                        d_dp: cov(d_dp)?,
                    })
                })()
                .filter(|c| c.denominator.mean != 0.0),
                _ => None,
            },
        },
    })
}

fn arm_summary(m: Option<&ArmMoments>) -> ArmSummary {
    match m {
        Some(ArmMoments::Mean { y, .. }) => summary(Some(y)),
        Some(ArmMoments::Ratio { r, .. }) => ratio_summary(Some(r)),
        None => summary(None),
    }
}

/// Result rows of every metric and non-control arm for one group of arm rows.
fn metric_rows(spec: &ReadoutSpec, rows: &[&ArmRow], segment: Option<SegmentRef>) -> Vec<ResultRow> {
    let row = |arm: &str| rows.iter().copied().find(|r| r.arm == arm);
    let options = Options {
        alpha: spec.alpha,
        cuped: spec.cuped,
        sequential: spec.sequential,
        power: 0.8,
    };
    let mut results = Vec::new();
    for m in &spec.metrics {
        let group: Vec<ArmMoments> = spec
            .arms
            .iter()
            .filter_map(|(a, _)| row(a).and_then(|r| arm_moments(m, r)))
            .collect();
        let control = row(&spec.control).and_then(|r| arm_moments(m, r));
        for (arm, _) in spec.arms.iter().skip(1) {
            let treatment = row(arm).and_then(|r| arm_moments(m, r));
            let cmp = match (&control, &treatment) {
                (Some(c), Some(t)) => Some(analysis::compare(c, t, &group, m.binary, m.mde, &options)),
                _ => None,
            };
            let diff = cmp.and_then(|c| c.difference);
            let control_value = cmp
                .and_then(|c| c.control_value)
                .map(f64::abs)
                .filter(|v| *v > 0.0);
            let mde = cmp.and_then(|c| c.mde);
            results.push(ResultRow {
                metric: m.name.clone(),
                role: m.role,
                arm: arm.clone(),
                segment: segment.clone(),
                control: arm_summary(control.as_ref()),
                treatment: arm_summary(treatment.as_ref()),
                difference: diff.as_ref().map(difference),
                relative: cmp.and_then(|c| c.relative).map(|r| RelativeOut {
                    estimate: r.estimate,
                    ci_low: r.ci_low,
                    ci_high: r.ci_high,
                }),
                change: Change::NotEnoughData,
                verdict: Verdict::NotEnoughData,
                family: Family::of(segment.is_some(), m.role),
                cuped: cmp
                    .and_then(|c| c.cuped)
                    .map(|(theta, variance_reduction)| CupedOut {
                        theta,
                        variance_reduction,
                    }),
                population_impact: None,
                power: PowerOut {
                    mde,
                    mde_relative: mde.zip(control_value).map(|(m, c)| m / c),
                    declared_mde: m.mde,
                    power_at_declared_mde: cmp.and_then(|c| c.power_at_declared),
                },
            });
        }
    }
    results
}

/// Adjusts p-values within each family and sets `change` and `verdict` from them.
fn adjust_and_judge(spec: &ReadoutSpec, results: &mut [ResultRow]) {
    for family in [Family::Primary, Family::Secondary, Family::Segment] {
        let idx: Vec<usize> = (0..results.len())
            .filter(|&i| results[i].family == family)
            .filter(|&i| {
                results[i]
                    .difference
                    .as_ref()
                    .is_some_and(|d| d.p_value.is_some())
            })
            .collect();
        let p: Vec<f64> = idx
            .iter()
            .map(|&i| {
                results[i]
                    .difference
                    .as_ref()
                    .and_then(|d| d.p_value)
                    .unwrap_or(1.0)
            })
            .collect();
        let adjusted = if family == Family::Primary {
            super::multiple::holm(&p)
        } else {
            super::multiple::benjamini_hochberg(&p)
        };
        for (k, &i) in idx.iter().enumerate() {
            if let Some(d) = results[i].difference.as_mut() {
                d.adjusted_p_value = Some(adjusted[k]);
            }
        }
    }
    for r in results.iter_mut() {
        let higher_is_better = spec
            .metrics
            .iter()
            .find(|m| m.name == r.metric)
            .and_then(|m| m.higher_is_better);
        r.change = match &r.difference {
            None => Change::NotEnoughData,
            Some(d) => match d.adjusted_p_value {
                None => Change::NoDetectableChange,
                Some(p) if p >= spec.alpha => Change::NoDetectableChange,
                Some(_) if d.estimate > 0.0 => Change::Increase,
                Some(_) => Change::Decrease,
            },
        };
        r.verdict = Verdict::of(r.change, higher_is_better);
    }
}

fn assumptions(spec: &ReadoutSpec) -> Vec<String> {
    let conf = (1.0 - spec.alpha) * 100.0;
    let mut out = vec![
        "Units are assigned to arms at random and independently; each unit is counted in the arm of its first exposure.".to_string(),
        format!(
            "Only events from a unit's first exposure (within the metric's window) up to the data cut-off {} count.",
            spec.end
        ),
        format!(
            "Differences are treatment minus control with {conf:.0}% intervals: Welch's t for means, two proportions (Wald interval, pooled z test) for 0/1 metrics, the delta method for relative differences and ratio metrics. All rely on enough units per arm for averages to be approximately normal."
        ),
        "Multiple testing: primary metrics are one family adjusted with Holm (family-wise error); secondary metrics and segment rows are families adjusted with Benjamini-Hochberg (false discovery rate); guardrails are not adjusted, so they fail more readily. Verdicts use the adjusted p-values.".into(),
        "MDE is the smallest effect this comparison detects with 80% power at the current sample size.".into(),
    ];
    if spec.cuped {
        out.push("CUPED: where a covariate window is set, each metric is adjusted with its own pre-exposure value (theta pooled over arms); this narrows intervals without biasing the difference, because exposure cannot affect the past.".into());
    }
    if spec.sequential {
        out.push("Sequential mode: p-values and intervals are always valid (mixture SPRT with a normal mixing distribution whose scale is the declared MDE, or 5% of the control value): you may look every day and stop when a result is significant. They are wider than fixed-sample intervals; relative intervals treat the control value as known.".into());
    } else {
        out.push("p-values are for one look at the data at the planned end; looking repeatedly and stopping on a good p-value inflates false positives (use --sequential for that).".into());
    }
    out
}

fn cautions(
    spec: &ReadoutSpec,
    srm: Option<&SampleRatio>,
    ex: &Excluded,
    results: &[ResultRow],
    guardrails: &[GuardrailFailure],
) -> Vec<String> {
    let mut out = Vec::new();
    for g in guardrails {
        out.push(format!(
            "Guardrail failed: {} moved the wrong way in arm {} (significant at alpha = {}). Do not ship this arm without understanding why.",
            g.metric, g.arm, spec.alpha
        ));
    }
    for m in spec
        .metrics
        .iter()
        .filter(|m| m.role == Role::Guardrail && m.higher_is_better.is_none())
    {
        out.push(format!(
            "Guardrail {} has no `direction`, so it cannot fail; declare `direction: increase` or `decrease` on the metric.",
            m.name
        ));
    }
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
    let thin = results
        .iter()
        .filter(|r| r.change == Change::NotEnoughData)
        .count();
    if thin > 0 {
        out.push(format!(
            "{thin} results have too few units (fewer than two per arm with a value) to compare."
        ));
    }
    for r in results
        .iter()
        .filter(|r| r.segment.is_none() && r.role == Role::Primary && r.change == Change::NoDetectableChange)
    {
        let weak = match (r.power.power_at_declared_mde, r.power.mde_relative) {
            (Some(p), _) => {
                (p < 0.8).then(|| format!("power to detect the declared MDE is only {:.0}%", p * 100.0))
            }
            (None, Some(m)) if m > 0.05 => Some(format!(
                "it could only detect changes of {:.1}% or more",
                m * 100.0
            )),
            _ => None,
        };
        if let Some(why) = weak {
            out.push(format!(
                "Low power: \"no detectable change\" for {} (arm {}) says little, because {why}.",
                r.metric, r.arm
            ));
        }
    }
    if results.iter().any(|r| r.change == Change::NoDetectableChange) {
        out.push("\"No detectable change\" is not evidence of no effect: the interval shows which effects the data cannot rule out.".into());
    }
    out
}
