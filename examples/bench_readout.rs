//! Readout speed on generated data, end to end as a user runs it: `plumb analyze` (the binary,
//! on files: start-up, catalog, compile, the readout and population-totals queries, statistics,
//! JSON) against the best single-pass query written by hand for the same numbers, and against
//! one join per metric, each on the same files with the same number of DuckDB threads. The
//! numbers of all three are asserted equal.
//!
//! Run: `cargo build --release && cargo run --release --example bench_readout`
//! Defaults: 1,000,000 units, 1,050,000 exposure rows, 20,000,000 events on 2 tables,
//! 20 metrics, no covariates, 2 threads, data as Parquet files and as a DuckDB file.
//! Options: `--units N --events N --threads N --runs N --memory-limit 4GB --formats
//! parquet,duckdb --skip-join --dir DIR` (`--skip-join` for large runs, where one join per
//! metric is slow; `--dir` keeps the generated data there and reuses it).

use duckdb::Connection;
use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::{Duration, Instant};

const START: &str = "2026-03-01 00:00:00";
const END: &str = "2026-03-15 00:00:00";

/// A metric of the benchmark: (name, table, per_unit, of, where, window days).
type MetricDef = (
    &'static str,
    &'static str,
    &'static str,
    &'static str,
    &'static str,
    Option<u32>,
);

const METRICS: &[MetricDef] = &[
    ("orders", "orders", "count", "", "status = 'paid'", None),
    ("refunds", "orders", "count", "", "status = 'refunded'", None),
    ("revenue", "orders", "sum", "amount", "status = 'paid'", None),
    ("bought", "orders", "any", "", "status = 'paid'", None),
    ("big_orders", "orders", "count", "", "amount > 50", None),
    ("big_revenue", "orders", "sum", "amount", "amount > 20", None),
    ("repeat", "orders", "at_least", "", "status = 'paid'", None),
    ("week_orders", "orders", "count", "", "status = 'paid'", Some(7)),
    (
        "week_revenue",
        "orders",
        "sum",
        "amount",
        "status = 'paid'",
        Some(7),
    ),
    ("max_order", "orders", "max", "amount", "status = 'paid'", None),
    ("visits", "visits", "count", "", "", None),
    ("care_views", "visits", "count", "", "page = 'care'", None),
    ("cart_views", "visits", "count", "", "page = 'cart'", None),
    ("visited_cart", "visits", "any", "", "page = 'cart'", None),
    ("engaged", "visits", "at_least", "", "", None),
    ("day_visits", "visits", "count", "", "", Some(1)),
    ("week_visits", "visits", "count", "", "", Some(7)),
    ("week_cart", "visits", "count", "", "page = 'cart'", Some(7)),
    ("dwell", "visits", "sum", "seconds", "", None),
    ("week_dwell", "visits", "sum", "seconds", "", Some(7)),
];

fn arg_text(name: &str) -> Option<String> {
    let args: Vec<String> = std::env::args().collect();
    args.iter()
        .position(|a| a == name)
        .and_then(|i| args.get(i + 1))
        .cloned()
}

fn arg(name: &str, default: u64) -> u64 {
    arg_text(name).and_then(|v| v.parse().ok()).unwrap_or(default)
}

fn catalog() -> String {
    let mut s = String::from(
        "units:\n  - name: user\nevent_tables:\n  - name: orders\n    unit: user\n    table: orders\n    id: unit_id\n    time: at\n  - name: visits\n    unit: user\n    table: visits\n    id: unit_id\n    time: at\nexposure_logs:\n  - name: exposures\n    unit: user\n    table: exposures\n    id: unit_id\n    time: exposed_at\n    experiment: experiment\n    arm: arm\nmetrics:\n",
    );
    for (name, table, per_unit, of, filter, days) in METRICS {
        s += &format!("  - name: {name}\n    events: {table}\n    per_unit: {per_unit}\n");
        if !of.is_empty() {
            s += &format!("    of: {of}\n");
        }
        if !filter.is_empty() {
            s += &format!("    where: \"{filter}\"\n");
        }
        if *per_unit == "at_least" {
            s += "    at_least: 2\n";
        }
        if let Some(d) = days {
            s += &format!("    window: [0d, {d}d]\n");
        }
    }
    let names: Vec<&str> = METRICS.iter().map(|m| m.0).collect();
    s += &format!(
        "experiments:\n  - name: bench\n    exposures: exposures\n    key: exp\n    control: control\n    split: {{control: 1, treatment: 1}}\n    start: 2026-03-01\n    end: 2026-03-15\n    covariate_window: 0d\n    primary: [{}]\n",
        names.join(", ")
    );
    s
}

fn condition(filter: &str, days: Option<u32>) -> String {
    let mut c = vec!["e.at >= x.first_exposed_at".to_string()];
    if let Some(d) = days {
        c.push(format!("e.at < x.first_exposed_at + INTERVAL {d} DAY"));
    }
    if !filter.is_empty() {
        c.push(format!(
            "({})",
            filter
                .replace("status", "e.status")
                .replace("amount", "e.amount")
                .replace("page", "e.page")
        ));
    }
    c.join(" AND ")
}

fn aggregate(per_unit: &str, of: &str, cond: &str) -> String {
    match per_unit {
        "count" => format!("count(*) FILTER (WHERE {cond})"),
        "sum" => format!("sum(e.{of}) FILTER (WHERE {cond})"),
        "max" => format!("max(e.{of}) FILTER (WHERE {cond})"),
        "any" => format!("CASE WHEN count(*) FILTER (WHERE {cond}) > 0 THEN 1 ELSE 0 END"),
        _ => format!("CASE WHEN count(*) FILTER (WHERE {cond}) >= 2 THEN 1 ELSE 0 END"),
    }
}

const UNITS_CTE: &str = "x AS (
  SELECT unit_id, min(arm) AS arm, min(exposed_at) AS first_exposed_at
  FROM exposures
  WHERE experiment = 'exp' AND exposed_at >= TIMESTAMP '2026-03-01 00:00:00' AND exposed_at < TIMESTAMP '2026-03-15 00:00:00'
  GROUP BY unit_id
  HAVING min(arm) = max(arm)
)";

fn final_select(cols: &[String]) -> String {
    let mut s = String::from("SELECT arm, count(*) AS units");
    for c in cols {
        s += &format!(
            ", count({c}) AS {c}__n, avg(CAST({c} AS DOUBLE)) AS {c}__mean, var_samp(CAST({c} AS DOUBLE)) AS {c}__var"
        );
    }
    s + " FROM per_unit GROUP BY arm ORDER BY arm"
}

/// The best single pass per event table written by hand, events first cut to the experiment.
fn hand_single_pass() -> String {
    let mut s = format!("WITH {UNITS_CTE}");
    for table in ["orders", "visits"] {
        let aggs: Vec<String> = METRICS
            .iter()
            .filter(|m| m.1 == table)
            .map(|(n, _, p, of, f, d)| format!("{} AS {n}", aggregate(p, of, &condition(f, *d))))
            .collect();
        s += &format!(
            ",\n{table}_pass AS (SELECT x.unit_id, {} FROM x JOIN {table} AS e ON e.unit_id = x.unit_id WHERE e.at >= TIMESTAMP '{START}' AND e.at < TIMESTAMP '{END}' GROUP BY x.unit_id)",
            aggs.join(", ")
        );
    }
    let cols: Vec<String> = METRICS
        .iter()
        .map(|(n, t, p, ..)| {
            if *p == "max" {
                format!("{t}_pass.{n} AS {n}")
            } else {
                format!("coalesce({t}_pass.{n}, 0) AS {n}")
            }
        })
        .collect();
    s += &format!(
        ",\nper_unit AS (SELECT x.arm, {} FROM x LEFT JOIN orders_pass ON orders_pass.unit_id = x.unit_id LEFT JOIN visits_pass ON visits_pass.unit_id = x.unit_id)\n",
        cols.join(", ")
    );
    let names: Vec<String> = METRICS.iter().map(|m| m.0.to_string()).collect();
    s + &final_select(&names)
}

/// One join (and one scan) per metric: what a metric-by-metric notebook does.
fn join_per_metric() -> String {
    let mut s = format!("WITH {UNITS_CTE}");
    for (n, t, p, of, f, d) in METRICS {
        s += &format!(
            ",\nm_{n} AS (SELECT x.unit_id, {} AS v FROM x JOIN {t} AS e ON e.unit_id = x.unit_id WHERE e.at < TIMESTAMP '{END}' GROUP BY x.unit_id)",
            aggregate(p, of, &condition(f, *d))
        );
    }
    let cols: Vec<String> = METRICS
        .iter()
        .map(|(n, _, p, ..)| {
            if *p == "max" {
                format!("m_{n}.v AS {n}")
            } else {
                format!("coalesce(m_{n}.v, 0) AS {n}")
            }
        })
        .collect();
    let joins: Vec<String> = METRICS
        .iter()
        .map(|(n, ..)| format!("LEFT JOIN m_{n} ON m_{n}.unit_id = x.unit_id"))
        .collect();
    s += &format!(
        ",\nper_unit AS (SELECT x.arm, {} FROM x {})\n",
        cols.join(", "),
        joins.join(" ")
    );
    let names: Vec<String> = METRICS.iter().map(|m| m.0.to_string()).collect();
    s + &final_select(&names)
}

/// Per arm, the mean of every metric (in METRICS order), from a hand-written query.
fn time_query(conn: &Connection, sql: &str, runs: usize) -> (Duration, Vec<(String, Vec<f64>)>) {
    let mut times = Vec::new();
    let mut rows = Vec::new();
    for _ in 0..runs {
        let t = Instant::now();
        let mut stmt = conn.prepare(sql).expect("prepare");
        let mut result = stmt.query([]).expect("query");
        let names: Vec<String> = result.as_ref().unwrap().column_names();
        rows.clear();
        while let Some(row) = result.next().unwrap() {
            let arm: String = row.get(0).unwrap();
            let mut v = Vec::new();
            for (i, n) in names.iter().enumerate() {
                if n.ends_with("__mean") {
                    v.push(row.get::<_, Option<f64>>(i).unwrap().unwrap_or(f64::NAN));
                }
            }
            rows.push((arm, v));
        }
        times.push(t.elapsed());
    }
    (median(times), rows)
}

fn median(mut times: Vec<Duration>) -> Duration {
    times.sort();
    times[times.len() / 2]
}

/// `plumb analyze bench --format json` in `ws`, as a user runs it; per arm the metric means.
fn time_plumb(plumb: &Path, ws: &Path, runs: usize) -> (Duration, Vec<(String, Vec<f64>)>) {
    let mut times = Vec::new();
    let mut json = serde_json::Value::Null;
    for _ in 0..runs {
        let t = Instant::now();
        let out = Command::new(plumb)
            .args(["--workspace"])
            .arg(ws)
            .args(["analyze", "bench", "--format", "json"])
            .output()
            .expect("run plumb");
        times.push(t.elapsed());
        assert!(
            out.status.code() == Some(0) || out.status.code() == Some(3),
            "plumb failed: {}",
            String::from_utf8_lossy(&out.stderr)
        );
        json = serde_json::from_slice(&out.stdout).expect("plumb JSON");
    }
    let overall = |metric: &str| {
        json["results"]
            .as_array()
            .unwrap()
            .iter()
            .find(|r| r["metric"] == metric && r["segment"].is_null())
            .unwrap_or_else(|| panic!("no row for {metric}"))
            .clone()
    };
    let mean = |v: &serde_json::Value| v.as_f64().unwrap_or(f64::NAN);
    let control: Vec<f64> = METRICS
        .iter()
        .map(|m| mean(&overall(m.0)["control"]["mean"]))
        .collect();
    let treatment: Vec<f64> = METRICS
        .iter()
        .map(|m| mean(&overall(m.0)["treatment"]["mean"]))
        .collect();
    (
        median(times),
        vec![("control".into(), control), ("treatment".into(), treatment)],
    )
}

fn same(label: &str, a: &[(String, Vec<f64>)], b: &[(String, Vec<f64>)]) {
    assert_eq!(a.len(), b.len(), "{label}: arms");
    for ((arm_a, x), (arm_b, y)) in a.iter().zip(b) {
        assert_eq!(arm_a, arm_b, "{label}: arm order");
        for (i, (x, y)) in x.iter().zip(y).enumerate() {
            assert!(
                (x - y).abs() <= 1e-9 * y.abs().max(1.0),
                "{label}: {} in {arm_a}: {x} vs {y}",
                METRICS[i].0
            );
        }
    }
}

/// Generates the workload into `dir` as Parquet files and a DuckDB file.
fn generate(dir: &Path, units: u64, events: u64) {
    let conn = Connection::open_in_memory().expect("duckdb");
    let half = events / 2;
    // 5% of units are exposed again an hour later: most in the same arm, one in fifty in the
    // other arm (0.1% of units, excluded as exposed to several arms).
    let again = units / 20;
    conn.execute_batch(&format!(
        "CREATE TABLE exposures AS
         SELECT 'u' || lpad(CAST(i AS VARCHAR), 8, '0') AS unit_id, 'exp' AS experiment,
            CASE WHEN hash(i) % 2 = 0 THEN 'control' ELSE 'treatment' END AS arm,
            TIMESTAMP '{START}' + to_seconds(CAST(hash(i * 7) % (14 * 86400) AS BIGINT)) AS exposed_at
         FROM range({units}) t(i)
         UNION ALL
         SELECT 'u' || lpad(CAST(i * 20 AS VARCHAR), 8, '0'), 'exp',
            CASE WHEN (hash(i * 20) % 2 = 0) = (i % 50 <> 0) THEN 'control' ELSE 'treatment' END,
            TIMESTAMP '{START}' + to_seconds(CAST(hash(i * 7) % (14 * 86400) AS BIGINT) + 3600)
         FROM range({again}) t(i);
         CREATE TABLE orders AS SELECT 'u' || lpad(CAST(hash(i) % {units} AS VARCHAR), 8, '0') AS unit_id,
            TIMESTAMP '2026-02-01 00:00:00' + to_seconds(CAST(hash(i * 3) % (50 * 86400) AS BIGINT)) AS at,
            CASE WHEN hash(i * 5) % 10 = 0 THEN 'refunded' ELSE 'paid' END AS status,
            CAST(hash(i * 11) % 10000 AS DOUBLE) / 100.0 AS amount
         FROM range({half}) t(i);
         CREATE TABLE visits AS SELECT 'u' || lpad(CAST(hash(i + 99) % {units} AS VARCHAR), 8, '0') AS unit_id,
            TIMESTAMP '2026-02-01 00:00:00' + to_seconds(CAST(hash(i * 13) % (50 * 86400) AS BIGINT)) AS at,
            ['home', 'care', 'cart', 'pots'][CAST(hash(i * 17) % 4 AS INTEGER) + 1] AS page,
            CAST(hash(i * 19) % 300 AS INTEGER) AS seconds
         FROM range({half}) t(i);"
    ))
    .expect("generate data");
    let mut copy = String::new();
    for t in ["exposures", "orders", "visits"] {
        copy += &format!(
            "COPY {t} TO '{}' (FORMAT parquet);\n",
            dir.join(format!("{t}.parquet")).display()
        );
    }
    copy += &format!("ATTACH '{}' AS f;\n", dir.join("bench.duckdb").display());
    for t in ["exposures", "orders", "visits"] {
        copy += &format!("CREATE TABLE f.{t} AS SELECT * FROM {t};\n");
    }
    copy += "DETACH f;";
    conn.execute_batch(&copy).expect("write files");
}

fn workspace(dir: &Path, name: &str, local: &str) -> PathBuf {
    let ws = dir.join(name);
    std::fs::create_dir_all(ws.join("metrics")).unwrap();
    std::fs::write(
        ws.join("plumb.yaml"),
        format!("catalog: metrics\nlocal:\n{local}"),
    )
    .unwrap();
    std::fs::write(ws.join("metrics/bench.yaml"), catalog()).unwrap();
    ws
}

fn main() {
    let units = arg("--units", 1_000_000);
    let events = arg("--events", 20_000_000);
    let threads = arg("--threads", 2);
    let runs = arg("--runs", 3) as usize;
    let memory_limit = arg_text("--memory-limit");
    let formats = arg_text("--formats").unwrap_or_else(|| "parquet,duckdb".into());
    let skip_join = std::env::args().any(|a| a == "--skip-join");
    let plumb = std::env::current_exe()
        .ok()
        .and_then(|p| Some(p.parent()?.parent()?.join("plumb")))
        .filter(|p| p.is_file())
        .expect("the plumb binary is not built: run `cargo build --release` first");
    // `--dir DIR` keeps the data (and reuses it when it is there), for profiling.
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir_path = arg_text("--dir").map(PathBuf::from);
    let dir = dir_path.as_deref().unwrap_or(tmp.path());
    std::fs::create_dir_all(dir).unwrap();
    let t = Instant::now();
    if !dir.join("bench.duckdb").is_file() {
        generate(dir, units, events);
    }
    println!(
        "generated {units} units, {} exposure rows and {events} events in {:.1}s; DuckDB threads for every query: {threads}{}",
        units + units / 20,
        t.elapsed().as_secs_f64(),
        memory_limit
            .as_ref()
            .map(|m| format!(", memory limit {m}"))
            .unwrap_or_default()
    );
    let mut settings = format!("  threads: {threads}\n");
    if let Some(m) = &memory_limit {
        settings += &format!("  memory_limit: {m}\n");
    }
    for format in formats.split(',') {
        let data = dir.display().to_string();
        let (ws, conn) = match format {
            "parquet" => {
                let tables: String = ["exposures", "orders", "visits"]
                    .iter()
                    .map(|t| format!("    {t}: {data}/{t}.parquet\n"))
                    .collect();
                let ws = workspace(dir, "ws_parquet", &format!("  tables:\n{tables}{settings}"));
                let conn = Connection::open_in_memory().unwrap();
                for t in ["exposures", "orders", "visits"] {
                    conn.execute_batch(&format!(
                        "CREATE VIEW {t} AS SELECT * FROM read_parquet('{data}/{t}.parquet')"
                    ))
                    .unwrap();
                }
                (ws, conn)
            }
            "duckdb" => {
                let ws = workspace(
                    dir,
                    "ws_duckdb",
                    &format!("  database: {data}/bench.duckdb\n{settings}"),
                );
                let conn = Connection::open_in_memory().unwrap();
                conn.execute_batch(&format!("ATTACH '{data}/bench.duckdb' AS f (READ_ONLY); USE f"))
                    .unwrap();
                (ws, conn)
            }
            other => panic!("unknown format {other}"),
        };
        conn.execute_batch(&format!("SET threads = {threads}")).unwrap();
        if let Some(m) = &memory_limit {
            conn.execute_batch(&format!("SET memory_limit = '{m}'")).unwrap();
        }
        println!("\n{format}:");
        let (t_plumb, r_plumb) = time_plumb(&plumb, &ws, runs);
        let (t_hand, r_hand) = time_query(&conn, &hand_single_pass(), runs);
        same("plumb vs hand-written", &r_plumb, &r_hand);
        println!(
            "  plumb analyze (end to end): {:>7.2}s  (median of {runs})",
            t_plumb.as_secs_f64()
        );
        println!(
            "  hand-written single pass:   {:>7.2}s  (plumb / hand = {:.2})",
            t_hand.as_secs_f64(),
            t_plumb.as_secs_f64() / t_hand.as_secs_f64()
        );
        if !skip_join {
            let (t_join, r_join) = time_query(&conn, &join_per_metric(), 1);
            same("join-per-metric vs hand-written", &r_join, &r_hand);
            println!(
                "  one join per metric:        {:>7.2}s  (join / plumb = {:.1})",
                t_join.as_secs_f64(),
                t_join.as_secs_f64() / t_plumb.as_secs_f64()
            );
        }
        println!("  same numbers (metric means per arm, 1e-9): yes");
    }
}
