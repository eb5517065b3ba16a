//! Compile speed: a generated catalog of 1,000 metrics (with covariates) on 4 event tables,
//! compiled to SQL (plan + render) for every built-in dialect, and the sqlparser re-parse that
//! validates the result, measured separately.
//! Run: `cargo bench --bench compile` (release profile, same DuckDB build as everything else).

use criterion::{Criterion, criterion_group, criterion_main};
use plumb::load::load_catalog_texts;
use plumb::render::{Dialect, builtin_dialects};
use plumb::source::SourceMap;

fn catalog(metrics: usize) -> String {
    let mut s = String::from("units:\n  - name: user\nevent_tables:\n");
    for t in 0..4 {
        s += &format!("  - name: t{t}\n    unit: user\n    table: t{t}\n    id: user_id\n    time: at\n");
    }
    s += "exposure_logs:\n  - name: x\n    unit: user\n    table: x\n    id: user_id\n    time: at\n    experiment: exp\n    arm: arm\nmetrics:\n";
    let kinds = ["count", "sum", "any", "distinct", "max"];
    let mut names = Vec::new();
    for i in 0..metrics {
        let kind = kinds[i % kinds.len()];
        let of = if matches!(kind, "sum" | "distinct" | "max") {
            "    of: amount * 2\n"
        } else {
            ""
        };
        s += &format!(
            "  - name: m{i}\n    events: t{}\n    per_unit: {kind}\n{of}    where: \"kind = 'k{}' and amount > {}\"\n    window: [0d, {}d]\n",
            i % 4,
            i % 7,
            i % 13,
            1 + i % 28
        );
        names.push(format!("m{i}"));
    }
    s += &format!(
        "experiments:\n  - name: big\n    exposures: x\n    control: a\n    split: {{a: 1, b: 1}}\n    start: 2026-01-01\n    end: 2026-02-01\n    covariate_window: 14d\n    primary: [{}]\n",
        names.join(", ")
    );
    s
}

fn bench(c: &mut Criterion) {
    let text = catalog(1000);
    let mut sources = SourceMap::new();
    let (raw, _) = load_catalog_texts(&[("big.yaml", &text)], &mut sources);
    let ir = plumb::resolve::resolve(&sources, &raw).expect("valid catalog");
    // Compile = plan + render: what `plumb sql` needs to produce the statement.
    let mut group = c.benchmark_group("compile_1000_metrics");
    group.sample_size(20);
    for name in builtin_dialects() {
        let dialect = Dialect::load(name, None).unwrap();
        group.bench_function(name, |b| {
            b.iter(|| {
                let plan = plumb::plan::plan_experiment(&ir, 0, &[]);
                dialect.render_experiment(&plan).unwrap()
            })
        });
    }
    group.finish();
    // The safety re-parse of the statement (about 0.8 MB of SQL here) with sqlparser.
    let mut group = c.benchmark_group("validate_1000_metrics");
    group.sample_size(10);
    for name in builtin_dialects() {
        let dialect = Dialect::load(name, None).unwrap();
        let sql = dialect
            .render_experiment(&plumb::plan::plan_experiment(&ir, 0, &[]))
            .unwrap();
        group.bench_function(name, |b| {
            b.iter(|| plumb::validate::validate(&sql, &dialect.caps.sqlparser).unwrap())
        });
    }
    group.finish();
    c.bench_function("load_and_resolve_1000_metrics", |b| {
        b.iter(|| {
            let mut sources = SourceMap::new();
            let (raw, _) = load_catalog_texts(&[("big.yaml", &text)], &mut sources);
            plumb::resolve::resolve(&sources, &raw).unwrap()
        })
    });
}

criterion_group!(benches, bench);
criterion_main!(benches);
