//! `plumb check`: load, resolve, lint and compile every experiment; a one-line summary.

use super::{EXIT_CATALOG, Format, Global, Outcome, Part};
use crate::context::EngineChoice;
use crate::diagnostics;
use crate::error::Result;

#[derive(Debug, clap::Args)]
pub struct CheckArgs {
    #[arg(long, value_enum, default_value = "table")]
    format: Format,
    /// `--deny warnings`: warnings (lint and local-data) fail the check (exit code 1), for CI.
    #[arg(long, value_parser = ["warnings"], value_name = "warnings")]
    deny: Option<String>,
}

pub fn run(global: &Global, args: CheckArgs) -> Result<Outcome> {
    let deny_warnings = args.deny.is_some();
    // Only catalog errors are the check's result; other failures (no workspace) are errors.
    let opened = match global.open(EngineChoice::Local) {
        Err(e) if e.diagnostics().is_none() => return Err(e),
        other => other,
    };
    if args.format == Format::Json {
        // Diagnostics as data, whether or not the catalog resolved.
        let (ok, json, warned) = match &opened {
            Ok(ctx) => (
                true,
                diagnostics::to_json(ctx.sources(), ctx.warnings()),
                !ctx.warnings().is_empty(),
            ),
            Err(e) => {
                let c = e.diagnostics().expect("only catalog errors get here");
                (false, diagnostics::to_json(&c.sources, &c.diagnostics), false)
            }
        };
        let text = super::json(&serde_json::json!({ "ok": ok, "diagnostics": json }))?;
        let failed = !ok || (deny_warnings && warned);
        return Ok(Outcome::stdout(text).with_code(if failed { EXIT_CATALOG } else { 0 }));
    }
    let ctx = opened?;
    // Every experiment must also compile in the workspace dialect.
    let dialect = ctx.dialect(None)?;
    for id in 0..ctx.catalog().experiments.len() {
        ctx.compile_readout(id, &[], &dialect)?;
    }
    let mut parts = Vec::new();
    let warnings = ctx.warnings();
    if !warnings.is_empty() {
        parts.push(Part::Stderr(diagnostics::render_plain(ctx.sources(), warnings)));
        if deny_warnings {
            parts.push(Part::Stderr(format!(
                "plumb: {} warnings (denied by --deny warnings)\n",
                warnings.len()
            )));
            return Ok(Outcome {
                parts,
                code: EXIT_CATALOG,
            });
        }
    }
    let ws = ctx.workspace();
    let c = ctx.catalog();
    let counted = match warnings.len() {
        0 => String::new(),
        1 => ", 1 warning".into(),
        n => format!(", {n} warnings"),
    };
    parts.push(Part::Stdout(format!(
        "ok: {} files, {} units, {} event tables, {} exposure logs, {} segments, {} metrics, {} experiments (dialect {}{counted})\n",
        ws.files,
        c.units.len(),
        c.event_tables.len(),
        c.exposure_logs.len(),
        c.segments.len(),
        c.metrics.len(),
        c.experiments.len(),
        ws.dialect
    )));
    Ok(Outcome { parts, code: 0 })
}
