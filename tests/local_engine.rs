//! The local engine as a user meets it: readouts on Parquet, NDJSON, partitioned globs and a
//! DuckDB file equal the CSV ones; the same inputs give byte-identical output with 1, 2 or 8
//! threads; nothing is ever downloaded; `local:` settings are checked with located errors.
#![cfg(feature = "engine")]

use plumb::execute::Cell;
use plumb::execute::duckdb::{LocalEngine, LocalSettings};
use std::path::Path;
use std::process::Command;

fn plumb(ws: &Path, args: &[&str]) -> (Option<i32>, String, String) {
    let out = Command::new(env!("CARGO_BIN_EXE_plumb"))
        .arg("--workspace")
        .arg(ws)
        .args(args)
        .output()
        .unwrap();
    (
        out.status.code(),
        String::from_utf8_lossy(&out.stdout).into_owned(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

/// A demo workspace of `shoppers` shoppers (CSV), written by `plumb demo`.
fn demo(shoppers: &str) -> tempfile::TempDir {
    let dir = tempfile::tempdir().unwrap();
    let ws = dir.path().join("ws");
    let out = Command::new(env!("CARGO_BIN_EXE_plumb"))
        .args([
            "demo",
            ws.to_str().unwrap(),
            "--shoppers",
            shoppers,
            "--no-readout",
        ])
        .output()
        .unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    dir
}

/// Replaces the `local:` block of the demo's plumb.yaml.
fn set_local(ws: &Path, local: &str) {
    let text = std::fs::read_to_string(ws.join("plumb.yaml")).unwrap();
    let start = text.find("local:").unwrap();
    let end = text.find("lint:").unwrap();
    std::fs::write(
        ws.join("plumb.yaml"),
        format!("{}{local}{}", &text[..start], &text[end..]),
    )
    .unwrap();
}

const TABLES: [&str; 4] = ["orders", "visits", "assignments", "shoppers"];

#[test]
fn readouts_on_parquet_ndjson_globs_and_a_duckdb_file_equal_the_csv_ones() {
    let dir = demo("3000");
    let ws = dir.path().join("ws");
    let data = ws.join("data");
    let args = ["analyze", "one_page_checkout", "--format", "json"];
    let (code, csv_readout, err) = plumb(&ws, &args);
    assert_eq!(code, Some(0), "{err}");
    let report_args = [
        "report",
        "revenue",
        "--from",
        "2026-03-02",
        "--to",
        "2026-03-09",
        "--format",
        "csv",
    ];
    let (_, csv_report, _) = plumb(&ws, &report_args);

    // Convert the CSV files with DuckDB itself: the same columns and types in every format.
    let engine = LocalEngine::open_for_writing().unwrap();
    for t in TABLES {
        engine
            .execute_batch(&format!(
                "CREATE VIEW {t} AS SELECT * FROM read_csv('{}', header = true)",
                data.join(format!("{t}.csv")).display()
            ))
            .unwrap();
    }
    std::fs::create_dir_all(data.join("orders_parts")).unwrap();
    let mut copy = String::new();
    for t in TABLES {
        let base = data.join(t);
        copy += &format!(
            "COPY (SELECT * FROM {t}) TO '{}.parquet' (FORMAT parquet);\n\
             COPY (SELECT * FROM {t}) TO '{}.ndjson' (FORMAT json);\n",
            base.display(),
            base.display()
        );
    }
    // A partitioned layout: orders in two files, read through a glob.
    for (i, cond) in [
        "ordered_at < TIMESTAMP '2026-03-05'",
        "ordered_at >= TIMESTAMP '2026-03-05'",
    ]
    .iter()
    .enumerate()
    {
        copy += &format!(
            "COPY (SELECT * FROM orders WHERE {cond}) TO '{}' (FORMAT parquet);\n",
            data.join(format!("orders_parts/part-{i}.parquet")).display()
        );
    }
    let db = data.join("shop.duckdb");
    copy += &format!("ATTACH '{}' AS shop;\n", db.display());
    for t in TABLES {
        copy += &format!("CREATE TABLE shop.{t} AS SELECT * FROM {t};\n");
    }
    copy += "DETACH shop;\n";
    engine.execute_batch(&copy).unwrap();
    drop(engine);

    let tables = |ext: &str| -> String {
        TABLES
            .iter()
            .map(|t| format!("    {t}: data/{t}.{ext}\n"))
            .collect()
    };
    let layouts = [
        ("parquet", format!("local:\n  tables:\n{}", tables("parquet"))),
        ("ndjson", format!("local:\n  tables:\n{}", tables("ndjson"))),
        (
            "glob",
            format!("local:\n  tables:\n{}", tables("parquet")).replace(
                "orders: data/orders.parquet",
                "orders: data/orders_parts/*.parquet",
            ),
        ),
        (
            "duckdb file",
            "local:\n  database: data/shop.duckdb\n".to_string(),
        ),
    ];
    for (name, local) in layouts {
        set_local(&ws, &local);
        let (code, readout, err) = plumb(&ws, &args);
        assert_eq!(code, Some(0), "{name}: {err}");
        assert!(readout == csv_readout, "{name}: readout differs from the CSV one");
        let (_, report, _) = plumb(&ws, &report_args);
        assert!(report == csv_report, "{name}: report differs from the CSV one");
    }
}

#[test]
fn output_is_byte_identical_with_1_2_and_8_threads() {
    // Enough rows that DuckDB splits scans across threads (several row groups per table).
    let dir = demo("60000");
    let ws = dir.path().join("ws");
    let text = std::fs::read_to_string(ws.join("plumb.yaml")).unwrap();
    let commands: &[&[&str]] = &[
        &["analyze", "one_page_checkout", "--format", "json"],
        &[
            "analyze",
            "care_guide_banner",
            "--by",
            "region",
            "--format",
            "json",
        ],
        &[
            "report",
            "revenue",
            "avg_basket",
            "--from",
            "2026-03-02",
            "--to",
            "2026-03-23",
            "--format",
            "csv",
        ],
        &["power", "revenue", "--mde", "5%", "--format", "json"],
    ];
    let mut first: Vec<String> = Vec::new();
    for threads in [1, 2, 8] {
        std::fs::write(
            ws.join("plumb.yaml"),
            text.replace("local:\n", &format!("local:\n  threads: {threads}\n")),
        )
        .unwrap();
        for (i, args) in commands.iter().enumerate() {
            let (code, out, err) = plumb(&ws, args);
            assert_eq!(code, Some(0), "{args:?} with {threads} threads: {err}");
            match first.get(i) {
                None => first.push(out),
                Some(want) => assert!(*want == out, "{args:?}: {threads} threads differ from 1 thread"),
            }
        }
    }
}

#[test]
fn nothing_is_downloaded_and_settings_reach_duckdb() {
    let tmp = tempfile::tempdir().unwrap();
    let settings = LocalSettings {
        threads: Some(3),
        memory_limit: Some("1GB".into()),
        temp_directory: Some(tmp.path().join("spill")),
    };
    // A Parquet and an NDJSON table, written by an unrestricted engine, read by the locked one.
    let writer = LocalEngine::open_for_writing().unwrap();
    let parquet = tmp.path().join("t.parquet");
    let ndjson = tmp.path().join("t.ndjson");
    writer
        .execute_batch(&format!(
            "COPY (SELECT 1 AS a) TO '{}' (FORMAT parquet); COPY (SELECT 2 AS a) TO '{}' (FORMAT json);",
            parquet.display(),
            ndjson.display()
        ))
        .unwrap();
    let tables = [("p".to_string(), parquet), ("j".to_string(), ndjson)];
    let engine = LocalEngine::open_with(None, &tables, &settings).unwrap();
    let setting = |name: &str| match &engine
        .query(&format!("SELECT CAST(current_setting('{name}') AS VARCHAR) AS v"))
        .unwrap()[0]["v"]
    {
        Cell::Text(t) => t.clone(),
        Cell::Number(x) => x.to_string(),
        Cell::Null => String::new(),
    };
    assert_eq!(setting("autoinstall_known_extensions"), "false");
    assert_eq!(setting("autoload_known_extensions"), "false");
    assert_eq!(setting("threads"), "3");
    assert!(
        setting("memory_limit").contains("953.6 MiB") || setting("memory_limit").contains("1.0 GB"),
        "{}",
        setting("memory_limit")
    );
    assert!(setting("temp_directory").ends_with("spill"));
    // The readers are compiled in: they work with autoloading off and every file or network
    // access outside the declared tables refused (even listing the extension folder is).
    let rows = engine
        .query("SELECT (SELECT sum(a) FROM p) + (SELECT sum(a) FROM j) AS n")
        .unwrap();
    assert_eq!(rows[0]["n"], Cell::Number(3.0));
    assert!(
        engine
            .query("SELECT count(*) AS n FROM duckdb_extensions()")
            .is_err()
    );
}

#[test]
fn local_settings_are_checked_with_located_errors() {
    let dir = demo("200");
    let ws = dir.path().join("ws");
    let text = std::fs::read_to_string(ws.join("plumb.yaml")).unwrap();
    std::fs::write(
        ws.join("plumb.yaml"),
        text.replace("local:\n", "local:\n  threads: 0\n  memory_limit: lots\n"),
    )
    .unwrap();
    let (code, _, err) = plumb(&ws, &["check"]);
    assert_eq!(code, Some(1), "{err}");
    assert!(
        err.contains("`threads` must be between 1 and 1024, got 0"),
        "{err}"
    );
    assert!(err.contains("`memory_limit` `lots` is not a size"), "{err}");
    assert!(err.contains("plumb.yaml:5:"), "located: {err}");
    // A glob that matches nothing and a folder are clear data errors (exit 2).
    std::fs::write(
        ws.join("plumb.yaml"),
        text.replace("orders: data/orders.csv", "orders: data/none/*.parquet"),
    )
    .unwrap();
    let (code, _, err) = plumb(&ws, &["analyze", "one_page_checkout"]);
    assert_eq!(code, Some(2), "{err}");
    assert!(err.contains("local table `orders`"), "{err}");
    std::fs::write(
        ws.join("plumb.yaml"),
        text.replace("orders: data/orders.csv", "orders: data"),
    )
    .unwrap();
    let (code, _, err) = plumb(&ws, &["analyze", "one_page_checkout"]);
    assert_eq!(code, Some(2), "{err}");
    assert!(err.contains("is a folder"), "{err}");
}

/// The engine that runs catalog SQL reads only the declared tables: writing files,
/// attaching databases, installing extensions and reading other files all fail, and
/// external access cannot be switched back on.
#[test]
fn the_local_engine_reaches_nothing_but_the_declared_data() {
    let dir = tempfile::tempdir().unwrap();
    let data = dir.path().join("t.csv");
    std::fs::write(&data, "a,b\n1,2\n").unwrap();
    std::fs::write(dir.path().join("other.csv"), "x\n1\n").unwrap();
    let engine = LocalEngine::open(None, &[("t".to_string(), data.clone())]).unwrap();
    assert_eq!(engine.query("SELECT count(*) AS n FROM t").unwrap().len(), 1);
    let other = dir.path().join("other.csv").display().to_string();
    let out = dir.path().join("out.csv").display().to_string();
    for sql in [
        format!("SELECT * FROM read_csv('{other}')"),
        format!("SELECT * FROM read_text('{other}')"),
        format!("COPY (SELECT 1) TO '{out}'"),
        format!("ATTACH '{}' AS x", dir.path().join("x.duckdb").display()),
        "INSTALL httpfs".to_string(),
        "LOAD httpfs".to_string(),
        "SET enable_external_access = true".to_string(),
    ] {
        assert!(engine.execute_batch(&sql).is_err(), "allowed: {sql}");
    }
    assert!(!dir.path().join("out.csv").exists());
    // Still readable after all that.
    assert_eq!(engine.query("SELECT count(*) AS n FROM t").unwrap().len(), 1);
}
