//! Readout speed on generated data: plumb's compiled DuckDB query against the best single-pass
//! query written by hand for the same numbers, and against one join per metric.
//!
//! Run: `cargo run --release --example bench_readout` (defaults: 1,000,000 units,
//! 20,000,000 events on 2 tables, 20 metrics; `-- --units N --events N` to change).
//! Data lives in a temporary DuckDB file (native tables, string unit keys).

use duckdb::Connection;
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

fn arg(name: &str, default: u64) -> u64 {
    let args: Vec<String> = std::env::args().collect();
    args.iter()
        .position(|a| a == name)
        .and_then(|i| args.get(i + 1))
        .and_then(|v| v.parse().ok())
        .unwrap_or(default)
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

fn time_query(conn: &Connection, sql: &str, runs: usize) -> (Duration, Vec<Vec<f64>>) {
    let mut best = Duration::MAX;
    let mut rows = Vec::new();
    for _ in 0..runs {
        let t = Instant::now();
        let mut stmt = conn.prepare(sql).expect("prepare");
        let mut result = stmt.query([]).expect("query");
        let names: Vec<String> = result.as_ref().unwrap().column_names();
        rows.clear();
        while let Some(row) = result.next().unwrap() {
            let mut v = Vec::new();
            for (i, n) in names.iter().enumerate() {
                if n.ends_with("__mean") {
                    v.push(row.get::<_, Option<f64>>(i).unwrap().unwrap_or(f64::NAN));
                }
            }
            rows.push(v);
        }
        best = best.min(t.elapsed());
    }
    (best, rows)
}

fn main() {
    let units = arg("--units", 1_000_000);
    let events = arg("--events", 20_000_000);
    let dir = tempfile::tempdir().expect("temp dir");
    let conn = Connection::open(dir.path().join("bench.duckdb")).expect("duckdb");
    let t = Instant::now();
    conn.execute_batch(&format!(
        "CREATE TABLE exposures AS SELECT 'u' || lpad(CAST(i AS VARCHAR), 8, '0') AS unit_id, 'exp' AS experiment,
            CASE WHEN hash(i) % 2 = 0 THEN 'control' ELSE 'treatment' END AS arm,
            TIMESTAMP '{START}' + to_seconds(CAST(hash(i * 7) % (14 * 86400) AS BIGINT)) AS exposed_at
         FROM range({units}) t(i);
         CREATE TABLE orders AS SELECT 'u' || lpad(CAST(hash(i) % {units} AS VARCHAR), 8, '0') AS unit_id,
            TIMESTAMP '2026-02-01 00:00:00' + to_seconds(CAST(hash(i * 3) % (50 * 86400) AS BIGINT)) AS at,
            CASE WHEN hash(i * 5) % 10 = 0 THEN 'refunded' ELSE 'paid' END AS status,
            CAST(hash(i * 11) % 10000 AS DOUBLE) / 100.0 AS amount
         FROM range({half}) t(i);
         CREATE TABLE visits AS SELECT 'u' || lpad(CAST(hash(i + 99) % {units} AS VARCHAR), 8, '0') AS unit_id,
            TIMESTAMP '2026-02-01 00:00:00' + to_seconds(CAST(hash(i * 13) % (50 * 86400) AS BIGINT)) AS at,
            ['home', 'care', 'cart', 'pots'][CAST(hash(i * 17) % 4 AS INTEGER) + 1] AS page,
            CAST(hash(i * 19) % 300 AS INTEGER) AS seconds
         FROM range({half}) t(i);
         CHECKPOINT;",
        half = events / 2
    ))
    .expect("generate data");
    println!(
        "generated {units} units and {events} events in {:.1}s",
        t.elapsed().as_secs_f64()
    );
    println!(
        "threads: {}",
        std::thread::available_parallelism().map(|n| n.get()).unwrap_or(1)
    );

    let text = catalog();
    let mut sources = plumb::source::SourceMap::new();
    let (raw, _) = plumb::load::load_catalog_texts(&[("bench.yaml", &text)], &mut sources);
    let ir = plumb::resolve::resolve(&sources, &raw).expect("catalog");
    let dialect = plumb::render::Dialect::load("duckdb", None).unwrap();
    let (_, plumb_sql) = plumb::compile_experiment(&ir, 0, &[], &dialect).expect("compile");

    let (t_plumb, r_plumb) = time_query(&conn, &plumb_sql, 2);
    let (t_hand, r_hand) = time_query(&conn, &hand_single_pass(), 2);
    for (a, b) in r_plumb.iter().zip(&r_hand) {
        for (x, y) in a.iter().zip(b) {
            assert!((x - y).abs() <= 1e-9 * y.abs().max(1.0), "plumb {x} vs hand {y}");
        }
    }
    println!("plumb readout query:       {:>7.2}s", t_plumb.as_secs_f64());
    println!(
        "hand-written single pass:  {:>7.2}s  (plumb / hand = {:.2})",
        t_hand.as_secs_f64(),
        t_plumb.as_secs_f64() / t_hand.as_secs_f64()
    );
    let (t_join, r_join) = time_query(&conn, &join_per_metric(), 1);
    for (a, b) in r_join.iter().zip(&r_hand) {
        for (x, y) in a.iter().zip(b) {
            assert!(
                (x - y).abs() <= 1e-9 * y.abs().max(1.0),
                "join-per-metric {x} vs hand {y}"
            );
        }
    }
    println!(
        "one join per metric:       {:>7.2}s  (join / plumb = {:.1})",
        t_join.as_secs_f64(),
        t_join.as_secs_f64() / t_plumb.as_secs_f64()
    );
    println!("same numbers from all three queries: yes");
}
