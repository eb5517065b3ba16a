//! Compiling and describing one experiment: plan -> render -> validate, and the readout spec.
//!
//! The stage chain every command shares (through `Context`, or directly in tests): plan the
//! query, render it for a dialect, re-parse it with that dialect's sqlparser dialect, and tell
//! the statistics stage what each column of the result means.

use crate::columns;
use crate::error::{Error, Result};
use crate::ir::{self, Catalog, Direction, ExperimentId};
use crate::plan::{self, ExperimentPlan, PlannedKind};
use crate::render::Dialect;
use crate::stats::readout::{CovariateShape, MetricShape, MetricSpec, ReadoutSpec};

/// Plans, renders and validates the readout query of one experiment.
///
/// `by` adds segments to those the experiment declares (`plumb sql --by`, `analyze --by`).
pub fn compile_experiment(
    catalog: &Catalog,
    experiment: ExperimentId,
    by: &[ir::SegmentId],
    dialect: &Dialect,
) -> Result<(ExperimentPlan, String)> {
    let plan = plan::plan_experiment(catalog, experiment, by);
    let sql = compile_plan(&plan, dialect)?;
    Ok((plan, sql))
}

/// Renders and validates an experiment plan (a readout's, or `plan_history`'s).
pub fn compile_plan(plan: &ExperimentPlan, dialect: &Dialect) -> Result<String> {
    if !plan.segments.is_empty() && !dialect.caps.grouping_sets {
        return Err(Error::usage(format!(
            "dialect {} has no GROUPING SETS, so segments cannot be computed in one statement; \
             run without segments or use a dialect with `grouping_sets: true`",
            dialect.caps.name
        )));
    }
    validated(dialect.render_experiment(plan)?, dialect, "SQL")
}

/// The validate stage: rendered SQL must re-parse in the dialect's sqlparser dialect.
fn validated(sql: String, dialect: &Dialect, what: &str) -> Result<String> {
    crate::validate::validate(&sql, &dialect.caps.sqlparser).map_err(|e| {
        dialect.broken(format!(
            "dialect {} produced {what} that does not parse ({e}); this is a bug in the dialect's templates",
            dialect.caps.name
        ))
    })?;
    Ok(sql)
}

/// Renders and validates a population-totals query (see `plan::plan_totals`).
pub fn compile_totals(plan: &plan::TotalsPlan, dialect: &Dialect) -> Result<String> {
    validated(dialect.render_totals(plan)?, dialect, "totals SQL")
}

/// Plans, renders and validates a report query (see `plan::plan_report`).
pub fn compile_report(plan: &plan::ReportPlan, dialect: &Dialect) -> Result<String> {
    validated(dialect.render_report(plan)?, dialect, "report SQL")
}

/// Statistical choices of a readout (command-line flags).
#[derive(Debug, Clone, Copy)]
pub struct ReadoutOptions {
    pub alpha: f64,
    pub cuped: bool,
    pub sequential: bool,
    /// Add whole-population impact (one more query: the report of the experiment's count and
    /// sum metrics over its period).
    pub population_impact: bool,
    /// The most values one segment may have in a readout: a segment with more is almost
    /// always an id (every unit its own slice), whose readout would take very long and say
    /// nothing.
    pub max_segment_values: usize,
    /// The most metrics one readout computes on an engine (`analyze --max-metrics`); see
    /// [`MAX_READOUT_METRICS`].
    pub max_metrics: usize,
    /// Share of experiments like this one that truly work, for the false-positive risk of a
    /// significant result (`analyze --prior-success`).
    pub prior_success: f64,
}

/// Default of [`ReadoutOptions::prior_success`]: success rates of 8–33% are reported for
/// large experimentation programs (Kohavi, Deng & Vermeer 2022, Table 2, recalled from
/// memory); 20% is plumb's stated default, not a measured one.
pub const PRIOR_SUCCESS: f64 = 0.2;

/// Default of [`ReadoutOptions::max_metrics`]. The readout is one statement and its per-unit
/// table is units x metrics wide: on the local engine 500 metrics on 36,000 units took 6.7 GB
/// and 2,000 were killed for memory, while 250 took 2.1 GB.
pub const MAX_READOUT_METRICS: usize = 250;

/// Default of [`ReadoutOptions::max_segment_values`] (`analyze --max-segment-values`).
pub const MAX_SEGMENT_VALUES: usize = 1_000;

impl Default for ReadoutOptions {
    fn default() -> Self {
        ReadoutOptions {
            alpha: 0.05,
            cuped: true,
            sequential: false,
            population_impact: false,
            max_segment_values: MAX_SEGMENT_VALUES,
            max_metrics: MAX_READOUT_METRICS,
            prior_success: PRIOR_SUCCESS,
        }
    }
}

fn covariate_shape(kind: &PlannedKind, covariate: &PlannedKind) -> Option<CovariateShape> {
    use columns::covariance as cov;
    match (kind, covariate) {
        (PlannedKind::Mean { column: y }, PlannedKind::Mean { column: x }) => Some(CovariateShape::Mean {
            column: x.clone(),
            covariance: cov(y, x),
        }),
        (
            PlannedKind::Ratio {
                numerator: n,
                denominator: d,
            },
            PlannedKind::Ratio {
                numerator: np,
                denominator: dp,
            },
        ) => Some(CovariateShape::Ratio {
            numerator: np.clone(),
            denominator: dp.clone(),
            pre: cov(np, dp),
            n_np: cov(n, np),
            n_dp: cov(n, dp),
            d_np: cov(d, np),
            d_dp: cov(d, dp),
        }),
        _ => None,
    }
}

/// What the statistics stage needs to know about an experiment.
pub fn readout_spec(
    catalog: &Catalog,
    experiment: ExperimentId,
    plan: &ExperimentPlan,
    options: ReadoutOptions,
) -> ReadoutSpec {
    let exp = &catalog.experiments[experiment];
    ReadoutSpec {
        experiment: exp.name.clone(),
        control: exp.control.clone(),
        arms: exp.arms.iter().map(|a| (a.name.clone(), a.share)).collect(),
        metrics: plan
            .metrics
            .iter()
            .map(|m| {
                let metric = &catalog.metrics[m.id];
                let binary = matches!(
                    metric.kind,
                    ir::MetricKind::Events {
                        aggregation: ir::Aggregation::Any | ir::Aggregation::AtLeast(_),
                        ..
                    }
                );
                MetricSpec {
                    name: m.name.clone(),
                    role: m.role,
                    kind: match &m.kind {
                        PlannedKind::Mean { column } => MetricShape::Mean {
                            column: column.clone(),
                        },
                        PlannedKind::Ratio {
                            numerator,
                            denominator,
                        } => MetricShape::Ratio {
                            numerator: numerator.clone(),
                            denominator: denominator.clone(),
                            covariance: columns::covariance(numerator, denominator),
                        },
                    },
                    higher_is_better: metric.direction.map(|d| d == Direction::Increase),
                    binary,
                    mde: metric.mde.or(exp.mde),
                    covariate: m.covariate.as_ref().and_then(|c| covariate_shape(&m.kind, c)),
                }
            })
            .collect(),
        alpha: options.alpha,
        cuped: options.cuped,
        sequential: options.sequential,
        prior_success: options.prior_success,
        days: (exp.end.0 - exp.start.0) as f64 / 86_400.0,
        start: exp.start.to_iso(),
        end: exp.end.to_iso(),
        exploratory_segments: plan
            .segments
            .iter()
            .filter(|s| !exp.segments.iter().any(|&id| catalog.segments[id].name == s.name))
            .map(|s| s.name.clone())
            .collect(),
    }
}
