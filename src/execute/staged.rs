//! Deterministic parallel execution: one statement split at its top aggregation.
//!
//! A parallel engine adds floating-point numbers in an order that depends on thread
//! scheduling, so `avg`, `var_samp` and `covar_samp` over a million units differ in their last
//! bits from run to run. plumb's statements have two kinds of work: the heavy part (exposures,
//! event scans joined and grouped per unit, caps) whose aggregates are exact (counts, min/max,
//! exact sums — see the `sum_input` capability), and the small top aggregation over per-unit
//! rows, which is floating point. [`stage`] splits a statement there:
//!
//! 1. every CTE that the top aggregation reads is materialised into a temporary table,
//!    sorted by all its columns (`ORDER BY ALL`) — this runs on all cores;
//! 2. the rest of the statement (the top aggregation and any layers above it) runs against
//!    those tables on one thread, reading rows in that fixed order.
//!
//! The top aggregation is found by walking down from the final SELECT through layers that do
//! not aggregate (a report's final `SELECT ... FROM report_rows ORDER BY ...`) to the first that
//! does (GROUP BY or an aggregate function); the CTEs it references are the inputs. The SQL of
//! both stages is the statement's own SQL, re-printed by sqlparser: nothing is recomputed
//! differently, only in two steps. Used by the local DuckDB engine only; warehouses run the
//! statement as it is.

use sqlparser::ast::{Cte, Expr, Ident, ObjectName, ObjectNamePart, Query, SetExpr, Statement};
use sqlparser::ast::{GroupByExpr, SelectItem, visit_expressions, visit_relations, visit_relations_mut};
use sqlparser::dialect::DuckDbDialect;
use sqlparser::parser::Parser;
use std::collections::BTreeSet;
use std::ops::ControlFlow;

/// Prefix of the temporary tables of stage 1 (reserved in the local engine).
pub const STAGE_PREFIX: &str = "plumb_stage_";

/// One materialised CTE of stage 1.
#[derive(Debug, Clone, PartialEq)]
pub struct StageTable {
    /// The CTE's name in the statement (lower case).
    pub cte: String,
    /// The temporary table holding it.
    pub table: String,
    /// The `CREATE TEMP TABLE ... AS` statement.
    pub create: String,
}

/// A statement split in two stages.
#[derive(Debug, Clone, PartialEq)]
pub struct Staged {
    /// Stage 1, in CTE order.
    pub tables: Vec<StageTable>,
    /// Stage 2: the statement's top aggregation and what is above it, reading the tables.
    pub finish: String,
}

/// Aggregate functions (a SELECT calling one outside a window aggregates).
const AGGREGATES: &[&str] = &[
    "count",
    "sum",
    "avg",
    "min",
    "max",
    "var_samp",
    "var_pop",
    "variance",
    "stddev",
    "stddev_samp",
    "stddev_pop",
    "covar_samp",
    "covar_pop",
    "corr",
    "quantile",
    "quantile_cont",
    "quantile_disc",
    "median",
    "percentile_cont",
    "percentile_disc",
    "string_agg",
    "list",
    "array_agg",
    "bool_and",
    "bool_or",
    "any_value",
    "first",
    "last",
    "fsum",
];

/// Splits `sql` (DuckDB dialect) at its top aggregation; `None` when it has no CTE that an
/// aggregation reads (then there is nothing to stage and it runs as it is). `ordered`: stage-1
/// tables are sorted by all columns (needed when stage 2 is SQL on one thread; not when it is
/// an order-independent aggregation, see `arm_stats`).
pub fn stage(sql: &str, ordered: bool) -> Option<Staged> {
    let mut statements = Parser::parse_sql(&DuckDbDialect {}, sql).ok()?;
    if statements.len() != 1 {
        return None;
    }
    let Statement::Query(query) = statements.pop()? else {
        return None;
    };
    let with = query.with.clone()?;
    if with.recursive {
        return None;
    }
    let ctes = &with.cte_tables;
    let names: Vec<String> = ctes
        .iter()
        .map(|c| c.alias.name.value.to_ascii_lowercase())
        .collect();
    let mut body = (*query).clone();
    body.with = None;
    let mut serial = BTreeSet::new();
    let mut inputs = BTreeSet::new();
    layers(&body, ctes, &names, &mut serial, &mut inputs);
    if inputs.is_empty() {
        return None;
    }
    let table = |i: usize| format!("{STAGE_PREFIX}{i}");
    let tables = inputs
        .iter()
        .map(|&i| {
            let defs: Vec<String> = ctes[..=i].iter().map(Cte::to_string).collect();
            let create = format!(
                "CREATE TEMP TABLE {} AS WITH {} SELECT * FROM {}{}",
                table(i),
                defs.join(",\n"),
                ctes[i].alias.name,
                if ordered { " ORDER BY ALL" } else { "" }
            );
            StageTable {
                cte: names[i].clone(),
                table: table(i),
                create,
            }
        })
        .collect();
    // Stage 2: the serial CTEs (not materialised) and the body, inputs read from the tables.
    let mut finish = (*query).clone();
    let kept: Vec<Cte> = ctes
        .iter()
        .enumerate()
        .filter(|(i, _)| serial.contains(i) && !inputs.contains(i))
        .map(|(_, c)| c.clone())
        .collect();
    finish.with = if kept.is_empty() {
        None
    } else {
        Some(sqlparser::ast::With {
            cte_tables: kept,
            ..with.clone()
        })
    };
    let _ = visit_relations_mut(&mut finish, |name: &mut ObjectName| {
        if let Some(i) = cte_index(name, &names)
            && inputs.contains(&i)
        {
            *name = ObjectName(vec![ObjectNamePart::Identifier(Ident::new(table(i)))]);
        }
        ControlFlow::<()>::Continue(())
    });
    Some(Staged {
        tables,
        finish: finish.to_string(),
    })
}

/// The statement's `WITH ...` clause as text (every CTE, re-printed), to run another final
/// SELECT over its CTEs; `None` when `sql` is not one query with a WITH clause.
pub fn with_clause(sql: &str) -> Option<String> {
    let mut statements = Parser::parse_sql(&DuckDbDialect {}, sql).ok()?;
    let Statement::Query(query) = statements.pop()? else {
        return None;
    };
    query.with.as_ref().map(|w| w.to_string())
}

/// Walks down from `q` through non-aggregating layers; the CTEs an aggregating layer reads
/// are `inputs`, the non-aggregating layers passed through are `serial`.
fn layers(
    q: &Query,
    ctes: &[Cte],
    names: &[String],
    serial: &mut BTreeSet<usize>,
    inputs: &mut BTreeSet<usize>,
) {
    let refs = referenced(q, names);
    if aggregates(&q.body) {
        inputs.extend(refs);
        return;
    }
    for r in refs {
        if serial.insert(r) {
            layers(&ctes[r].query, ctes, names, serial, inputs);
        }
    }
}

fn cte_index(name: &ObjectName, names: &[String]) -> Option<usize> {
    match name.0.as_slice() {
        [ObjectNamePart::Identifier(id)] => names.iter().position(|n| *n == id.value.to_ascii_lowercase()),
        _ => None,
    }
}

/// CTEs referenced anywhere in `q` (subqueries included).
fn referenced(q: &Query, names: &[String]) -> BTreeSet<usize> {
    let mut out = BTreeSet::new();
    let _ = visit_relations(q, |name| {
        if let Some(i) = cte_index(name, names) {
            out.insert(i);
        }
        ControlFlow::<()>::Continue(())
    });
    out
}

/// Whether a query body groups or calls an aggregate function (outside a window).
fn aggregates(body: &SetExpr) -> bool {
    match body {
        SetExpr::Select(s) => {
            let grouped = match &s.group_by {
                GroupByExpr::All(_) => true,
                GroupByExpr::Expressions(e, _) => !e.is_empty(),
            };
            grouped
                || s.projection.iter().any(|item| match item {
                    SelectItem::UnnamedExpr(e) | SelectItem::ExprWithAlias { expr: e, .. } => {
                        calls_aggregate(e)
                    }
                    _ => false,
                })
        }
        SetExpr::Query(q) => aggregates(&q.body),
        SetExpr::SetOperation { left, right, .. } => aggregates(left) || aggregates(right),
        _ => false,
    }
}

fn calls_aggregate(e: &Expr) -> bool {
    let mut found = false;
    let _ = visit_expressions(e, |x| {
        match x {
            // A scalar subquery aggregates on its own; it does not make this SELECT aggregate.
            Expr::Subquery(_) => return ControlFlow::Break(()),
            Expr::Function(f) if f.over.is_none() => {
                let name = f.name.to_string().to_ascii_lowercase();
                if AGGREGATES.contains(&name.as_str()) {
                    found = true;
                    return ControlFlow::Break(());
                }
            }
            _ => {}
        }
        ControlFlow::Continue(())
    });
    found
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn splits_at_the_top_aggregation() {
        let sql = "WITH a AS (SELECT u, count(*) AS n FROM t GROUP BY u), \
                   b AS (SELECT u, n FROM a), \
                   ex AS (SELECT sum(n) AS total FROM a) \
                   SELECT count(*), avg(n), (SELECT total FROM ex) AS total FROM b";
        let s = stage(sql, true).unwrap();
        let names: Vec<&str> = s.tables.iter().map(|t| t.table.as_str()).collect();
        // The final SELECT aggregates over b and reads ex in a subquery: both are inputs.
        assert_eq!(names, ["plumb_stage_1", "plumb_stage_2"]);
        assert_eq!(s.tables[1].cte, "ex");
        assert!(
            s.tables[0]
                .create
                .starts_with("CREATE TEMP TABLE plumb_stage_1 AS WITH a AS")
        );
        assert!(s.tables[0].create.ends_with("SELECT * FROM b ORDER BY ALL"));
        assert!(
            stage(sql, false).unwrap().tables[0]
                .create
                .ends_with("SELECT * FROM b")
        );
        assert_eq!(
            s.finish,
            "SELECT count(*), avg(n), (SELECT total FROM plumb_stage_2) AS total FROM plumb_stage_1"
        );
    }

    #[test]
    fn walks_through_layers_that_do_not_aggregate() {
        let sql = "WITH s AS (SELECT u, p, sum(x) AS v FROM t GROUP BY u, p), \
                   r AS (SELECT p, sum(v) AS total FROM s GROUP BY p UNION ALL SELECT p, count(*) FROM s GROUP BY p) \
                   SELECT p, total FROM r ORDER BY p";
        let s = stage(sql, true).unwrap();
        assert_eq!(s.tables.len(), 1, "{s:?}");
        assert!(s.tables[0].create.contains("SELECT * FROM s ORDER BY ALL"));
        assert!(
            s.finish
                .starts_with("WITH r AS (SELECT p, sum(v) AS total FROM plumb_stage_0 GROUP BY p")
        );
        assert!(s.finish.ends_with("SELECT p, total FROM r ORDER BY p"));
    }

    #[test]
    fn nothing_to_stage() {
        assert_eq!(stage("SELECT count(*) FROM t", true), None);
        assert_eq!(stage("WITH a AS (SELECT 1 AS x) SELECT x FROM a", true), None);
        assert_eq!(stage("not sql at all", true), None);
        // A window function is not an aggregation of its SELECT.
        assert_eq!(
            stage(
                "WITH a AS (SELECT 1 AS x) SELECT row_number() OVER (ORDER BY x) FROM a",
                true
            ),
            None
        );
    }
}
