//! Stage 6, `execute`: runs rendered SQL and returns the small statistics table.
//!
//! The only module that touches a database. Every place that runs SQL goes through the
//! [`Engine`] trait: the embedded DuckDB ([`duckdb::LocalEngine`], behind the default `engine`
//! feature) and a PostgreSQL server ([`postgres::PostgresEngine`], behind the default
//! `postgres` feature); a new engine is one more implementation. This module also turns the
//! named columns of the returned rows into a typed [`StatsTable`], checking that every column
//! the plan asked for came back, so a short or renamed result can never be read as zeros.

pub mod arm_stats;
pub mod command;
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

    /// Binds statements without running them, for the check-time probes of the local data
    /// ([`crate::probe`]); `None` where the engine cannot.
    fn binder(&self) -> Option<&dyn crate::probe::Binder> {
        None
    }
}

/// A cell as a number: engines return numbers, command engines and files return their text,
/// parsed here (exactly); `Err` names what the cell holds instead.
pub fn cell_number(cell: Option<&Cell>) -> std::result::Result<Option<f64>, String> {
    match cell {
        None | Some(Cell::Null) => Ok(None),
        Some(Cell::Number(x)) => Ok(Some(*x)),
        Some(Cell::Text(t)) => t
            .trim()
            .parse::<f64>()
            .map(Some)
            .map_err(|_| format!("`{t}` is not a number")),
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

/// The largest count a statistics table may hold: beyond 2^53 an f64 no longer counts
/// exactly (`units = 1e30` once saturated through `as u64`).
const MAX_COUNT: f64 = 9_007_199_254_740_992.0;

/// Reads the readout query's rows into a [`StatsTable`]. Column names are matched without
/// regard to case (engines that fold unquoted names return them in upper case).
///
/// Every cell is checked, whichever engine or file it comes from, and a bad one is refused with
/// its row and column named: counts are whole numbers up to 2^53, a metric's `__n` is at most
/// the arm's units, means are finite (0/1 metrics between 0 and 1, counts not negative),
/// variances finite and not negative, covariances within Cauchy–Schwarz, one row per arm and
/// segment value, and segment rows only for the plan's segments.
pub fn stats_table(plan: &ExperimentPlan, rows: &[NamedRow]) -> Result<StatsTable> {
    let mut table = StatsTable::default();
    let mut seen = std::collections::BTreeSet::new();
    let third_moments = crate::plan::third_moment_columns(plan);
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
        let at = |col: &str, problem: String| {
            Error::data(format!(
                "row {} of the statistics (arm `{arm}`), column `{col}`: {problem}",
                i + 1
            ))
        };
        let count = |col: &str| -> Result<u64> {
            let x = count(row, col)?;
            if x as f64 > MAX_COUNT {
                return Err(at(col, format!("{x} is more than any table holds")));
            }
            Ok(x)
        };
        // Layout 1 tables (exported before the third moments existed) have none; a missing
        // layout column is the fingerprint check's to refuse.
        let layout = number(row, columns::LAYOUT)
            .ok()
            .flatten()
            .unwrap_or(f64::from(crate::plan::STATS_LAYOUT));
        let with_third = layout >= 2.0;
        if i == 0 {
            table.third_moments = with_third;
            table.excluded_multiple_arms = count(columns::EXCLUDED_MULTIPLE_ARMS)?;
            table.excluded_missing_arm = count(columns::EXCLUDED_MISSING_ARM)?;
            table.excluded_rows_without_unit = count(columns::EXCLUDED_ROWS_WITHOUT_UNIT)?;
        }
        let segment = if plan.segments.is_empty() {
            // A segment row where the plan has no segments would be read as the overall row.
            if let Some(name) = row.get(columns::SEGMENT_NAME).filter(|c| **c != Cell::Null) {
                return Err(at(
                    columns::SEGMENT_NAME,
                    format!("{name:?} is a segment row, but this experiment is read without segments"),
                ));
            }
            None
        } else {
            let segment = text(columns::SEGMENT_NAME)?
                .map(|name| -> Result<_> { Ok((name, text(columns::SEGMENT_VALUE)?)) })
                .transpose()?;
            if let Some((name, _)) = &segment
                && !plan.segments.iter().any(|s| &s.name == name)
            {
                return Err(at(
                    columns::SEGMENT_NAME,
                    format!("`{name}` is not a segment of this readout"),
                ));
            }
            segment
        };
        if !seen.insert((arm.clone(), segment.clone())) {
            let what = match &segment {
                None => "the overall row".to_string(),
                Some((name, value)) => format!("segment `{name}` = {value:?}"),
            };
            return Err(at(columns::ARM, format!("a second row for this arm and {what}")));
        }
        let mut out = ArmRow {
            arm: arm.clone(),
            segment,
            units: count(columns::UNITS)?,
            ..ArmRow::default()
        };
        for c in &plan.columns {
            let (n_col, mean_col, var_col) = (
                columns::stat(&c.column, Stat::N),
                columns::stat(&c.column, Stat::Mean),
                columns::stat(&c.column, Stat::Var),
            );
            let n = count(&n_col)?;
            if n > out.units {
                return Err(at(
                    &n_col,
                    format!("{n} units with a value, more than the arm's {} units", out.units),
                ));
            }
            let mean = number(row, &mean_col)?.unwrap_or(f64::NAN);
            let mut var = number(row, &var_col)?.unwrap_or(f64::NAN);
            if n > 0 && !mean.is_finite() {
                return Err(at(&mean_col, format!("{mean} is not a finite mean")));
            }
            let aggregation = plan.scans.get(c.scan).and_then(|s| {
                s.aggregates
                    .iter()
                    .find(|a| a.column == c.column)
                    .map(|a| a.aggregation)
            });
            if n > 0 {
                use crate::ir::Aggregation as A;
                let tolerance = 1e-9;
                match aggregation {
                    Some(A::Any | A::AtLeast(_)) if !(-tolerance..=1.0 + tolerance).contains(&mean) => {
                        return Err(at(
                            &mean_col,
                            format!("{mean} is the mean of a 0/1 metric, so it must lie between 0 and 1"),
                        ));
                    }
                    Some(A::Count | A::Distinct) if mean < -tolerance => {
                        return Err(at(
                            &mean_col,
                            format!("{mean} is the mean of a count, so it cannot be negative"),
                        ));
                    }
                    _ => {}
                }
            }
            if n > 1 {
                if var.is_nan() || var.is_infinite() {
                    return Err(at(&var_col, format!("{var} is not a finite variance")));
                }
                // Rounding in an engine's one-pass formula can leave a zero variance a hair
                // below 0; anything more is not a variance.
                let scale = 1e-9 * mean.abs().max(1.0).powi(2);
                if var < -scale {
                    return Err(at(&var_col, format!("{var} is a negative variance")));
                }
                var = var.max(0.0);
            }
            out.columns.insert(c.column.clone(), Moments { n, mean, var });
            if with_third && out.segment.is_none() && third_moments.contains(&c.column.as_str()) {
                let m3_col = columns::stat(&c.column, Stat::M3);
                match number(row, &m3_col)? {
                    Some(m3) if !m3.is_finite() => {
                        return Err(at(&m3_col, format!("{m3} is not a finite third moment")));
                    }
                    Some(m3) => {
                        out.third_moments.insert(c.column.clone(), m3);
                    }
                    None if n > 0 => {
                        return Err(at(&m3_col, "empty, but the column has values".to_string()));
                    }
                    None => {}
                }
            }
        }
        for c in &plan.covariances {
            let cov = number(row, &c.name)?.unwrap_or(f64::NAN);
            // Cauchy–Schwarz holds when the covariance and both variances are over the same
            // units: when neither column has missing values (min/max ones can).
            if let (Some(a), Some(b)) = (out.columns.get(&c.a), out.columns.get(&c.b))
                && a.n > 1
                && a.n == out.units
                && b.n == out.units
            {
                if cov.is_infinite() {
                    return Err(at(&c.name, format!("{cov} is not a finite covariance")));
                }
                let bound = (a.var * b.var).sqrt();
                if cov.abs() > bound * (1.0 + 1e-6) + 1e-12 {
                    return Err(at(
                        &c.name,
                        format!(
                            "{cov} is larger than the two variances allow (at most {bound} in size, by Cauchy–Schwarz)"
                        ),
                    ));
                }
            }
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
    // Spreadsheet programs start UTF-8 files with a byte-order mark.
    let text = text.strip_prefix('\u{feff}').unwrap_or(&text);
    match ext.as_str() {
        "csv" => parse_csv(text).map_err(|e| Error::data(format!("{}: {e}", path.display()))),
        "json" | "jsonl" | "ndjson" => {
            parse_json(text).map_err(|e| Error::data(format!("{}: {e}", path.display())))
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

/// A cell of a statistics file as written: labels stay text (`007` and `1.0` are arms, not
/// the numbers 7 and 1); numbers are parsed exactly where a number is read.
fn cell_from_text(t: &str) -> Cell {
    let t = t.trim();
    if t.is_empty() || t.eq_ignore_ascii_case("null") || t == "\\N" {
        Cell::Null
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
                        // As written (`1.0` stays `1.0` where it is a label); read exactly as
                        // a number where one is expected (serde_json's float_roundtrip).
                        serde_json::Value::Number(n) => Cell::Text(n.to_string()),
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

/// Checks that a statistics table comes from this plan: same fingerprint, a layout this plumb
/// reads (the current one, or an older one down to [`crate::plan::OLDEST_STATS_LAYOUT`], whose
/// fingerprint is then the one that layout computed). Returns the table's layout.
pub fn check_fingerprint(plan: &ExperimentPlan, rows: &[NamedRow]) -> Result<u32> {
    use crate::plan::{OLDEST_STATS_LAYOUT, STATS_LAYOUT};
    if rows.is_empty() {
        return Err(Error::data("the statistics table has no rows"));
    }
    let mut found: Option<u32> = None;
    for row in rows {
        let row: NamedRow = row
            .iter()
            .map(|(k, v)| (k.to_ascii_lowercase(), v.clone()))
            .collect();
        let readable = |x: f64| (OLDEST_STATS_LAYOUT..=STATS_LAYOUT).find(|l| f64::from(*l) == x);
        let layout = match row.get(columns::LAYOUT) {
            Some(Cell::Number(x)) if readable(*x).is_some() => readable(*x).unwrap_or(STATS_LAYOUT),
            Some(Cell::Text(t)) if t.trim().parse::<f64>().ok().and_then(readable).is_some() => t
                .trim()
                .parse::<f64>()
                .ok()
                .and_then(readable)
                .unwrap_or(STATS_LAYOUT),
            None => {
                return Err(Error::data(
                    "the statistics table has no plumb_layout column: it was not produced by `plumb sql`",
                ));
            }
            Some(other) => {
                return Err(Error::data(format!(
                    "the statistics table has layout {other:?}, this plumb reads layouts {OLDEST_STATS_LAYOUT} to {STATS_LAYOUT}; re-run the query from `plumb sql`"
                )));
            }
        };
        let want = crate::plan::fingerprint_at(plan, layout);
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
        found = Some(found.unwrap_or(layout));
        if found != Some(layout) {
            return Err(Error::data("the statistics table mixes rows of two layouts"));
        }
    }
    Ok(found.unwrap_or(STATS_LAYOUT))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The same digits in a JSON and a CSV statistics file are the same number (serde_json's
    /// default float parser once differed in the last bit, moving p-values in the 10th digit),
    /// and labels stay as written.
    #[test]
    fn json_and_csv_cells_read_the_same_digits_exactly() {
        let digits = [
            "0.1234567890123456789",
            "2.2250738585072011e-308",
            "1.7976931348623157e308",
            "0.30000000000000004",
            "123456.78901234567",
            "8.589973e9",
        ];
        for d in digits {
            let csv = parse_csv(&format!("x,arm\n{d},007\n")).unwrap();
            let json = parse_json(&format!("[{{\"x\": {d}, \"arm\": \"007\"}}]")).unwrap();
            let a = number(&csv[0], "x").unwrap().unwrap();
            let b = number(&json[0], "x").unwrap().unwrap();
            assert_eq!(a.to_bits(), b.to_bits(), "{d}");
            assert_eq!(a.to_bits(), d.parse::<f64>().unwrap().to_bits(), "{d}");
            assert_eq!(csv[0]["arm"], Cell::Text("007".into()));
            assert_eq!(json[0]["arm"], Cell::Text("007".into()));
        }
        let json = parse_json("{\"arm\": 1.0}").unwrap();
        assert_eq!(
            json[0]["arm"],
            Cell::Text("1.0".into()),
            "a JSON number label keeps its text"
        );
    }
}
