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
    /// Per-unit column -> third central moment (population form), for the columns of
    /// `plan::third_moment_columns` on overall rows.
    pub third_moments: BTreeMap<String, f64>,
}

/// The whole statistics table: one row per arm, plus the exclusion counts.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct StatsTable {
    pub rows: Vec<ArmRow>,
    pub excluded_multiple_arms: u64,
    pub excluded_missing_arm: u64,
    pub excluded_rows_without_unit: u64,
    /// Whether the table carries third moments (statistics layout 2 and later): without them
    /// the heavy-tails check cannot run.
    pub third_moments: bool,
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
    /// Prior share of experiments that truly work (for the false-positive risk).
    pub prior_success: f64,
    /// Days from start to the data cut-off.
    pub days: f64,
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

/// Version of the readout JSON document; bumped when a key changes meaning (keys are only
/// ever added, never renamed).
pub const SCHEMA_VERSION: u32 = 2;

#[derive(Debug, Clone, Serialize)]
pub struct Readout {
    /// See [`SCHEMA_VERSION`].
    pub schema_version: u32,
    /// The decision in one or two lines: void, failed guardrails, the primary verdicts.
    pub headline: Vec<String>,
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
    /// Automatic trust checks that flagged something (each also a caution); checks that passed
    /// are not listed. `trust_checks_run` names every check that ran.
    pub trust_checks: Vec<TrustCheck>,
    pub trust_checks_run: Vec<&'static str>,
    /// Who computed the statistics: `local DuckDB`, `PostgreSQL`, `engine \`spark\` (...)`,
    /// or `statistics file PATH`.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub computed_on: Option<String>,
}

/// One flagged trust check.
#[derive(Debug, Clone, Serialize)]
pub struct TrustCheck {
    /// `pre_period_imbalance`, `segment_sample_ratio`, `false_positive_risk`, `short_run`,
    /// `partial_weeks`.
    pub check: &'static str,
    /// What it is about: a metric and arm, a segment value, or the experiment.
    pub subject: String,
    pub p_value: Option<f64>,
    /// The check's number where it has one (false-positive risk, days).
    pub value: Option<f64>,
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
    /// Data in both arms but no valid test (e.g. every value equal within each arm).
    #[serde(rename = "not testable")]
    NotTestable,
}

impl Change {
    /// The documented JSON and table wording.
    pub fn as_str(self) -> &'static str {
        match self {
            Change::Increase => "increase",
            Change::Decrease => "decrease",
            Change::NoDetectableChange => "no detectable change",
            Change::NotEnoughData => "not enough data",
            Change::NotTestable => "not testable",
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
    #[serde(rename = "not testable")]
    NotTestable,
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
            Verdict::NotTestable => "not testable",
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
            (Change::NotTestable, _) => Verdict::NotTestable,
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
    /// The estimator used: `welch`, `two_proportions`, `fisher_newcombe`, `delta_ratio`, with a
    /// `cuped_` and/or `msprt_` prefix when CUPED or the sequential test was applied.
    pub method: String,
    /// Why a row with data has no test (`no_variation`, `sequential_zero_control`,
    /// `sequential_few_events`); null otherwise.
    pub not_testable: Option<&'static str>,
    /// A segment row of a segment chosen after the fact (not declared on the experiment).
    pub exploratory: bool,
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
    /// Minimum detectable effect (absolute) at the current sample size and 80% power, for the
    /// test the verdict uses (at `planned_alpha`; the always-valid test in sequential mode).
    pub mde: Option<f64>,
    /// Two-sided level the MDE and power are computed at: α/m for a Holm family of m rows,
    /// α otherwise.
    pub planned_alpha: f64,
    /// "No detectable change" here says little: power at the declared MDE is below 80%, or
    /// (without a declared MDE) the relative MDE is above 5%.
    pub low_power: bool,
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
    /// The interval at the level the row's verdict uses (see README, "Intervals"): equal to
    /// the raw one for guardrails, wider for rows of an adjusted family.
    pub adjusted_ci_low: f64,
    pub adjusted_ci_high: f64,
    /// Confidence level of the adjusted interval, e.g. 0.975.
    pub adjusted_confidence: f64,
}

#[derive(Debug, Clone, Serialize)]
pub struct RelativeOut {
    pub estimate: f64,
    pub ci_low: f64,
    pub ci_high: f64,
    /// At the level of `difference.adjusted_confidence`.
    pub adjusted_ci_low: f64,
    pub adjusted_ci_high: f64,
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
        adjusted_ci_low: e.ci_low,
        adjusted_ci_high: e.ci_high,
        adjusted_confidence: f64::NAN,
    }
}

fn untestable_code(u: analysis::Untestable) -> &'static str {
    match u {
        analysis::Untestable::NoVariation => "no_variation",
        analysis::Untestable::SequentialZeroControl => "sequential_zero_control",
        analysis::Untestable::SequentialFewEvents => "sequential_few_events",
    }
}

/// What a result row was computed from, kept for the second pass that recomputes intervals
/// and power at the levels the row's family uses.
struct Inputs {
    control: ArmMoments,
    treatment: ArmMoments,
    group: Vec<ArmMoments>,
    binary: bool,
    mde: Option<f64>,
}

/// A slice of the statistics table: `None` for the whole population, else (segment, value).
type SliceKey<'a> = Option<&'a (String, Option<String>)>;
/// A slice and its arm rows.
type Group<'a> = (SliceKey<'a>, Vec<&'a ArmRow>);

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
    let mut groups: Vec<Group> = vec![(None, Vec::new())];
    let mut index: std::collections::HashMap<SliceKey, usize> = std::collections::HashMap::from([(None, 0)]);
    for r in &table.rows {
        let key = r.segment.as_ref();
        let i = *index.entry(key).or_insert_with(|| {
            groups.push((key, Vec::new()));
            groups.len() - 1
        });
        groups[i].1.push(r);
    }
    let mut results = Vec::new();
    let mut inputs = Vec::new();
    for (group, rows) in &groups {
        let segment = group.map(|(name, value)| SegmentRef {
            name: name.clone(),
            value: value.clone(),
        });
        metric_rows(spec, rows, segment, &mut results, &mut inputs);
    }
    adjust_and_judge(spec, &mut results, &inputs);
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
    let mut cautions = cautions(spec, srm.as_ref(), &excluded, &results, &guardrails_failed);
    let trust_checks = trust_checks(spec, table, &groups, &results, &mut cautions);
    let mut headline = headline(spec, srm.as_ref(), &results, &guardrails_failed);
    let slices = trust_checks
        .iter()
        .filter(|c| c.check == "segment_sample_ratio")
        .count();
    if slices > 0 && !headline[0].starts_with("VOID") {
        insert_check_failed(
            &mut headline,
            format!(
                "CHECK FAILED: sample-ratio mismatch within {slices} segment value{} (see cautions); their rows cannot be trusted.",
                if slices == 1 { "" } else { "s" }
            ),
        );
    }
    Readout {
        headline,
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
        schema_version: SCHEMA_VERSION,
        cuped: spec.cuped,
        sequential: spec.sequential,
        assumptions: assumptions(spec),
        cautions,
        trust_checks,
        computed_on: None,
        trust_checks_run: TRUST_CHECKS
            .iter()
            .copied()
            .filter(|c| *c != "heavy_tails" || table.third_moments)
            .collect(),
    }
}

/// Every automatic trust check, in the order they run.
pub const TRUST_CHECKS: &[&str] = &[
    "heavy_tails",
    "pre_period_imbalance",
    "segment_sample_ratio",
    "false_positive_risk",
    "short_run",
    "partial_weeks",
];

/// Below this p-value a pre-period difference between arms is flagged (common practice: the
/// same strict level as the sample-ratio check, since with many metrics some p < 0.05 are
/// expected by chance).
pub const IMBALANCE_THRESHOLD: f64 = 0.001;

/// Fewer days than this do not average out the weekly cycle (common practice: run whole weeks,
/// at least one).
pub const MIN_DAYS: f64 = 7.0;

/// The automatic trust checks of a readout; each flag also becomes a plain-words caution.
///
/// - Heavy tails: the skewness g₁ of each mean metric's per-unit values in each arm (from the
///   third moment the statistics table carries); an arm with fewer than 355·g₁² units
///   (Kohavi, Deng, Longbotham & Xu 2014, rule 7; see [`super::HEAVY_TAIL_FACTOR`]) is
///   flagged, once per metric at its worst arm. 0/1 metrics are left to the exact methods'
///   rule, ratio metrics are not checked. Not run on statistics tables of layout 1.
/// - Pre-period imbalance: Welch's t on each CUPED covariate (the metric's own value before
///   exposure) between control and each arm; randomisation makes the arms alike before
///   exposure, so p < 0.001 points at broken assignment or a covariate window that overlaps
///   exposure (Deng, Xu, Kohavi & Walker 2013 use the pre-period for exactly this reason).
/// - Sample ratio per segment value: Pearson's chi-square of the arm sizes within each segment
///   value against the planned split, Benjamini–Hochberg adjusted over all segment values,
///   flagged below 0.001 like the overall check: a mismatch inside one slice (one device, one
///   region) is a logging or eligibility bug there, which the overall check can miss.
/// - False-positive risk of each significant primary row: P(no real effect | significant) =
///   (α'/2)(1 − π) / ((α'/2)(1 − π) + (1 − β)π) with π the prior success rate, 1 − β = 0.8
///   the design power and α' the row's planning level (Kohavi, Deng & Vermeer 2022, "A/B
///   Testing Intuition Busters", KDD, §4; the halved α counts only the significant direction
///   taken as success; formula recalled from memory).
/// - Short run and partial weeks: fewer than 7 days from start to cut-off, or a duration that
///   is not whole weeks, leave the weekly cycle unevenly represented (common practice).
fn trust_checks(
    spec: &ReadoutSpec,
    table: &StatsTable,
    groups: &[Group],
    results: &[ResultRow],
    cautions: &mut Vec<String>,
) -> Vec<TrustCheck> {
    let mut out = Vec::new();
    let overall = |arm: &str| table.rows.iter().find(|r| r.arm == arm && r.segment.is_none());
    // Heavy tails.
    if !table.third_moments {
        cautions.push("Heavy tails not checked: this statistics table has no third moments (layout 1, exported by an older plumb). Re-run the SQL that `plumb sql` prints now to include them.".into());
    }
    let mut skewed = Vec::new();
    for m in spec.metrics.iter().filter(|m| !m.binary) {
        let MetricShape::Mean { column } = &m.kind else {
            continue;
        };
        // (arm, units with a value, skewness, units needed) of the worst arm, the first on ties.
        let worst = spec
            .arms
            .iter()
            .filter_map(|(arm, _)| {
                let row = overall(arm)?;
                let moments = row.columns.get(column)?;
                let g = super::skewness(moments, *row.third_moments.get(column)?)?;
                let needed = super::HEAVY_TAIL_FACTOR * g * g;
                (needed > moments.n as f64).then_some((arm, moments.n, g, needed))
            })
            .reduce(|a, b| if b.3 / b.1 as f64 > a.3 / a.1 as f64 { b } else { a });
        if let Some((arm, n, g, needed)) = worst {
            skewed.push(format!(
                "{} (skewness {g:.1} in {arm}: about {} units per arm needed, {} there)",
                m.name,
                crate::output::count(needed.ceil() as u64),
                crate::output::count(n)
            ));
            out.push(TrustCheck {
                check: "heavy_tails",
                subject: format!("{} ({arm})", m.name),
                p_value: None,
                value: Some(g),
            });
        }
    }
    if !skewed.is_empty() {
        let (one, many) = (skewed.len() == 1, skewed.join("; "));
        cautions.push(format!(
            "Heavy tails: {many}. A mean is near-normal only from about 355 × skewness² units per arm (Kohavi et al. 2014), so {} may be off, most where arms differ in size (with equal arms much of the skew cancels in the difference). Capping the per-unit value (winsorize) or a longer run helps.",
            if one { "its p-value and interval ends" } else { "their p-values and interval ends" }
        ));
    }
    // Pre-period imbalance.
    for m in &spec.metrics {
        let columns: Vec<&str> = match &m.covariate {
            Some(CovariateShape::Mean { column, .. }) => vec![column],
            Some(CovariateShape::Ratio {
                numerator,
                denominator,
                ..
            }) => vec![numerator, denominator],
            None => continue,
        };
        let Some(control) = overall(&spec.control) else {
            continue;
        };
        for (arm, _) in spec.arms.iter().skip(1) {
            let Some(treatment) = overall(arm) else { continue };
            let worst = columns
                .iter()
                .filter_map(|c| {
                    let (a, b) = (control.columns.get(*c)?, treatment.columns.get(*c)?);
                    super::welch(a, b, spec.alpha).and_then(|e| e.p_value)
                })
                .fold(None, |acc: Option<f64>, p| Some(acc.map_or(p, |a| a.min(p))));
            if let Some(p) = worst.filter(|p| *p < IMBALANCE_THRESHOLD) {
                cautions.push(format!(
                    "Pre-period imbalance: before exposure, {} already differed between {} and {arm} (Welch p = {:.1e}). Random assignment makes arms alike before exposure: check assignment, and that the covariate window ends before exposure. CUPED corrects for the observed difference, but the cause may bias other metrics too.",
                    m.name, spec.control, p
                ));
                out.push(TrustCheck {
                    check: "pre_period_imbalance",
                    subject: format!("{} ({arm})", m.name),
                    p_value: Some(p),
                    value: None,
                });
            }
        }
    }
    // Sample ratio per segment value.
    let shares: Vec<f64> = spec.arms.iter().map(|(_, s)| *s).collect();
    let mut slices: Vec<(String, f64)> = Vec::new();
    for (key, rows) in groups.iter().skip(1) {
        let Some((name, value)) = key else { continue };
        let observed: Vec<u64> = spec
            .arms
            .iter()
            .map(|(a, _)| rows.iter().find(|r| &r.arm == a).map(|r| r.units).unwrap_or(0))
            .collect();
        // Too few units for the chi-square approximation say nothing either way.
        if observed.iter().sum::<u64>() < 20 {
            continue;
        }
        if let Some(s) = super::sample_ratio(&observed, &shares) {
            slices.push((
                format!("{name} = {}", value.as_deref().unwrap_or("(none)")),
                s.p_value,
            ));
        }
    }
    let p: Vec<f64> = slices.iter().map(|(_, p)| *p).collect();
    let adjusted = super::multiple::benjamini_hochberg(&p);
    for ((subject, _), adj) in slices.iter().zip(&adjusted) {
        if *adj < super::SRM_THRESHOLD {
            cautions.push(format!(
                "Sample-ratio mismatch within segment {subject} (BH-adjusted p = {adj:.1e}): assignment or logging differs for these units; do not read their rows."
            ));
            out.push(TrustCheck {
                check: "segment_sample_ratio",
                subject: subject.clone(),
                p_value: Some(*adj),
                value: None,
            });
        }
    }
    // False-positive risk of significant primary results.
    let pi = spec.prior_success;
    for r in results
        .iter()
        .filter(|r| r.segment.is_none() && r.role == Role::Primary && r.change.is_significant())
    {
        let a = r.power.planned_alpha / 2.0;
        let fpr = a * (1.0 - pi) / (a * (1.0 - pi) + 0.8 * pi);
        cautions.push(format!(
            "False-positive risk: if {:.0}% of ideas like this one truly work (--prior-success), a significant {} at this level is a false positive about {:.0}% of the time (Kohavi, Deng & Vermeer 2022). A surprising result deserves a replication.",
            pi * 100.0,
            r.metric,
            fpr * 100.0
        ));
        out.push(TrustCheck {
            check: "false_positive_risk",
            subject: format!("{} ({})", r.metric, r.arm),
            p_value: None,
            value: Some(fpr),
        });
    }
    // Duration.
    let days = spec.days;
    if days < MIN_DAYS {
        cautions.push(format!(
            "Short run: {} from start to cut-off; weekday and weekend behaviour are not yet both represented, and early effects (novelty) dominate. Run at least one whole week.",
            plural_days(days)
        ));
        out.push(TrustCheck {
            check: "short_run",
            subject: spec.experiment.clone(),
            p_value: None,
            value: Some(days),
        });
    } else if (days / 7.0 - (days / 7.0).round()).abs() > 1e-9 {
        cautions.push(format!(
            "Partial weeks: {} is not a whole number of weeks, so some weekdays count more than others; if behaviour differs by weekday, the averages lean towards the days counted twice.",
            plural_days(days)
        ));
        out.push(TrustCheck {
            check: "partial_weeks",
            subject: spec.experiment.clone(),
            p_value: None,
            value: Some(days),
        });
    }
    out
}

/// The per-day sample-ratio check (run when the engine can count arms per day of first
/// exposure; not for a statistics file): Pearson's chi-square of each day's new units per arm
/// against the planned split (days with 20 units or more), Benjamini–Hochberg adjusted over
/// the days, flagged below 0.001. A mismatch on some days only — a deploy, a logging outage,
/// a bot wave — can hide inside a whole-period ratio that looks fine.
pub fn add_daily_sample_ratio(readout: &mut Readout, days: &[(String, BTreeMap<String, u64>)]) {
    let planned: Vec<(&str, f64)> = readout
        .arms
        .iter()
        .filter_map(|a| a.planned_share.map(|s| (a.name.as_str(), s)))
        .collect();
    let shares: Vec<f64> = planned.iter().map(|(_, s)| *s).collect();
    let mut tested: Vec<(&str, f64)> = Vec::new();
    for (day, counts) in days {
        let observed: Vec<u64> = planned
            .iter()
            .map(|(a, _)| counts.get(*a).copied().unwrap_or(0))
            .collect();
        if observed.iter().sum::<u64>() < 20 {
            continue;
        }
        if let Some(s) = super::sample_ratio(&observed, &shares) {
            tested.push((day.as_str(), s.p_value));
        }
    }
    let p: Vec<f64> = tested.iter().map(|(_, p)| *p).collect();
    let adjusted = super::multiple::benjamini_hochberg(&p);
    let flagged: Vec<(String, f64)> = tested
        .iter()
        .zip(&adjusted)
        .filter(|(_, a)| **a < super::SRM_THRESHOLD)
        .map(|((d, _), a)| (d.to_string(), *a))
        .collect();
    if !flagged.is_empty() {
        let list: Vec<String> = flagged.iter().take(5).map(|(d, _)| d.clone()).collect();
        readout.cautions.push(format!(
            "Sample-ratio mismatch on {} of {} days ({}{}; BH-adjusted p < {}): assignment or logging broke on those days; find the cause before reading the results.",
            flagged.len(),
            tested.len(),
            list.join(", "),
            if flagged.len() > 5 { ", ..." } else { "" },
            super::SRM_THRESHOLD
        ));
    }
    if !flagged.is_empty() && !readout.void {
        insert_check_failed(
            &mut readout.headline,
            format!(
                "CHECK FAILED: sample-ratio mismatch on {} of {} days (see cautions); find the cause before deciding.",
                flagged.len(),
                tested.len()
            ),
        );
    }
    for (day, p) in flagged {
        readout.trust_checks.push(TrustCheck {
            check: "daily_sample_ratio",
            subject: day,
            p_value: Some(p),
            value: None,
        });
    }
    readout.trust_checks_run.push("daily_sample_ratio");
}

/// Puts a failed trust check into the headline, after `GUARDRAIL FAILED` lines and before the
/// primary verdicts.
fn insert_check_failed(headline: &mut Vec<String>, line: String) {
    let at = headline
        .iter()
        .take_while(|l| l.starts_with("GUARDRAIL FAILED") || l.starts_with("CHECK FAILED"))
        .count();
    headline.insert(at, line);
}

fn plural_days(days: f64) -> String {
    if (days - 1.0).abs() < 1e-9 {
        "1 day".into()
    } else if days.fract().abs() < 1e-9 {
        format!("{days:.0} days")
    } else {
        format!("{days:.1} days")
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

fn options(spec: &ReadoutSpec, alpha: f64, plan_alpha: f64) -> Options {
    Options {
        alpha,
        plan_alpha,
        cuped: spec.cuped,
        sequential: spec.sequential,
        power: 0.8,
    }
}

/// Result rows of every metric and non-control arm for one group of arm rows, with what each
/// was computed from. Intervals and power are at the unadjusted level here.
fn metric_rows(
    spec: &ReadoutSpec,
    rows: &[&ArmRow],
    segment: Option<SegmentRef>,
    results: &mut Vec<ResultRow>,
    inputs: &mut Vec<Option<Inputs>>,
) {
    let row = |arm: &str| rows.iter().copied().find(|r| r.arm == arm);
    let options = options(spec, spec.alpha, spec.alpha);
    let exploratory = segment
        .as_ref()
        .is_some_and(|s| spec.exploratory_segments.contains(&s.name));
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
            inputs.push(match (&control, &treatment) {
                (Some(c), Some(t)) => Some(Inputs {
                    control: *c,
                    treatment: *t,
                    group: group.clone(),
                    binary: m.binary,
                    mde: m.mde,
                }),
                _ => None,
            });
            let diff = cmp.and_then(|c| c.difference);
            let relative = cmp.and_then(|c| c.relative).map(|r| RelativeOut {
                estimate: r.estimate,
                ci_low: r.ci_low,
                ci_high: r.ci_high,
                adjusted_ci_low: r.ci_low,
                adjusted_ci_high: r.ci_high,
            });
            results.push(ResultRow {
                metric: m.name.clone(),
                role: m.role,
                arm: arm.clone(),
                segment: segment.clone(),
                control: arm_summary(control.as_ref()),
                treatment: arm_summary(treatment.as_ref()),
                difference: diff.as_ref().map(difference),
                relative,
                change: Change::NotEnoughData,
                verdict: Verdict::NotEnoughData,
                family: Family::of(segment.is_some(), m.role),
                method: cmp
                    .map(|c| c.method_code(spec.sequential))
                    .unwrap_or_else(|| "none".into()),
                not_testable: cmp.and_then(|c| c.untestable).map(untestable_code),
                exploratory,
                cuped: cmp
                    .and_then(|c| c.cuped)
                    .map(|(theta, variance_reduction)| CupedOut {
                        theta,
                        variance_reduction,
                    }),
                population_impact: None,
                power: PowerOut {
                    mde: None,
                    planned_alpha: spec.alpha,
                    low_power: false,
                    mde_relative: None,
                    declared_mde: m.mde,
                    power_at_declared_mde: None,
                },
            });
        }
    }
}

/// Two-sided interval levels that agree with each row's adjusted test, for the rows `idx` of
/// one family with raw p-values `p` (same order):
/// - Holm: the row tested at step j (p sorted ascending, 0-based) of m gets level α/(m − j)
///   while the step-down rejects; every row from the first non-rejected step k on gets
///   α/(m − k). A rejected row's interval then excludes 0 and an accepted row's includes it
///   (for intervals dual to the test). These step-down intervals agree with the decisions;
///   simultaneous coverage is only guaranteed by the Bonferroni level α/m, which the first
///   step uses.
/// - Benjamini–Hochberg: with R rows rejected, every row gets level R·α/m (α/m when R = 0),
///   the false-coverage-rate intervals of Benjamini & Yekutieli (2005), "False discovery
///   rate-adjusted multiple confidence intervals for selected parameters", JASA 100(469),
///   §3 (FCR ≤ α over the selected rows). Rejected rows have p ≤ R·α/m, the others p > R·α/m.
fn interval_levels(family: Family, p: &[f64], alpha: f64) -> Vec<f64> {
    let m = p.len();
    let mut order: Vec<usize> = (0..m).collect();
    order.sort_by(|&a, &b| p[a].total_cmp(&p[b]));
    let mut out = vec![alpha; m];
    match family {
        Family::Primary => {
            let mut stopped: Option<f64> = None;
            for (j, &i) in order.iter().enumerate() {
                let level = alpha / (m - j) as f64;
                let level = match stopped {
                    Some(l) => l,
                    None if p[i] * (m - j) as f64 >= alpha => {
                        stopped = Some(level);
                        level
                    }
                    None => level,
                };
                out[i] = level;
            }
        }
        Family::Secondary | Family::Segment => {
            let rejected = order
                .iter()
                .enumerate()
                .filter(|(j, i)| p[**i] * (m as f64) / ((*j + 1) as f64) < alpha)
                .map(|(j, _)| j + 1)
                .max()
                .unwrap_or(0);
            out.fill(alpha * rejected.max(1) as f64 / m as f64);
        }
        Family::Guardrail => {}
    }
    out
}

/// Adjusts p-values within each family, recomputes intervals and power at the levels the
/// family's test uses, and sets `change` and `verdict`. A row is significant when its adjusted
/// p-value is below α and its adjusted interval excludes 0; for tests dual to their interval
/// these agree, for Fisher's test with Newcombe's interval the stricter of the two decides.
fn adjust_and_judge(spec: &ReadoutSpec, results: &mut [ResultRow], inputs: &[Option<Inputs>]) {
    let alpha = spec.alpha;
    let mut ci_alpha = vec![alpha; results.len()];
    let mut plan_alpha = vec![alpha; results.len()];
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
        let levels = interval_levels(family, &p, alpha);
        for (k, &i) in idx.iter().enumerate() {
            if let Some(d) = results[i].difference.as_mut() {
                d.adjusted_p_value = Some(adjusted[k]);
            }
            ci_alpha[i] = levels[k];
        }
        // Power is planned for the test as run: Bonferroni's α/m bounds Holm's first step
        // (common practice for planning several primary metrics). Benjamini–Hochberg's level
        // depends on how many rows have real effects; its families are planned at α.
        if family == Family::Primary {
            let m = (0..results.len())
                .filter(|&i| results[i].family == family && results[i].difference.is_some())
                .count()
                .max(1);
            for (i, r) in results.iter().enumerate() {
                if r.family == family {
                    plan_alpha[i] = alpha / m as f64;
                }
            }
        }
    }
    for (i, r) in results.iter_mut().enumerate() {
        let Some(input) = &inputs[i] else { continue };
        let cmp = analysis::compare(
            &input.control,
            &input.treatment,
            &input.group,
            input.binary,
            input.mde,
            &options(spec, ci_alpha[i], plan_alpha[i]),
        );
        if let (Some(d), Some(adj)) = (r.difference.as_mut(), cmp.difference) {
            d.adjusted_ci_low = adj.ci_low;
            d.adjusted_ci_high = adj.ci_high;
            d.adjusted_confidence = 1.0 - ci_alpha[i];
        }
        if let (Some(rel), Some(adj)) = (r.relative.as_mut(), cmp.relative) {
            rel.adjusted_ci_low = adj.ci_low;
            rel.adjusted_ci_high = adj.ci_high;
        }
        let control_value = cmp.control_value.map(f64::abs).filter(|v| *v > 0.0);
        r.power.planned_alpha = plan_alpha[i];
        r.power.mde = cmp.mde;
        r.power.mde_relative = cmp.mde.zip(control_value).map(|(m, c)| m / c);
        r.power.power_at_declared_mde = cmp.power_at_declared;
    }
    for r in results.iter_mut() {
        let higher_is_better = spec
            .metrics
            .iter()
            .find(|m| m.name == r.metric)
            .and_then(|m| m.higher_is_better);
        r.change = match &r.difference {
            None => Change::NotEnoughData,
            Some(_) if r.not_testable.is_some() => Change::NotTestable,
            Some(d) => {
                let excludes_zero = d.adjusted_ci_low > 0.0 || d.adjusted_ci_high < 0.0;
                match d.adjusted_p_value {
                    None => Change::NoDetectableChange,
                    Some(p) if p >= alpha || !excludes_zero => Change::NoDetectableChange,
                    Some(_) if d.estimate > 0.0 => Change::Increase,
                    Some(_) => Change::Decrease,
                }
            }
        };
        r.verdict = Verdict::of(r.change, higher_is_better);
        r.power.low_power = r.change == Change::NoDetectableChange
            && match (r.power.power_at_declared_mde, r.power.mde_relative) {
                (Some(p), _) => p < 0.8,
                (None, Some(m)) => m > LOW_POWER_MDE,
                (None, None) => false,
            };
    }
}

/// Without a declared MDE, a relative MDE above this makes "no detectable change" weak
/// evidence (common practice: online experiments usually target changes of a few percent).
pub const LOW_POWER_MDE: f64 = 0.05;

/// A signed percentage with one decimal, e.g. `+5.1%`.
fn signed_pct(x: f64) -> String {
    format!("{:+.1}%", x * 100.0)
}

/// The decision first: `VOID`, `GUARDRAIL FAILED`, then the primary verdicts per arm.
fn headline(
    spec: &ReadoutSpec,
    srm: Option<&SampleRatio>,
    results: &[ResultRow],
    guardrails: &[GuardrailFailure],
) -> Vec<String> {
    let mut out = Vec::new();
    if let Some(s) = srm.filter(|s| s.mismatch) {
        out.push(format!(
            "VOID: sample-ratio mismatch (p = {:.1e}); assignment or logging is broken, so no result below can be used for a decision.",
            s.p_value
        ));
        return out;
    }
    if !guardrails.is_empty() {
        let failed: Vec<String> = guardrails
            .iter()
            .map(|g| {
                let rel = results
                    .iter()
                    .find(|r| r.segment.is_none() && r.metric == g.metric && r.arm == g.arm)
                    .and_then(|r| r.relative.as_ref())
                    .map(|r| format!(" ({})", signed_pct(r.estimate)))
                    .unwrap_or_default();
                format!("{} worse in {}{rel}", g.metric, g.arm)
            })
            .collect();
        out.push(format!("GUARDRAIL FAILED: {}.", failed.join("; ")));
    }
    let multi_arm = spec.arms.len() > 2;
    for (arm, _) in spec.arms.iter().skip(1) {
        let rows: Vec<&ResultRow> = results
            .iter()
            .filter(|r| r.segment.is_none() && r.role == Role::Primary && &r.arm == arm)
            .collect();
        if rows.is_empty() {
            out.push("No primary metrics: the experiment declares none, so there is no decision rule; read the table.".into());
            break;
        }
        let shown = 4;
        let mut parts: Vec<String> = rows
            .iter()
            .take(shown)
            .map(|r| {
                let rel = r
                    .relative
                    .as_ref()
                    .filter(|_| r.change.is_significant())
                    .map(|x| format!(" ({})", signed_pct(x.estimate)))
                    .unwrap_or_default();
                let low = if r.power.low_power { ", low power" } else { "" };
                format!("{} {}{rel}{low}", r.metric, r.verdict)
            })
            .collect();
        if rows.len() > shown {
            parts.push(format!("{} more in the table", rows.len() - shown));
        }
        let who = if multi_arm {
            format!("{arm} vs {}", spec.control)
        } else {
            "Primary".to_string()
        };
        out.push(format!("{who}: {}.", parts.join("; ")));
    }
    out
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
            "Differences are treatment minus control: Welch's t for means, two proportions (Wald interval, pooled z test) for 0/1 metrics, the delta method for relative differences and ratio metrics. All rely on enough units per arm for averages to be approximately normal; 0/1 metrics with fewer than {} events or non-events in an arm use Fisher's exact test and Newcombe's hybrid score interval instead.",
            super::exact::MIN_EVENTS_FOR_NORMAL
        ),
        format!("Multiple testing: primary metrics are one family adjusted with Holm (family-wise error); secondary metrics and segment rows are families adjusted with Benjamini-Hochberg (false discovery rate); guardrails are not adjusted, so they fail more readily. Verdicts use the adjusted p-values, and the intervals shown are at the level that matches them (Holm step-down levels; Benjamini-Yekutieli false-coverage intervals); the raw {conf:.0}% intervals are in --format json."),
        "MDE is the smallest effect the test behind the verdict detects with 80% power at the current sample size: at alpha / m for m primary rows (Bonferroni, which bounds Holm), at alpha for the other families.".into(),
    ];
    if spec.cuped {
        out.push("CUPED: where a covariate window is set, each metric is adjusted with its own pre-exposure value (theta is the within-arm slope, pooled over arms); this narrows intervals without biasing the difference, because exposure cannot affect the past.".into());
    }
    if spec.sequential {
        out.push("Sequential mode: p-values and intervals are always valid (mixture SPRT with a normal mixing distribution whose scale is the declared MDE, or 5% of the control value): you may look every day and stop when a result is significant. They are wider than fixed-sample intervals; relative intervals treat the control value as known. The MDE is that of the always-valid test at the current sample size.".into());
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
            "{thin} {} too few units (fewer than two per arm with a value) to compare.",
            if thin == 1 { "result has" } else { "results have" }
        ));
    }
    for r in results
        .iter()
        .filter(|r| r.segment.is_none() && r.role != Role::Secondary && r.power.low_power)
    {
        let why = match (r.power.power_at_declared_mde, r.power.mde_relative) {
            (Some(p), _) => format!("power to detect the declared MDE is only {:.0}%", p * 100.0),
            (_, Some(m)) => format!("it could only detect changes of {:.1}% or more", m * 100.0),
            _ => continue,
        };
        if r.role == Role::Guardrail {
            out.push(format!(
                "Underpowered guardrail: \"no detectable change\" for {} (arm {}) does not show it is safe, because {why}.",
                r.metric, r.arm
            ));
        } else {
            out.push(format!(
                "Low power: \"no detectable change\" for {} (arm {}) says little, because {why}.",
                r.metric, r.arm
            ));
        }
    }
    let untestable = |code: &str| {
        results
            .iter()
            .filter(|r| r.not_testable == Some(code))
            .map(|r| r.metric.as_str())
            .collect::<std::collections::BTreeSet<_>>()
            .into_iter()
            .collect::<Vec<_>>()
    };
    let names = untestable("no_variation");
    if !names.is_empty() {
        out.push(format!(
            "Not testable: every unit has the same value within each arm, and the arms differ ({}). With no variation there is nothing to judge chance by; check that the metric measures what you expect.",
            names.join(", ")
        ));
    }
    let names = untestable("sequential_zero_control");
    if !names.is_empty() {
        out.push(format!(
            "Not testable in sequential mode: the control value is zero ({}), so the always-valid test has no mixing scale fixed in advance.",
            names.join(", ")
        ));
    }
    let names = untestable("sequential_few_events");
    if !names.is_empty() {
        out.push(format!(
            "Not testable in sequential mode: fewer than {} events or non-events in an arm ({}); the always-valid test relies on the normal approximation. Wait for more data.",
            super::exact::MIN_EVENTS_FOR_NORMAL,
            names.join(", ")
        ));
    }
    let exact_rows = results.iter().filter(|r| r.method == "fisher_newcombe").count();
    if exact_rows > 0 && !spec.sequential {
        out.push(format!(
            "{exact_rows} {} of 0/1 metrics with fewer than {} events or non-events in an arm {} Fisher's exact test and Newcombe's score interval instead of the normal approximation; such rows count as a change only when both agree.",
            if exact_rows == 1 { "row" } else { "rows" },
            super::exact::MIN_EVENTS_FOR_NORMAL,
            if exact_rows == 1 { "uses" } else { "use" },
        ));
    }
    let negative: Vec<&str> = results
        .iter()
        .filter(|r| r.segment.is_none() && r.control.mean.is_some_and(|m| m < 0.0))
        .map(|r| r.metric.as_str())
        .collect();
    if !negative.is_empty() {
        out.push(format!(
            "Negative control value ({}): relative changes are the difference divided by the size of the control value, so their sign is that of the difference.",
            negative.join(", ")
        ));
    }
    if results.iter().any(|r| r.change == Change::NoDetectableChange) {
        out.push("\"No detectable change\" is not evidence of no effect: the interval shows which effects the data cannot rule out.".into());
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    fn spec(metrics: Vec<MetricSpec>) -> ReadoutSpec {
        ReadoutSpec {
            experiment: "e".into(),
            control: "control".into(),
            arms: vec![("control".into(), 0.5), ("treatment".into(), 0.5)],
            metrics,
            alpha: 0.05,
            start: "2026-01-01".into(),
            end: "2026-01-29".into(),
            exploratory_segments: vec![],
            cuped: true,
            sequential: false,
            prior_success: 0.2,
            days: 28.0,
        }
    }

    fn metric(name: &str, role: Role, binary: bool) -> MetricSpec {
        MetricSpec {
            name: name.into(),
            role,
            kind: MetricShape::Mean { column: name.into() },
            higher_is_better: Some(true),
            binary,
            mde: None,
            covariate: None,
        }
    }

    /// (n, mean, var) of one arm.
    type Arm = (u64, f64, f64);
    /// A metric column: name, control, treatment.
    type Column<'a> = (&'a str, Arm, Arm);

    /// Arm rows with, per metric, (n, mean, var) for control and treatment.
    fn table(cols: &[Column]) -> StatsTable {
        let arm = |name: &str, pick: &dyn Fn(&Column) -> Arm| ArmRow {
            arm: name.into(),
            segment: None,
            units: cols.first().map(|c| pick(c).0).unwrap_or(0),
            columns: cols
                .iter()
                .map(|c| {
                    let (n, mean, var) = pick(c);
                    (c.0.to_string(), Moments { n, mean, var })
                })
                .collect(),
            covariances: BTreeMap::new(),
            third_moments: BTreeMap::new(),
        };
        StatsTable {
            rows: vec![arm("control", &|c| c.1), arm("treatment", &|c| c.2)],
            ..Default::default()
        }
    }

    fn binary(x: u64, n: u64) -> (u64, f64, f64) {
        let p = x as f64 / n as f64;
        (n, p, p * (1.0 - p) * n as f64 / (n as f64 - 1.0))
    }

    /// The shown interval agrees with the verdict: a row whose raw 95% interval excludes 0
    /// but whose Holm-adjusted p-value is above α shows an adjusted interval containing 0.
    #[test]
    fn adjusted_interval_agrees_with_the_holm_verdict() {
        // Two primary metrics, p ≈ 0.03 and 0.04: raw intervals exclude 0, Holm rejects none
        // (adjusted p 0.06 and 0.06).
        let s = spec(vec![
            metric("a", Role::Primary, false),
            metric("b", Role::Primary, false),
        ]);
        let t = table(&[
            ("a", (1000, 0.0, 1.0), (1000, 0.0970, 1.0)),
            ("b", (1000, 0.0, 1.0), (1000, 0.0920, 1.0)),
        ]);
        let r = build(&s, &t);
        for row in &r.results {
            let d = row.difference.as_ref().unwrap();
            assert!(d.ci_low > 0.0, "raw interval excludes 0: {d:?}");
            assert!(d.p_value.unwrap() < 0.05 && d.adjusted_p_value.unwrap() >= 0.05);
            assert!(d.adjusted_ci_low < 0.0, "adjusted interval contains 0: {d:?}");
            assert_eq!(row.verdict, Verdict::NoDetectableChange);
        }
    }

    /// Holm step-down and Benjamini–Yekutieli levels on the 15 p-values of Benjamini &
    /// Hochberg (1995), §4 (shared REFERENCES.md): a row's p-value is below its interval level
    /// exactly when its adjusted p-value is below α; Holm rejects 3 rows, BH 4.
    #[test]
    fn interval_levels_match_the_adjusted_decisions() {
        let p = [
            0.0001, 0.0004, 0.0019, 0.0095, 0.0201, 0.0278, 0.0298, 0.0344, 0.0459, 0.3240, 0.4262, 0.5719,
            0.6528, 0.7590, 1.0,
        ];
        for (family, adjusted, rejections) in [
            (Family::Primary, crate::stats::multiple::holm(&p), 3),
            (
                Family::Secondary,
                crate::stats::multiple::benjamini_hochberg(&p),
                4,
            ),
        ] {
            let levels = interval_levels(family, &p, 0.05);
            let mut n = 0;
            for k in 0..p.len() {
                assert_eq!(p[k] < levels[k], adjusted[k] < 0.05, "{family:?} row {k}");
                n += usize::from(adjusted[k] < 0.05);
            }
            assert_eq!(n, rejections, "{family:?}");
        }
    }

    /// 3/3 against 0/3 on a 0/1 metric was "increase (better)" with the pooled z test
    /// (p = 0.014); Fisher's exact test gives p = 0.1: no detectable change.
    #[test]
    fn three_of_three_is_not_better() {
        let s = spec(vec![metric("bought", Role::Primary, true)]);
        let t = table(&[("bought", binary(0, 3), binary(3, 3))]);
        let r = build(&s, &t);
        let row = &r.results[0];
        assert_eq!(row.method, "fisher_newcombe");
        assert!((row.difference.as_ref().unwrap().p_value.unwrap() - 0.1).abs() < 1e-12);
        assert_eq!(row.verdict, Verdict::NoDetectableChange);
        assert!(row.difference.as_ref().unwrap().ci_high > row.difference.as_ref().unwrap().ci_low);
    }

    /// Both arms constant but different: there is a difference and no variation to test it
    /// against; "no detectable change" would hide it.
    #[test]
    fn constant_but_different_arms_are_not_testable() {
        let s = spec(vec![metric("price", Role::Secondary, false)]);
        let t = table(&[("price", (50, 5.0, 0.0), (50, 6.0, 0.0))]);
        let r = build(&s, &t);
        assert_eq!(r.results[0].verdict, Verdict::NotTestable);
        assert_eq!(r.results[0].not_testable, Some("no_variation"));
        assert!(r.cautions.iter().any(|c| c.starts_with("Not testable")));
        // Equal constant arms are no change, not "not testable".
        let t = table(&[("price", (50, 5.0, 0.0), (50, 5.0, 0.0))]);
        assert_eq!(build(&s, &t).results[0].verdict, Verdict::NoDetectableChange);
    }

    /// A negative control mean no longer flips the relative effect's sign.
    #[test]
    fn relative_change_keeps_the_sign_of_the_difference() {
        let s = spec(vec![metric("profit", Role::Secondary, false)]);
        let t = table(&[("profit", (2000, -10.0, 4.0), (2000, -5.0, 4.0))]);
        let r = build(&s, &t);
        let row = &r.results[0];
        assert!(row.difference.as_ref().unwrap().estimate > 0.0);
        let rel = row.relative.as_ref().unwrap();
        assert!((rel.estimate - 0.5).abs() < 1e-12, "{rel:?}");
        assert_eq!(row.verdict, Verdict::Better);
        assert!(r.cautions.iter().any(|c| c.starts_with("Negative control value")));
    }

    /// Sequential mode with a zero control value has no mixing scale fixed in advance, and
    /// with constant arms no variance: neither falls back to the fixed-sample test.
    #[test]
    fn sequential_does_not_fall_back_silently() {
        let mut s = spec(vec![metric("m", Role::Primary, false)]);
        s.sequential = true;
        let t = table(&[("m", (500, 0.0, 1.0), (500, 0.5, 1.0))]);
        let r = build(&s, &t);
        assert_eq!(r.results[0].not_testable, Some("sequential_zero_control"));
        assert_eq!(r.results[0].difference.as_ref().unwrap().p_value, None);
        assert_eq!(r.results[0].verdict, Verdict::NotTestable);
        let t = table(&[("m", (500, 1.0, 0.0), (500, 2.0, 0.0))]);
        assert_eq!(build(&s, &t).results[0].not_testable, Some("no_variation"));
    }

    /// An underpowered guardrail is flagged instead of reading as safe; power is planned at
    /// α/m for m primary rows.
    #[test]
    fn guardrail_power_is_checked_and_primary_power_uses_the_family_level() {
        let s = spec(vec![
            metric("a", Role::Primary, false),
            metric("b", Role::Primary, false),
            metric("refunds", Role::Guardrail, true),
        ]);
        let t = table(&[
            ("a", (400, 1.0, 1.0), (400, 1.0, 1.0)),
            ("b", (400, 1.0, 1.0), (400, 1.0, 1.0)),
            ("refunds", binary(20, 400), binary(21, 400)),
        ]);
        let r = build(&s, &t);
        let g = r.results.iter().find(|x| x.metric == "refunds").unwrap();
        assert!(g.power.low_power);
        assert!(r.cautions.iter().any(|c| c.starts_with("Underpowered guardrail")));
        let a = r.results.iter().find(|x| x.metric == "a").unwrap();
        assert!((a.power.planned_alpha - 0.025).abs() < 1e-15);
        let se = a.difference.as_ref().unwrap().se;
        let want = crate::stats::power::mde(se, 0.025, 0.8);
        assert!((a.power.mde.unwrap() - want).abs() < 1e-12);
    }

    /// False-positive risk (Kohavi, Deng & Vermeer 2022): one primary row planned at α = 0.05,
    /// prior success 20%, power 80%: 0.025·0.8 / (0.025·0.8 + 0.8·0.2) = 1/9.
    #[test]
    fn significant_primary_rows_state_their_false_positive_risk() {
        let s = spec(vec![metric("a", Role::Primary, false)]);
        let t = table(&[("a", (2000, 1.0, 1.0), (2000, 1.2, 1.0))]);
        let r = build(&s, &t);
        assert_eq!(r.results[0].verdict, Verdict::Better);
        let f = r
            .trust_checks
            .iter()
            .find(|c| c.check == "false_positive_risk")
            .unwrap();
        assert!((f.value.unwrap() - 1.0 / 9.0).abs() < 1e-12, "{f:?}");
        assert!(
            r.cautions
                .iter()
                .any(|c| c.contains("false positive about 11% of the time"))
        );
    }

    #[test]
    fn pre_period_imbalance_is_flagged() {
        let mut m = metric("a", Role::Primary, false);
        m.covariate = Some(CovariateShape::Mean {
            column: "a__pre".into(),
            covariance: "a__cov__a__pre".into(),
        });
        let s = spec(vec![m]);
        let mut t = table(&[("a", (2000, 1.0, 1.0), (2000, 1.0, 1.0))]);
        for (row, pre) in t.rows.iter_mut().zip([1.0, 1.3]) {
            row.columns.insert(
                "a__pre".into(),
                Moments {
                    n: 2000,
                    mean: pre,
                    var: 1.0,
                },
            );
            row.covariances.insert("a__cov__a__pre".into(), 0.5);
        }
        let r = build(&s, &t);
        let c = r
            .trust_checks
            .iter()
            .find(|c| c.check == "pre_period_imbalance")
            .unwrap();
        assert!(c.p_value.unwrap() < 1e-10);
        assert!(
            r.cautions
                .iter()
                .any(|c| c.starts_with("Pre-period imbalance: before exposure, a"))
        );
        // A table without third moments (statistics layout 1) cannot run the heavy-tails check.
        assert_eq!(r.trust_checks_run, &TRUST_CHECKS[1..]);
        t.third_moments = true;
        assert_eq!(build(&s, &t).trust_checks_run, TRUST_CHECKS);
    }

    /// Skewness 4.003 (m₃ = 4, variance 1 in the n − 1 form) asks for 355 × 4.003² = 5,689 units
    /// per arm: 2,000 are flagged, 6,000 are not; a symmetric column never is, and a 0/1 metric
    /// is left to the exact methods' rule.
    #[test]
    fn heavy_tails_are_flagged_below_355_skewness_squared() {
        for (n, flagged) in [(2000u64, true), (6000, false)] {
            let s = spec(vec![
                metric("spend", Role::Primary, false),
                metric("even", Role::Secondary, false),
            ]);
            let mut t = table(&[
                ("spend", (n, 1.0, 1.0), (n, 1.0, 1.0)),
                ("even", (n, 1.0, 1.0), (n, 1.0, 1.0)),
            ]);
            t.third_moments = true;
            for row in &mut t.rows {
                row.third_moments.insert("spend".into(), 4.0);
                row.third_moments.insert("even".into(), 0.0);
            }
            let r = build(&s, &t);
            let flags: Vec<&TrustCheck> = r
                .trust_checks
                .iter()
                .filter(|c| c.check == "heavy_tails")
                .collect();
            assert_eq!(flags.len(), usize::from(flagged), "n = {n}: {flags:?}");
            if flagged {
                assert_eq!(flags[0].subject, "spend (control)");
                let g = flags[0].value.unwrap();
                let want = 4.0 / ((n - 1) as f64 / n as f64).powf(1.5);
                assert!((g - want).abs() < 1e-12, "{g} vs {want}");
                assert!(
                    r.cautions.iter().any(|c| c.starts_with(
                        "Heavy tails: spend (skewness 4.0 in control: about 5,689 units per arm needed, 2,000 there). A mean"
                    )),
                    "{:?}",
                    r.cautions
                );
            }
        }
        let s = spec(vec![metric("bought", Role::Primary, true)]);
        let mut t = table(&[("bought", (100, 0.01, 0.0099), (100, 0.01, 0.0099))]);
        t.third_moments = true;
        for row in &mut t.rows {
            row.third_moments.insert("bought".into(), 0.0097);
        }
        assert!(
            build(&s, &t)
                .trust_checks
                .iter()
                .all(|c| c.check != "heavy_tails")
        );
    }

    #[test]
    fn sample_ratio_is_checked_within_segment_values() {
        let s = spec(vec![metric("a", Role::Primary, false)]);
        let mut t = table(&[("a", (2000, 1.0, 1.0), (2000, 1.0, 1.0))]);
        for (value, (c, tr)) in [("mobile", (1000u64, 1000u64)), ("desktop", (1000, 600))] {
            for (arm, n) in [("control", c), ("treatment", tr)] {
                let mut row = t.rows[0].clone();
                row.arm = arm.into();
                row.units = n;
                row.segment = Some(("device".into(), Some(value.into())));
                t.rows.push(row);
            }
        }
        let r = build(&s, &t);
        let flagged: Vec<&str> = r
            .trust_checks
            .iter()
            .filter(|c| c.check == "segment_sample_ratio")
            .map(|c| c.subject.as_str())
            .collect();
        assert_eq!(flagged, ["device = desktop"]);
        assert!(r.headline[0].starts_with("CHECK FAILED: sample-ratio mismatch within 1 segment value"));
    }

    #[test]
    fn short_runs_and_partial_weeks_are_flagged() {
        let t = table(&[("a", (2000, 1.0, 1.0), (2000, 1.0, 1.0))]);
        for (days, check) in [
            (3.0, Some("short_run")),
            (10.0, Some("partial_weeks")),
            (14.0, None),
        ] {
            let mut s = spec(vec![metric("a", Role::Primary, false)]);
            s.days = days;
            let r = build(&s, &t);
            let got = r
                .trust_checks
                .iter()
                .find(|c| c.check == "short_run" || c.check == "partial_weeks")
                .map(|c| c.check);
            assert_eq!(got, check, "{days} days");
        }
    }

    /// A day whose new units do not follow the split is flagged (after BH over the days); a
    /// balanced day and a day with fewer than 20 units are not.
    #[test]
    fn sample_ratio_is_checked_per_day() {
        let s = spec(vec![metric("a", Role::Primary, false)]);
        let t = table(&[("a", (2000, 1.0, 1.0), (2000, 1.0, 1.0))]);
        let mut r = build(&s, &t);
        let day =
            |c: u64, tr: u64| BTreeMap::from([("control".to_string(), c), ("treatment".to_string(), tr)]);
        let days = vec![
            ("2026-01-01".to_string(), day(500, 510)),
            ("2026-01-02".to_string(), day(500, 300)),
            ("2026-01-03".to_string(), day(9, 1)),
        ];
        add_daily_sample_ratio(&mut r, &days);
        let flagged: Vec<&str> = r
            .trust_checks
            .iter()
            .filter(|c| c.check == "daily_sample_ratio")
            .map(|c| c.subject.as_str())
            .collect();
        assert_eq!(flagged, ["2026-01-02"]);
        assert!(r.trust_checks_run.contains(&"daily_sample_ratio"));
        assert!(
            r.cautions
                .iter()
                .any(|c| c.starts_with("Sample-ratio mismatch on 1 of 2 days (2026-01-02"))
        );
    }

    #[test]
    fn headline_leads_with_void_and_failed_guardrails() {
        let s = spec(vec![metric("a", Role::Primary, false)]);
        let mut t = table(&[("a", (1000, 1.0, 1.0), (1300, 1.0, 1.0))]);
        t.rows[0].units = 1000;
        t.rows[1].units = 1300;
        let r = build(&s, &t);
        assert!(r.void);
        assert!(r.headline[0].starts_with("VOID"), "{:?}", r.headline);
        let mut g = metric("refunds", Role::Guardrail, false);
        g.higher_is_better = Some(false);
        let s = spec(vec![metric("a", Role::Primary, false), g]);
        let t = table(&[
            ("a", (1000, 1.0, 1.0), (1000, 1.0, 1.0)),
            ("refunds", (1000, 1.0, 1.0), (1000, 1.3, 1.0)),
        ]);
        let r = build(&s, &t);
        assert!(
            r.headline[0].starts_with("GUARDRAIL FAILED: refunds worse in treatment"),
            "{:?}",
            r.headline
        );
        assert!(
            r.headline[1].starts_with("Primary: a no detectable change"),
            "{:?}",
            r.headline
        );
    }
}
