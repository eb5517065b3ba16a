//! A loaded, resolved workspace: the catalog IR plus the settings in `plumb.yaml`.
//!
//! Ties the load and resolve stages together for commands that start from a folder, and
//! resolves relative paths in `local:` against the workspace folder so commands behave the
//! same whichever directory they are run from. Opening is split in two steps, [`load`] and
//! [`Loaded::resolve`], so that the caller (the `Context`) can read the local tables' schemas
//! with the same engine it later runs the queries on: one DuckDB per command.
//!
//! There is one way to get a catalog from text: [`resolve_texts`] (load + resolve), which
//! [`Loaded::resolve`] extends with local schemas, workspace checks and lint.

use crate::diagnostics::Diagnostic;
use crate::error::{Error, Result};
use crate::ir;
use crate::load::{self, RawCatalog, RawWorkspace, yaml::Seg};
use crate::resolve;
use crate::source::SourceMap;
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

/// Column names of local tables, by table name (checked against SQL fragments).
pub type Schemas = BTreeMap<String, Vec<String>>;

/// How the local engine runs (`local:` in plumb.yaml; unset values are DuckDB's defaults).
#[derive(Debug, Clone, Default, PartialEq)]
pub struct LocalSettings {
    /// Worker threads (default: every core).
    pub threads: Option<u32>,
    /// Memory limit, e.g. `4GB` (default: 80% of the machine's memory); beyond it operators
    /// spill to `temp_directory`.
    pub memory_limit: Option<String>,
    /// Where the engine spills (default: chosen by the caller, in the system's temp folder).
    pub temp_directory: Option<PathBuf>,
}

impl LocalSettings {
    /// Only the values that pass the checks of `plumb.yaml` (invalid ones are reported as
    /// errors there): what an engine may be opened with before the checks have run.
    pub fn checked(&self) -> LocalSettings {
        LocalSettings {
            threads: self.threads.filter(|t| (1..=MAX_THREADS).contains(t)),
            memory_limit: self.memory_limit.clone().filter(|m| is_memory_size(m)),
            temp_directory: self.temp_directory.clone(),
        }
    }
}

#[derive(Debug)]
pub struct Workspace {
    pub root: PathBuf,
    /// The catalog as written (with spans), for located messages after resolve.
    pub raw: RawCatalog,
    pub catalog: ir::Catalog,
    /// Default dialect (`dialect:`), `duckdb` when absent.
    pub dialect: String,
    pub local_database: Option<PathBuf>,
    pub local_tables: Vec<(String, PathBuf)>,
    pub local_settings: LocalSettings,
    /// Number of catalog files read.
    pub files: usize,
    /// Named engines (`engines:`) and the default one.
    pub engines: crate::engines::Engines,
}

/// The outcome of opening a workspace: diagnostics are rendered by the caller.
pub enum Opened {
    Ok(Box<Workspace>, Vec<Diagnostic>),
    Invalid(Vec<Diagnostic>),
}

/// The local data named in `plumb.yaml`, with paths resolved against the workspace.
#[derive(Debug, Clone, Default)]
pub struct LocalData {
    pub database: Option<PathBuf>,
    pub tables: Vec<(String, PathBuf)>,
    pub settings: LocalSettings,
}

impl LocalData {
    /// True when nothing is declared.
    pub fn is_empty(&self) -> bool {
        self.database.is_none() && self.tables.is_empty()
    }

    /// True when every declared file exists (so an engine opened on it is the real one).
    pub fn complete(&self) -> bool {
        self.database.as_ref().is_none_or(|p| p.is_file()) && self.tables.iter().all(|(_, p)| exists(p))
    }

    /// Only the files that exist (enough to check columns of the tables that are there).
    pub fn present(&self) -> LocalData {
        LocalData {
            database: self.database.clone().filter(|p| p.is_file()),
            tables: self.tables.iter().filter(|(_, p)| exists(p)).cloned().collect(),
            settings: self.settings.clone(),
        }
    }
}

/// A local table's file exists; for a glob (`data/orders/*.parquet`), its folder does (the
/// engine then says whether any file matches).
fn exists(path: &Path) -> bool {
    if path.to_string_lossy().contains(['*', '?', '[']) {
        let mut dir = path.to_path_buf();
        while dir.to_string_lossy().contains(['*', '?', '[']) {
            if !dir.pop() {
                return false;
            }
        }
        dir.as_os_str().is_empty() || dir.is_dir()
    } else {
        path.is_file()
    }
}

/// A workspace after the load stage: `plumb.yaml` and the catalog files as written.
pub struct Loaded {
    pub raw_ws: RawWorkspace,
    pub raw_catalog: RawCatalog,
    pub diagnostics: Vec<Diagnostic>,
    pub local: LocalData,
    pub files: usize,
    /// `engines:` and `default_engine:`, checked (their errors are in `diagnostics`).
    pub engines: crate::engines::Engines,
}

/// Reads `plumb.yaml` in `dir` and the catalog files (the load stage).
pub fn load(dir: &Path, sources: &mut SourceMap) -> Result<Loaded> {
    let (raw_ws, raw_catalog, mut diagnostics) =
        load::load_workspace(dir, sources).map_err(|e| Error::usage(e.to_string()))?;
    let engines = crate::engines::read(&raw_ws, &mut diagnostics);
    let files = sources.files().count().saturating_sub(1);
    let local = raw_ws.value.local.clone().unwrap_or_default();
    let local = LocalData {
        database: local.database.as_ref().map(|p| raw_ws.root.join(p)),
        tables: local
            .tables
            .map(|t| t.0.into_iter().map(|(n, p)| (n, raw_ws.root.join(p))).collect())
            .unwrap_or_default(),
        settings: LocalSettings {
            threads: local.threads,
            memory_limit: local.memory_limit.clone(),
            temp_directory: local.temp_directory.as_ref().map(|p| raw_ws.root.join(p)),
        },
    };
    Ok(Loaded {
        raw_ws,
        raw_catalog,
        diagnostics,
        local,
        files,
        engines,
    })
}

/// An error: a declared local file exists but cannot be read (empty, corrupt, not the format
/// its extension says). Pointed at the file's entry under `local: tables:` when the message
/// names it, else at `local:`.
pub fn unreadable_local_data(raw_ws: &RawWorkspace, error: &Error) -> Diagnostic {
    let message = error.to_string();
    let table = message
        .split_once("local table `")
        .and_then(|(_, rest)| rest.split_once('`'))
        .map(|(name, _)| name.to_string());
    let span = table
        .and_then(|t| raw_ws.value_span(&[Seg::Key("local".into()), Seg::Key("tables".into()), Seg::Key(t)]))
        .or_else(|| raw_ws.value_span(&[Seg::Key("local".into())]));
    Diagnostic {
        severity: crate::diagnostics::Severity::Error,
        code: "E022",
        message: format!("cannot read the local data: {message}"),
        span,
        labels: Vec::new(),
        hints: vec![
            "fix the file, or its path under `local:` in plumb.yaml (a file that is not there yet is skipped; one that is there must be readable)".into(),
        ],
    }
}

impl Loaded {
    /// The resolve stage with the local tables' `schemas`, then the workspace's own checks and
    /// lint (with the severities set in `plumb.yaml`).
    pub fn resolve(self, sources: &SourceMap, schemas: &Schemas) -> Opened {
        let Loaded {
            raw_ws,
            raw_catalog,
            mut diagnostics,
            local,
            files,
            engines,
        } = self;
        let catalog = match resolve::resolve_with_schemas(sources, &raw_catalog, schemas) {
            Ok(c) => Some(c),
            Err(more) => {
                diagnostics.extend(more);
                None
            }
        };
        if let Some(db) = &local.database
            && !db.is_file()
        {
            diagnostics.push(
                Diagnostic::error("E005", format!("local database {} does not exist", db.display()))
                    .at(raw_ws.value_span(&[Seg::Key("local".into()), Seg::Key("database".into())]))
                    .hint("fix the path (relative to plumb.yaml) or remove `database:`"),
            );
        }
        check_local_settings(&raw_ws, &local.settings, &mut diagnostics);
        let dialect = raw_ws.value.dialect.clone().unwrap_or_else(|| "duckdb".into());
        let levels = raw_ws.value.lint.clone().map(|l| l.0).unwrap_or_default();
        check_lint_levels(&raw_ws, &levels, &mut diagnostics);
        if let Some(c) = &catalog
            && !diagnostics.iter().any(Diagnostic::is_error)
        {
            diagnostics.extend(crate::lint::apply_levels(
                crate::lint::lint(&raw_catalog, c),
                &levels,
            ));
        }
        if diagnostics.iter().any(Diagnostic::is_error) {
            return Opened::Invalid(diagnostics);
        }
        Opened::Ok(
            Box::new(Workspace {
                root: raw_ws.root,
                raw: raw_catalog,
                catalog: catalog.unwrap_or_default(),
                dialect,
                local_database: local.database,
                local_tables: local.tables,
                local_settings: local.settings,
                files,
                engines,
            }),
            diagnostics,
        )
    }
}

/// The most worker threads `local.threads` accepts (DuckDB would try to start any number).
pub const MAX_THREADS: u32 = 1024;

/// `threads` from 1 to [`MAX_THREADS`]; `memory_limit` a size DuckDB reads (`4GB`, `512 MiB`).
fn check_local_settings(raw_ws: &RawWorkspace, s: &LocalSettings, diags: &mut Vec<Diagnostic>) {
    let span = |key: &str| raw_ws.value_span(&[Seg::Key("local".into()), Seg::Key(key.into())]);
    if let Some(t) = s.threads
        && !(1..=MAX_THREADS).contains(&t)
    {
        diags.push(
            Diagnostic::error(
                "E017",
                format!("`threads` must be between 1 and {MAX_THREADS}, got {t}"),
            )
            .at(span("threads"))
            .hint("remove `threads:` to use every core; results are the same for any value"),
        );
    }
    if let Some(m) = &s.memory_limit
        && !is_memory_size(m)
    {
        diags.push(
            Diagnostic::error("E017", format!("`memory_limit` `{m}` is not a size"))
                .at(span("memory_limit"))
                .hint("write a number and a unit, e.g. 4GB, 512MB or 8GiB"),
        );
    }
}

/// A number followed by KB, MB, GB, TB (or KiB, MiB, GiB, TiB), any case, optional space.
pub fn is_memory_size(text: &str) -> bool {
    let t = text.trim();
    let split = t
        .find(|c: char| !(c.is_ascii_digit() || c == '.'))
        .unwrap_or(t.len());
    let (number, unit) = t.split_at(split);
    let unit = unit.trim().to_ascii_lowercase();
    number.parse::<f64>().is_ok_and(|n| n > 0.0)
        && matches!(
            unit.as_str(),
            "kb" | "mb" | "gb" | "tb" | "kib" | "mib" | "gib" | "tib"
        )
}

fn check_lint_levels(raw_ws: &RawWorkspace, levels: &[(String, String)], diags: &mut Vec<Diagnostic>) {
    for (i, (key, level)) in levels.iter().enumerate() {
        let known = crate::lint::RULES.iter().any(|r| r.code == key || r.name == key);
        let span = raw_ws.value_span(&[Seg::Key("lint".into())]);
        if let Some(r) = crate::lint::RULES.iter().find(|r| r.old_code == key) {
            diags.push(
                Diagnostic::warning(
                    "W005",
                    format!("lint code `{key}` is now `{}` ({})", r.code, r.name),
                )
                .at(span.clone())
                .hint(format!(
                    "write `{}` or `{}`; `{key}` is still read for now",
                    r.name, r.code
                )),
            );
            continue_level_check(key, level, i, span, diags);
            continue;
        }
        if !known {
            diags.push(
                Diagnostic::error("E003", format!("unknown lint rule `{key}`"))
                    .at(span.clone())
                    .hint(format!(
                        "rules: {}",
                        crate::lint::RULES
                            .iter()
                            .map(|r| format!("{} ({})", r.code, r.name))
                            .collect::<Vec<_>>()
                            .join(", ")
                    )),
            );
        }
        continue_level_check(key, level, i, span, diags);
    }
}

/// The level of one `lint:` entry must be off, warning or error.
fn continue_level_check(
    key: &str,
    level: &str,
    i: usize,
    span: Option<crate::source::Span>,
    diags: &mut Vec<Diagnostic>,
) {
    if !matches!(level, "off" | "warning" | "error") {
        diags.push(
            Diagnostic::error(
                "E017",
                format!("lint level `{level}` for `{key}` (entry {})", i + 1),
            )
            .at(span)
            .hint("use off, warning or error"),
        );
    }
}

/// Loads and resolves the workspace in `dir`, checking fragments against the local tables
/// (read with a DuckDB opened for that alone; a `Context` reuses its engine instead).
pub fn open(dir: &Path, sources: &mut SourceMap) -> Result<Opened> {
    let mut loaded = load(dir, sources)?;
    let schemas = match local_schemas(&loaded.local.present()) {
        Ok(s) => s,
        Err(e) => {
            loaded.diagnostics.push(unreadable_local_data(&loaded.raw_ws, &e));
            Schemas::new()
        }
    };
    Ok(loaded.resolve(sources, &schemas))
}

/// Schemas of the local tables (empty without the engine feature or without local data).
pub fn local_schemas(local: &LocalData) -> Result<Schemas> {
    if local.is_empty() {
        return Ok(Schemas::new());
    }
    #[cfg(feature = "engine")]
    {
        crate::execute::duckdb::LocalEngine::open_with(
            local.database.as_deref(),
            &local.tables,
            &local.settings.checked(),
        )?
        .schemas()
    }
    #[cfg(not(feature = "engine"))]
    Ok(Schemas::new())
}

/// Loads and resolves catalog files given as `(path, text)` (e.g. read from git objects).
/// Fragments are checked against declared `columns:` only: today's local data need not match
/// another revision's definitions.
pub fn resolve_texts(files: &[(String, String)]) -> Result<(RawCatalog, ir::Catalog)> {
    let mut sources = SourceMap::new();
    let refs: Vec<(&str, &str)> = files.iter().map(|(p, t)| (p.as_str(), t.as_str())).collect();
    let (raw, mut diags) = load::load_catalog_texts(&refs, &mut sources);
    match resolve::resolve(&sources, &raw) {
        Ok(c) if !diags.iter().any(Diagnostic::is_error) => Ok((raw, c)),
        Ok(_) => Err(Error::catalog(sources, diags)),
        Err(more) => {
            diags.extend(more);
            Err(Error::catalog(sources, diags))
        }
    }
}
