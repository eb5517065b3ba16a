//! `plumb demo`: a complete example workspace for an invented online plant shop.
//!
//! Writes `plumb.yaml`, the catalog (the very files in the repository's `metrics/` folder) and
//! deterministic CSV data: about 100,000 shoppers, 1,000,000 page views and orders, and the
//! exposure log of two experiments. `one_page_checkout` has a real injected effect (paid-order
//! probability +12% after exposure in the treatment arm); `care_guide_banner` is an A/A test
//! (both arms are generated identically), so its readout should show no change. The same seed
//! always gives byte-identical files. Invented data, for the demo only.

use crate::time::Timestamp;
use std::fmt::Write as _;
use std::io::{BufWriter, Write};
use std::path::{Path, PathBuf};

/// The demo catalog, shared with the repository's `metrics/` folder.
pub const CATALOG: &[(&str, &str)] = &[("plant_shop.yaml", include_str!("../../metrics/plant_shop.yaml"))];

/// The experiment whose readout `plumb demo` prints.
pub const MAIN_EXPERIMENT: &str = "one_page_checkout";

pub const WORKSPACE_FILE: &str = "\
# plumb workspace for the plant-shop demo.
catalog: metrics
dialect: duckdb
local:
  tables:
    orders: data/orders.csv
    visits: data/visits.csv
    assignments: data/assignments.csv
    shoppers: data/shoppers.csv
lint:
  # avg_basket divides revenue by paid orders, which most shoppers do not have in the window:
  # intended here (revenue per paid order), so this rule is switched off for the demo.
  ratio-denominator-often-zero: off
";

/// Knobs of the generator.
#[derive(Debug, Clone)]
pub struct DemoConfig {
    pub seed: u64,
    pub shoppers: usize,
}

impl Default for DemoConfig {
    fn default() -> Self {
        DemoConfig {
            seed: 20_260_302,
            shoppers: 100_000,
        }
    }
}

/// What was written, for the command's summary line.
#[derive(Debug, Default, Clone)]
pub struct DemoSummary {
    pub shoppers: usize,
    pub visits: usize,
    pub orders: usize,
    pub exposures: usize,
    pub files: Vec<PathBuf>,
}

/// SplitMix64 (Steele, Lea & Flood 2014): tiny, fast, and fixed forever, so demo files
/// never change with a dependency upgrade.
struct Rng(u64);

impl Rng {
    fn new(seed: u64, stream: u64) -> Rng {
        let mut r = Rng(seed ^ stream.wrapping_mul(0x9E37_79B9_7F4A_7C15));
        r.next();
        r
    }
    fn next(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }
    /// Uniform in [0, 1).
    fn uniform(&mut self) -> f64 {
        (self.next() >> 11) as f64 / (1u64 << 53) as f64
    }
    fn below(&mut self, n: u64) -> u64 {
        self.next() % n
    }
    /// Standard normal by Box–Muller.
    fn normal(&mut self) -> f64 {
        let u1 = 1.0 - self.uniform();
        let u2 = self.uniform();
        (-2.0 * u1.ln()).sqrt() * (std::f64::consts::TAU * u2).cos()
    }
    /// Poisson by inversion (small means only).
    fn poisson(&mut self, mean: f64) -> u32 {
        let l = (-mean).exp();
        let mut k = 0;
        let mut p = self.uniform();
        while p > l && k < 1000 {
            k += 1;
            p *= self.uniform();
        }
        k
    }
}

const REGIONS: &[&str] = &["north", "south", "east", "west", "islands"];
const DEVICES: &[&str] = &["mobile", "desktop", "tablet"];
const PAGES: &[&str] = &["home", "ferns", "succulents", "pots", "care-guides", "cart"];

/// Writes the demo workspace into `dir` (created if needed; existing demo files are replaced).
/// File a demo folder holds so that `plumb demo` may rewrite it without `--force`.
pub const MARKER: &str = ".plumb-demo";

pub fn write_demo(dir: &Path, config: &DemoConfig) -> std::io::Result<DemoSummary> {
    std::fs::create_dir_all(dir.join("metrics"))?;
    std::fs::write(
        dir.join(MARKER),
        "Written by `plumb demo`; `plumb demo` may overwrite this folder.\n",
    )?;
    std::fs::create_dir_all(dir.join("data"))?;
    let mut summary = DemoSummary::default();
    std::fs::write(dir.join("plumb.yaml"), WORKSPACE_FILE)?;
    summary.files.push(dir.join("plumb.yaml"));
    for (name, text) in CATALOG {
        std::fs::write(dir.join("metrics").join(name), text)?;
        summary.files.push(dir.join("metrics").join(name));
    }
    generate(&dir.join("data"), config, &mut summary)?;
    Ok(summary)
}

fn csv_writer(path: &Path, header: &str) -> std::io::Result<BufWriter<std::fs::File>> {
    let mut w = BufWriter::with_capacity(1 << 20, std::fs::File::create(path)?);
    writeln!(w, "{header}")?;
    Ok(w)
}

/// Generates the four CSV files. Each shopper draws from its own random stream, so the data
/// for shopper i does not depend on how many shoppers come before it.
fn generate(data: &Path, config: &DemoConfig, summary: &mut DemoSummary) -> std::io::Result<()> {
    let data_start = Timestamp::parse("2026-02-09T00:00:00Z").expect("valid").0;
    let data_end = Timestamp::parse("2026-03-30T00:00:00Z").expect("valid").0;
    let checkout_start = Timestamp::parse("2026-03-02T00:00:00Z").expect("valid").0;
    let checkout_end = Timestamp::parse("2026-03-23T00:00:00Z").expect("valid").0;
    let banner_end = Timestamp::parse("2026-03-16T00:00:00Z").expect("valid").0;
    let span_days = ((data_end - data_start) / 86_400) as f64;

    let mut shoppers = csv_writer(&data.join("shoppers.csv"), "shopper_id,region,signed_up_at")?;
    let mut visits = csv_writer(&data.join("visits.csv"), "shopper_id,visited_at,page")?;
    let mut orders = csv_writer(
        &data.join("orders.csv"),
        "order_id,shopper_id,ordered_at,status,amount_cents,is_test",
    )?;
    let mut assignments = csv_writer(
        &data.join("assignments.csv"),
        "shopper_id,experiment,arm,exposed_at,device",
    )?;
    let mut line = String::with_capacity(128);
    let mut order_id: u64 = 0;
    for i in 0..config.shoppers {
        let mut rng = Rng::new(config.seed, i as u64 + 1);
        let id = format!("s{:06}", i + 1);
        let region = REGIONS[rng.below(REGIONS.len() as u64) as usize];
        let device = DEVICES[(rng.uniform() * 1.6) as usize % DEVICES.len()];
        let signed_up = data_start - 86_400 * rng.below(400) as i64;
        line.clear();
        let _ = writeln!(line, "{id},{region},{}", Timestamp(signed_up).to_sql_string());
        shoppers.write_all(line.as_bytes())?;
        summary.shoppers += 1;

        // Shopper habits: visits per day (log-normal) and baseline paid-order chance per visit.
        let visit_rate = (0.125 * (0.9 * rng.normal()).exp()).min(3.0);
        let buy_chance = (0.09 * (0.5 * rng.normal()).exp()).min(0.6);
        let basket = 3_500.0 * (0.35 * rng.normal()).exp();

        // Exposures. One-page checkout: 85% of shoppers, at a random time in its period;
        // care-guide banner (A/A): 60% of shoppers, in its own period.
        let mut checkout: Option<(i64, bool)> = None;
        if rng.uniform() < 0.85 {
            let at = checkout_start + rng.below((checkout_end - checkout_start) as u64 - 3600) as i64;
            let treated = rng.uniform() < 0.5;
            checkout = Some((at, treated));
            let arm = if treated { "treatment" } else { "control" };
            write_exposure(
                &mut assignments,
                &mut line,
                &id,
                "one-page-checkout",
                arm,
                at,
                device,
            )?;
            summary.exposures += 1;
            // Repeat exposures (same arm): only the first counts.
            let repeats = rng.poisson(0.6);
            for _ in 0..repeats {
                let later = at + rng.below(6 * 86_400) as i64;
                if later < checkout_end {
                    write_exposure(
                        &mut assignments,
                        &mut line,
                        &id,
                        "one-page-checkout",
                        arm,
                        later,
                        device,
                    )?;
                    summary.exposures += 1;
                }
            }
            // A rare logging fault shows a shopper the other arm too; plumb must exclude them.
            if rng.uniform() < 0.002 {
                let other = if treated { "control" } else { "treatment" };
                let later = (at + 3_600).min(checkout_end - 1);
                write_exposure(
                    &mut assignments,
                    &mut line,
                    &id,
                    "one-page-checkout",
                    other,
                    later,
                    device,
                )?;
                summary.exposures += 1;
            }
        }
        if rng.uniform() < 0.6 {
            let at = checkout_start + rng.below((banner_end - checkout_start) as u64 - 3600) as i64;
            let arm = if rng.uniform() < 0.5 {
                "treatment"
            } else {
                "control"
            };
            write_exposure(
                &mut assignments,
                &mut line,
                &id,
                "care-guide-banner",
                arm,
                at,
                device,
            )?;
            summary.exposures += 1;
        }

        // Visits over the whole data period; each visit may lead to an order.
        let n_visits = rng.poisson(visit_rate * span_days);
        for _ in 0..n_visits {
            let at = data_start + rng.below((data_end - data_start) as u64) as i64;
            let page = PAGES[rng.below(PAGES.len() as u64) as usize];
            line.clear();
            let _ = writeln!(line, "{id},{},{page}", Timestamp(at).to_sql_string());
            visits.write_all(line.as_bytes())?;
            summary.visits += 1;

            let mut chance = buy_chance;
            if let Some((exposed, true)) = checkout
                && at >= exposed
            {
                chance *= 1.12; // the injected effect of the one-page checkout
            }
            if rng.uniform() < chance {
                order_id += 1;
                let ordered = at + 60 + rng.below(1_800) as i64;
                let amount = (basket * (0.25 * rng.normal()).exp()).round().max(299.0) as i64;
                let status = if rng.uniform() < 0.04 { "refunded" } else { "paid" };
                let is_test = rng.uniform() < 0.003;
                line.clear();
                let _ = writeln!(
                    line,
                    "o{order_id:07},{id},{},{status},{amount},{is_test}",
                    Timestamp(ordered).to_sql_string()
                );
                orders.write_all(line.as_bytes())?;
                summary.orders += 1;
            }
        }
    }
    for mut w in [shoppers, visits, orders, assignments] {
        w.flush()?;
    }
    for f in ["shoppers.csv", "visits.csv", "orders.csv", "assignments.csv"] {
        summary.files.push(data.join(f));
    }
    Ok(())
}

fn write_exposure(
    w: &mut impl Write,
    line: &mut String,
    id: &str,
    experiment: &str,
    arm: &str,
    at: i64,
    device: &str,
) -> std::io::Result<()> {
    line.clear();
    let _ = writeln!(
        line,
        "{id},{experiment},{arm},{},{device}",
        Timestamp(at).to_sql_string()
    );
    w.write_all(line.as_bytes())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn same_seed_gives_identical_files_and_another_seed_does_not() {
        let config = DemoConfig {
            seed: 7,
            shoppers: 500,
        };
        let (a, b) = (tempfile::tempdir().unwrap(), tempfile::tempdir().unwrap());
        write_demo(a.path(), &config).unwrap();
        write_demo(b.path(), &config).unwrap();
        for f in ["visits.csv", "orders.csv", "assignments.csv", "shoppers.csv"] {
            let (x, y) = (
                std::fs::read(a.path().join("data").join(f)).unwrap(),
                std::fs::read(b.path().join("data").join(f)).unwrap(),
            );
            assert_eq!(x, y, "{f} differs between runs with the same seed");
        }
        let c = tempfile::tempdir().unwrap();
        write_demo(
            c.path(),
            &DemoConfig {
                seed: 8,
                shoppers: 500,
            },
        )
        .unwrap();
        assert_ne!(
            std::fs::read(a.path().join("data/visits.csv")).unwrap(),
            std::fs::read(c.path().join("data/visits.csv")).unwrap()
        );
    }
}
