//! `plumb diff`: what a catalog change does between two git revisions (or a revision and the
//! working tree): definitions, affected experiments and reports, SQL diffs, and with `--data`
//! the readout numbers and verdicts before and after, on the working tree's local data.
//! Revisions are read from git objects; the working tree is never touched.

use super::{EXIT_DEFINITIONS_CHANGED, EXIT_VERDICT_CHANGED, Global, Outcome};
use crate::context::{Context, EngineChoice};
use crate::diff::{Affected, NumberChange, RowNumbers};
use crate::error::{Error, Result};
use crate::ir::Catalog;
use crate::{ReadoutOptions, workspace};
use clap::ValueEnum;
use std::collections::{BTreeMap, BTreeSet};
use std::path::{Path, PathBuf};

#[derive(Debug, Clone, Copy, ValueEnum, PartialEq, Eq)]
pub enum DiffFormat {
    Table,
    Markdown,
    Json,
}

#[derive(Debug, clap::Args)]
pub struct DiffArgs {
    /// Base revision (default: the merge base with the default branch, else HEAD).
    #[arg(long)]
    base: Option<String>,
    /// Head revision (default: the working tree).
    #[arg(long)]
    head: Option<String>,
    /// Dialect of the SQL diff (default: the workspace's).
    #[arg(long)]
    dialect: Option<String>,
    /// Also run both versions on the data and compare the numbers.
    #[arg(long)]
    data: bool,
    /// Where `--data` runs the SQL: an engine under `engines:` in plumb.yaml, `local`, or a
    /// postgres:// URL (default: `default_engine:`, else local).
    #[arg(long, value_name = "NAME|URL", requires = "data")]
    engine: Option<String>,
    #[arg(long, value_enum, default_value = "table")]
    format: DiffFormat,
    /// Exit with 4 when definitions changed (default: 0 whatever the diff shows, like
    /// `git diff`; scripts that gate on changes pass this).
    #[arg(long)]
    exit_code: bool,
    /// Exit with 5 when any readout verdict changes.
    #[arg(long, requires = "data")]
    fail_on_verdict_change: bool,
}

pub fn run(global: &Global, a: DiffArgs) -> Result<Outcome> {
    let dir = &global.workspace;
    // The working tree's settings (catalog folder, dialect) and load errors.
    let mut sources = crate::source::SourceMap::new();
    let loaded = workspace::load(dir, &mut sources)?;
    if loaded
        .diagnostics
        .iter()
        .any(crate::diagnostics::Diagnostic::is_error)
    {
        return Err(Error::catalog(sources, loaded.diagnostics));
    }
    // The resolved working tree: the head side by default, and the data for `--data`.
    let progress = super::Progress::start("reading both revisions");
    let ctx = match a.head.is_none() || a.data {
        true => Some(global.open(if a.data {
            super::engine_arg(a.engine.as_deref())?
        } else {
            EngineChoice::Local
        })?),
        false => None,
    };
    if let Some(c) = &ctx {
        progress.follow(c);
    }
    let top = PathBuf::from(git(dir, &["rev-parse", "--show-toplevel"])?.trim());
    let prefix = git(dir, &["rev-parse", "--show-prefix"])?.trim().to_string();
    let catalog_rel = format!(
        "{prefix}{}",
        loaded.raw_ws.value.catalog.as_deref().unwrap_or("metrics")
    );
    let base_rev = a.base.clone().unwrap_or_else(|| default_base(&top));
    let (base_raw, base_ir) = workspace::resolve_texts(&catalog_at(&top, &base_rev, &catalog_rel)?)?;
    let (head_raw, head_ir, head_name) = match (&a.head, &ctx) {
        (Some(rev), _) => {
            let (r, c) = workspace::resolve_texts(&catalog_at(&top, rev, &catalog_rel)?)?;
            (r, c, rev.clone())
        }
        (None, Some(ctx)) => (
            ctx.workspace().raw.clone(),
            ctx.catalog().clone(),
            "working tree".to_string(),
        ),
        (None, None) => return Err(Error::bug("diff: no working tree context for the head side")),
    };
    let changes = crate::diff::changes(&base_raw, &head_raw);
    let dialect_name = a
        .dialect
        .clone()
        .or(loaded.raw_ws.value.dialect.clone())
        .unwrap_or_else(|| "duckdb".into());
    let dialect = crate::render::Dialect::load(&dialect_name, global.dialects_dir.as_deref())?;
    let mut affected = Vec::new();
    for (name, reasons) in crate::diff::affected_experiments(&base_ir, &head_ir, &changes) {
        let sql = |c: &Catalog| -> Result<String> {
            match c.experiment(&name) {
                Some(id) => crate::compile_experiment(c, id, &[], &dialect).map(|(_, s)| s),
                None => Ok(String::new()),
            }
        };
        let sql_diff = crate::diff::text_diff(&sql(&base_ir)?, &sql(&head_ir)?, &base_rev, &head_name);
        let numbers = match (&ctx, a.data) {
            (Some(ctx), true) => {
                ctx.step(&format!("diff --data: {name}, before and after"));
                numbers(ctx, &name, &base_ir, &head_ir)?
            }
            _ => Vec::new(),
        };
        affected.push(Affected {
            experiment: name,
            reasons,
            sql_diff,
            numbers,
        });
    }
    let d = crate::diff::Diff {
        base: base_rev,
        head: head_name,
        affected_reports: crate::diff::affected_reports(&base_ir, &head_ir, &changes),
        changes,
        affected_experiments: affected,
    };
    let text = match a.format {
        DiffFormat::Table => crate::diff::text_output(&d, true),
        DiffFormat::Markdown => crate::diff::markdown_output(&d),
        DiffFormat::Json => super::json(&d)?,
    };
    let code = if a.fail_on_verdict_change && d.verdict_flips() > 0 {
        EXIT_VERDICT_CHANGED
    } else if a.exit_code && !d.changes.is_empty() {
        EXIT_DEFINITIONS_CHANGED
    } else {
        0
    };
    let mut out = Outcome::stdout(text).with_code(code);
    out.parts.extend(progress.finish(&format!(
        "compared {} affected experiment{}{}",
        d.affected_experiments.len(),
        if d.affected_experiments.len() == 1 {
            ""
        } else {
            "s"
        },
        if a.data { " on the local data" } else { "" }
    )));
    Ok(out)
}

/// Readout rows of one experiment before and after, on the working tree's local data (one
/// engine for both sides and every experiment).
fn numbers(ctx: &Context, experiment: &str, base: &Catalog, head: &Catalog) -> Result<Vec<NumberChange>> {
    let rows = |c: &Catalog| -> Result<BTreeMap<(String, String), RowNumbers>> {
        let mut out = BTreeMap::new();
        let Some(id) = c.experiment(experiment) else {
            return Ok(out);
        };
        let readout = ctx.readout_of(c, id, &[], ReadoutOptions::default())?;
        for r in readout.results.iter().filter(|r| r.segment.is_none()) {
            out.insert(
                (r.metric.clone(), r.arm.clone()),
                RowNumbers {
                    control_mean: r.control.mean,
                    treatment_mean: r.treatment.mean,
                    difference: r.difference.as_ref().map(|d| d.estimate),
                    ci_low: r.difference.as_ref().map(|d| d.ci_low),
                    ci_high: r.difference.as_ref().map(|d| d.ci_high),
                    verdict: r.verdict.to_string(),
                },
            );
        }
        Ok(out)
    };
    let (before, after) = (rows(base)?, rows(head)?);
    let keys: BTreeSet<&(String, String)> = before.keys().chain(after.keys()).collect();
    Ok(keys
        .into_iter()
        .filter(|k| before.get(*k) != after.get(*k))
        .map(|k| {
            let (b, a) = (before.get(k).cloned(), after.get(k).cloned());
            NumberChange {
                metric: k.0.clone(),
                arm: k.1.clone(),
                verdict_changed: b.as_ref().map(|x| &x.verdict) != a.as_ref().map(|x| &x.verdict),
                before: b,
                after: a,
            }
        })
        .collect())
}

/// Runs git in `dir`; its failure is a usage error.
fn git(dir: &Path, args: &[&str]) -> Result<String> {
    let out = std::process::Command::new("git")
        .arg("-C")
        .arg(dir)
        .args(args)
        .output()
        .map_err(|e| Error::usage(format!("cannot run git: {e}")).with_source(e))?;
    if !out.status.success() {
        return Err(Error::usage(format!(
            "git {} failed: {}",
            args.join(" "),
            String::from_utf8_lossy(&out.stderr).trim()
        )));
    }
    Ok(String::from_utf8_lossy(&out.stdout).into_owned())
}

/// The merge base of HEAD with the default branch (origin's HEAD, main or master), else HEAD.
fn default_base(top: &Path) -> String {
    let candidates = ["refs/remotes/origin/HEAD", "refs/heads/main", "refs/heads/master"];
    for c in candidates {
        if git(top, &["rev-parse", "--verify", "--quiet", c]).is_ok()
            && let Ok(mb) = git(top, &["merge-base", "HEAD", c])
        {
            let mb = mb.trim().to_string();
            if !mb.is_empty() {
                return mb;
            }
        }
    }
    "HEAD".into()
}

/// The catalog files at a git revision, read from git objects (the working tree is untouched).
fn catalog_at(top: &Path, rev: &str, catalog_rel: &str) -> Result<Vec<(String, String)>> {
    let list = git(top, &["ls-tree", "-r", "--name-only", rev, "--", catalog_rel])?;
    let mut files = Vec::new();
    for path in list
        .lines()
        .filter(|p| p.ends_with(".yaml") || p.ends_with(".yml"))
    {
        let text = git(top, &["show", &format!("{rev}:{path}")])?;
        files.push((format!("{rev}:{path}"), text));
    }
    files.sort();
    Ok(files)
}
