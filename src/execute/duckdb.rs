//! The embedded DuckDB engine: opens the workspace's local data and runs a statement.
//!
//! Local tables named in `plumb.yaml` (`local.tables`: name -> a CSV, Parquet, JSON or NDJSON
//! file, or a glob such as `data/orders/*.parquet`) become views with the table's name, so the
//! SQL that runs here is byte for byte the SQL a warehouse would run. A `local.database` file
//! is attached read-only. The readers are compiled in (the `duckdb` crate's `parquet` and
//! `json` features) and extension auto-install and auto-load are off: nothing is ever
//! downloaded.
//!
//! All cores, byte-identical results: a statement with an aggregation over CTEs runs in two
//! stages ([`super::staged`]): the exact per-unit work in parallel, materialised in a fixed
//! order, then the floating-point aggregation over it on one thread.

use super::{Cell, NamedRow, staged};
use crate::error::{Error, Result};
use duckdb::types::Value;
use duckdb::{Config, Connection};
use std::path::{Path, PathBuf};

pub use crate::workspace::LocalSettings;

/// An open local engine.
pub struct LocalEngine {
    conn: Connection,
    /// The thread count to restore after a serial stage.
    threads: i64,
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

/// Whether a local table path is a glob pattern (`*`, `?`, `[`).
pub fn is_glob(path: &Path) -> bool {
    path.to_string_lossy().contains(['*', '?', '['])
}

/// The reader of a local file or glob, chosen by its extension.
fn reader(path: &Path) -> Option<String> {
    let p = literal(&path.to_string_lossy());
    let name = path.file_name()?.to_string_lossy().to_ascii_lowercase();
    let name = name
        .strip_suffix(".gz")
        .or_else(|| name.strip_suffix(".zst"))
        .unwrap_or(&name);
    let ext = name.rsplit('.').next()?;
    Some(match ext {
        "parquet" => format!("read_parquet({p})"),
        "csv" | "tsv" => format!("read_csv({p}, header = true)"),
        "json" => format!("read_json({p})"),
        "ndjson" | "jsonl" => format!("read_json({p}, format = 'newline_delimited')"),
        _ => return None,
    })
}

impl LocalEngine {
    /// Opens DuckDB on `database` (read-only) or in memory, and maps `tables` to views.
    pub fn open(database: Option<&Path>, tables: &[(String, PathBuf)]) -> Result<LocalEngine> {
        Self::open_with(database, tables, &LocalSettings::default())
    }

    /// [`LocalEngine::open`] with thread, memory and spill settings.
    pub fn open_with(
        database: Option<&Path>,
        tables: &[(String, PathBuf)],
        settings: &LocalSettings,
    ) -> Result<LocalEngine> {
        let configure = |e| err("configuring DuckDB", e);
        // Never fetch code from the network: the readers plumb needs are compiled in.
        let mut config = Config::default()
            .with("autoinstall_known_extensions", "false")
            .and_then(|c| c.with("autoload_known_extensions", "false"))
            .map_err(configure)?;
        if let Some(t) = settings.threads {
            config = config.threads(i64::from(t)).map_err(configure)?;
        }
        if let Some(m) = &settings.memory_limit {
            config = config.max_memory(m).map_err(configure)?;
        }
        if let Some(dir) = &settings.temp_directory {
            config = config
                .with("temp_directory", dir.to_string_lossy())
                .map_err(configure)?;
        }
        let conn = Connection::open_in_memory_with_flags(config).map_err(|e| err("starting DuckDB", e))?;
        if let Some(path) = database {
            // Attached read-only; the in-memory main database holds plumb's temporary tables.
            conn.execute_batch(&format!(
                "ATTACH {} AS plumb_local (READ_ONLY); USE plumb_local",
                literal(&path.to_string_lossy())
            ))
            .map_err(|e| data_err(&format!("opening {}", path.display()), e))?;
        }
        let threads = conn
            .query_row("SELECT current_setting('threads')", [], |r| r.get::<_, i64>(0))
            .map_err(configure)?;
        let engine = LocalEngine { conn, threads };
        for (name, path) in tables {
            engine.register(name, path)?;
        }
        Ok(engine)
    }

    /// Makes a CSV, Parquet, JSON or NDJSON file (or glob of them) visible as view `name`.
    pub fn register(&self, name: &str, path: &Path) -> Result<()> {
        if path.is_dir() {
            return Err(Error::data(format!(
                "local table `{name}`: {} is a folder; name a file or a glob such as {}/*.parquet",
                path.display(),
                path.display()
            )));
        }
        if is_glob(path) {
            let matched: i64 = self
                .conn
                .query_row(
                    &format!("SELECT count(*) FROM glob({})", literal(&path.to_string_lossy())),
                    [],
                    |r| r.get(0),
                )
                .map_err(|e| data_err(&format!("local table `{name}`"), e))?;
            if matched == 0 {
                return Err(Error::data(format!(
                    "local table `{name}`: no file matches {}",
                    path.display()
                )));
            }
        } else if !path.is_file() {
            return Err(Error::data(format!(
                "local table `{name}`: file {} does not exist",
                path.display()
            )));
        }
        let Some(reader) = reader(path) else {
            return Err(Error::data(format!(
                "local table `{name}`: {} is not .csv, .tsv, .parquet, .json, .ndjson or .jsonl (optionally .gz)",
                path.display()
            )));
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

    /// Runs one statement and returns its rows by column name, in two stages when it has an
    /// aggregation over CTEs (see [`staged`]), so the result is the same whatever the number
    /// of threads.
    pub fn query(&self, sql: &str) -> Result<Vec<NamedRow>> {
        let Some(plan) = staged::stage(sql) else {
            return self.run(sql);
        };
        let result = self.run_staged(&plan);
        // Whatever happened: drop the stage tables and restore the thread count.
        let drops: String = plan
            .tables
            .iter()
            .map(|(t, _)| format!("DROP TABLE IF EXISTS {t}; "))
            .collect();
        let cleanup = self
            .conn
            .execute_batch(&format!("{drops}SET threads = {}", self.threads))
            .map_err(|e| err("cleaning up after a query", e));
        let rows = result?;
        cleanup?;
        Ok(rows)
    }

    fn run_staged(&self, plan: &staged::Staged) -> Result<Vec<NamedRow>> {
        for (_, create) in &plan.tables {
            self.conn
                .execute_batch(create)
                .map_err(|e| err("running the query (per-unit stage)", e))?;
        }
        self.conn
            .execute_batch("SET threads = 1")
            .map_err(|e| err("configuring DuckDB", e))?;
        self.run(&plan.finish)
    }

    /// Runs one statement as it is.
    fn run(&self, sql: &str) -> Result<Vec<NamedRow>> {
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
