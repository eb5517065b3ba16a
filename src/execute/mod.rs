//! Stage 6, `execute`: runs rendered SQL and returns the small statistics table.
//!
//! The only module that touches a database (DuckDB, embedded, behind the default `engine`
//! feature). It also turns the named columns of the returned rows into a typed
//! [`StatsTable`], checking that every column the plan asked for came back, so a short or
//! renamed result can never be read as zeros.

#[cfg(feature = "engine")]
pub mod duckdb;

use crate::plan::ExperimentPlan;
use crate::stats::Moments;
use crate::stats::readout::{ArmRow, StatsTable};
use std::collections::BTreeMap;

/// One cell of a result row.
#[derive(Debug, Clone, PartialEq)]
pub enum Cell {
    Null,
    Number(f64),
    Text(String),
}

/// A result row, column name -> cell.
pub type NamedRow = BTreeMap<String, Cell>;

/// A failure while running SQL or reading its result.
#[derive(Debug)]
pub struct ExecuteError(pub String);

impl std::fmt::Display for ExecuteError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(&self.0)
    }
}

fn number(row: &NamedRow, col: &str) -> Result<Option<f64>, ExecuteError> {
    match row.get(col) {
        None => Err(ExecuteError(format!("the result has no column `{col}`"))),
        Some(Cell::Null) => Ok(None),
        Some(Cell::Number(x)) => Ok(Some(*x)),
        Some(Cell::Text(t)) => t
            .trim()
            .parse::<f64>()
            .map(Some)
            .map_err(|_| ExecuteError(format!("column `{col}` holds `{t}`, not a number"))),
    }
}

fn count(row: &NamedRow, col: &str) -> Result<u64, ExecuteError> {
    let x = number(row, col)?.unwrap_or(0.0);
    if x < 0.0 || x.fract() != 0.0 || !x.is_finite() {
        return Err(ExecuteError(format!("column `{col}` holds {x}, not a count")));
    }
    Ok(x as u64)
}

/// Reads the readout query's rows into a [`StatsTable`]. Column names are matched without
/// regard to case (engines that fold unquoted names return them in upper case).
pub fn stats_table(plan: &ExperimentPlan, rows: &[NamedRow]) -> Result<StatsTable, ExecuteError> {
    let mut table = StatsTable::default();
    for (i, row) in rows.iter().enumerate() {
        let row: NamedRow = row
            .iter()
            .map(|(k, v)| (k.to_ascii_lowercase(), v.clone()))
            .collect();
        let row = &row;
        let text = |col: &str| -> Result<Option<String>, ExecuteError> {
            match row.get(col) {
                Some(Cell::Text(t)) => Ok(Some(t.clone())),
                Some(Cell::Number(x)) => Ok(Some(x.to_string())),
                Some(Cell::Null) => Ok(None),
                None => Err(ExecuteError(format!("the result has no column `{col}`"))),
            }
        };
        let Some(arm) = text("arm")? else {
            return Err(ExecuteError(format!("row {} of the result has no arm", i + 1)));
        };
        if i == 0 {
            table.excluded_multiple_arms = count(row, "excluded_multiple_arms")?;
            table.excluded_missing_arm = count(row, "excluded_missing_arm")?;
            table.excluded_rows_without_unit = count(row, "excluded_rows_without_unit")?;
        }
        let segment = if plan.segments.is_empty() {
            None
        } else {
            text("segment_name")?
                .map(|name| -> Result<_, ExecuteError> { Ok((name, text("segment_value")?)) })
        };
        let mut out = ArmRow {
            arm,
            segment: segment.transpose()?,
            units: count(row, "units")?,
            ..ArmRow::default()
        };
        for c in &plan.columns {
            let n = count(row, &format!("{}__n", c.column))?;
            let mean = number(row, &format!("{}__mean", c.column))?.unwrap_or(f64::NAN);
            let var = number(row, &format!("{}__var", c.column))?.unwrap_or(f64::NAN);
            out.columns.insert(c.column.clone(), Moments { n, mean, var });
        }
        for c in &plan.covariances {
            let cov = number(row, &c.name)?.unwrap_or(f64::NAN);
            out.covariances.insert(c.name.clone(), cov);
        }
        table.rows.push(out);
    }
    Ok(table)
}
