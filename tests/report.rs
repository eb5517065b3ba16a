//! Reports from the same definitions as readouts: the numbers must agree exactly.
#![cfg(feature = "engine")]

use plumb::execute::duckdb::LocalEngine;
use plumb::source::SourceMap;
use std::path::Path;

fn demo(shoppers: usize) -> tempfile::TempDir {
    let dir = tempfile::tempdir().unwrap();
    plumb::demo::write_demo(dir.path(), &plumb::demo::DemoConfig { seed: 11, shoppers }).unwrap();
    dir
}

fn open(dir: &Path) -> plumb::workspace::Workspace {
    let mut sources = SourceMap::new();
    match plumb::workspace::open(dir, &mut sources).unwrap() {
        plumb::workspace::Opened::Ok(ws, _) => *ws,
        plumb::workspace::Opened::Invalid(d) => panic!("{}", plumb::diagnostics::render_plain(&sources, &d)),
    }
}

/// Sum over every arm of the readout's per-unit totals (mean × n) for each metric, and the
/// report's total over all days of the experiment restricted to its exposed units.
fn both_totals(dir: &Path, metrics: &[&str]) -> Vec<(f64, f64)> {
    let ws = open(dir);
    let dialect = plumb::render::Dialect::load("duckdb", None).unwrap();
    let engine = LocalEngine::open(ws.local_database.as_deref(), &ws.local_tables).unwrap();
    let exp = ws.catalog.experiment("one_page_checkout").unwrap();
    let (plan, sql) = plumb::compile_experiment(&ws.catalog, exp, &[], &dialect).unwrap();
    let table = plumb::execute::stats_table(&plan, &engine.query(&sql).unwrap()).unwrap();
    let ids: Vec<usize> = metrics.iter().map(|m| ws.catalog.metric(m).unwrap()).collect();
    let e = &ws.catalog.experiments[exp];
    let rplan = plumb::plan::plan_report(
        &ws.catalog,
        &ids,
        plumb::time::Grain::Day,
        e.start,
        e.end,
        None,
        Some(exp),
    );
    let rsql = plumb::compile_report(&rplan, &dialect).unwrap();
    let rows = plumb::report::assemble(&rplan, &engine.query(&rsql).unwrap()).unwrap();
    metrics
        .iter()
        .map(|m| {
            let readout: f64 = table
                .rows
                .iter()
                .filter(|r| r.segment.is_none())
                .map(|r| r.columns[*m].mean * r.columns[*m].n as f64)
                .sum();
            let report: f64 = rows
                .iter()
                .filter(|r| r.metric == *m)
                .map(|r| r.total.unwrap())
                .sum();
            (readout, report)
        })
        .collect()
}

fn assert_equal(pairs: &[(f64, f64)]) {
    for (a, b) in pairs {
        assert!(
            (a - b).abs() <= 1e-9 * a.abs().max(1.0),
            "readout total {a} vs report total {b}"
        );
    }
}

#[test]
fn report_totals_equal_readout_totals_for_the_exposed_units() {
    let dir = demo(20_000);
    // `revenue` is winsorized in readouts (a cap from the experiment's units) and reports are
    // never capped, so the comparison uses the uncapped metrics.
    let pairs = both_totals(dir.path(), &["orders", "refunds", "page_views"]);
    assert!(pairs.iter().all(|(a, _)| *a > 0.0));
    assert_equal(&pairs);
}

#[test]
fn a_definition_change_moves_both_numbers_identically() {
    let dir = demo(20_000);
    let before = both_totals(dir.path(), &["orders", "refunds"]);
    let catalog = dir.path().join("metrics/plant_shop.yaml");
    let text = std::fs::read_to_string(&catalog).unwrap();
    // Only orders above 30 euros count as paid orders from now on.
    let changed = text.replacen(
        "per_unit: count\n    where: \"status = 'paid'\"",
        "per_unit: count\n    where: \"status = 'paid' and amount_cents > 3000\"",
        1,
    );
    assert_ne!(text, changed);
    std::fs::write(&catalog, changed).unwrap();
    let after = both_totals(dir.path(), &["orders", "refunds"]);
    assert_equal(&after);
    assert!(after[0].0 < before[0].0, "the new where removed orders");
    assert_eq!(after[1], before[1], "refunds' definition did not change");
}

#[test]
fn report_command_fills_gaps_and_writes_json_and_csv() {
    let dir = demo(3_000);
    let run = |args: &[&str]| -> String {
        let out = std::process::Command::new(env!("CARGO_BIN_EXE_plumb"))
            .arg("--workspace")
            .arg(dir.path())
            .args(args)
            .output()
            .unwrap();
        assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
        String::from_utf8(out.stdout).unwrap()
    };
    // The demo data ends on 2026-03-30: the days after it must appear as zero rows.
    let json: serde_json::Value = serde_json::from_str(&run(&[
        "report",
        "orders",
        "avg_basket",
        "--grain",
        "day",
        "--from",
        "2026-03-25",
        "--to",
        "2026-04-05",
        "--format",
        "json",
    ]))
    .unwrap();
    let rows = json.as_array().unwrap();
    assert_eq!(rows.len(), 2 * 11, "11 days for each of 2 metrics");
    let last = rows.iter().rfind(|r| r["metric"] == "orders").unwrap();
    assert_eq!(last["period_start"], "2026-04-04T00:00:00Z");
    assert_eq!(last["units"], 0);
    assert_eq!(last["total"], 0.0);
    let ratio = rows.iter().find(|r| r["metric"] == "avg_basket").unwrap();
    assert!(ratio["total"].is_null() && ratio["numerator"].as_f64().unwrap() > 0.0);
    let csv = run(&[
        "report",
        "orders",
        "--from",
        "2026-03-01",
        "--to",
        "2026-03-08",
        "--format",
        "csv",
        "--by",
        "region",
    ]);
    let mut lines = csv.lines();
    assert_eq!(
        lines.next().unwrap(),
        "metric,period_start,segment,segment_value,units,total,mean,numerator,denominator"
    );
    assert_eq!(lines.count(), 7 * 5, "7 days for each of 5 regions");
    let table = run(&["report", "orders", "--from", "2026-03-01", "--to", "2026-03-08"]);
    assert!(
        table.contains('▁') || table.contains('█'),
        "a text chart is shown:\n{table}"
    );
    let sql = run(&[
        "sql",
        "--report",
        "orders,revenue",
        "--from",
        "2026-03-01",
        "--to",
        "2026-04-01",
        "--dialect",
        "bigquery",
    ]);
    assert!(sql.contains("TIMESTAMP_TRUNC"));
}
