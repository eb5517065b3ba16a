//! Stage 6, `execute`: runs rendered SQL and returns the small statistics table.
//!
//! The only module that touches a database. Every place that runs SQL goes through the
//! [`Engine`] trait: the embedded DuckDB ([`duckdb::LocalEngine`], behind the default `engine`
//! feature) and a PostgreSQL server ([`postgres::PostgresEngine`], behind the default
//! `postgres` feature); a new engine is one more implementation. This module also turns the
//! named columns of the returned rows into a typed [`StatsTable`], checking that every column
//! the plan asked for came back, so a short or renamed result can never be read as zeros.

pub mod arm_stats;
#[cfg(feature = "engine")]
pub mod duckdb;
#[cfg(feature = "postgres")]
pub mod postgres;
pub mod staged;

use crate::columns::{self, Stat};
use crate::error::{Error, Result};
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

/// Where a statement runs: it speaks one dialect and returns rows by column name.
///
/// Implementations: [`duckdb::LocalEngine`] (the workspace's local data) and
/// [`postgres::PostgresEngine`]. Errors are [`crate::ErrorKind::Engine`] (the engine failed)
/// or [`crate::ErrorKind::Data`] (the data it read does not fit).
pub trait Engine {
    /// Who computes the numbers, for messages: `local DuckDB`, `PostgreSQL`.
    fn describe(&self) -> String;
    /// The dialect whose SQL this engine runs.
    fn dialect(&self) -> &str;
    /// Runs one statement and returns its rows by column name.
    fn query(&mut self, sql: &str) -> Result<Vec<NamedRow>>;

    /// Runs the readout statement `sql` of `plan` and returns the rows its final SELECT
    /// returns. By default the statement runs as it is; the local engine computes the final
    /// aggregation itself, order-independently (`arm_stats`), to stay byte-identical on all
    /// cores.
    fn readout(&mut self, plan: &ExperimentPlan, sql: &str) -> Result<Vec<NamedRow>> {
        let _ = plan;
        self.query(sql)
    }
}

fn number(row: &NamedRow, col: &str) -> Result<Option<f64>> {
    match row.get(col) {
        None => Err(Error::data(format!("the result has no column `{col}`"))),
        Some(Cell::Null) => Ok(None),
        Some(Cell::Number(x)) => Ok(Some(*x)),
        Some(Cell::Text(t)) => t
            .trim()
            .parse::<f64>()
            .map(Some)
            .map_err(|_| Error::data(format!("column `{col}` holds `{t}`, not a number"))),
    }
}

fn count(row: &NamedRow, col: &str) -> Result<u64> {
    let x = number(row, col)?.unwrap_or(0.0);
    if x < 0.0 || x.fract() != 0.0 || !x.is_finite() {
        return Err(Error::data(format!("column `{col}` holds {x}, not a count")));
    }
    Ok(x as u64)
}

/// Reads the readout query's rows into a [`StatsTable`]. Column names are matched without
/// regard to case (engines that fold unquoted names return them in upper case).
pub fn stats_table(plan: &ExperimentPlan, rows: &[NamedRow]) -> Result<StatsTable> {
    let mut table = StatsTable::default();
    for (i, row) in rows.iter().enumerate() {
        let row: NamedRow = row
            .iter()
            .map(|(k, v)| (k.to_ascii_lowercase(), v.clone()))
            .collect();
        let row = &row;
        let text = |col: &str| -> Result<Option<String>> {
            match row.get(col) {
                Some(Cell::Text(t)) => Ok(Some(t.clone())),
                Some(Cell::Number(x)) => Ok(Some(x.to_string())),
                Some(Cell::Null) => Ok(None),
                None => Err(Error::data(format!("the result has no column `{col}`"))),
            }
        };
        let Some(arm) = text(columns::ARM)? else {
            return Err(Error::data(format!("row {} of the result has no arm", i + 1)));
        };
        if i == 0 {
            table.excluded_multiple_arms = count(row, columns::EXCLUDED_MULTIPLE_ARMS)?;
            table.excluded_missing_arm = count(row, columns::EXCLUDED_MISSING_ARM)?;
            table.excluded_rows_without_unit = count(row, columns::EXCLUDED_ROWS_WITHOUT_UNIT)?;
        }
        let segment = if plan.segments.is_empty() {
            None
        } else {
            text(columns::SEGMENT_NAME)?
                .map(|name| -> Result<_> { Ok((name, text(columns::SEGMENT_VALUE)?)) })
        };
        let mut out = ArmRow {
            arm,
            segment: segment.transpose()?,
            units: count(row, columns::UNITS)?,
            ..ArmRow::default()
        };
        for c in &plan.columns {
            let n = count(row, &columns::stat(&c.column, Stat::N))?;
            let mean = number(row, &columns::stat(&c.column, Stat::Mean))?.unwrap_or(f64::NAN);
            let var = number(row, &columns::stat(&c.column, Stat::Var))?.unwrap_or(f64::NAN);
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

/// Reads a statistics table exported from a warehouse: CSV with a header row, or JSON (an array
/// of objects, or one object per line). Parquet is not read by this build: export CSV or JSON.
pub fn read_stats_file(path: &std::path::Path) -> Result<Vec<NamedRow>> {
    let ext = path
        .extension()
        .and_then(|e| e.to_str())
        .unwrap_or("")
        .to_ascii_lowercase();
    let text = std::fs::read_to_string(path)
        .map_err(|e| Error::data(format!("cannot read {}: {e}", path.display())).with_source(e))?;
    match ext.as_str() {
        "csv" => parse_csv(&text).map_err(|e| Error::data(format!("{}: {e}", path.display()))),
        "json" | "jsonl" | "ndjson" => {
            parse_json(&text).map_err(|e| Error::data(format!("{}: {e}", path.display())))
        }
        "parquet" => Err(Error::data(format!(
            "{}: Parquet statistics files are not supported by this build; export the result as CSV or JSON",
            path.display()
        ))),
        _ => Err(Error::data(format!(
            "{}: unknown file type; export the statistics table as .csv or .json",
            path.display()
        ))),
    }
}

fn cell_from_text(t: &str) -> Cell {
    let t = t.trim();
    if t.is_empty() || t.eq_ignore_ascii_case("null") || t == "\\N" {
        Cell::Null
    } else if let Ok(x) = t.parse::<f64>() {
        Cell::Number(x)
    } else if t.eq_ignore_ascii_case("nan") {
        Cell::Number(f64::NAN)
    } else {
        Cell::Text(t.to_string())
    }
}

/// RFC 4180 CSV: quoted fields may hold commas, quotes (doubled) and newlines.
fn parse_csv(text: &str) -> Result<Vec<NamedRow>, String> {
    let mut records: Vec<Vec<(String, bool)>> = Vec::new();
    let mut field = String::new();
    let mut record = Vec::new();
    let (mut quoted, mut in_quotes, mut chars) = (false, false, text.chars().peekable());
    while let Some(c) = chars.next() {
        match c {
            '"' if in_quotes && chars.peek() == Some(&'"') => {
                field.push('"');
                chars.next();
            }
            '"' if in_quotes => in_quotes = false,
            '"' if field.is_empty() => {
                in_quotes = true;
                quoted = true;
            }
            ',' if !in_quotes => {
                record.push((std::mem::take(&mut field), quoted));
                quoted = false;
            }
            '\n' if !in_quotes => {
                record.push((
                    std::mem::take(&mut field).trim_end_matches('\r').to_string(),
                    quoted,
                ));
                quoted = false;
                records.push(std::mem::take(&mut record));
            }
            c => field.push(c),
        }
    }
    if in_quotes {
        return Err("a quoted field is not closed".into());
    }
    if !field.is_empty() || !record.is_empty() {
        record.push((field, quoted));
        records.push(record);
    }
    let mut records = records
        .into_iter()
        .filter(|r| !(r.len() == 1 && r[0].0.is_empty()));
    let header: Vec<String> = records
        .next()
        .ok_or("the file is empty")?
        .into_iter()
        .map(|(h, _)| h.trim().to_ascii_lowercase())
        .collect();
    records
        .enumerate()
        .map(|(i, r)| {
            if r.len() != header.len() {
                return Err(format!(
                    "row {} has {} fields, the header {}",
                    i + 2,
                    r.len(),
                    header.len()
                ));
            }
            Ok(header
                .iter()
                .cloned()
                .zip(
                    r.into_iter()
                        .map(|(v, q)| if q { Cell::Text(v) } else { cell_from_text(&v) }),
                )
                .collect())
        })
        .collect()
}

fn parse_json(text: &str) -> Result<Vec<NamedRow>, String> {
    let values: Vec<serde_json::Value> = match serde_json::from_str::<serde_json::Value>(text) {
        Ok(serde_json::Value::Array(a)) => a,
        Ok(v @ serde_json::Value::Object(_)) => vec![v],
        _ => text
            .lines()
            .filter(|l| !l.trim().is_empty())
            .map(|l| serde_json::from_str(l).map_err(|e| e.to_string()))
            .collect::<Result<_, _>>()?,
    };
    values
        .into_iter()
        .map(|v| {
            let serde_json::Value::Object(o) = v else {
                return Err("each row must be a JSON object".to_string());
            };
            Ok(o.into_iter()
                .map(|(k, v)| {
                    let cell = match v {
                        serde_json::Value::Null => Cell::Null,
                        serde_json::Value::Number(n) => Cell::Number(n.as_f64().unwrap_or(f64::NAN)),
                        serde_json::Value::String(s) => cell_from_text(&s),
                        serde_json::Value::Bool(b) => Cell::Number(f64::from(u8::from(b))),
                        other => Cell::Text(other.to_string()),
                    };
                    (k.to_ascii_lowercase(), cell)
                })
                .collect())
        })
        .collect()
}

/// Checks that a statistics table comes from this plan: same fingerprint, same layout.
pub fn check_fingerprint(plan: &ExperimentPlan, rows: &[NamedRow]) -> Result<()> {
    let want = crate::plan::fingerprint(plan);
    if rows.is_empty() {
        return Err(Error::data("the statistics table has no rows"));
    }
    for row in rows {
        let row: NamedRow = row
            .iter()
            .map(|(k, v)| (k.to_ascii_lowercase(), v.clone()))
            .collect();
        match row.get(columns::LAYOUT) {
            Some(Cell::Number(x)) if *x == f64::from(crate::plan::STATS_LAYOUT) => {}
            Some(Cell::Text(t)) if t.trim() == crate::plan::STATS_LAYOUT.to_string() => {}
            None => {
                return Err(Error::data(
                    "the statistics table has no plumb_layout column: it was not produced by `plumb sql`",
                ));
            }
            Some(other) => {
                return Err(Error::data(format!(
                    "the statistics table has layout {other:?}, this plumb reads layout {}; re-run the query from `plumb sql`",
                    crate::plan::STATS_LAYOUT
                )));
            }
        }
        let got = match row.get(columns::FINGERPRINT) {
            Some(Cell::Text(t)) => t.clone(),
            Some(Cell::Number(x)) => x.to_string(),
            _ => String::new(),
        };
        if got != want {
            return Err(Error::data(format!(
                "the statistics table comes from another query (fingerprint `{got}`, expected `{want}`): another experiment or another version of the catalog. Re-run the SQL that `plumb sql {}` prints now",
                plan.experiment
            )));
        }
    }
    Ok(())
}
