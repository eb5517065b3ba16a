//! The embedded DuckDB engine: opens the workspace's local data and runs a statement.
//!
//! Local tables named in `plumb.yaml` (`local.tables`: name -> CSV or Parquet path) become
//! views with the table's name, so the SQL that runs here is byte for byte the SQL a warehouse
//! would run. A `local.database` file is attached read-only.

use super::{Cell, NamedRow};
use crate::error::{Error, Result};
use duckdb::types::Value;
use duckdb::{AccessMode, Config, Connection};
use std::path::Path;

/// An open local engine.
pub struct LocalEngine {
    conn: Connection,
}

fn err(context: &str, e: duckdb::Error) -> Error {
    Error::engine(format!("{context}: {e}")).with_source(e)
}

/// A local table that DuckDB cannot read is the data's problem, not the engine's.
fn data_err(context: &str, e: duckdb::Error) -> Error {
    Error::data(format!("{context}: {e}")).with_source(e)
}

fn ident(name: &str) -> String {
    format!("\"{}\"", name.replace('"', "\"\""))
}

fn literal(value: &str) -> String {
    format!("'{}'", value.replace('\'', "''"))
}

impl LocalEngine {
    /// Opens DuckDB on `database` (read-only) or in memory, and maps `tables` to views.
    pub fn open(database: Option<&Path>, tables: &[(String, std::path::PathBuf)]) -> Result<LocalEngine> {
        let conn = match database {
            Some(path) => {
                let config = Config::default()
                    .access_mode(AccessMode::ReadOnly)
                    .map_err(|e| err("configuring DuckDB", e))?;
                Connection::open_with_flags(path, config)
                    .map_err(|e| err(&format!("opening {}", path.display()), e))?
            }
            None => Connection::open_in_memory().map_err(|e| err("starting DuckDB", e))?,
        };
        // One thread: parallel aggregation adds floating-point numbers in a different order on
        // every run, and the same inputs must give byte-identical results.
        conn.execute_batch("SET threads = 1")
            .map_err(|e| err("configuring DuckDB", e))?;
        let engine = LocalEngine { conn };
        for (name, path) in tables {
            engine.register(name, path)?;
        }
        Ok(engine)
    }

    /// Makes a CSV or Parquet file visible as a view named `name`.
    pub fn register(&self, name: &str, path: &Path) -> Result<()> {
        if !path.is_file() {
            return Err(Error::data(format!(
                "local table `{name}`: file {} does not exist",
                path.display()
            )));
        }
        let p = literal(&path.to_string_lossy());
        let reader = match path.extension().and_then(|e| e.to_str()) {
            Some("parquet") => format!("read_parquet({p})"),
            Some("csv") | Some("tsv") | Some("gz") => format!("read_csv({p}, header = true)"),
            _ => {
                return Err(Error::data(format!(
                    "local table `{name}`: {} is neither .csv nor .parquet",
                    path.display()
                )));
            }
        };
        let context = format!("reading local table `{name}` from {}", path.display());
        self.conn
            .execute_batch(&format!(
                "CREATE OR REPLACE TEMP VIEW {} AS SELECT * FROM {reader}",
                ident(name)
            ))
            .map_err(|e| data_err(&context, e))?;
        // Timestamps with a zone become UTC timestamps without one, so that windows and the
        // experiment's (UTC) boundaries compare the same instants whatever the offsets written.
        let zoned: Vec<String> = self
            .query(&format!(
                "SELECT column_name FROM (DESCRIBE SELECT * FROM {}) WHERE column_type = 'TIMESTAMP WITH TIME ZONE'",
                ident(name)
            ))?
            .into_iter()
            .filter_map(|r| match r.get("column_name") {
                Some(Cell::Text(c)) => Some(c.clone()),
                _ => None,
            })
            .collect();
        if !zoned.is_empty() {
            let replace: Vec<String> = zoned
                .iter()
                .map(|c| format!("CAST({} AS TIMESTAMP) AS {}", ident(c), ident(c)))
                .collect();
            self.conn
                .execute_batch(&format!(
                    "CREATE OR REPLACE TEMP VIEW {} AS SELECT * REPLACE ({}) FROM {reader}",
                    ident(name),
                    replace.join(", ")
                ))
                .map_err(|e| data_err(&context, e))?;
        }
        Ok(())
    }

    /// Runs one statement and returns its rows by column name.
    pub fn query(&self, sql: &str) -> Result<Vec<NamedRow>> {
        let mut stmt = self
            .conn
            .prepare(sql)
            .map_err(|e| err("preparing the query", e))?;
        let mut rows = stmt.query([]).map_err(|e| err("running the query", e))?;
        let names: Vec<String> = rows.as_ref().map(|s| s.column_names()).unwrap_or_default();
        let mut out = Vec::new();
        while let Some(row) = rows.next().map_err(|e| err("reading the result", e))? {
            let mut named = NamedRow::new();
            for (i, name) in names.iter().enumerate() {
                let v: Value = row.get(i).map_err(|e| err("reading the result", e))?;
                named.insert(
                    name.clone(),
                    cell(v).map_err(|e| Error::data(format!("column `{name}`: {e}")))?,
                );
            }
            out.push(named);
        }
        Ok(out)
    }

    /// Runs statements that return nothing (loading test data).
    pub fn execute_batch(&self, sql: &str) -> Result<()> {
        self.conn.execute_batch(sql).map_err(|e| err("running SQL", e))
    }

    /// Column names of every local table (CSV/Parquet views and tables of the local
    /// database), keyed by table name, so the resolver can check SQL fragments against real
    /// schemas.
    pub fn schemas(&self) -> Result<std::collections::BTreeMap<String, Vec<String>>> {
        let rows = self.query(
            "SELECT table_name, column_name FROM information_schema.columns \
             ORDER BY table_name, ordinal_position",
        )?;
        let mut out: std::collections::BTreeMap<String, Vec<String>> = Default::default();
        for row in rows {
            if let (Some(Cell::Text(t)), Some(Cell::Text(c))) =
                (row.get("table_name"), row.get("column_name"))
            {
                out.entry(t.clone()).or_default().push(c.clone());
            }
        }
        Ok(out)
    }
}

impl super::Engine for LocalEngine {
    fn describe(&self) -> String {
        "local DuckDB".into()
    }

    fn dialect(&self) -> &str {
        "duckdb"
    }

    fn query(&mut self, sql: &str) -> Result<Vec<NamedRow>> {
        LocalEngine::query(self, sql)
    }
}

fn cell(v: Value) -> Result<Cell, String> {
    Ok(match v {
        Value::Null => Cell::Null,
        Value::Boolean(b) => Cell::Number(f64::from(u8::from(b))),
        Value::TinyInt(x) => Cell::Number(x.into()),
        Value::SmallInt(x) => Cell::Number(x.into()),
        Value::Int(x) => Cell::Number(x.into()),
        Value::BigInt(x) => Cell::Number(x as f64),
        Value::HugeInt(x) => Cell::Number(x as f64),
        Value::UTinyInt(x) => Cell::Number(x.into()),
        Value::USmallInt(x) => Cell::Number(x.into()),
        Value::UInt(x) => Cell::Number(x.into()),
        Value::UBigInt(x) => Cell::Number(x as f64),
        Value::Float(x) => Cell::Number(x.into()),
        Value::Double(x) => Cell::Number(x),
        Value::Text(t) => Cell::Text(t),
        // Timestamps (report periods) as seconds since the epoch, UTC.
        Value::Timestamp(unit, v) => Cell::Number(match unit {
            duckdb::types::TimeUnit::Second => v as f64,
            duckdb::types::TimeUnit::Millisecond => (v.div_euclid(1_000)) as f64,
            duckdb::types::TimeUnit::Microsecond => (v.div_euclid(1_000_000)) as f64,
            duckdb::types::TimeUnit::Nanosecond => (v.div_euclid(1_000_000_000)) as f64,
        }),
        Value::Date32(days) => Cell::Number(f64::from(days) * 86_400.0),
        other => return Err(format!("unexpected value type {other:?}")),
    })
}
