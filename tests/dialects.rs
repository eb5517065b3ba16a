//! Every built-in dialect's SQL for every test catalog: re-parsed with the matching sqlparser
//! dialect, and snapshotted. The generic dialect is stored in full; the others as a unified
//! diff against it, so a review shows exactly what a dialect changes.

use plumb::load::load_catalog_texts;
use plumb::render::{Dialect, builtin_dialects};
use plumb::source::SourceMap;
use std::path::Path;

/// The test catalogs, each as a list of files.
fn catalogs() -> Vec<(&'static str, Vec<(String, String)>)> {
    let fixtures = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures");
    let read = |f: &str| std::fs::read_to_string(fixtures.join(f)).unwrap();
    vec![
        (
            "demo",
            vec![("plant_shop.yaml".into(), plumb::demo::CATALOG[0].1.to_string())],
        ),
        ("handmade", vec![("handmade.yaml".into(), read("handmade.yaml"))]),
        (
            "every_kind",
            vec![("every_kind.yaml".into(), read("every_kind.yaml"))],
        ),
    ]
}

fn compile_all(files: &[(String, String)]) -> Vec<(String, String, String)> {
    let mut sources = SourceMap::new();
    let refs: Vec<(&str, &str)> = files.iter().map(|(p, t)| (p.as_str(), t.as_str())).collect();
    let (raw, diags) = load_catalog_texts(&refs, &mut sources);
    assert!(
        diags.is_empty(),
        "{}",
        plumb::diagnostics::render_plain(&sources, &diags)
    );
    let catalog = plumb::resolve::resolve(&sources, &raw)
        .unwrap_or_else(|d| panic!("{}", plumb::diagnostics::render_plain(&sources, &d)));
    let mut out = Vec::new();
    for name in std::iter::once("generic").chain(builtin_dialects()) {
        let dialect = Dialect::load(name, None).unwrap();
        for (id, exp) in catalog.experiments.iter().enumerate() {
            // compile_experiment re-parses with the dialect's sqlparser dialect.
            let (_, sql) = plumb::compile_experiment(&catalog, id, &[], &dialect)
                .unwrap_or_else(|e| panic!("{name} / {}: {e}", exp.name));
            out.push((name.to_string(), exp.name.clone(), sql));
        }
    }
    out
}

#[test]
fn every_dialect_parses_and_is_snapshotted_as_a_diff_against_generic() {
    for (catalog, files) in catalogs() {
        let all = compile_all(&files);
        for (dialect, experiment, sql) in &all {
            plumb::validate::validate(sql, &Dialect::load(dialect, None).unwrap().caps.sqlparser).unwrap();
            if dialect == "generic" {
                insta::assert_snapshot!(format!("{catalog}__{experiment}__generic"), sql);
            } else {
                let generic = &all
                    .iter()
                    .find(|(d, e, _)| d == "generic" && e == experiment)
                    .unwrap()
                    .2;
                let diff = similar::TextDiff::from_lines(generic.as_str(), sql.as_str())
                    .unified_diff()
                    .context_radius(1)
                    .header("generic", dialect)
                    .to_string();
                insta::assert_snapshot!(format!("{catalog}__{experiment}__{dialect}"), diff);
            }
        }
    }
}

/// Percentile caps are exact and portable on every dialect: no ordered-set or approximate
/// quantile aggregate (Redshift rejects two `PERCENTILE_CONT ... WITHIN GROUP` with different
/// orderings in one SELECT; `APPROX_QUANTILES` / `approx_percentile` are approximate), only
/// the window-function cap, which the engine tests compare with DuckDB's `quantile_cont`.
#[test]
fn caps_use_no_quantile_aggregate_on_any_dialect() {
    for (catalog, files) in catalogs() {
        for (dialect, experiment, sql) in compile_all(&files) {
            let lower = sql.to_ascii_lowercase();
            for banned in ["percentile", "quantile", "approx", "within group"] {
                assert!(
                    !lower.contains(banned),
                    "{catalog} {experiment} {dialect}: `{banned}` in\n{sql}"
                );
            }
            if lower.contains("winsorize") || sql.contains("__cap_rank") {
                assert!(sql.contains("row_number() OVER"), "{dialect}: exact cap missing");
            }
        }
    }
}

#[test]
fn compilation_is_deterministic() {
    for (_, files) in catalogs() {
        assert_eq!(compile_all(&files), compile_all(&files));
    }
}

/// The SQL of the first experiment of a one-file catalog, in every dialect.
fn first_experiment_in_every_dialect(catalog: &str) -> Vec<(String, Dialect, String)> {
    let mut sources = SourceMap::new();
    let (raw, diags) = load_catalog_texts(&[("hostile.yaml", catalog)], &mut sources);
    assert!(
        diags.is_empty(),
        "{}",
        plumb::diagnostics::render_plain(&sources, &diags)
    );
    let catalog = plumb::resolve::resolve(&sources, &raw).unwrap();
    std::iter::once("generic")
        .chain(builtin_dialects())
        .map(|name| {
            let dialect = Dialect::load(name, None).unwrap();
            let (_, sql) = plumb::compile_experiment(&catalog, 0, &[], &dialect).unwrap();
            (name.to_string(), dialect, sql)
        })
        .collect()
}

#[test]
fn hostile_names_and_values_cannot_change_the_statement() {
    // Table, column, arm and experiment names with quotes, semicolons and comment markers.
    let catalog = r#"
units:
  - name: user
event_tables:
  - name: events
    unit: user
    table: "ev\"; DROP TABLE users; --"
    id: "id`); DROP TABLE x; --"
    time: "t' OR '1'='1"
exposure_logs:
  - name: exposures
    unit: user
    table: "exp'; DELETE FROM y; /*"
    id: "id\"--"
    time: "at"
    experiment: "experiment\\"
    arm: "arm'"
metrics:
  - name: events
    events: events
    per_unit: count
experiments:
  - name: hostile
    exposure_log: exposures
    logged_as: "x'; DROP TABLE z; --"
    control: "c'--"
    split: {"c'--": 1, "t\"; --": 1}
    start: 2026-01-01
    end: 2026-01-02
    primary: [events]
"#;
    for (name, dialect, sql) in first_experiment_in_every_dialect(catalog) {
        let name = name.as_str();
        // Still exactly one statement (validate checks the count) ...
        plumb::validate::validate(&sql, &dialect.caps.sqlparser).unwrap();
        // ... and the payloads only appear inside quoted identifiers or literals.
        let dialect_ast = sqlparser::dialect::dialect_from_str(&dialect.caps.sqlparser).unwrap();
        let statements = sqlparser::parser::Parser::parse_sql(dialect_ast.as_ref(), &sql).unwrap();
        assert_eq!(statements.len(), 1, "{name}");
        assert!(
            matches!(statements[0], sqlparser::ast::Statement::Query(_)),
            "{name}: not a query"
        );
    }
}

/// Literals and quoted names inside user fragments are re-emitted with each engine's own
/// escaping: on engines that read backslash escapes (BigQuery, Snowflake, Redshift, Spark),
/// `'x\'` printed as written would swallow the rest of the condition and let
/// `OR 4242 = 4242 --` become SQL. Read with each engine's tokenizer, the payload must stay
/// inside literals and the values must be the ones the user wrote.
#[test]
fn hostile_fragments_stay_literals_on_every_dialect() {
    use sqlparser::tokenizer::{Token, Tokenizer};
    let catalog = r#"
units:
  - name: user
event_tables:
  - name: events
    unit: user
    table: "ev\\"
    id: id
    time: t
exposure_logs:
  - name: exposures
    unit: user
    table: exposures
    id: id
    time: t
    experiment: experiment
    arm: arm
metrics:
  - name: hits
    events: events
    per_unit: count
    where: |-
      status = 'x\' OR status = ' OR 4242 = 4242 --' OR "c\" = 'it''s' OR page = E'a\'b'
experiments:
  - name: hostile
    exposure_log: exposures
    logged_as: 'k\'
    control: c
    split: {c: 1, t: 1}
    start: 2026-01-01
    end: 2026-01-02
    primary: [hits]
"#;
    for (name, _, sql) in first_experiment_in_every_dialect(catalog) {
        let name = name.as_str();
        // How the engine itself reads the text (sqlparser's tokenizer for that engine).
        let reading = match name {
            "postgres" => "postgresql",
            "spark" => "databricks",
            "trino" => "generic",
            other => other,
        };
        let reading = sqlparser::dialect::dialect_from_str(reading).unwrap();
        let tokens = Tokenizer::new(reading.as_ref(), &sql).tokenize().unwrap();
        let literals: Vec<&str> = tokens
            .iter()
            .filter_map(|t| match t {
                Token::SingleQuotedString(s) => Some(s.as_str()),
                _ => None,
            })
            .collect();
        for expected in [r"x\", " OR 4242 = 4242 --", "it's", "a'b", r"k\"] {
            assert!(
                literals.contains(&expected),
                "{name}: `{expected}` is not one literal; literals: {literals:?}"
            );
        }
        assert!(
            !tokens
                .iter()
                .any(|t| matches!(t, Token::Number(n, _) if n == "4242")),
            "{name}: the payload became SQL:\n{sql}"
        );
        let quoted: Vec<&str> = tokens
            .iter()
            .filter_map(|t| match t {
                Token::Word(w) if w.quote_style.is_some() => Some(w.value.as_str()),
                _ => None,
            })
            .collect();
        // sqlparser's BigQuery tokenizer does not unescape quoted names; BigQuery does
        // (its lexical reference: quoted identifiers take the escapes of string literals).
        let names = if name == "bigquery" {
            [r"c\\", r"ev\\"]
        } else {
            [r"c\", r"ev\"]
        };
        for expected in names {
            assert!(
                quoted.contains(&expected),
                "{name}: quoted name `{expected}` not read back; quoted names: {quoted:?}"
            );
        }
    }
}

#[test]
fn report_queries_parse_in_every_dialect() {
    let files = [(
        "plant_shop.yaml".to_string(),
        plumb::demo::CATALOG[0].1.to_string(),
    )];
    let mut sources = SourceMap::new();
    let refs: Vec<(&str, &str)> = files.iter().map(|(p, t)| (p.as_str(), t.as_str())).collect();
    let (raw, _) = load_catalog_texts(&refs, &mut sources);
    let catalog = plumb::resolve::resolve(&sources, &raw).unwrap();
    let metrics: Vec<usize> = ["orders", "avg_basket", "engaged"]
        .iter()
        .map(|m| catalog.metric(m).unwrap())
        .collect();
    let from = plumb::time::Timestamp::parse("2026-03-01").unwrap();
    let to = plumb::time::Timestamp::parse("2026-04-01").unwrap();
    let region = catalog.segments.iter().position(|s| s.name == "region").unwrap();
    let device = catalog.segments.iter().position(|s| s.name == "device").unwrap();
    let exp = catalog.experiment("one_page_checkout").unwrap();
    for name in std::iter::once("generic").chain(builtin_dialects()) {
        let dialect = Dialect::load(name, None).unwrap();
        for grain in [plumb::time::Grain::Day, plumb::time::Grain::Week] {
            for (segment, exposed) in [(None, None), (Some(region), None), (Some(device), Some(exp))] {
                let plan = plumb::plan::plan_report(&catalog, &metrics, grain, from, to, segment, exposed);
                let sql = plumb::compile_report(&plan, &dialect).unwrap_or_else(|e| panic!("{name}: {e}"));
                if name == "generic" && segment.is_none() && grain == plumb::time::Grain::Day {
                    insta::assert_snapshot!("report__demo__generic", sql);
                }
            }
        }
    }
}

/// The fingerprint is a contract with warehouse exports (`analyze --stats`): it must change
/// only on purpose. Its canonical text is snapshotted so a review shows what is hashed, and
/// the demo's fingerprints are pinned here; bump `plan::STATS_LAYOUT` or note the change in
/// README when they must move. (Changed deliberately when the canonical text replaced the
/// `Debug` form of internal structs, and again with layout 2, which added the third moments;
/// layout 1's fingerprints stay pinned because exported layout-1 tables are still read.)
#[test]
fn demo_fingerprints_are_pinned() {
    let mut sources = SourceMap::new();
    let (raw, _) = load_catalog_texts(&[("plant_shop.yaml", plumb::demo::CATALOG[0].1)], &mut sources);
    let catalog = plumb::resolve::resolve(&sources, &raw).unwrap();
    let fp = |name: &str, by: &[usize]| {
        let plan = plumb::plan::plan_experiment(&catalog, catalog.experiment(name).unwrap(), by);
        (
            plumb::plan::fingerprint(&plan),
            plumb::plan::canonical_text(&plan),
        )
    };
    let (main, text) = fp("one_page_checkout", &[]);
    assert_eq!(main, "fp754eab9605637bb1");
    assert_eq!(fp("care_guide_banner", &[]).0, "fp5b5f8d17001c5162");
    let plan = plumb::plan::plan_experiment(&catalog, catalog.experiment("one_page_checkout").unwrap(), &[]);
    assert_eq!(plumb::plan::fingerprint_at(&plan, 1), "fpcea2e07cadc61970");
    // Extra segments change what is computed, so they change the fingerprint.
    assert_ne!(fp("care_guide_banner", &[0]).0, fp("care_guide_banner", &[]).0);
    insta::assert_snapshot!("demo_one_page_checkout_canonical_text", text);
}

/// The population-totals query (whole-population impact) in every dialect: re-parsed by
/// `compile_totals`, generic snapshotted.
#[test]
fn population_totals_compile_in_every_dialect() {
    let mut sources = SourceMap::new();
    let (raw, _) = load_catalog_texts(&[("plant_shop.yaml", plumb::demo::CATALOG[0].1)], &mut sources);
    let catalog = plumb::resolve::resolve(&sources, &raw).unwrap();
    let exp = &catalog.experiments[0];
    let metrics: Vec<usize> = exp.metrics.iter().map(|(m, _)| *m).collect();
    let plan = plumb::plan::plan_totals(&catalog, &metrics, exp.start, exp.end);
    // count and sum metrics only: orders, revenue, page_views, refunds.
    let names: Vec<&str> = plan.metrics.iter().map(|m| m.0.as_str()).collect();
    assert_eq!(names, ["orders", "revenue", "page_views", "refunds"]);
    for name in std::iter::once("generic").chain(builtin_dialects()) {
        let dialect = Dialect::load(name, None).unwrap();
        let sql = plumb::compile_totals(&plan, &dialect).unwrap_or_else(|e| panic!("{name}: {e}"));
        if name == "generic" {
            insta::assert_snapshot!("demo_totals_generic", sql);
        }
    }
}
