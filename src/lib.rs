//! plumb: metric definitions declared once, compiled to warehouse SQL, analysed as readouts.
//!
//! The pipeline is a chain of typed functions; tests and `plumb sql` can stop after any stage:
//!
//! ```text
//!  files ──load──▶ syntax structs ──resolve──▶ ir::Catalog ──plan──▶ ExperimentPlan
//!        (spans)                  (all errors                (dialect-free)
//!                                  at once)
//!  ExperimentPlan ──render(dialect)──▶ SQL ──validate──▶ SQL ──execute──▶ StatsTable
//!  StatsTable ──stats──▶ Readout ──output──▶ table | JSON
//! ```
//!
//! See DEVELOPERS.md for the stage table, the code map and the invariants each stage keeps.

pub mod cli;
pub mod demo;
pub mod diagnostics;
pub mod diff;
pub mod execute;
pub mod ir;
pub mod lint;
pub mod load;
pub mod output;
pub mod plan;
pub mod render;
pub mod report;
pub mod resolve;
pub mod source;
pub mod stats;
pub mod time;
pub mod validate;
pub mod workspace;

use ir::{Catalog, Direction, ExperimentId};
use plan::{ExperimentPlan, PlannedKind};
use render::{Dialect, DialectError};
use stats::readout::{CovariateShape, MetricShape, MetricSpec, ReadoutSpec};

/// Plans, renders and validates the readout query of one experiment.
///
/// `by` adds segments to those the experiment declares (`plumb sql --by`, `analyze --by`).
pub fn compile_experiment(
    catalog: &Catalog,
    experiment: ExperimentId,
    by: &[ir::SegmentId],
    dialect: &Dialect,
) -> Result<(ExperimentPlan, String), DialectError> {
    let plan = plan::plan_experiment(catalog, experiment, by);
    let sql = dialect.render_experiment(&plan)?;
    validate::validate(&sql, &dialect.caps.sqlparser).map_err(|e| {
        DialectError(format!(
            "dialect {} produced SQL that does not parse ({e}); this is a bug in the dialect's templates",
            dialect.caps.name
        ))
    })?;
    Ok((plan, sql))
}

/// Plans, renders and validates a report query (see `plan::plan_report`).
pub fn compile_report(plan: &plan::ReportPlan, dialect: &Dialect) -> Result<String, DialectError> {
    let sql = dialect.render_report(plan)?;
    validate::validate(&sql, &dialect.caps.sqlparser).map_err(|e| {
        DialectError(format!(
            "dialect {} produced report SQL that does not parse ({e}); this is a bug in the dialect's templates",
            dialect.caps.name
        ))
    })?;
    Ok(sql)
}

/// Statistical choices of a readout (command-line flags).
#[derive(Debug, Clone, Copy)]
pub struct ReadoutOptions {
    pub alpha: f64,
    pub cuped: bool,
    pub sequential: bool,
}

impl Default for ReadoutOptions {
    fn default() -> Self {
        ReadoutOptions {
            alpha: 0.05,
            cuped: true,
            sequential: false,
        }
    }
}

fn covariate_shape(kind: &PlannedKind, covariate: &PlannedKind) -> Option<CovariateShape> {
    use plan::covariance_name as cov;
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
                let metric = catalog.metric(&m.name).map(|id| &catalog.metrics[id]);
                let binary = matches!(
                    metric.map(|m| &m.kind),
                    Some(ir::MetricKind::Events {
                        aggregation: ir::Aggregation::Any | ir::Aggregation::AtLeast(_),
                        ..
                    })
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
                            covariance: plan::covariance_name(numerator, denominator),
                        },
                    },
                    higher_is_better: metric.and_then(|m| m.direction).map(|d| d == Direction::Increase),
                    binary,
                    mde: metric.and_then(|m| m.mde).or(exp.mde),
                    covariate: m.covariate.as_ref().and_then(|c| covariate_shape(&m.kind, c)),
                }
            })
            .collect(),
        alpha: options.alpha,
        cuped: options.cuped,
        sequential: options.sequential,
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
