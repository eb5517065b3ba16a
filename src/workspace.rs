//! A loaded, resolved workspace: the catalog IR plus the settings in `plumb.yaml`.
//!
//! Ties the load and resolve stages together for commands that start from a folder, and
//! resolves relative paths in `local:` against the workspace folder so commands behave the
//! same whichever directory they are run from.

use crate::diagnostics::Diagnostic;
use crate::ir;
use crate::load::{self, LoadError, yaml::Seg};
use crate::resolve;
use crate::source::SourceMap;
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

#[derive(Debug)]
pub struct Workspace {
    pub root: PathBuf,
    pub catalog: ir::Catalog,
    /// Default dialect (`dialect:`), `duckdb` when absent.
    pub dialect: String,
    pub local_database: Option<PathBuf>,
    pub local_tables: Vec<(String, PathBuf)>,
    /// Number of catalog files read.
    pub files: usize,
}

/// The outcome of opening a workspace: diagnostics are rendered by the caller.
pub enum Opened {
    Ok(Box<Workspace>, Vec<Diagnostic>),
    Invalid(Vec<Diagnostic>),
}

/// Schemas of the local tables, when the engine is built in and the data can be opened; an
/// empty map otherwise (fragments are then checked against declared `columns:` only).
#[cfg(feature = "engine")]
fn local_schemas(ws: &load::RawWorkspace) -> BTreeMap<String, Vec<String>> {
    let local = ws.value.local.clone().unwrap_or_default();
    let database = local
        .database
        .as_ref()
        .map(|p| ws.root.join(p))
        .filter(|p| p.is_file());
    let tables: Vec<(String, PathBuf)> = local
        .tables
        .map(|t| {
            t.0.into_iter()
                .map(|(n, p)| (n, ws.root.join(p)))
                .filter(|(_, p)| p.is_file())
                .collect()
        })
        .unwrap_or_default();
    if database.is_none() && tables.is_empty() {
        return BTreeMap::new();
    }
    crate::execute::duckdb::local_schemas(database.as_deref(), &tables).unwrap_or_default()
}

#[cfg(not(feature = "engine"))]
fn local_schemas(_: &load::RawWorkspace) -> BTreeMap<String, Vec<String>> {
    BTreeMap::new()
}

/// Loads and resolves the workspace in `dir`.
pub fn open(dir: &Path, sources: &mut SourceMap) -> Result<Opened, LoadError> {
    let (raw_ws, raw_catalog, mut diags) = load::load_workspace(dir, sources)?;
    let files = sources.files().count().saturating_sub(1);
    let schemas = local_schemas(&raw_ws);
    let catalog = match resolve::resolve_with_schemas(sources, &raw_catalog, &schemas) {
        Ok(c) => Some(c),
        Err(more) => {
            diags.extend(more);
            None
        }
    };
    let local = raw_ws.value.local.clone().unwrap_or_default();
    let local_database = local.database.as_ref().map(|p| raw_ws.root.join(p));
    if let Some(db) = &local_database
        && !db.is_file()
    {
        diags.push(
            Diagnostic::error("E005", format!("local database {} does not exist", db.display()))
                .at(raw_ws.value_span(&[Seg::Key("local".into()), Seg::Key("database".into())]))
                .hint("fix the path (relative to plumb.yaml) or remove `database:`"),
        );
    }
    let local_tables = local
        .tables
        .map(|t| t.0.into_iter().map(|(n, p)| (n, raw_ws.root.join(p))).collect())
        .unwrap_or_default();
    let dialect = raw_ws.value.dialect.clone().unwrap_or_else(|| "duckdb".into());
    let levels = raw_ws.value.lint.clone().map(|l| l.0).unwrap_or_default();
    for (i, (key, level)) in levels.iter().enumerate() {
        let known = crate::lint::RULES.iter().any(|r| r.code == key || r.name == key);
        let span = raw_ws.value_span(&[Seg::Key("lint".into())]);
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
        if !matches!(level.as_str(), "off" | "warning" | "error") {
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
    if let Some(c) = &catalog
        && !diags.iter().any(Diagnostic::is_error)
    {
        diags.extend(crate::lint::apply_levels(
            crate::lint::lint(&raw_catalog, c),
            &levels,
        ));
    }
    if diags.iter().any(Diagnostic::is_error) {
        return Ok(Opened::Invalid(diags));
    }
    Ok(Opened::Ok(
        Box::new(Workspace {
            root: raw_ws.root,
            catalog: catalog.unwrap_or_default(),
            dialect,
            local_database,
            local_tables,
            files,
        }),
        diags,
    ))
}
