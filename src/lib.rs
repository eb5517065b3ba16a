//! plumb: metric definitions declared once, compiled to warehouse SQL, analysed as readouts.
//!
//! The pipeline is a chain of typed functions; tests and `plumb sql` can stop after any stage:
//!
//! ```text
//!  files ──load──▶ syntax structs ──resolve──▶ ir::Catalog ──plan──▶ ExperimentPlan
//!        (spans)                  (all errors                (dialect-free)
//!                                  at once)
//!  ExperimentPlan ──render(dialect)──▶ SQL ──validate──▶ SQL ──execute(Engine)──▶ StatsTable
//!  StatsTable ──stats──▶ Readout ──output──▶ table | JSON
//! ```
//!
//! Commands never wire these stages by hand: they open a [`Context`] (workspace, dialects,
//! a lazily opened [`execute::Engine`]) and ask it for compiled queries and readouts. Every
//! failure is one [`Error`] whose [`ErrorKind`] the command line maps to an exit code.
//!
//! See DEVELOPERS.md for the stage table, the code map and the invariants each stage keeps.

pub mod cli;
pub mod columns;
pub mod compile;
pub mod context;
pub mod demo;
pub mod diagnostics;
pub mod diff;
pub mod engines;
pub mod error;
pub mod execute;
pub mod ir;
pub mod lint;
pub mod load;
pub mod output;
pub mod plan;
pub mod probe;
pub mod render;
pub mod report;
pub mod resolve;
pub mod source;
pub mod stats;
pub mod time;
pub mod timing;
pub mod validate;
pub mod workspace;

pub use compile::{
    ReadoutOptions, compile_experiment, compile_plan, compile_report, compile_totals, readout_spec,
};
pub use context::Context;
pub use error::{Error, ErrorKind, Result};
