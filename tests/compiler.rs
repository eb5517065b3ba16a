//! The compiled SQL, run on DuckDB over generated data, against an independent computation in
//! plain Rust over the raw rows: every per-arm statistic (n, mean, variance), covariate moments
//! and covariances, winsorizing, windows, segments, exclusions. Also: one scan per event table
//! in DuckDB's plan, and exact edge cases (boundaries, NULLs, time zones).
#![cfg(feature = "engine")]

use plumb::execute::duckdb::LocalEngine;
use plumb::source::SourceMap;
use plumb::stats::readout::StatsTable;
use std::collections::BTreeMap;
use std::path::Path;

const H: i64 = 3600;
const D: i64 = 86_400;

fn ts(secs: i64) -> String {
    plumb::time::Timestamp(secs).to_sql_string()
}

/// A tiny deterministic generator (64-bit LCG), independent of the demo's.
struct Lcg(u64);
impl Lcg {
    fn next(&mut self) -> u64 {
        self.0 = self
            .0
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        self.0 >> 33
    }
    fn below(&mut self, n: u64) -> u64 {
        self.next() % n
    }
}

#[derive(Clone)]
struct Exposure {
    user: String,
    exp: String,
    variant: Option<String>,
    at: i64,
    platform: String,
}
#[derive(Clone)]
struct Purchase {
    user: String,
    at: i64,
    status: &'static str,
    amount: Option<f64>,
    sku: Option<String>,
    is_test: bool,
}
#[derive(Clone)]
struct Session {
    user: String,
    at: i64,
    duration: Option<i64>,
}
struct UserRow {
    user: String,
    tier: String,
    updated_at: i64,
}

struct Data {
    exposures: Vec<Exposure>,
    purchases: Vec<Purchase>,
    sessions: Vec<Session>,
    users: Vec<UserRow>,
}

fn start() -> i64 {
    plumb::time::Timestamp::parse("2026-04-01T00:00:00Z").unwrap().0
}
fn end() -> i64 {
    plumb::time::Timestamp::parse("2026-04-15T00:00:00Z").unwrap().0
}

/// Generated data with whole-hour timestamps, so many events fall exactly on window bounds.
fn generate(users: usize) -> Data {
    let mut r = Lcg(42);
    let (s, e) = (start(), end());
    let mut d = Data {
        exposures: vec![],
        purchases: vec![],
        sessions: vec![],
        users: vec![],
    };
    for i in 0..users {
        let u = format!("u{i}");
        let arms = ["a", "b", "c", "c"];
        let arm = arms[r.below(4) as usize].to_string();
        let at = s + H * r.below(((e - s) / H) as u64) as i64;
        let platform = ["ios", "android", "web"][r.below(3) as usize].to_string();
        let mut ex = |variant: Option<String>, at: i64, exp: &str| {
            d.exposures.push(Exposure {
                user: u.clone(),
                exp: exp.into(),
                variant,
                at,
                platform: platform.clone(),
            })
        };
        ex(Some(arm.clone()), at, "it's-exp");
        match r.below(20) {
            0 => ex(Some("b".into()), at + H, "it's-exp"), // maybe a second arm
            1 => ex(Some(arm.clone()), at + 5 * H, "it's-exp"), // duplicate exposure
            2 => ex(Some(arm.clone()), s - 2 * D, "it's-exp"), // before the start: ignored
            3 => ex(Some("a".into()), at, "other"),
            4 => ex(None, at + 2 * H, "it's-exp"),
            _ => {}
        }
        // Tier history: a row long ago, sometimes a change in the middle of the experiment.
        d.users.push(UserRow {
            user: u.clone(),
            tier: ["free", "plus"][r.below(2) as usize].into(),
            updated_at: s - 30 * D,
        });
        if r.below(3) == 0 {
            d.users.push(UserRow {
                user: u.clone(),
                tier: "pro".into(),
                updated_at: s + H * r.below(((e - s) / H) as u64) as i64,
            });
        }
        for _ in 0..r.below(9) {
            let t = s - 8 * D + H * r.below((23 * D / H) as u64) as i64;
            let amount = if r.below(10) == 0 {
                None
            } else {
                Some((1 + r.below(400)) as f64 / 4.0)
            };
            d.purchases.push(Purchase {
                user: u.clone(),
                at: t,
                status: if r.below(5) == 0 { "refunded" } else { "paid" },
                amount,
                sku: if r.below(8) == 0 {
                    None
                } else {
                    Some(format!("k{}", r.below(6)))
                },
                is_test: r.below(25) == 0,
            });
        }
        // Events exactly at exposure, at +24h and at the cut-off.
        for t in [at, at + 24 * H, at + H, e] {
            d.sessions.push(Session {
                user: u.clone(),
                at: t,
                duration: Some(r.below(600) as i64 - 30),
            });
        }
        for _ in 0..r.below(6) {
            let t = s - 8 * D + H * r.below((23 * D / H) as u64) as i64;
            let duration = if r.below(12) == 0 {
                None
            } else {
                Some(r.below(900) as i64 - 60)
            };
            d.sessions.push(Session {
                user: u.clone(),
                at: t,
                duration,
            });
        }
    }
    d
}

fn opt<T: ToString>(v: &Option<T>) -> String {
    v.as_ref().map(|x| x.to_string()).unwrap_or_default()
}

fn write_data(d: &Data, dir: &Path) {
    let mut f = String::from("user_id,exp,variant,at,platform\n");
    for x in &d.exposures {
        f += &format!(
            "{},\"{}\",{},{},{}\n",
            x.user,
            x.exp,
            opt(&x.variant),
            ts(x.at),
            x.platform
        );
    }
    std::fs::write(dir.join("exposures.csv"), f).unwrap();
    let mut f = String::from("user_id,at,status,amount,sku,is_test\n");
    for p in &d.purchases {
        f += &format!(
            "{},{},{},{},{},{}\n",
            p.user,
            ts(p.at),
            p.status,
            opt(&p.amount),
            opt(&p.sku),
            p.is_test
        );
    }
    std::fs::write(dir.join("purchases.csv"), f).unwrap();
    let mut f = String::from("user_id,started_at,duration_s\n");
    for x in &d.sessions {
        f += &format!("{},{},{}\n", x.user, ts(x.at), opt(&x.duration));
    }
    std::fs::write(dir.join("sessions.csv"), f).unwrap();
    let mut f = String::from("user_id,tier,updated_at\n");
    for x in &d.users {
        f += &format!("{},{},{}\n", x.user, x.tier, ts(x.updated_at));
    }
    std::fs::write(dir.join("users.csv"), f).unwrap();
}

/// Per-unit values of the experiment computed directly from the rows.
struct Unit {
    arm: String,
    platform: String,
    tier: Option<String>,
    values: BTreeMap<String, Option<f64>>,
}

fn quantile_cont(values: &[f64], p: f64) -> f64 {
    let mut v = values.to_vec();
    v.sort_by(f64::total_cmp);
    let h = (v.len() - 1) as f64 * p;
    let lo = h.floor() as usize;
    let hi = (lo + 1).min(v.len() - 1);
    v[lo] + (h - lo as f64) * (v[hi] - v[lo])
}

fn expected_units(d: &Data) -> (Vec<Unit>, u64) {
    let (s, e) = (start(), end());
    let mut by_user: BTreeMap<&str, Vec<&Exposure>> = BTreeMap::new();
    for x in d
        .exposures
        .iter()
        .filter(|x| x.exp == "it's-exp" && x.at >= s && x.at < e)
    {
        by_user.entry(&x.user).or_default().push(x);
    }
    let mut units = Vec::new();
    let mut multiple = 0;
    for (user, rows) in by_user {
        let arms: std::collections::BTreeSet<&String> =
            rows.iter().filter_map(|x| x.variant.as_ref()).collect();
        if arms.len() > 1 {
            multiple += 1;
            continue;
        }
        let Some(arm) = arms.into_iter().next() else {
            continue;
        };
        let first = rows.iter().map(|x| x.at).min().unwrap();
        let platform = rows
            .iter()
            .filter(|x| x.at == first)
            .map(|x| x.platform.clone())
            .min()
            .unwrap();
        let tier = d
            .users
            .iter()
            .filter(|u| u.user == user && u.updated_at <= first)
            .max_by_key(|u| u.updated_at)
            .map(|u| u.tier.clone());
        let mut values = BTreeMap::new();
        for (suffix, ws, we) in [("", 0, None), ("__pre", -7 * D, Some(0))] {
            let inwin = |t: i64, ws: i64, we: Option<i64>| {
                t >= first + ws && we.is_none_or(|w| t < first + w) && t < e && t >= s - 7 * D
            };
            let p: Vec<&Purchase> = d
                .purchases
                .iter()
                .filter(|p| p.user == user && !p.is_test && inwin(p.at, ws, we))
                .collect();
            let paid: Vec<&&Purchase> = p.iter().filter(|p| p.status == "paid").collect();
            let amounts: Vec<f64> = p.iter().filter_map(|p| p.amount).collect();
            let sum = |xs: &[f64]| xs.iter().sum::<f64>();
            let mut put = |k: &str, v: Option<f64>| values.insert(format!("{k}{suffix}"), v);
            put("purchases", Some(paid.len() as f64));
            put(
                "spend",
                Some(sum(&paid.iter().filter_map(|p| p.amount).collect::<Vec<_>>())),
            );
            put("spend_capped", Some(sum(&amounts)));
            let skus: std::collections::BTreeSet<&String> = p.iter().filter_map(|p| p.sku.as_ref()).collect();
            put("skus", Some(skus.len() as f64));
            put("purchased", Some(if p.is_empty() { 0.0 } else { 1.0 }));
            put("first_amount", amounts.iter().copied().reduce(f64::min));
            put("max_amount", amounts.iter().copied().reduce(f64::max));
            put("frequent", Some(if paid.len() >= 3 { 1.0 } else { 0.0 }));
            let sessions: Vec<&Session> = d
                .sessions
                .iter()
                .filter(|x| x.user == user && x.duration.is_some_and(|v| v >= 0))
                .collect();
            let (w1s, w1e) = if suffix.is_empty() {
                (0, Some(24 * H))
            } else {
                (ws, we)
            };
            put(
                "day_one_sessions",
                Some(sessions.iter().filter(|x| inwin(x.at, w1s, w1e)).count() as f64),
            );
            let (w2s, w2e) = if suffix.is_empty() {
                (H, Some(7 * D))
            } else {
                (ws, we)
            };
            put(
                "session_time",
                Some(
                    sessions
                        .iter()
                        .filter(|x| inwin(x.at, w2s, w2e))
                        .map(|x| x.duration.unwrap() as f64)
                        .sum(),
                ),
            );
        }
        units.push(Unit {
            arm: arm.clone(),
            platform,
            tier,
            values,
        });
    }
    // winsorize: spend at its 99th percentile over all exposed units (each of post and pre
    // separately), spend_capped at 100.
    for col in ["spend", "spend__pre"] {
        let vals: Vec<f64> = units.iter().map(|u| u.values[col].unwrap()).collect();
        let cap = quantile_cont(&vals, 0.99);
        for u in &mut units {
            let v = u.values[col].unwrap();
            u.values.insert(col.into(), Some(v.min(cap)));
        }
    }
    for col in ["spend_capped", "spend_capped__pre"] {
        for u in &mut units {
            let v = u.values[col].unwrap();
            u.values.insert(col.into(), Some(v.min(100.0)));
        }
    }
    (units, multiple)
}

fn moments(units: &[&Unit], col: &str) -> (u64, f64, f64) {
    let v: Vec<f64> = units.iter().filter_map(|u| u.values[col]).collect();
    let n = v.len() as f64;
    let mean = v.iter().sum::<f64>() / n;
    let var = v.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / (n - 1.0);
    (v.len() as u64, mean, var)
}

fn covariance(units: &[&Unit], a: &str, b: &str) -> f64 {
    let pairs: Vec<(f64, f64)> = units
        .iter()
        .filter_map(|u| Some((u.values[a]?, u.values[b]?)))
        .collect();
    let n = pairs.len() as f64;
    let (ma, mb) = (
        pairs.iter().map(|p| p.0).sum::<f64>() / n,
        pairs.iter().map(|p| p.1).sum::<f64>() / n,
    );
    pairs.iter().map(|p| (p.0 - ma) * (p.1 - mb)).sum::<f64>() / (n - 1.0)
}

fn close(got: f64, want: f64, what: &str) {
    let tol = 1e-9 * want.abs().max(1.0);
    assert!((got - want).abs() <= tol, "{what}: got {got}, want {want}");
}

fn run_every_kind(users: usize) -> (StatsTable, plumb::plan::ExperimentPlan, Data) {
    let dir = tempfile::tempdir().unwrap();
    let data = generate(users);
    write_data(&data, dir.path());
    let catalog_text =
        std::fs::read_to_string(Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/every_kind.yaml"))
            .unwrap();
    let mut sources = SourceMap::new();
    let (raw, diags) = plumb::load::load_catalog_texts(&[("every_kind.yaml", &catalog_text)], &mut sources);
    assert!(diags.is_empty());
    let catalog = plumb::resolve::resolve(&sources, &raw).unwrap();
    let dialect = plumb::render::Dialect::load("duckdb", None).unwrap();
    let (plan, sql) = plumb::compile_experiment(&catalog, 0, &[], &dialect).unwrap();
    let tables: Vec<(String, std::path::PathBuf)> = ["exposures", "purchases", "sessions", "users"]
        .iter()
        .map(|t| (t.to_string(), dir.path().join(format!("{t}.csv"))))
        .collect();
    let mut engine = LocalEngine::open(None, &tables).unwrap();
    // The readout path (`plumb analyze`): per-unit stage in SQL, final aggregation in Rust.
    let rows = plumb::execute::Engine::readout(&mut engine, &plan, &sql).unwrap();
    let table = plumb::execute::stats_table(&plan, &rows).unwrap();
    // The statement's own final SELECT gives the same statistics (what a warehouse computes).
    let sql_table = plumb::execute::stats_table(&plan, &engine.query(&sql).unwrap()).unwrap();
    assert_eq!(table.rows.len(), sql_table.rows.len());
    for (a, b) in table.rows.iter().zip(&sql_table.rows) {
        assert_eq!((&a.arm, &a.segment, a.units), (&b.arm, &b.segment, b.units));
        for (k, m) in &a.columns {
            let o = b.columns[k];
            assert_eq!(m.n, o.n, "{k}");
            let close =
                |x: f64, y: f64| (x - y).abs() <= 1e-12 * y.abs().max(1.0) || (x.is_nan() && y.is_nan());
            assert!(
                close(m.mean, o.mean) && close(m.var, o.var),
                "{k}: {m:?} vs {o:?}"
            );
        }
        assert_eq!(
            a.third_moments.keys().collect::<Vec<_>>(),
            b.third_moments.keys().collect::<Vec<_>>(),
            "third moments of {} {:?}",
            a.arm,
            a.segment
        );
        for (k, m3) in &a.third_moments {
            let o = b.third_moments[k];
            let scale = a.columns[k].var.powf(1.5).max(1e-300);
            assert!((m3 - o).abs() <= 1e-9 * scale, "{k} third moment: {m3} vs {o}");
        }
        for (k, c) in &a.covariances {
            let o = b.covariances[k];
            assert!(
                (c - o).abs() <= 1e-12 * o.abs().max(1.0) || (c.is_nan() && o.is_nan()),
                "{k}: {c} vs {o}"
            );
        }
    }
    (table, plan, data)
}

#[test]
fn every_per_arm_statistic_matches_an_independent_computation() {
    let (table, plan, data) = run_every_kind(400);
    let (units, multiple) = expected_units(&data);
    assert!(multiple > 0, "the data has units in two arms");
    assert_eq!(table.excluded_multiple_arms, multiple);
    let mut checked = 0;
    for arm in ["a", "b", "c"] {
        let mine: Vec<&Unit> = units.iter().filter(|u| u.arm == arm).collect();
        let row = table
            .rows
            .iter()
            .find(|r| r.arm == arm && r.segment.is_none())
            .unwrap();
        assert_eq!(row.units, mine.len() as u64, "units in arm {arm}");
        for c in &plan.columns {
            let (n, mean, var) = moments(&mine, &c.column);
            let got = row.columns[&c.column];
            assert_eq!(got.n, n, "{arm} {} n", c.column);
            close(got.mean, mean, &format!("{arm} {} mean", c.column));
            close(got.var, var, &format!("{arm} {} var", c.column));
            checked += 1;
        }
        let third = plumb::plan::third_moment_columns(&plan);
        assert!(!third.is_empty(), "the catalog has mean metrics");
        assert_eq!(row.third_moments.len(), third.len());
        for c in third {
            let v: Vec<f64> = mine.iter().filter_map(|u| u.values[c]).collect();
            let (n, mean) = (v.len() as f64, v.iter().sum::<f64>() / v.len() as f64);
            let m3 = v.iter().map(|x| (x - mean).powi(3)).sum::<f64>() / n;
            let scale = row.columns[c].var.powf(1.5).max(1.0);
            assert!(
                (row.third_moments[c] - m3).abs() <= 1e-9 * scale,
                "{arm} {c} third moment: {} vs {m3}",
                row.third_moments[c]
            );
            checked += 1;
        }
        for c in &plan.covariances {
            close(
                row.covariances[&c.name],
                covariance(&mine, &c.a, &c.b),
                &format!("{arm} {}", c.name),
            );
            checked += 1;
        }
        // Segments: the tier as of first exposure, and the platform of the first exposure row.
        for (segment, key) in [("tier", 0), ("platform", 1)] {
            let mut values: Vec<Option<String>> = mine
                .iter()
                .map(|u| {
                    if key == 0 {
                        u.tier.clone()
                    } else {
                        Some(u.platform.clone())
                    }
                })
                .collect();
            values.sort();
            values.dedup();
            for v in values {
                let slice: Vec<&Unit> = mine
                    .iter()
                    .copied()
                    .filter(|u| {
                        (if key == 0 {
                            u.tier.clone()
                        } else {
                            Some(u.platform.clone())
                        }) == v
                    })
                    .collect();
                let seg = Some((segment.to_string(), v.clone()));
                let row = table
                    .rows
                    .iter()
                    .find(|r| r.arm == arm && r.segment == seg)
                    .unwrap();
                assert_eq!(row.units, slice.len() as u64, "{arm} {segment}={v:?}");
                let (_, mean, _) = moments(&slice, "spend");
                close(
                    row.columns["spend"].mean,
                    mean,
                    &format!("{arm} {segment}={v:?} spend"),
                );
            }
        }
    }
    assert!(checked > 100, "checked {checked} statistics");
}

#[test]
fn one_scan_per_event_table_with_twenty_metrics() {
    // 20 metrics on 2 tables, plus covariates and two segments.
    let mut metrics = String::new();
    let mut names = Vec::new();
    for i in 0..20 {
        let (table, kind) = if i % 2 == 0 {
            ("purchases", "count")
        } else {
            ("sessions", "count")
        };
        metrics += &format!(
            "  - name: m{i}\n    events: {table}\n    per_unit: {kind}\n    window: [0d, {}d]\n",
            1 + i % 7
        );
        names.push(format!("m{i}"));
    }
    let catalog = format!(
        "units:\n  - name: user\nevent_tables:\n  - name: purchases\n    unit: user\n    table: purchases\n    id: user_id\n    time: at\n  - name: sessions\n    unit: user\n    table: sessions\n    id: user_id\n    time: started_at\nexposure_logs:\n  - name: exposures\n    unit: user\n    table: exposures\n    id: user_id\n    time: at\n    experiment: exp\n    arm: variant\nsegments:\n  - name: platform\n    from_exposure: platform\nmetrics:\n{metrics}experiments:\n  - name: wide\n    exposure_log: exposures\n    logged_as: k\n    control: a\n    split: {{a: 1, b: 1}}\n    start: 2026-04-01\n    end: 2026-04-15\n    covariate_window: 7d\n    segments: [platform]\n    primary: [{}]\n",
        names.join(", ")
    );
    let mut sources = SourceMap::new();
    let (raw, _) = plumb::load::load_catalog_texts(&[("wide.yaml", &catalog)], &mut sources);
    let catalog = plumb::resolve::resolve(&sources, &raw).unwrap();
    let dialect = plumb::render::Dialect::load("duckdb", None).unwrap();
    let (_, sql) = plumb::compile_experiment(&catalog, 0, &[], &dialect).unwrap();
    let engine = LocalEngine::open(None, &[]).unwrap();
    engine
        .execute_batch(
            "CREATE TABLE purchases (user_id VARCHAR, \"at\" TIMESTAMP);
             CREATE TABLE sessions (user_id VARCHAR, started_at TIMESTAMP);
             CREATE TABLE exposures (user_id VARCHAR, exp VARCHAR, variant VARCHAR, \"at\" TIMESTAMP, platform VARCHAR);
             INSERT INTO purchases SELECT 'u' || (i % 100), TIMESTAMP '2026-04-02' + i * INTERVAL 1 MINUTE FROM range(1000) t(i);
             INSERT INTO sessions SELECT 'u' || (i % 100), TIMESTAMP '2026-04-02' + i * INTERVAL 1 MINUTE FROM range(1000) t(i);
             INSERT INTO exposures SELECT 'u' || i, 'k', CASE WHEN i % 2 = 0 THEN 'a' ELSE 'b' END, TIMESTAMP '2026-04-01 12:00', 'web' FROM range(100) t(i);",
        )
        .unwrap();
    let plan = engine.query(&format!("EXPLAIN (FORMAT json) {sql}")).unwrap();
    let text: String = plan
        .iter()
        .filter_map(|r| r.get("explain_value"))
        .filter_map(|c| match c {
            plumb::execute::Cell::Text(t) => Some(t.clone()),
            _ => None,
        })
        .collect();
    let doc: serde_json::Value = serde_json::from_str(&text).unwrap();
    let mut scans: BTreeMap<String, usize> = BTreeMap::new();
    fn walk(v: &serde_json::Value, scans: &mut BTreeMap<String, usize>) {
        match v {
            serde_json::Value::Object(o) => {
                if let Some(t) = o
                    .get("extra_info")
                    .and_then(|e| e.get("Table"))
                    .and_then(|t| t.as_str())
                {
                    *scans
                        .entry(t.rsplit('.').next().unwrap().to_string())
                        .or_default() += 1;
                }
                o.values().for_each(|c| walk(c, scans));
            }
            serde_json::Value::Array(a) => a.iter().for_each(|c| walk(c, scans)),
            _ => {}
        }
    }
    walk(&doc, &mut scans);
    assert_eq!(scans.get("purchases"), Some(&1), "scans: {scans:?}");
    assert_eq!(scans.get("sessions"), Some(&1), "scans: {scans:?}");
}

#[test]
fn timestamps_with_and_without_zone_give_the_same_numbers() {
    // The same instants written in UTC without a zone and with a +02:00 offset.
    let dir = tempfile::tempdir().unwrap();
    let catalog = "units:\n  - name: user\nevent_tables:\n  - name: ev\n    unit: user\n    table: ev\n    id: user_id\n    time: at\nexposure_logs:\n  - name: ex\n    unit: user\n    table: ex\n    id: user_id\n    time: at\n    experiment: exp\n    arm: arm\nmetrics:\n  - name: n\n    events: ev\n    per_unit: count\n    window: [0h, 2h]\nexperiments:\n  - name: e\n    exposure_log: ex\n    logged_as: e\n    control: a\n    split: {a: 1, b: 1}\n    start: 2026-04-01T00:00:00Z\n    end: 2026-04-02T00:00:00Z\n    primary: [n]\n";
    let mut sources = SourceMap::new();
    let (raw, _) = plumb::load::load_catalog_texts(&[("tz.yaml", catalog)], &mut sources);
    let catalog = plumb::resolve::resolve(&sources, &raw).unwrap();
    let dialect = plumb::render::Dialect::load("duckdb", None).unwrap();
    let (plan, sql) = plumb::compile_experiment(&catalog, 0, &[], &dialect).unwrap();
    let run = |suffix: &str, shift: i64| -> StatsTable {
        let t = |secs: i64| {
            let s = ts(secs + shift);
            format!("{s}{suffix}")
        };
        let base = start();
        // u1 exposed at 00:00 (a), events at 00:00 (in), 01:59:59 (in), 02:00 (out: window end);
        // u2 exposed 23:00 (b), event at 00:00 next day (the cut-off: out).
        std::fs::write(
            dir.path().join("ex.csv"),
            format!(
                "user_id,exp,arm,at\nu1,e,a,{}\nu2,e,b,{}\n",
                t(base),
                t(base + 23 * H)
            ),
        )
        .unwrap();
        std::fs::write(
            dir.path().join("ev.csv"),
            format!(
                "user_id,at\nu1,{}\nu1,{}\nu1,{}\nu2,{}\n",
                t(base),
                t(base + 2 * H - 1),
                t(base + 2 * H),
                t(base + D)
            ),
        )
        .unwrap();
        let tables = vec![
            ("ex".to_string(), dir.path().join("ex.csv")),
            ("ev".to_string(), dir.path().join("ev.csv")),
        ];
        let mut engine = LocalEngine::open(None, &tables).unwrap();
        plumb::execute::stats_table(
            &plan,
            &plumb::execute::Engine::readout(&mut engine, &plan, &sql).unwrap(),
        )
        .unwrap()
    };
    let utc = run("", 0);
    let zoned = run("+02:00", 2 * H);
    let summary = |t: &StatsTable| -> Vec<(String, u64, u64, f64)> {
        t.rows
            .iter()
            .map(|r| (r.arm.clone(), r.units, r.columns["n"].n, r.columns["n"].mean))
            .collect()
    };
    assert_eq!(summary(&utc), summary(&zoned));
    let a = utc.rows.iter().find(|r| r.arm == "a").unwrap();
    assert_eq!(
        a.columns["n"].mean, 2.0,
        "events at exposure count, at the window end do not"
    );
    let b = utc.rows.iter().find(|r| r.arm == "b").unwrap();
    assert_eq!(b.columns["n"].mean, 0.0, "an event at the cut-off does not count");
}

#[test]
fn min_max_without_events_stay_null_and_n_shrinks() {
    let (table, _, data) = run_every_kind(60);
    let (units, _) = expected_units(&data);
    let row = table
        .rows
        .iter()
        .find(|r| r.arm == "a" && r.segment.is_none())
        .unwrap();
    let with_value = units
        .iter()
        .filter(|u| u.arm == "a" && u.values["max_amount"].is_some())
        .count();
    assert!(
        with_value < row.units as usize,
        "some units have no purchase amounts"
    );
    assert_eq!(row.columns["max_amount"].n, with_value as u64);
    assert_eq!(row.columns["purchases"].n, row.units, "counts are zero-filled");
}

/// NIST StRD Univariate Summary Statistics through the DuckDB path: per-unit values of a sum
/// metric whose arm-level variance is DuckDB's own `var_samp`, as plumb's SQL computes it.
/// Certified sd: NumAcc3 0.1, NumAcc4 0.1, Lew 277.332168044316 (f64 inputs cap the accuracy
/// of NumAcc3/4 at ~3.5e-10 / 5.6e-9 relative, so 1e-9 / 1e-8 there; shared REFERENCES.md).
#[test]
fn nist_variance_numerics_through_duckdb() {
    for (file, mean, sd, tol) in [
        ("nist_strd_numacc3.csv", 1000000.2, 0.1, 1e-9),
        ("nist_strd_numacc4.csv", 10000000.2, 0.1, 1e-8),
        ("nist_strd_lew.csv", -177.435, 277.332168044316, 1e-12),
    ] {
        let text = std::fs::read_to_string(
            Path::new(env!("CARGO_MANIFEST_DIR"))
                .join("tests/data/reference")
                .join(file),
        )
        .unwrap();
        let values: Vec<&str> = text.lines().skip(1).filter(|l| !l.trim().is_empty()).collect();
        let dir = tempfile::tempdir().unwrap();
        let (mut ex, mut ev) = (String::from("u,exp,arm,at\n"), String::from("u,at,y\n"));
        for (i, v) in values.iter().enumerate() {
            ex += &format!("a{i},e,a,2026-01-01 00:00:00\n");
            ev += &format!("a{i},2026-01-01 01:00:00,{v}\n");
        }
        for i in 0..3 {
            ex += &format!("b{i},e,b,2026-01-01 00:00:00\n");
        }
        std::fs::write(dir.path().join("ex.csv"), ex).unwrap();
        std::fs::write(dir.path().join("ev.csv"), ev).unwrap();
        let catalog = "units:\n  - name: u\nevent_tables:\n  - name: ev\n    unit: u\n    table: ev\n    id: u\n    time: at\nexposure_logs:\n  - name: ex\n    unit: u\n    table: ex\n    id: u\n    time: at\n    experiment: exp\n    arm: arm\nmetrics:\n  - name: y\n    events: ev\n    per_unit: sum\n    of: \"CAST(y AS DOUBLE)\"\nexperiments:\n  - name: e\n    exposure_log: ex\n    control: a\n    split: {a: 1, b: 1}\n    start: 2026-01-01\n    end: 2026-01-02\n    primary: [y]\n";
        let mut sources = SourceMap::new();
        let (raw, _) = plumb::load::load_catalog_texts(&[("nist.yaml", catalog)], &mut sources);
        let catalog = plumb::resolve::resolve(&sources, &raw).unwrap();
        let dialect = plumb::render::Dialect::load("duckdb", None).unwrap();
        let (plan, sql) = plumb::compile_experiment(&catalog, 0, &[], &dialect).unwrap();
        let tables = vec![
            ("ex".to_string(), dir.path().join("ex.csv")),
            ("ev".to_string(), dir.path().join("ev.csv")),
        ];
        let mut engine = LocalEngine::open(None, &tables).unwrap();
        // Both local paths: the readout's (order-independent aggregation in Rust, what
        // `plumb analyze` runs) and the statement's own SQL (DuckDB's var_samp).
        let readout = plumb::execute::Engine::readout(&mut engine, &plan, &sql).unwrap();
        let sql_rows = engine.query(&sql).unwrap();
        for (path, rows) in [("readout", readout), ("sql", sql_rows)] {
            let table = plumb::execute::stats_table(&plan, &rows).unwrap();
            let a = table.rows.iter().find(|r| r.arm == "a").unwrap().columns["y"];
            assert!(
                ((a.mean - mean) / mean).abs() < 1e-14,
                "{file} ({path}) mean {}",
                a.mean
            );
            assert!(
                ((a.sd() - sd) / sd).abs() < tol,
                "{file} ({path}) sd {} vs {sd}",
                a.sd()
            );
        }
    }
}
