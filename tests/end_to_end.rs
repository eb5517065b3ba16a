//! End to end on real DuckDB: catalog -> SQL -> DuckDB -> statistics table -> readout.
//!
//! The hand-made dataset in `tests/data/handmade/` is small enough that every per-unit value
//! is worked out by hand below (see the comments); the test recomputes means and variances
//! from those values in plain Rust and compares them with what the compiled SQL returned.
#![cfg(feature = "engine")]

use plumb::execute::duckdb::LocalEngine;
use plumb::source::SourceMap;
use plumb::stats::Moments;
use std::path::Path;

fn handmade_workspace() -> tempfile::TempDir {
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let dir = tempfile::tempdir().unwrap();
    std::fs::create_dir_all(dir.path().join("metrics")).unwrap();
    std::fs::copy(
        root.join("tests/fixtures/handmade.yaml"),
        dir.path().join("metrics/handmade.yaml"),
    )
    .unwrap();
    let data = root.join("tests/data/handmade");
    std::fs::write(
        dir.path().join("plumb.yaml"),
        format!(
            "catalog: metrics\nlocal:\n  tables:\n    orders: {}\n    assignments: {}\n",
            data.join("orders.csv").display(),
            data.join("assignments.csv").display()
        ),
    )
    .unwrap();
    dir
}

/// Per-unit values worked out by hand from the CSV files (experiment 2026-01-10 .. 01-20):
/// - u1 (control, first exposure 01-10 10:00): paid orders at 01-10 11:00 (10) and 01-15 (20)
///   count; 01-09 is before exposure, 01-20 00:00 is exactly at the cut-off (excluded), the
///   refund is not paid. Within 7 days (until 01-17 10:00): both.
/// - u2 (control, 01-11 00:00): 01-11 00:00 counts (at exposure), 01-18 23:00 counts for the
///   full window but not for the 7-day one (ends 01-18 00:00). Revenue 7 + 3.
/// - u3 (control): no events -> zeros, still counted.
/// - u4 (treatment, 01-10 12:00): 13:00 (30), 01-11 (30), 01-19 (40); the 500 is a test order
///   removed by the event table's `where`. 7-day window ends 01-17 12:00: two orders.
/// - u5 (treatment): only a refund -> zeros. u6 (treatment, 01-13): its order is before exposure.
/// - u7 was exposed to both arms (excluded and counted), u8 before the start, u9 to another
///   experiment (neither is a unit of this experiment), u10 to an arm not in the split.
const CONTROL: [[f64; 4]; 3] = [
    // orders, revenue, bought, week_orders
    [2.0, 30.0, 1.0, 2.0],
    [2.0, 10.0, 1.0, 1.0],
    [0.0, 0.0, 0.0, 0.0],
];
const TREATMENT: [[f64; 4]; 3] = [[3.0, 100.0, 1.0, 2.0], [0.0, 0.0, 0.0, 0.0], [0.0, 0.0, 0.0, 0.0]];

fn moments(rows: &[[f64; 4]], col: usize) -> (f64, f64) {
    let n = rows.len() as f64;
    let mean = rows.iter().map(|r| r[col]).sum::<f64>() / n;
    let var = rows.iter().map(|r| (r[col] - mean).powi(2)).sum::<f64>() / (n - 1.0);
    (mean, var)
}

fn cov(rows: &[[f64; 4]], a: usize, b: usize) -> f64 {
    let (ma, _) = moments(rows, a);
    let (mb, _) = moments(rows, b);
    rows.iter().map(|r| (r[a] - ma) * (r[b] - mb)).sum::<f64>() / (rows.len() as f64 - 1.0)
}

#[test]
fn handmade_dataset_matches_hand_computation() {
    let ws_dir = handmade_workspace();
    let mut sources = SourceMap::new();
    let ws = match plumb::workspace::open(ws_dir.path(), &mut sources).unwrap() {
        plumb::workspace::Opened::Ok(ws, _) => ws,
        plumb::workspace::Opened::Invalid(d) => panic!("{}", plumb::diagnostics::render_plain(&sources, &d)),
    };
    let dialect = plumb::render::Dialect::load("duckdb", None).unwrap();
    let id = ws.catalog.experiment("exp").unwrap();
    let (plan, sql) = plumb::compile_experiment(&ws.catalog, id, &[], &dialect).unwrap();
    let engine = LocalEngine::open(None, &ws.local_tables).unwrap();
    let rows = engine.query(&sql).unwrap();
    let table = plumb::execute::stats_table(&plan, &rows).unwrap();

    assert_eq!(table.excluded_multiple_arms, 1, "u7 is in two arms");
    let arms: Vec<(&str, u64)> = table.rows.iter().map(|r| (r.arm.as_str(), r.units)).collect();
    assert_eq!(arms, vec![("control", 3), ("holdout", 1), ("treatment", 3)]);

    for (arm, expected) in [("control", &CONTROL), ("treatment", &TREATMENT)] {
        let row = table.rows.iter().find(|r| r.arm == arm).unwrap();
        for (col, name) in ["orders", "revenue", "bought", "week_orders"].iter().enumerate() {
            let (mean, var) = moments(expected.as_slice(), col);
            let got: &Moments = &row.columns[*name];
            assert_eq!(got.n, 3, "{arm} {name}: zero-event units are counted");
            assert!(
                (got.mean - mean).abs() < 1e-12,
                "{arm} {name} mean {} vs {mean}",
                got.mean
            );
            assert!(
                (got.var - var).abs() < 1e-9,
                "{arm} {name} var {} vs {var}",
                got.var
            );
        }
        let c = row.covariances["revenue__cov__orders"];
        assert!((c - cov(expected.as_slice(), 1, 0)).abs() < 1e-9, "{arm} cov {c}");
    }

    // The readout: the holdout arm is excluded as an unknown arm and reported.
    let spec = plumb::readout_spec(&ws.catalog, id, &plan, plumb::ReadoutOptions::default());
    let readout = plumb::stats::readout::build(&spec, &table);
    assert_eq!(readout.excluded.multiple_arms, 1);
    assert_eq!(readout.excluded.unknown_arm, 1);
    assert!(readout.cautions.iter().any(|c| c.contains("more than one arm")));
    let orders = readout.results.iter().find(|r| r.metric == "orders").unwrap();
    assert_eq!(orders.control.n, 3);
    let d = orders.difference.as_ref().unwrap();
    assert!((d.estimate - (1.0 - 4.0 / 3.0)).abs() < 1e-12);
}

#[test]
fn demo_readout_shows_the_injected_effect_and_a_clean_aa_test() {
    let dir = tempfile::tempdir().unwrap();
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_plumb"))
        .args(["demo", "--no-readout", "--shoppers", "40000"])
        .arg(dir.path())
        .output()
        .unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let run = |exp: &str| -> serde_json::Value {
        let out = std::process::Command::new(env!("CARGO_BIN_EXE_plumb"))
            .arg("--workspace")
            .arg(dir.path())
            .args(["analyze", exp, "--format", "json"])
            .output()
            .unwrap();
        assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
        serde_json::from_slice(&out.stdout).unwrap()
    };
    let main = run("one_page_checkout");
    // The stable keys of the JSON document.
    for key in [
        "experiment",
        "control",
        "arms",
        "excluded",
        "sample_ratio",
        "results",
    ] {
        assert!(main.get(key).is_some(), "missing key {key}");
    }
    assert_eq!(main["experiment"], "one_page_checkout");
    assert_eq!(main["sample_ratio"]["mismatch"], false);
    assert!(
        main["excluded"]["multiple_arms"].as_u64().unwrap() > 0,
        "the demo injects units in two arms"
    );
    let row = |doc: &serde_json::Value, metric: &str| -> serde_json::Value {
        doc["results"]
            .as_array()
            .unwrap()
            .iter()
            .find(|r| r["metric"] == metric)
            .unwrap()
            .clone()
    };
    let orders = row(&main, "orders");
    for key in [
        "metric",
        "role",
        "arm",
        "segment",
        "control",
        "treatment",
        "difference",
        "relative",
    ] {
        assert!(orders.get(key).is_some(), "result row missing {key}");
    }
    assert_eq!(orders["role"], "primary");
    assert!(orders["difference"]["estimate"].as_f64().unwrap() > 0.0);
    assert!(
        orders["difference"]["p_value"].as_f64().unwrap() < 0.05,
        "{orders}"
    );

    let aa = run("care_guide_banner");
    assert_eq!(aa["sample_ratio"]["mismatch"], false);
    for r in aa["results"].as_array().unwrap() {
        let p = r["difference"]["p_value"].as_f64().unwrap();
        assert!(p > 0.01, "A/A test row {} has p = {p}", r["metric"]);
    }
}

fn plumb_in(dir: &Path, args: &[&str]) -> std::process::Output {
    std::process::Command::new(env!("CARGO_BIN_EXE_plumb"))
        .arg("--workspace")
        .arg(dir)
        .args(args)
        .output()
        .unwrap()
}

#[test]
fn sample_ratio_mismatch_voids_the_readout_with_exit_code_3() {
    let ws = handmade_workspace();
    let catalog = ws.path().join("metrics/handmade.yaml");
    let text = std::fs::read_to_string(&catalog).unwrap();
    std::fs::write(
        &catalog,
        text.replace(
            "split: {control: 50, treatment: 50}",
            "split: {control: 99, treatment: 1}",
        ),
    )
    .unwrap();
    let out = plumb_in(ws.path(), &["analyze", "exp", "--format", "json"]);
    assert_eq!(
        out.status.code(),
        Some(3),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let doc: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(doc["sample_ratio"]["mismatch"], true);
    assert_eq!(doc["void"], true);
    assert!(doc["cautions"][0].as_str().unwrap().contains("void"));
}

#[test]
fn cuped_sequential_and_power_on_the_demo() {
    let dir = tempfile::tempdir().unwrap();
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_plumb"))
        .args(["demo", "--no-readout", "--shoppers", "30000"])
        .arg(dir.path())
        .output()
        .unwrap();
    assert!(out.status.success());
    let json = |args: &[&str]| -> serde_json::Value {
        let out = plumb_in(dir.path(), args);
        assert!(
            out.status.code() == Some(0),
            "{}",
            String::from_utf8_lossy(&out.stderr)
        );
        serde_json::from_slice(&out.stdout).unwrap()
    };
    let orders = |doc: &serde_json::Value| doc["results"][0].clone();
    let cuped = json(&["analyze", "one_page_checkout", "--format", "json"]);
    let plain = json(&["analyze", "one_page_checkout", "--format", "json", "--no-cuped"]);
    let seq = json(&["analyze", "one_page_checkout", "--format", "json", "--sequential"]);
    let (c, p, s) = (orders(&cuped), orders(&plain), orders(&seq));
    assert_eq!(c["metric"], "orders");
    assert!(c["cuped"]["theta"].as_f64().unwrap() > 0.0);
    assert!(c["cuped"]["variance_reduction"].as_f64().unwrap() > 0.0);
    assert!(p["cuped"].is_null());
    let width = |r: &serde_json::Value| {
        r["difference"]["ci_high"].as_f64().unwrap() - r["difference"]["ci_low"].as_f64().unwrap()
    };
    assert!(width(&c) < width(&p), "CUPED narrows the interval");
    assert!(width(&s) > width(&c), "always-valid intervals are wider");
    assert_eq!(seq["sequential"], true);
    assert_eq!(c["family"], "primary (Holm)");
    assert!(
        c["difference"]["adjusted_p_value"].as_f64().unwrap() >= c["difference"]["p_value"].as_f64().unwrap()
    );
    assert!(c["power"]["mde"].as_f64().unwrap() > 0.0);
    // Whole-population impact for additive metrics: absolute per day = effect × triggered/day.
    let impact = &c["population_impact"];
    let rel = impact["relative"].as_f64().unwrap();
    assert!(impact["ci_low"].as_f64().unwrap() <= rel && rel <= impact["ci_high"].as_f64().unwrap());
    let units: f64 = cuped["arms"]
        .as_array()
        .unwrap()
        .iter()
        .map(|a| a["units"].as_f64().unwrap())
        .sum();
    let per_day = units / 21.0;
    let want = c["difference"]["estimate"].as_f64().unwrap() * per_day;
    assert!((impact["absolute_per_day"].as_f64().unwrap() - want).abs() < 1e-9 * want.abs());
    let bought = cuped["results"]
        .as_array()
        .unwrap()
        .iter()
        .find(|r| r["metric"] == "bought")
        .unwrap();
    assert!(
        bought["population_impact"].is_null(),
        "0/1 metrics are not additive"
    );

    let power = json(&[
        "power", "orders", "--mde", "5%", "--days", "14", "--format", "json",
    ]);
    let per_arm = power["units_per_arm"].as_array().unwrap();
    assert_eq!(per_arm.len(), 2);
    assert!(power["days"].as_f64().unwrap() > 0.0);
    assert!(power["history"]["sd"].as_f64().unwrap() > 0.0);
    // The plan must be consistent with the normal-approximation formula on the history's sd.
    let (mean, sd) = (
        power["history"]["mean"].as_f64().unwrap(),
        power["history"]["sd"].as_f64().unwrap(),
    );
    let want = plumb::stats::power::total_units(0.05 * mean, sd, 0.05, 0.8, 0.5);
    assert!((power["total_units"].as_f64().unwrap() - want).abs() < 1e-6 * want);

    // The history window is bounded by the days the exposure log covers (21 here): asking for
    // 400 days must not divide the units by 400. Before: 330 days where 21 said 17.
    let per_day = |h: &str| {
        let doc = json(&[
            "power",
            "orders",
            "--mde",
            "5%",
            "--history-days",
            h,
            "--format",
            "json",
        ]);
        (
            doc["units_per_day"].as_f64().unwrap(),
            doc["days"].as_f64().unwrap(),
            doc,
        )
    };
    let (u21, d21, _) = per_day("21");
    let (u400, d400, long) = per_day("400");
    assert!((u400 / u21 - 1.0).abs() < 0.1, "{u400} vs {u21} units per day");
    assert!((d400 / d21 - 1.0).abs() < 0.1, "{d400} vs {d21} days");
    assert_eq!(long["history"]["bounded_by_exposure_log"], true);
    assert!((long["history"]["days"].as_f64().unwrap() - 21.0).abs() < 1e-9);
    for bad in [
        &["--units-per-day", "0"][..],
        &["--days=-5"],
        &["--units-per-day=-1"],
    ] {
        let mut args = vec!["power", "orders", "--mde", "5%"];
        args.extend_from_slice(bad);
        let out = plumb_in(dir.path(), &args);
        assert_eq!(out.status.code(), Some(2), "{args:?}");
        assert!(
            String::from_utf8_lossy(&out.stderr).contains("must be a positive"),
            "{args:?}"
        );
    }
}

fn csv_of(rows: &[plumb::execute::NamedRow]) -> String {
    let cols: Vec<String> = rows[0].keys().cloned().collect();
    let mut out = cols.join(",") + "\n";
    for r in rows {
        let cells: Vec<String> = cols
            .iter()
            .map(|c| match &r[c] {
                plumb::execute::Cell::Null => String::new(),
                plumb::execute::Cell::Number(x) => format!("{x:?}"),
                plumb::execute::Cell::Text(t) => format!("\"{}\"", t.replace('"', "\"\"")),
            })
            .collect();
        out += &(cells.join(",") + "\n");
    }
    out
}

/// The warehouse hand-off: run `plumb sql` elsewhere, export the statistics table, and
/// `plumb analyze --stats FILE` gives the same readout; a file from another catalog version or
/// experiment is rejected. The postgres and generic dialects' SQL also runs on DuckDB and gives
/// the same statistics as the duckdb dialect.
#[test]
fn statistics_table_hand_off_gives_the_same_readout() {
    let dir = tempfile::tempdir().unwrap();
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_plumb"))
        .args(["demo", "--no-readout", "--shoppers", "5000"])
        .arg(dir.path())
        .output()
        .unwrap();
    assert!(out.status.success());
    let mut sources = SourceMap::new();
    let ws = match plumb::workspace::open(dir.path(), &mut sources).unwrap() {
        plumb::workspace::Opened::Ok(ws, _) => ws,
        plumb::workspace::Opened::Invalid(_) => panic!("demo catalog invalid"),
    };
    let mut engine = LocalEngine::open(None, &ws.local_tables).unwrap();
    let id = ws.catalog.experiment("one_page_checkout").unwrap();
    let mut tables = Vec::new();
    for dialect in ["duckdb", "postgres", "generic"] {
        let d = plumb::render::Dialect::load(dialect, None).unwrap();
        let (plan, sql) = plumb::compile_experiment(&ws.catalog, id, &[], &d).unwrap();
        // DuckDB: the local engine's own path (final aggregation in Rust, order-independent),
        // exactly what `plumb analyze` runs; the others: the statement's SQL as a warehouse
        // runs it (var_samp, covar_samp), compared below to 1e-9.
        let rows = if dialect == "duckdb" {
            let rows = plumb::execute::Engine::readout(&mut engine, &plan, &sql).unwrap();
            std::fs::write(dir.path().join("stats.csv"), csv_of(&rows)).unwrap();
            rows
        } else {
            engine.query(&sql).unwrap()
        };
        tables.push(plumb::execute::stats_table(&plan, &rows).unwrap());
    }
    for t in &tables[1..] {
        assert_eq!(t.rows.len(), tables[0].rows.len());
        for (a, b) in t.rows.iter().zip(&tables[0].rows) {
            assert_eq!(
                (a.arm.clone(), a.segment.clone(), a.units),
                (b.arm.clone(), b.segment.clone(), b.units)
            );
            for (k, m) in &a.columns {
                let n = b.columns[k];
                assert_eq!(m.n, n.n, "{k}");
                assert!((m.mean - n.mean).abs() <= 1e-9 * n.mean.abs().max(1.0), "{k}");
                assert!(
                    (m.var - n.var).abs() <= 1e-9 * n.var.abs().max(1.0)
                        || (m.var.is_nan() && n.var.is_nan()),
                    "{k}"
                );
            }
        }
    }
    let local = plumb_in(dir.path(), &["analyze", "one_page_checkout", "--format", "json"]);
    let handed = plumb_in(
        dir.path(),
        &[
            "analyze",
            "one_page_checkout",
            "--format",
            "json",
            "--stats",
            dir.path().join("stats.csv").to_str().unwrap(),
        ],
    );
    assert!(
        handed.status.success(),
        "{}",
        String::from_utf8_lossy(&handed.stderr)
    );
    let (mut a, mut b): (serde_json::Value, serde_json::Value) = (
        serde_json::from_slice(&local.stdout).unwrap(),
        serde_json::from_slice(&handed.stdout).unwrap(),
    );
    // Population impact needs the local event tables, and the per-day sample-ratio check the
    // exposure log (one more query): a statistics file has neither. Everything else must be
    // identical.
    let run = |d: &serde_json::Value| d["trust_checks_run"].as_array().unwrap().len();
    assert_eq!(run(&a), run(&b) + 1);
    assert_eq!(a["trust_checks_run"][run(&b)], "daily_sample_ratio");
    for doc in [&mut a, &mut b] {
        for r in doc["results"].as_array_mut().unwrap() {
            r.as_object_mut().unwrap().remove("population_impact");
        }
        doc.as_object_mut().unwrap().remove("assumptions");
        doc.as_object_mut().unwrap().remove("computed_on");
        doc.as_object_mut().unwrap().remove("trust_checks_run");
    }
    assert_eq!(a, b);
    // A table exported under statistics layout 1 (before the third moments) is still read,
    // with its own fingerprint; only the heavy-tails check does not run, and the readout says so.
    let d = plumb::render::Dialect::load("duckdb", None).unwrap();
    let (plan, _) = plumb::compile_experiment(&ws.catalog, id, &[], &d).unwrap();
    let text = std::fs::read_to_string(dir.path().join("stats.csv")).unwrap();
    let mut lines = text.lines();
    let header: Vec<&str> = lines.next().unwrap().split(',').collect();
    let keep: Vec<usize> = (0..header.len())
        .filter(|&i| !header[i].ends_with("__m3"))
        .collect();
    assert!(keep.len() < header.len(), "the current layout has third moments");
    let old_fp = plumb::plan::fingerprint_at(&plan, 1);
    let mut old = keep.iter().map(|&i| header[i]).collect::<Vec<_>>().join(",") + "\n";
    for line in lines {
        let cells: Vec<&str> = line.split(',').collect();
        let row: Vec<String> = keep
            .iter()
            .map(|&i| match header[i] {
                "plumb_layout" => "1".to_string(),
                "plumb_fingerprint" => old_fp.clone(),
                _ => cells[i].to_string(),
            })
            .collect();
        old += &(row.join(",") + "\n");
    }
    std::fs::write(dir.path().join("stats_v1.csv"), old).unwrap();
    let v1 = plumb_in(
        dir.path(),
        &[
            "analyze",
            "one_page_checkout",
            "--format",
            "json",
            "--stats",
            dir.path().join("stats_v1.csv").to_str().unwrap(),
        ],
    );
    assert!(v1.status.success(), "{}", String::from_utf8_lossy(&v1.stderr));
    let mut v1: serde_json::Value = serde_json::from_slice(&v1.stdout).unwrap();
    for r in v1["results"].as_array_mut().unwrap() {
        r.as_object_mut().unwrap().remove("population_impact");
    }
    let run: Vec<&str> = v1["trust_checks_run"]
        .as_array()
        .unwrap()
        .iter()
        .map(|c| c.as_str().unwrap())
        .collect();
    assert!(
        !run.contains(&"heavy_tails") && run.contains(&"pre_period_imbalance"),
        "{run:?}"
    );
    assert!(
        v1["cautions"]
            .as_array()
            .unwrap()
            .iter()
            .any(|c| c.as_str().unwrap().contains("layout 1")),
        "{}",
        v1["cautions"]
    );
    assert_eq!(v1["results"], b["results"]);
    // Another experiment's query, or a changed catalog, is rejected with a clear error.
    let other = plumb_in(
        dir.path(),
        &[
            "analyze",
            "care_guide_banner",
            "--stats",
            dir.path().join("stats.csv").to_str().unwrap(),
        ],
    );
    assert_eq!(other.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&other.stderr).contains("another query"));
    let catalog = dir.path().join("metrics/plant_shop.yaml");
    let text = std::fs::read_to_string(&catalog).unwrap();
    std::fs::write(&catalog, text.replace("window: [0d, 7d]", "window: [0d, 6d]")).unwrap();
    let changed = plumb_in(
        dir.path(),
        &[
            "analyze",
            "one_page_checkout",
            "--stats",
            dir.path().join("stats.csv").to_str().unwrap(),
        ],
    );
    assert_eq!(changed.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&changed.stderr).contains("fingerprint"));
}
