//! Structure-aware fuzzing of load → resolve → plan → render.
//!
//! Random text mostly dies in the YAML parser; this harness starts from the demo catalog's
//! structure and replaces chosen keys of chosen items with values from pools of plausible and
//! hostile inputs (fragments with aggregates, multi-byte text, deep nesting, overflowing windows,
//! reserved names, wrong types). Every catalog that resolves is compiled for every experiment on
//! every built-in dialect, with and without a segment. Nothing may panic; whatever compiles has
//! passed plumb's own re-parse of the generated SQL; every diagnostic renders.
//!
//! CI runs a bounded number of cases (`PLUMB_FUZZ_CASES`, default 400); a long run sets it
//! higher, e.g. `PLUMB_FUZZ_CASES=100000 cargo test --release --test fuzz`.

use plumb::load::load_catalog_texts;
use plumb::source::SourceMap;
use proptest::prelude::*;
use serde_yaml::Value;

const FRAGMENTS: &[&str] = &[
    "status = 'paid'",
    "amount_cents",
    "amount_cents / 100",
    "sum(amount_cents)",
    "count(*) over ()",
    "'日本語' = status AND (status = 'paid')",
    "e.amout_cents > 0",
    "((((((((((((((((((((((((((amount_cents))))))))))))))))))))))))))",
    "case when status = 'paid' then amount_cents else 0 end",
    "status = 'pa''id'",
    "amount_cents > 1; drop table orders",
    "(select 1)",
    "amount_cents between 1 and 2",
    "coalesce(amount_cents, 0) * 1.5",
    "null",
    "",
    "1e400",
    "status = 'paid' or status = 'refunded' or status = 'x'",
    "amount_cents is not null",
    "\u{1b}]0;title\u{7}",
    "not is_test",
    "with d as (delete from orders returning *) select * from d",
];

fn scalar(s: &str) -> Value {
    Value::String(s.to_string())
}

fn window(a: &str, b: &str) -> Value {
    Value::Sequence(vec![scalar(a), scalar(b)])
}

/// Values a key may be set to; each key draws from all of them, so wrong types appear too.
fn pool() -> Vec<Value> {
    let mut values: Vec<Value> = FRAGMENTS.iter().map(|f| scalar(f)).collect();
    values.extend([
        window("0d", "7d"),
        window("7d", "0d"),
        window("0d", "144115188075855879d"),
        window("-3d", "2h"),
        window("0d", "7д"),
        Value::Sequence(vec![]),
        scalar("14d"),
        scalar("99999999999999999999d"),
        scalar("count"),
        scalar("sum"),
        scalar("mean"),
        scalar("any"),
        scalar("distinct"),
        scalar("increase"),
        scalar("decrease"),
        scalar("orders"),
        scalar("orders__pre"),
        scalar("revenue"),
        scalar("日本"),
        scalar("a b"),
        scalar("control"),
        scalar("treatment"),
        scalar("2026-03-02T00:00:00Z"),
        scalar("2026-03-1é"),
        Value::Number(1.into()),
        Value::Number((-5).into()),
        Value::Number(serde_yaml::Number::from(1.10)),
        Value::Bool(true),
        Value::Null,
        Value::Sequence(vec![scalar("orders"), scalar("bought")]),
        Value::Sequence(vec![scalar("refunds"), scalar("nope")]),
        serde_yaml::from_str("{control: 50, treatment: 50}").unwrap(),
        serde_yaml::from_str("{control: 1e308, treatment: 1e308}").unwrap(),
        serde_yaml::from_str("{\"1.0\": 50, \"2.0\": 50}").unwrap(),
        serde_yaml::from_str("{cap: -1}").unwrap(),
        serde_yaml::from_str("{quantile: 0.99}").unwrap(),
    ]);
    values
}

const KEYS: &[&str] = &[
    "name",
    "where",
    "of",
    "value",
    "window",
    "per_unit",
    "events",
    "winsorize",
    "direction",
    "numerator",
    "denominator",
    "primary",
    "secondary",
    "guardrails",
    "split",
    "control",
    "covariate_window",
    "start",
    "end",
    "segments",
    "unit",
    "table",
    "sql",
    "time",
    "id",
];

/// One change: in section `section` (by position among the top-level keys), item `item`
/// (modulo the section's length), set `KEYS[key]` to `pool[value]`, or remove it.
#[derive(Debug, Clone)]
struct Change {
    section: usize,
    item: usize,
    key: usize,
    value: usize,
    remove: bool,
}

fn change() -> impl Strategy<Value = Change> {
    (
        0usize..8,
        0usize..16,
        0..KEYS.len(),
        0usize..200,
        prop::bool::weighted(0.15),
    )
        .prop_map(|(section, item, key, value, remove)| Change {
            section,
            item,
            key,
            value,
            remove,
        })
}

fn mutate(base: &Value, changes: &[Change], pool: &[Value]) -> String {
    let mut doc = base.clone();
    if let Value::Mapping(top) = &mut doc {
        let sections: Vec<Value> = top.keys().cloned().collect();
        for c in changes {
            let section = &sections[c.section % sections.len()];
            let Some(Value::Sequence(items)) = top.get_mut(section) else {
                continue;
            };
            if items.is_empty() {
                continue;
            }
            let n = items.len();
            if let Value::Mapping(item) = &mut items[c.item % n] {
                let key = scalar(KEYS[c.key]);
                if c.remove {
                    item.remove(&key);
                } else {
                    item.insert(key, pool[c.value % pool.len()].clone());
                }
            }
        }
    }
    serde_yaml::to_string(&doc).unwrap()
}

/// The whole pipeline on one catalog text; panics are the failures proptest reports.
fn pipeline(text: &str, dialects: &[plumb::render::Dialect]) {
    let mut sources = SourceMap::new();
    let (raw, mut diags) = load_catalog_texts(&[("fuzz.yaml", text)], &mut sources);
    match plumb::resolve::resolve(&sources, &raw) {
        Err(more) => {
            stat("rejected");
            diags.extend(more)
        }
        Ok(catalog) => {
            stat("resolved");
            for dialect in dialects {
                for experiment in 0..catalog.experiments.len() {
                    let _ = plumb::compile_experiment(&catalog, experiment, &[], dialect);
                    if !catalog.segments.is_empty() {
                        let _ = plumb::compile_experiment(&catalog, experiment, &[0], dialect);
                    }
                }
            }
        }
    }
    let _ = plumb::diagnostics::render_plain(&sources, &diags);
}

/// With `PLUMB_FUZZ_STATS=1`, one word per case on stderr, to count how many cases reach the
/// compiler (`--nocapture | sort | uniq -c`).
fn stat(word: &str) {
    if std::env::var_os("PLUMB_FUZZ_STATS").is_some() {
        eprintln!("fuzz: {word}");
    }
}

fn cases() -> u32 {
    std::env::var("PLUMB_FUZZ_CASES")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(400)
}

#[test]
fn the_demo_catalog_compiles_on_every_dialect() {
    // The harness's starting point must itself get through the whole pipeline, or the fuzz
    // cases would only exercise error paths.
    let dialects: Vec<_> = plumb::render::builtin_dialects()
        .into_iter()
        .map(|d| plumb::render::Dialect::load(d, None).unwrap())
        .collect();
    let mut sources = SourceMap::new();
    let (raw, diags) = load_catalog_texts(&[("demo.yaml", plumb::demo::CATALOG[0].1)], &mut sources);
    assert!(
        diags
            .iter()
            .all(|d| d.severity != plumb::diagnostics::Severity::Error)
    );
    let catalog = plumb::resolve::resolve(&sources, &raw).unwrap();
    for dialect in &dialects {
        for experiment in 0..catalog.experiments.len() {
            let (_, sql) = plumb::compile_experiment(&catalog, experiment, &[0], dialect).unwrap();
            assert!(sql.contains("select") || sql.contains("SELECT"));
        }
    }
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(cases()))]
    #[test]
    fn mutated_catalogs_never_panic(changes in prop::collection::vec(change(), 1..6)) {
        thread_local! {
            static SETUP: (Value, Vec<Value>, Vec<plumb::render::Dialect>) = (
                serde_yaml::from_str(plumb::demo::CATALOG[0].1).unwrap(),
                pool(),
                plumb::render::builtin_dialects()
                    .into_iter()
                    .map(|d| plumb::render::Dialect::load(d, None).unwrap())
                    .collect(),
            );
        }
        SETUP.with(|(base, pool, dialects)| {
            let text = mutate(base, &changes, pool);
            pipeline(&text, dialects);
        });
    }
}
