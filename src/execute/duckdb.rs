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
    if e.to_string().contains("disabled by configuration") {
        // `lock_down`: catalog SQL reached for something outside the declared data.
        return Error::data(format!(
            "{context}: the SQL tried to read or write a file, folder or address outside the workspace's data; plumb's local engine reads only the tables and database named under `local:` in plumb.yaml ({e})"
        ))
        .with_source(e);
    }
    if let Some(message) = csv_value_error(&e.to_string()) {
        return Error::data(message).with_source(e);
    }
    Error::engine(format!("{context}: {e}")).with_source(e)
}

/// A value deep in a CSV file that does not fit the type its first rows gave the column, in
/// plumb's words: file, line, column, value, type, and fixes that apply to a plumb workspace
/// (DuckDB's own suggestions are reader options plumb does not expose). Found when the rows
/// are read, so after `check`, which binds without reading.
fn csv_value_error(message: &str) -> Option<String> {
    let after = |key: &str| -> Option<&str> {
        let start = message.find(key)? + key.len();
        Some(message[start..].lines().next().unwrap_or("").trim())
    };
    let line = after("CSV Error on Line:")?;
    let file = after("file =").unwrap_or("a local CSV file");
    let detail = message
        .lines()
        .find(|l| l.starts_with("Error when converting column"))
        .map(|l| l.trim().to_string())
        .unwrap_or_else(|| message.lines().next().unwrap_or("").to_string());
    Some(format!(
        "{file}, line {line}: {detail}. The column's type was read from the file's first rows (up to 20,480), and this value does not fit it: fix the value in the file (an empty field is read as NULL)"
    ))
}

/// A local table that DuckDB cannot read is the data's problem, not the engine's. The first
/// line of DuckDB's message says why; the rest quotes plumb's own statement.
fn data_err(context: &str, e: duckdb::Error) -> Error {
    let text = e.to_string();
    let why = text.lines().next().unwrap_or(&text).trim().to_string();
    Error::data(format!("{context}: {why}")).with_source(e)
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
        engine.lock_down(database, tables, settings)?;
        Ok(engine)
    }

    /// An in-memory engine that may read and write any file: for generating data files in
    /// tests and tools, never for running a catalog's SQL.
    pub fn open_for_writing() -> Result<LocalEngine> {
        let conn = Connection::open_in_memory().map_err(|e| err("starting DuckDB", e))?;
        Ok(LocalEngine { conn, threads: 1 })
    }

    /// From here on the engine reads only the workspace's declared data (the files, the
    /// folders of globs, the spill folder): a catalog fragment such as
    /// `(SELECT content FROM read_text('/etc/passwd'))` fails, and so do `COPY ... TO`,
    /// `ATTACH`, `INSTALL`/`LOAD` and other file or network access. DuckDB refuses to turn
    /// external access back on while the database runs; catalog SQL is expressions and one
    /// SELECT per event table, so it cannot issue `SET` at all.
    fn lock_down(
        &self,
        database: Option<&Path>,
        tables: &[(String, PathBuf)],
        settings: &LocalSettings,
    ) -> Result<()> {
        let abs = |p: &Path| std::path::absolute(p).unwrap_or_else(|_| p.to_path_buf());
        let mut paths: Vec<String> = Vec::new();
        let mut dirs: Vec<String> = Vec::new();
        for (_, path) in tables {
            let path = abs(path);
            if is_glob(&path) {
                // The folder up to the first component with a wildcard.
                let mut dir = PathBuf::new();
                for part in path.components() {
                    let text = part.as_os_str().to_string_lossy();
                    if text.contains(['*', '?', '[', '{']) {
                        break;
                    }
                    dir.push(part);
                }
                dirs.push(format!("{}/", dir.to_string_lossy().trim_end_matches('/')));
            } else {
                paths.push(path.to_string_lossy().into_owned());
            }
        }
        if let Some(db) = database {
            paths.push(abs(db).to_string_lossy().into_owned());
        }
        let temp: String = match &settings.temp_directory {
            Some(dir) => abs(dir).to_string_lossy().into_owned(),
            None => self
                .conn
                .query_row("SELECT current_setting('temp_directory')", [], |r| r.get(0))
                .map_err(|e| err("configuring DuckDB", e))?,
        };
        if !temp.is_empty() {
            dirs.push(format!(
                "{}/",
                abs(Path::new(&temp)).to_string_lossy().trim_end_matches('/')
            ));
        }
        let list = |items: &[String]| items.iter().map(|i| literal(i)).collect::<Vec<_>>().join(", ");
        self.conn
            .execute_batch(&format!(
                "SET allowed_paths = [{}]; SET allowed_directories = [{}]; SET enable_external_access = false;",
                list(&paths),
                list(&dirs)
            ))
            .map_err(|e| err("restricting DuckDB to the workspace's data", e))
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
        } else if std::fs::metadata(path).is_ok_and(|m| m.len() == 0) {
            return Err(Error::data(format!(
                "local table `{name}`: file {} is empty; a table needs at least its header line, and rows from which its column types can be read",
                path.display()
            )));
        }
        // Absolute, as the engine's list of readable files has it (see `lock_down`).
        let absolute = std::path::absolute(path).unwrap_or_else(|_| path.to_path_buf());
        let Some(reader) = reader(&absolute) else {
            return Err(Error::data(format!(
                "local table `{name}`: {} is not .csv, .tsv, .parquet, .json, .ndjson or .jsonl (optionally .gz)",
                path.display()
            )));
        };
        let context = format!("reading local table `{name}` from {}", path.display());
        let reader = self.pinned(&absolute).unwrap_or(reader);
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

    /// A CSV file's reader with the dialect and column types the reader detects written out
    /// (DuckDB's `sniff_csv`), so that the file is sniffed once, here, instead of each time a
    /// statement over it is bound (a bind then costs ~0.6 ms instead of ~16 ms), and every
    /// statement of the command reads the file with the same types. `None` (keep the
    /// detecting reader) for other formats, globs, and files the sniffer cannot read.
    fn pinned(&self, path: &Path) -> Option<String> {
        let name = path.file_name()?.to_string_lossy().to_ascii_lowercase();
        if is_glob(path) || !(name.ends_with(".csv") || name.ends_with(".tsv")) {
            return None;
        }
        let prompt: String = self
            .conn
            .query_row(
                &format!(
                    "SELECT prompt FROM sniff_csv({}, header = true)",
                    literal(&path.to_string_lossy())
                ),
                [],
                |r| r.get(0),
            )
            .ok()?;
        let reader = prompt.trim().strip_prefix("FROM ")?.trim_end_matches(';').trim();
        reader.starts_with("read_csv(").then(|| reader.to_string())
    }

    /// Runs one statement and returns its rows by column name, in two stages when it has an
    /// aggregation over CTEs (see [`staged`]), so the result is the same whatever the number
    /// of threads.
    pub fn query(&self, sql: &str) -> Result<Vec<NamedRow>> {
        let Some(plan) = staged::stage(sql, true) else {
            return self.run(sql);
        };
        let result = self.run_staged(&plan);
        // Whatever happened: drop the stage tables and restore the thread count.
        let drops: String = plan
            .tables
            .iter()
            .map(|t| format!("DROP TABLE IF EXISTS {}; ", t.table))
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
        for t in &plan.tables {
            self.conn
                .execute_batch(&t.create)
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

/// Binding without running, for the check-time probes of [`crate::probe`].
impl crate::probe::Binder for LocalEngine {
    fn bind_columns(&self, sql: &str) -> std::result::Result<Vec<(String, String)>, String> {
        let mut stmt = self
            .conn
            .prepare(&format!("DESCRIBE {sql}"))
            .map_err(|e| e.to_string())?;
        let rows = stmt
            .query_map([], |r| Ok((r.get::<_, String>(0)?, r.get::<_, String>(1)?)))
            .map_err(|e| e.to_string())?;
        rows.collect::<std::result::Result<Vec<_>, _>>()
            .map_err(|e| e.to_string())
    }

    fn text_values(&self, sql: &str) -> Option<Vec<String>> {
        let mut stmt = self.conn.prepare(sql).ok()?;
        let rows = stmt.query_map([], |r| r.get::<_, Option<String>>(0)).ok()?;
        rows.collect::<std::result::Result<Vec<_>, _>>()
            .ok()
            .map(|v| v.into_iter().flatten().collect())
    }

    fn has_rows(&self, sql: &str) -> Option<bool> {
        self.conn
            .query_row(&format!("SELECT count(*) FROM ({sql}) AS q"), [], |r| {
                r.get::<_, i64>(0)
            })
            .ok()
            .map(|n| n > 0)
    }
}

/// The readout's final aggregation, computed from the streamed per-unit rows with
/// order-independent sums: rows in the layout and order of the template's final SELECT.
mod readout {
    use super::{Cell, LocalEngine, NamedRow, err, ident};
    use crate::columns::{self, Stat};
    use crate::error::{Error, Result};
    use crate::execute::arm_stats::{self, Column};
    use crate::plan::ExperimentPlan;
    use duckdb::arrow::array::{Array, Float64Array, StringArray};
    use duckdb::arrow::datatypes::DataType;
    use std::collections::{BTreeMap, HashMap};

    /// Text values as small integer ids (arms, segment values), in order of appearance;
    /// looking up a value already seen allocates nothing.
    #[derive(Default)]
    struct Ids {
        names: Vec<Option<String>>,
        index: HashMap<String, u32>,
        null: Option<u32>,
    }

    impl Ids {
        fn id(&mut self, v: Option<&str>) -> u32 {
            let known = match v {
                Some(v) => self.index.get(v).copied(),
                None => self.null,
            };
            if let Some(i) = known {
                return i;
            }
            let i = self.names.len() as u32;
            self.names.push(v.map(str::to_string));
            match v {
                Some(v) => {
                    self.index.insert(v.to_string(), i);
                }
                None => self.null = Some(i),
            }
            i
        }
    }

    fn text(a: &dyn Array) -> Result<StringArray> {
        let a = duckdb::arrow::compute::cast(&a.slice(0, a.len()), &DataType::Utf8)
            .map_err(|e| Error::bug(format!("per-unit text column: {e}")))?;
        a.as_any()
            .downcast_ref::<StringArray>()
            .cloned()
            .ok_or_else(|| Error::bug("per-unit text column is not text"))
    }

    /// A per-unit value column as doubles: DOUBLE as it is, integers converted here (exactly
    /// as DuckDB's CAST to DOUBLE rounds them); wider types were cast by the reading query.
    fn doubles(a: &dyn Array) -> Result<Float64Array> {
        if let Some(f) = a.as_any().downcast_ref::<Float64Array>() {
            return Ok(f.clone());
        }
        if !a.data_type().is_integer() {
            return Err(Error::bug(format!(
                "per-unit value column has type {}, not a number",
                a.data_type()
            )));
        }
        let f = duckdb::arrow::compute::cast(&a.slice(0, a.len()), &DataType::Float64)
            .map_err(|e| Error::bug(format!("per-unit value column: {e}")))?;
        f.as_any()
            .downcast_ref::<Float64Array>()
            .cloned()
            .ok_or_else(|| Error::bug("per-unit value column did not convert to DOUBLE"))
    }

    const EXCLUSIONS: [(&str, &str); 3] = [
        (columns::EXCLUDED_MULTIPLE_ARMS, "multiple_arms"),
        (columns::EXCLUDED_MISSING_ARM, "missing_arm"),
        (columns::EXCLUDED_ROWS_WITHOUT_UNIT, "rows_without_unit"),
    ];

    /// The temporary table that holds a readout's per-unit rows while they are read.
    const PER_UNIT_TABLE: &str = "plumb_per_unit";

    impl LocalEngine {
        /// Runs `create` (which fills [`PER_UNIT_TABLE`]) without insertion order and reads
        /// the table back.
        /// Column types of `query`'s result, from binding it (nothing runs).
        fn result_types(&self, query: &str) -> Result<Vec<String>> {
            let what = |e| err("describing the per-unit rows", e);
            let mut describe = self.conn.prepare(&format!("DESCRIBE {query}")).map_err(what)?;
            let mut rows = describe.query([]).map_err(what)?;
            let mut types = Vec::new();
            while let Some(row) = rows.next().map_err(what)? {
                types.push(row.get::<_, String>(1).map_err(what)?);
            }
            Ok(types)
        }

        /// Fills [`PER_UNIT_TABLE`] from `with` + `SELECT select FROM per_unit`, in parallel and
        /// without insertion order, and reads it back. The first column and the last
        /// `text_columns` are read as text; of the others, exact decimals and wide integers
        /// are cast to DOUBLE in the parallel write (DuckDB's own, correctly rounded, cast),
        /// and narrower numbers are converted while reading (`doubles`), which is cheaper.
        fn materialised(
            &self,
            with: &str,
            select: &[String],
            text_columns: usize,
        ) -> Result<Vec<duckdb::arrow::record_batch::RecordBatch>> {
            let types = self.result_types(&format!("{with}\nSELECT {} FROM per_unit", select.join(", ")))?;
            let columns: Vec<String> = select
                .iter()
                .zip(&types)
                .enumerate()
                .map(|(i, (expr, ty))| {
                    let wide = ty.starts_with("DECIMAL")
                        || matches!(ty.as_str(), "HUGEINT" | "UHUGEINT" | "UBIGINT");
                    if i == 0 || i + text_columns >= select.len() {
                        format!("CAST({expr} AS VARCHAR)")
                    } else if wide {
                        format!("CAST({expr} AS DOUBLE)")
                    } else {
                        expr.clone()
                    }
                })
                .collect();
            let create = format!(
                "SET preserve_insertion_order = false;\nCREATE OR REPLACE TEMP TABLE {PER_UNIT_TABLE} AS\n{with}\nSELECT {} FROM per_unit",
                columns.join(", ")
            );
            crate::timing::stage("per-unit table: create", || self.conn.execute_batch(&create))
                .map_err(|e| err("running the query", e))?;
            let mut stmt = self
                .conn
                .prepare(&format!("SELECT * FROM {PER_UNIT_TABLE}"))
                .map_err(|e| err("preparing the query", e))?;
            let batches = stmt
                .query_arrow([])
                .map_err(|e| err("reading the per-unit rows", e))?
                .collect();
            Ok(batches)
        }

        /// Runs the statement's CTEs (in parallel) with a final SELECT that streams the
        /// per-unit rows out, then aggregates them per grouping set.
        pub(crate) fn local_readout(&self, plan: &ExperimentPlan, sql: &str) -> Result<Vec<NamedRow>> {
            let with = crate::execute::staged::with_clause(sql)
                .ok_or_else(|| Error::bug("the readout statement has no WITH clause"))?;
            let mut select = vec![columns::ARM.to_string()];
            for (_, key) in EXCLUSIONS {
                select.push(format!("CAST((SELECT {key} FROM exclusions) AS DOUBLE)"));
            }
            for c in &plan.columns {
                select.push(ident(&c.column));
            }
            for s in &plan.segments {
                select.push(ident(&s.column));
            }
            // The per-unit rows are materialised first (a parallel write, in no particular
            // order: nothing below depends on it), then read back as Arrow batches.
            let batches = crate::timing::stage("per-unit table", || {
                self.materialised(&with, &select, plan.segments.len())
            });
            self.conn
                .execute_batch(&format!(
                    "DROP TABLE IF EXISTS {PER_UNIT_TABLE}; SET preserve_insertion_order = true"
                ))
                .map_err(|e| err("cleaning up after a query", e))?;
            let batches = batches?;
            let mut arms = Ids::default();
            let mut arm_of: Vec<u32> = Vec::new();
            let mut exclusions: [Cell; 3] = [Cell::Null, Cell::Null, Cell::Null];
            let mut cols = vec![Column::default(); plan.columns.len()];
            let mut seg_ids: Vec<Ids> = plan.segments.iter().map(|_| Ids::default()).collect();
            let mut seg_of: Vec<Vec<u32>> = vec![Vec::new(); plan.segments.len()];
            let first_value = 1 + EXCLUSIONS.len();
            for (bi, b) in batches.iter().enumerate() {
                let arm = text(b.column(0).as_ref())?;
                for i in 0..arm.len() {
                    arm_of.push(arms.id(arm.is_valid(i).then(|| arm.value(i))));
                }
                if bi == 0 && b.num_rows() > 0 {
                    for (k, cell) in exclusions.iter_mut().enumerate() {
                        let f = doubles(b.column(1 + k).as_ref())?;
                        *cell = if f.is_valid(0) {
                            Cell::Number(f.value(0))
                        } else {
                            Cell::Null
                        };
                    }
                }
                for (k, col) in cols.iter_mut().enumerate() {
                    let f = doubles(b.column(first_value + k).as_ref())?;
                    col.values.extend_from_slice(f.values());
                    col.valid.extend((0..f.len()).map(|i| f.is_valid(i)));
                }
                for (k, ids) in seg_ids.iter_mut().enumerate() {
                    let s = text(b.column(first_value + plan.columns.len() + k).as_ref())?;
                    for i in 0..s.len() {
                        seg_of[k].push(ids.id(s.is_valid(i).then(|| s.value(i))));
                    }
                }
            }
            // Groups as the GROUPING SETS make them: (0, -, arm) overall, (1 + k, value, arm)
            // for segment k.
            let n_arms = arms.names.len();
            let mut buckets: Vec<Vec<Vec<u32>>> = std::iter::once(1)
                .chain(seg_ids.iter().map(|ids| ids.names.len()))
                .map(|values| vec![Vec::new(); values * n_arms])
                .collect();
            for (r, &arm) in arm_of.iter().enumerate() {
                buckets[0][arm as usize].push(r as u32);
                for (k, seg) in seg_of.iter().enumerate() {
                    buckets[1 + k][seg[r] as usize * n_arms + arm as usize].push(r as u32);
                }
            }
            let groups = buckets.into_iter().enumerate().flat_map(|(set, b)| {
                b.into_iter()
                    .enumerate()
                    .filter(|(_, rows)| !rows.is_empty())
                    .map(move |(i, rows)| ((set, (i / n_arms) as u32, (i % n_arms) as u32), rows))
            });
            let threads = usize::try_from(self.threads).unwrap_or(1).max(1);
            let col_index: BTreeMap<&str, usize> = plan
                .columns
                .iter()
                .enumerate()
                .map(|(i, c)| (c.column.as_str(), i))
                .collect();
            let jobs: Vec<Job> = (0..cols.len())
                .map(Job::Moments)
                .chain(
                    plan.covariances
                        .iter()
                        .map(|c| Job::Covariance(col_index[c.a.as_str()], col_index[c.b.as_str()])),
                )
                .collect();
            // Overall rows also carry the third moments of the mean metrics.
            let third = crate::plan::third_moment_columns(plan);
            let overall_jobs: Vec<Job> = jobs
                .iter()
                .copied()
                .chain(third.iter().map(|c| Job::ThirdMoment(col_index[c])))
                .collect();
            let fingerprint = crate::plan::fingerprint(plan);
            let mut out = Vec::new();
            for ((set, value, arm), rows) in groups {
                let mut row = NamedRow::new();
                let arm = arms.names[arm as usize].clone().map_or(Cell::Null, Cell::Text);
                row.insert(columns::ARM.into(), arm);
                if !plan.segments.is_empty() {
                    let (name, value) = match set {
                        0 => (Cell::Null, Cell::Null),
                        k => (
                            Cell::Text(plan.segments[k - 1].name.clone()),
                            seg_ids[k - 1].names[value as usize]
                                .clone()
                                .map_or(Cell::Null, Cell::Text),
                        ),
                    };
                    row.insert(columns::SEGMENT_NAME.into(), name);
                    row.insert(columns::SEGMENT_VALUE.into(), value);
                }
                row.insert(columns::UNITS.into(), Cell::Number(rows.len() as f64));
                for ((name, _), cell) in EXCLUSIONS.iter().zip(&exclusions) {
                    row.insert((*name).into(), cell.clone());
                }
                // Every column and covariance of this group, spread over the engine's threads;
                // each result depends only on its values, so the split changes nothing.
                let num = |x: Option<f64>| x.map_or(Cell::Null, Cell::Number);
                let jobs = if set == 0 {
                    &overall_jobs
                } else {
                    // Segment rows carry the third-moment columns empty, as the SQL does.
                    for c in &third {
                        row.insert(columns::stat(c, Stat::M3), Cell::Null);
                    }
                    &jobs
                };
                for (job, result) in jobs.iter().zip(run_jobs(jobs, &cols, &rows, threads)) {
                    match (job, result) {
                        (Job::Moments(i), JobResult::Moments(n, mean, var)) => {
                            let c = &plan.columns[*i].column;
                            row.insert(columns::stat(c, Stat::N), Cell::Number(n as f64));
                            row.insert(columns::stat(c, Stat::Mean), num(mean));
                            row.insert(columns::stat(c, Stat::Var), num(var));
                        }
                        (Job::ThirdMoment(i), JobResult::ThirdMoment(v)) => {
                            row.insert(columns::stat(&plan.columns[*i].column, Stat::M3), num(v));
                        }
                        (Job::Covariance(a, b), JobResult::Covariance(v)) => {
                            let name =
                                columns::covariance(&plan.columns[*a].column, &plan.columns[*b].column);
                            row.insert(name, num(v));
                        }
                        _ => return Err(Error::bug("arm statistics out of step")),
                    }
                }
                row.insert(columns::FINGERPRINT.into(), Cell::Text(fingerprint.clone()));
                row.insert(
                    columns::LAYOUT.into(),
                    Cell::Number(f64::from(crate::plan::STATS_LAYOUT)),
                );
                out.push(row);
            }
            // The template's ORDER BY: segment_name NULLS FIRST, segment_value NULLS FIRST, arm.
            let key = |r: &NamedRow, k: &str| match r.get(k) {
                Some(Cell::Text(t)) => Some(t.clone()),
                _ => None,
            };
            out.sort_by_key(|r| {
                (
                    key(r, columns::SEGMENT_NAME),
                    key(r, columns::SEGMENT_VALUE),
                    key(r, columns::ARM),
                )
            });
            Ok(out)
        }
    }

    #[derive(Debug, Clone, Copy)]
    enum Job {
        Moments(usize),
        ThirdMoment(usize),
        Covariance(usize, usize),
    }

    enum JobResult {
        Moments(u64, Option<f64>, Option<f64>),
        ThirdMoment(Option<f64>),
        Covariance(Option<f64>),
    }

    fn run_job(job: &Job, cols: &[Column], rows: &[u32]) -> JobResult {
        match *job {
            Job::Moments(i) => {
                let (n, mean, var) = arm_stats::moments(&cols[i], rows);
                JobResult::Moments(n, mean, var)
            }
            Job::ThirdMoment(i) => JobResult::ThirdMoment(arm_stats::third_moment(&cols[i], rows)),
            Job::Covariance(a, b) => JobResult::Covariance(arm_stats::covariance(&cols[a], &cols[b], rows)),
        }
    }

    fn run_jobs(jobs: &[Job], cols: &[Column], rows: &[u32], threads: usize) -> Vec<JobResult> {
        if threads <= 1 || jobs.len() < 2 || rows.len() < 10_000 {
            return jobs.iter().map(|j| run_job(j, cols, rows)).collect();
        }
        let chunk = jobs.len().div_ceil(threads);
        std::thread::scope(|s| {
            let handles: Vec<_> = jobs
                .chunks(chunk)
                .map(|part| s.spawn(move || part.iter().map(|j| run_job(j, cols, rows)).collect::<Vec<_>>()))
                .collect();
            handles
                .into_iter()
                .flat_map(|h| h.join().expect("arm statistics thread"))
                .collect()
        })
    }
}

impl super::Engine for LocalEngine {
    fn binder(&self) -> Option<&dyn crate::probe::Binder> {
        Some(self)
    }

    fn readout(&mut self, plan: &crate::plan::ExperimentPlan, sql: &str) -> Result<Vec<NamedRow>> {
        self.local_readout(plan, sql)
    }

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
