//! Stage timings on stderr when `PLUMB_TIMINGS` is set, so a slow readout can be taken apart
//! (workspace, schema check, readout statement, per-unit table, statistics, totals) without
//! a profiler. Nothing is printed otherwise, and nothing here changes any result.

use std::sync::OnceLock;
use std::time::Instant;

fn enabled() -> bool {
    static ON: OnceLock<bool> = OnceLock::new();
    *ON.get_or_init(|| std::env::var_os("PLUMB_TIMINGS").is_some())
}

/// Runs `f`, and prints how long it took under `label` when timings are on.
pub fn stage<T>(label: &str, f: impl FnOnce() -> T) -> T {
    if !enabled() {
        return f();
    }
    let started = Instant::now();
    let out = f();
    eprintln!("plumb timing: {label}: {:.3}s", started.elapsed().as_secs_f64());
    out
}
