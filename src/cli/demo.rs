//! `plumb demo`: writes the plant-shop workspace (deterministic data) and prints its readout.

use super::{Format, Global, Outcome, Part};
use crate::ReadoutOptions;
use crate::context::EngineChoice;
use crate::error::{Error, Result};
use std::path::PathBuf;

#[derive(Debug, clap::Args)]
pub struct DemoArgs {
    /// Folder to write (default: ./plumb-demo).
    #[arg(default_value = "plumb-demo")]
    dir: PathBuf,
    /// Seed of the data generator; the same seed gives identical files.
    #[arg(long, default_value_t = 20_260_302)]
    seed: u64,
    /// Number of shoppers to generate.
    #[arg(long, default_value_t = 100_000)]
    shoppers: usize,
    /// Only write the files; do not print the readout.
    #[arg(long)]
    no_readout: bool,
    /// Write into a folder that is not empty (files of the demo's names are overwritten,
    /// others are left alone). Not needed to rewrite an earlier demo folder.
    #[arg(long)]
    force: bool,
}

/// Whether writing the demo into `dir` could overwrite someone's files: the folder exists, is
/// not empty, and is not a folder an earlier `plumb demo` wrote (it leaves a marker file).
fn refuse_to_write(dir: &std::path::Path) -> bool {
    let Ok(mut entries) = std::fs::read_dir(dir) else {
        return false; // does not exist (yet), or not a folder: writing reports that
    };
    entries.next().is_some() && !dir.join(crate::demo::MARKER).is_file()
}

pub fn run(global: &Global, a: DemoArgs) -> Result<Outcome> {
    let started = std::time::Instant::now();
    let config = crate::demo::DemoConfig {
        seed: a.seed,
        shoppers: a.shoppers,
    };
    let dir = &a.dir;
    if !a.force && refuse_to_write(dir) {
        return Err(Error::usage(format!(
            "{} is not empty and was not written by `plumb demo`; choose another folder, or pass --force to write the demo files into it (files of other names are kept)",
            dir.display()
        )));
    }
    let summary = crate::demo::write_demo(dir, &config).map_err(|e| {
        Error::usage(format!("cannot write the demo into {}: {e}", dir.display())).with_source(e)
    })?;
    let mut parts = vec![Part::Stderr(format!(
        "plumb: wrote the plant-shop demo to {} ({} shoppers, {} page views, {} orders, {} exposure rows) in {:.1}s\n",
        dir.display(),
        summary.shoppers,
        summary.visits,
        summary.orders,
        summary.exposures,
        started.elapsed().as_secs_f64()
    ))];
    if a.no_readout {
        return Ok(Outcome { parts, code: 0 });
    }
    let ctx = global.open_at(dir, EngineChoice::Local)?;
    let id = ctx.experiment(crate::demo::MAIN_EXPERIMENT)?;
    let options = ReadoutOptions {
        population_impact: true,
        ..ReadoutOptions::default()
    };
    let readout = super::with_progress("running the demo readout on local DuckDB", || {
        ctx.readout(id, &[], options)
    })?;
    let shown = super::analyze::readout_outcome(&readout, Format::Table, &Default::default());
    parts.extend(shown.parts);
    parts.push(Part::Stderr(format!(
        "plumb: next, try `plumb --workspace {} analyze care_guide_banner` (an A/A test) or `plumb --workspace {} sql {}`\n",
        dir.display(),
        dir.display(),
        crate::demo::MAIN_EXPERIMENT
    )));
    // The demo's readout is shown, not judged: it exits 0 whatever the readout says.
    Ok(Outcome { parts, code: 0 })
}
