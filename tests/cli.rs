//! Command-line tests: the `plumb` binary run in a temporary workspace per test.
//! Rendered diagnostics and SQL are snapshotted (`cargo insta review` to update).

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

fn fixtures() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures")
}

/// A temporary workspace holding `base.yaml` plus the given catalog files.
fn workspace(files: &[(&str, &str)]) -> tempfile::TempDir {
    let dir = tempfile::tempdir().unwrap();
    std::fs::create_dir_all(dir.path().join("metrics")).unwrap();
    std::fs::write(
        dir.path().join("plumb.yaml"),
        "catalog: metrics\ndialect: duckdb\n",
    )
    .unwrap();
    std::fs::copy(fixtures().join("base.yaml"), dir.path().join("metrics/base.yaml")).unwrap();
    for (name, text) in files {
        std::fs::write(dir.path().join("metrics").join(name), text).unwrap();
    }
    dir
}

fn plumb(dir: &Path, args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_plumb"))
        .current_dir(dir)
        .args(["--workspace", "."])
        .args(args)
        .output()
        .unwrap()
}

fn text(bytes: &[u8]) -> String {
    String::from_utf8_lossy(bytes).into_owned()
}

/// The demo workspace with `shoppers` shoppers, in a temporary folder.
fn small_demo(seed: u64, shoppers: usize) -> tempfile::TempDir {
    let dir = tempfile::tempdir().unwrap();
    plumb::demo::write_demo(dir.path(), &plumb::demo::DemoConfig { seed, shoppers }).unwrap();
    dir
}

#[test]
fn check_errors_are_located_and_snapshotted() {
    insta::glob!("fixtures/err_*.yaml", |path| {
        let name = path.file_name().unwrap().to_str().unwrap();
        let body = std::fs::read_to_string(path).unwrap();
        let ws = workspace(&[(name, &body)]);
        let out = plumb(ws.path(), &["check"]);
        assert_eq!(out.status.code(), Some(1), "catalog errors exit with 1");
        assert!(out.stdout.is_empty(), "diagnostics go to stderr");
        let stderr = text(&out.stderr);
        assert!(
            stderr.contains(&format!("metrics/{name}:")),
            "file:line:col shown:\n{stderr}"
        );
        insta::assert_snapshot!(stderr);
    });
}

#[test]
fn check_reports_every_error_at_once_with_hints() {
    let body = std::fs::read_to_string(fixtures().join("err_duplicates_and_values.yaml")).unwrap();
    let ws = workspace(&[("bad.yaml", &body)]);
    let stderr = text(&plumb(ws.path(), &["check"]).stderr);
    for expected in [
        "duplicate metric name `orders`",
        "not snake_case",
        "unknown per_unit `cnt`",
        "bad window bound",
        "the window ends before it starts",
        "needs `of`",
        "invalid SQL in `where`",
        "control arm `ctrl` is not in `split`",
        "the experiment ends before it starts",
    ] {
        assert!(stderr.contains(expected), "missing `{expected}` in:\n{stderr}");
    }
    assert!(
        stderr.contains("metrics/bad.yaml:5:11"),
        "duplicate located at line 5:\n{stderr}"
    );
}

#[test]
fn check_json_lists_diagnostics_with_positions() {
    let body = std::fs::read_to_string(fixtures().join("err_unknown_keys.yaml")).unwrap();
    let ws = workspace(&[("bad.yaml", &body)]);
    let out = plumb(ws.path(), &["check", "--format", "json"]);
    assert_eq!(out.status.code(), Some(1));
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(v["ok"], false);
    let first = &v["diagnostics"][0];
    assert_eq!(first["code"], "E003");
    assert_eq!(first["line"], 4);
    assert_eq!(first["column"], 5);
    assert_eq!(first["hints"][0], "did you mean `per_unit`?");
}

#[test]
fn check_ok_prints_one_line_summary() {
    let body = std::fs::read_to_string(fixtures().join("ok_minimal.yaml")).unwrap();
    let ws = workspace(&[("ok.yaml", &body)]);
    let out = plumb(ws.path(), &["check"]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    insta::assert_snapshot!(text(&out.stdout), @"ok: 2 files, 2 units, 2 event tables, 1 exposure logs, 0 segments, 3 metrics, 1 experiments (dialect duckdb, 7 warnings)\n");
}

#[test]
fn usage_errors_exit_with_2() {
    let empty = tempfile::tempdir().unwrap();
    let out = plumb(empty.path(), &["check"]);
    assert_eq!(out.status.code(), Some(2));
    assert!(text(&out.stderr).contains("no plumb.yaml"));

    let body = std::fs::read_to_string(fixtures().join("ok_minimal.yaml")).unwrap();
    let ws = workspace(&[("ok.yaml", &body)]);
    let out = plumb(ws.path(), &["sql", "chekout"]);
    assert_eq!(out.status.code(), Some(2));
    assert!(
        text(&out.stderr).contains("did you mean `checkout`?"),
        "{}",
        text(&out.stderr)
    );

    let out = plumb(ws.path(), &["sql", "checkout", "--dialect", "nosuch"]);
    assert_eq!(out.status.code(), Some(2));
    let out = plumb(ws.path(), &["analyze", "checkout", "--alpha", "2"]);
    assert_eq!(out.status.code(), Some(2));
    let out = plumb(ws.path(), &["frobnicate"]);
    assert_eq!(out.status.code(), Some(2));
}

#[test]
fn sql_of_the_demo_catalog_is_stable_and_parses_as_duckdb() {
    let dir = tempfile::tempdir().unwrap();
    std::fs::create_dir_all(dir.path().join("metrics")).unwrap();
    std::fs::write(dir.path().join("plumb.yaml"), "catalog: metrics\n").unwrap();
    for (name, text) in plumb::demo::CATALOG {
        std::fs::write(dir.path().join("metrics").join(name), text).unwrap();
    }
    let out = plumb(dir.path(), &["sql", "one_page_checkout"]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let sql = text(&out.stdout);
    plumb::validate::validate(&sql, "duckdb").unwrap();
    // Deterministic: a second run gives byte-identical SQL.
    assert_eq!(
        text(&plumb(dir.path(), &["sql", "one_page_checkout"]).stdout),
        sql
    );
    insta::assert_snapshot!("demo_one_page_checkout_duckdb", sql);
    let generic = text(&plumb(dir.path(), &["sql", "one_page_checkout", "--dialect", "generic"]).stdout);
    plumb::validate::validate(&generic, "generic").unwrap();
    insta::assert_snapshot!("demo_one_page_checkout_generic", generic);
}

#[test]
fn user_dialect_folder_overrides_without_recompiling() {
    let body = std::fs::read_to_string(fixtures().join("ok_minimal.yaml")).unwrap();
    let ws = workspace(&[("ok.yaml", &body)]);
    let dialects = ws.path().join("my-dialects/shouty");
    std::fs::create_dir_all(&dialects).unwrap();
    std::fs::write(
        dialects.join("dialect.yaml"),
        "float_type: FLOAT8\nfilter_clause: true\n",
    )
    .unwrap();
    let out = plumb(
        ws.path(),
        &[
            "--dialects-dir",
            "my-dialects",
            "sql",
            "checkout",
            "--dialect",
            "shouty",
        ],
    );
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let sql = text(&out.stdout);
    assert!(sql.contains("AS FLOAT8)"), "{sql}");
    assert!(sql.contains("FILTER (WHERE"), "{sql}");
}

#[test]
fn lint_warnings_are_reported_configurable_and_deniable() {
    let body = std::fs::read_to_string(fixtures().join("ok_minimal.yaml")).unwrap();
    let ws = workspace(&[("ok.yaml", &body)]);
    let out = plumb(ws.path(), &["check"]);
    assert_eq!(out.status.code(), Some(0));
    let stderr = text(&out.stderr);
    for code in ["Q101", "Q102", "Q301"] {
        assert!(
            stderr.contains(&format!("warning[{code}]")),
            "{code} missing:\n{stderr}"
        );
    }
    assert!(
        stderr.contains("no experiment uses metric `deliveries`"),
        "{stderr}"
    );
    assert!(text(&out.stdout).contains(" warnings)"));
    // --deny warnings fails the check for CI.
    assert_eq!(
        plumb(ws.path(), &["check", "--deny", "warnings"]).status.code(),
        Some(1)
    );
    // Severities from plumb.yaml: switch rules off (by code or name) or make them errors.
    std::fs::write(
        ws.path().join("plumb.yaml"),
        "catalog: metrics\nlint:\n  Q101: off\n  metric-without-owner: off\n  unused-metric: off\n",
    )
    .unwrap();
    let out = plumb(ws.path(), &["check", "--deny", "warnings"]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    std::fs::write(
        ws.path().join("plumb.yaml"),
        "catalog: metrics\nlint:\n  Q301: error\n",
    )
    .unwrap();
    let out = plumb(ws.path(), &["check", "--format", "json"]);
    assert_eq!(out.status.code(), Some(1));
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    let errors: Vec<&serde_json::Value> = v["diagnostics"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|d| d["severity"] == "error")
        .collect();
    assert_eq!(errors.len(), 1);
    assert_eq!(errors[0]["code"], "Q301");
    // The old code still works, with a warning naming the new one.
    std::fs::write(
        ws.path().join("plumb.yaml"),
        "catalog: metrics\nlint:\n  L004: error\n",
    )
    .unwrap();
    let out = plumb(ws.path(), &["check", "--format", "json"]);
    assert_eq!(out.status.code(), Some(1));
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    let shown = serde_json::to_string(&v).unwrap();
    assert!(
        shown.contains("lint code `L004` is now `Q301` (unused-metric)"),
        "{shown}"
    );
    std::fs::write(
        ws.path().join("plumb.yaml"),
        "catalog: metrics\nlint:\n  L999: off\n",
    )
    .unwrap();
    assert_eq!(
        plumb(ws.path(), &["check"]).status.code(),
        Some(1),
        "unknown rules are errors"
    );
}

#[test]
fn division_by_a_whole_number_is_linted_with_the_fix() {
    let body = std::fs::read_to_string(fixtures().join("ok_minimal.yaml")).unwrap();
    let body = body.replacen(
        "per_unit: count\n    where: \"status = 'paid'\"",
        "per_unit: sum\n    of: amount_cents / 100\n    where: \"amount_cents / 100 > 5 and amount_cents / 100.0 < 9\"",
        1,
    );
    let ws = workspace(&[("ok.yaml", &body)]);
    let out = plumb(ws.path(), &["check", "--format", "json"]);
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    let l009: Vec<&serde_json::Value> = v["diagnostics"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|d| d["code"] == "Q105")
        .collect();
    // Once in `of`, once in `where`; `/ 100.0` is a decimal division and not flagged.
    assert_eq!(l009.len(), 2, "{}", text(&out.stdout));
    let all = serde_json::to_string(&l009).unwrap();
    assert!(
        all.contains("amount_cents / 100.0"),
        "the fix-it is offered: {all}"
    );
}

#[test]
fn the_demo_catalog_is_lint_clean() {
    let dir = tempfile::tempdir().unwrap();
    std::fs::create_dir_all(dir.path().join("metrics")).unwrap();
    // The demo's own workspace file (its data files need not exist for `check`).
    std::fs::write(dir.path().join("plumb.yaml"), plumb::demo::WORKSPACE_FILE).unwrap();
    for (name, text) in plumb::demo::CATALOG {
        std::fs::write(dir.path().join("metrics").join(name), text).unwrap();
    }
    let out = plumb(dir.path(), &["check", "--deny", "warnings"]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
}

#[test]
fn schema_lists_exactly_the_keys_the_loader_accepts() {
    let empty = tempfile::tempdir().unwrap();
    let out = Command::new(env!("CARGO_BIN_EXE_plumb"))
        .current_dir(empty.path())
        .arg("schema")
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(0));
    let schema: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    let defs = &schema["$defs"];
    let item_type = |kind: &str| -> String {
        let items = &schema["properties"][kind]["items"];
        let r = items
            .get("$ref")
            .or_else(|| items["anyOf"].get(0).and_then(|a| a.get("$ref")))
            .unwrap_or_else(|| panic!("{kind}: {items}"));
        r.as_str().unwrap().rsplit('/').next().unwrap().to_string()
    };
    for (kind, keys) in plumb::load::syntax::KINDS {
        let def = &defs[item_type(kind)];
        let mut props: Vec<&str> = def["properties"]
            .as_object()
            .unwrap()
            .keys()
            .map(String::as_str)
            .collect();
        let mut want: Vec<&str> = keys.to_vec();
        props.sort();
        want.sort();
        assert_eq!(props, want, "schema of `{kind}` items");
        assert_eq!(
            def["additionalProperties"], false,
            "{kind}: unknown keys are rejected"
        );
    }
}

/// A dialect without GROUPING SETS cannot compute an experiment's declared segments: that is
/// a located catalog error (exit 1) naming the experiment's `segments:`, not an internal one.
#[test]
fn segments_on_a_dialect_without_grouping_sets_is_a_located_error() {
    let body = "segments:\n  - name: device\n    from_exposure: device\n\nexperiments:\n  - name: sliced\n    exposure_log: assignments\n    control: a\n    split: {a: 1, b: 1}\n    start: 2026-03-02\n    end: 2026-03-09\n    primary: [orders]\n    segments: [device]\n  - name: plain\n    exposure_log: assignments\n    control: a\n    split: {a: 1, b: 1}\n    start: 2026-03-02\n    end: 2026-03-09\n    primary: [orders]\n";
    let ws = workspace(&[("sliced.yaml", body)]);
    let flat = ws.path().join("dialects/flat");
    std::fs::create_dir_all(&flat).unwrap();
    std::fs::write(flat.join("dialect.yaml"), "grouping_sets: false\n").unwrap();
    let out = plumb(
        ws.path(),
        &["--dialects-dir", "dialects", "sql", "sliced", "--dialect", "flat"],
    );
    assert_eq!(out.status.code(), Some(1), "{}", text(&out.stderr));
    let stderr = text(&out.stderr);
    assert!(stderr.contains("metrics/sliced.yaml:13:5"), "{stderr}");
    assert!(stderr.contains("has no GROUPING SETS"), "{stderr}");
    // Extra segments from a flag are a usage error (exit 2): there is no line to point at.
    let out = plumb(
        ws.path(),
        &[
            "--dialects-dir",
            "dialects",
            "sql",
            "plain",
            "--dialect",
            "flat",
            "--by",
            "device",
        ],
    );
    assert_eq!(out.status.code(), Some(2), "{}", text(&out.stderr));
    assert!(text(&out.stderr).contains("has no GROUPING SETS"));
    // Without segments the same dialect compiles.
    let out = plumb(
        ws.path(),
        &["--dialects-dir", "dialects", "sql", "plain", "--dialect", "flat"],
    );
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
}

/// Hostile text in flags and files gives a located error with the right exit code, never a
/// panic (exit 101): a non-ASCII date once sliced a string inside a character, and a catalog
/// file that is not UTF-8 was reported as an I/O failure (exit 2) without a location.
#[test]
fn non_ascii_dates_and_non_utf8_catalogs_are_clear_errors() {
    let body = std::fs::read_to_string(fixtures().join("ok_minimal.yaml")).unwrap();
    let ws = workspace(&[("ok.yaml", &body)]);
    for from in ["2026-03-1é", "é026-03-01", "2026-03-01T0é:00"] {
        let out = plumb(
            ws.path(),
            &["report", "paid_orders", "--from", from, "--to", "2026-04-01"],
        );
        assert_eq!(out.status.code(), Some(2), "--from {from}: {}", text(&out.stderr));
        assert!(
            text(&out.stderr).contains("is not a timestamp"),
            "{}",
            text(&out.stderr)
        );
    }
    let mut bytes = b"units:\n  - name: u".to_vec();
    bytes.extend([0xff, 0xfe, b'\n']);
    std::fs::write(ws.path().join("metrics/latin1.yaml"), bytes).unwrap();
    let out = plumb(ws.path(), &["check"]);
    assert_eq!(out.status.code(), Some(1), "{}", text(&out.stderr));
    let stderr = text(&out.stderr);
    assert!(stderr.contains("latin1.yaml:2:12"), "located: {stderr}");
    assert!(stderr.contains("not UTF-8"), "{stderr}");
}

/// A segment whose values are unit ids (every unit its own slice) once made `analyze --by`
/// run for a very long time; it is refused, naming the segment, its size and the limit.
#[test]
fn a_segment_with_too_many_values_is_refused_with_its_size() {
    let dir = small_demo(3, 2_000);
    std::fs::write(
        dir.path().join("metrics/by_id.yaml"),
        "segments:\n  - name: shopper_itself\n    unit: shopper\n    table: shoppers\n    id: shopper_id\n    value: shopper_id\n",
    )
    .unwrap();
    let out = plumb(
        dir.path(),
        &["analyze", "one_page_checkout", "--by", "shopper_itself"],
    );
    assert_eq!(out.status.code(), Some(2), "{}", text(&out.stderr));
    let stderr = text(&out.stderr);
    assert!(stderr.contains("segment `shopper_itself` has"), "{stderr}");
    assert!(stderr.contains("limit of 1000"), "{stderr}");
    // A coarse segment is unaffected, and the limit can be lowered below it.
    let out = plumb(dir.path(), &["analyze", "one_page_checkout", "--by", "region"]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let out = plumb(
        dir.path(),
        &[
            "analyze",
            "one_page_checkout",
            "--by",
            "region",
            "--max-segment-values",
            "2",
        ],
    );
    assert_eq!(out.status.code(), Some(2), "{}", text(&out.stderr));
}

/// A metric named `orders__pre` beside `orders` once read the other's column (and became
/// `orders`' CUPED covariate); names that can equal a derived or fixed column are refused.
#[test]
fn names_that_collide_with_generated_columns_are_refused() {
    let body = std::fs::read_to_string(fixtures().join("ok_minimal.yaml")).unwrap();
    let extra = "  - name: paid_orders__pre\n    events: orders\n    per_unit: count\n  - name: arm\n    events: orders\n    per_unit: count\n";
    let body = body.replacen("metrics:\n", &format!("metrics:\n{extra}"), 1);
    let ws = workspace(&[("ok.yaml", &body)]);
    let out = plumb(ws.path(), &["check"]);
    assert_eq!(out.status.code(), Some(1), "{}", text(&out.stderr));
    let stderr = text(&out.stderr);
    assert!(
        stderr.contains("metric name `paid_orders__pre` contains `__`"),
        "{stderr}"
    );
    assert!(stderr.contains("write `paid_orders_pre`"), "{stderr}");
    assert!(stderr.contains("metric name `arm` is reserved"), "{stderr}");
    assert!(stderr.contains("ok.yaml:2:"), "located: {stderr}");
}

/// Catalogs arrive through pull requests and `diff --data` runs them in CI: a fragment must
/// not read files outside the workspace's declared data.
#[test]
fn fragments_cannot_read_files_outside_the_declared_data() {
    let dir = small_demo(4, 1_000);
    let secret = dir.path().join("secret.txt");
    std::fs::write(&secret, "s3cret-value").unwrap();
    let metrics = dir.path().join("metrics/plant_shop.yaml");
    let catalog = std::fs::read_to_string(&metrics).unwrap();
    let catalog = catalog.replacen(
        "secondary: [revenue, avg_basket, page_views, engaged]",
        "secondary: [revenue, avg_basket, page_views, engaged, leak]",
        1,
    );
    std::fs::write(&metrics, catalog).unwrap();
    for (of, what) in [
        (
            format!(
                "(SELECT max(length(t.content)) FROM read_text('{}') AS t)",
                secret.display()
            ),
            "read_text",
        ),
        (
            format!("(SELECT count(*) FROM read_csv('{}') AS t)", secret.display()),
            "read_csv",
        ),
        (
            "(SELECT count(*) FROM read_parquet('/etc/*.parquet') AS t)".to_string(),
            "a glob elsewhere",
        ),
    ] {
        std::fs::write(
            dir.path().join("metrics/leak.yaml"),
            format!("metrics:\n  - name: leak\n    events: orders\n    per_unit: max\n    of: \"{of}\"\n"),
        )
        .unwrap();
        let out = plumb(dir.path(), &["analyze", "one_page_checkout", "--format", "json"]);
        let all = format!("{}{}", text(&out.stdout), text(&out.stderr));
        // Found when the catalog is checked against the local data, before anything runs.
        assert_eq!(out.status.code(), Some(1), "{what}: {all}");
        assert!(all.contains("outside the workspace's data"), "{what}: {all}");
        assert!(all.contains("leak.yaml:5:9"), "{what}: {all}");
        assert!(!all.contains("s3cret-value"), "{what}: {all}");
    }
}

/// `--alpha 1e-300` once gave null intervals: levels outside 1e-6..0.5 are usage errors.
#[test]
fn significance_levels_outside_a_sane_range_are_refused() {
    let body = std::fs::read_to_string(fixtures().join("ok_minimal.yaml")).unwrap();
    let ws = workspace(&[("ok.yaml", &body)]);
    for alpha in ["1e-300", "0", "0.7", "NaN", "-0.05"] {
        let flag = format!("--alpha={alpha}");
        let out = plumb(ws.path(), &["analyze", "checkout", &flag]);
        assert_eq!(out.status.code(), Some(2), "--alpha {alpha}");
        assert!(
            text(&out.stderr).contains("--alpha must be between 0.000001 and 0.5"),
            "{}",
            text(&out.stderr)
        );
        let out = plumb(
            ws.path(),
            &["power", "paid_orders", "--mde", "5%", "--alpha", alpha],
        );
        assert_eq!(
            out.status.code(),
            Some(2),
            "power --alpha {alpha}: {}",
            text(&out.stderr)
        );
    }
}

/// Runs plumb in `dir` without `--workspace`.
fn plumb_here(dir: &Path, args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_plumb"))
        .current_dir(dir)
        .args(args)
        .output()
        .unwrap()
}

#[test]
fn the_workspace_is_found_upwards_like_git_and_cargo() {
    let ws = workspace(&[]);
    let deep = ws.path().join("metrics/sub");
    std::fs::create_dir_all(&deep).unwrap();
    let out = plumb_here(&deep, &["check"]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    assert!(text(&out.stdout).starts_with("ok: "));
    // Without any plumb.yaml above, the error says where plumb looked.
    let empty = tempfile::tempdir().unwrap();
    let out = plumb_here(empty.path(), &["check"]);
    assert_eq!(out.status.code(), Some(2));
    assert!(
        text(&out.stderr).contains("the folders above it"),
        "{}",
        text(&out.stderr)
    );
}

#[test]
fn demo_refuses_a_folder_that_is_not_empty_unless_forced() {
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(dir.path().join("notes.txt"), "mine").unwrap();
    let target = dir.path().to_str().unwrap();
    let args = ["demo", target, "--shoppers", "200", "--no-readout"];
    let out = plumb_here(dir.path(), &args);
    assert_eq!(out.status.code(), Some(2));
    assert!(
        text(&out.stderr).contains("is not empty"),
        "{}",
        text(&out.stderr)
    );
    assert!(!dir.path().join("plumb.yaml").exists(), "nothing was written");
    let mut forced = args.to_vec();
    forced.push("--force");
    assert_eq!(plumb_here(dir.path(), &forced).status.code(), Some(0));
    assert_eq!(
        std::fs::read_to_string(dir.path().join("notes.txt")).unwrap(),
        "mine"
    );
    // An earlier demo folder is rewritten without --force.
    assert_eq!(plumb_here(dir.path(), &args).status.code(), Some(0));
}

#[test]
fn list_shows_the_catalog_and_mde_takes_a_fraction() {
    let demo = small_demo(3, 400);
    let out = plumb(demo.path(), &["list"]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let shown = text(&out.stdout);
    for want in [
        "Metrics (7):",
        "avg_basket  per shopper: ratio revenue / orders",
        "one_page_checkout",
    ] {
        assert!(shown.contains(want), "{want}:\n{shown}");
    }
    let json: serde_json::Value =
        serde_json::from_slice(&plumb(demo.path(), &["list", "--format", "json"]).stdout).unwrap();
    assert_eq!(json["experiments"].as_array().unwrap().len(), 2);
    let pct = plumb(
        demo.path(),
        &["power", "orders", "--mde", "5%", "--format", "json"],
    );
    let frac = plumb(
        demo.path(),
        &["power", "orders", "--mde", "0.05", "--format", "json"],
    );
    assert_eq!(pct.status.code(), Some(0), "{}", text(&pct.stderr));
    assert_eq!(pct.stdout, frac.stdout, "5% and 0.05 are the same request");
    let five = plumb(demo.path(), &["power", "orders", "--mde", "5"]);
    assert_eq!(five.status.code(), Some(2), "5 alone is ambiguous");
    // Every --by takes a comma list; a report still slices by one segment.
    let out = plumb(
        demo.path(),
        &[
            "report",
            "orders",
            "--by",
            "region,device",
            "--from",
            "2026-03-01",
            "--to",
            "2026-03-08",
        ],
    );
    assert_eq!(out.status.code(), Some(2));
    assert!(
        text(&out.stderr).contains("one segment at a time"),
        "{}",
        text(&out.stderr)
    );
}

#[test]
fn every_command_has_examples_in_its_help() {
    for cmd in [
        "check", "sql", "analyze", "diff", "list", "schema", "report", "power", "demo",
    ] {
        let out = plumb_here(Path::new("."), &[cmd, "--help"]);
        assert_eq!(out.status.code(), Some(0), "{cmd}");
        let help = text(&out.stdout);
        assert!(help.contains("Example"), "{cmd} --help has no examples:\n{help}");
        assert!(
            help.contains(&format!("plumb {cmd}")),
            "{cmd}: examples use the command"
        );
    }
}

#[test]
fn color_is_decided_by_the_flag_and_no_color() {
    let demo = small_demo(3, 400);
    // A void readout: its headline is coloured.
    let catalog = demo.path().join("metrics/plant_shop.yaml");
    let yaml = std::fs::read_to_string(&catalog).unwrap();
    std::fs::write(
        &catalog,
        yaml.replacen(
            "split: {control: 50, treatment: 50}",
            "split: {control: 95, treatment: 5}",
            1,
        ),
    )
    .unwrap();
    let args = ["analyze", "one_page_checkout"];
    let always = plumb(demo.path(), &[&args[..], &["--color", "always"]].concat());
    let never = plumb(demo.path(), &[&args[..], &["--color", "never"]].concat());
    assert_eq!(always.status.code(), Some(3));
    let (always, never) = (text(&always.stdout), text(&never.stdout));
    assert!(always.starts_with("\x1b[1m\x1b[31mVOID"), "{always}");
    let strip = |s: &str| {
        [
            "\x1b[31m", "\x1b[32m", "\x1b[33m", "\x1b[36m", "\x1b[1m", "\x1b[0m",
        ]
        .iter()
        .fold(s.to_string(), |acc, code| acc.replace(code, ""))
    };
    assert_eq!(strip(&always), never, "colour changes nothing but colour");
    assert!(!never.contains('\x1b'));
    // auto: a pipe gets no colour; NO_COLOR is honoured even with a terminal (not testable
    // here), and --color always wins over it.
    assert!(!text(&plumb(demo.path(), &args).stdout).contains('\x1b'));
    let forced = Command::new(env!("CARGO_BIN_EXE_plumb"))
        .current_dir(demo.path())
        .env("NO_COLOR", "1")
        .args(["--color", "always", "analyze", "one_page_checkout"])
        .output()
        .unwrap();
    assert!(text(&forced.stdout).contains('\x1b'));
}

#[test]
fn renamed_experiment_keys_are_read_with_a_warning_naming_the_new_key() {
    let demo = small_demo(5, 300);
    let catalog = demo.path().join("metrics/plant_shop.yaml");
    let new = std::fs::read_to_string(&catalog).unwrap();
    assert!(new.contains("exposure_log: assignments") && new.contains("logged_as: one-page-checkout"));
    let sql_new = text(&plumb(demo.path(), &["sql", "one_page_checkout"]).stdout);
    let old = new
        .replace("exposure_log: assignments", "exposures: assignments")
        .replace("logged_as: ", "key: ");
    std::fs::write(&catalog, &old).unwrap();
    let out = plumb(demo.path(), &["check"]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let stderr = text(&out.stderr);
    assert!(
        stderr.contains("warning[W005]: `exposures:` is now called `exposure_log:`"),
        "{stderr}"
    );
    assert!(stderr.contains("`key:` is now called `logged_as:`"), "{stderr}");
    assert_eq!(
        text(&plumb(demo.path(), &["sql", "one_page_checkout"]).stdout),
        sql_new
    );
    // Both spellings at once are an error.
    std::fs::write(
        &catalog,
        new.replacen(
            "exposure_log: assignments",
            "exposure_log: assignments\n    exposures: assignments",
            1,
        ),
    )
    .unwrap();
    let out = plumb(demo.path(), &["check"]);
    assert_eq!(out.status.code(), Some(1));
    assert!(text(&out.stderr).contains("both `exposures` and `exposure_log` are set"));
}

/// Progress goes to a terminal only: under a pseudo-terminal (util-linux `script`) the status
/// line names each query; on a pipe stderr stays empty.
#[test]
fn progress_is_shown_on_a_terminal_and_never_on_a_pipe() {
    let demo = small_demo(3, 2000);
    let ws = demo.path().to_str().unwrap();
    let bin = env!("CARGO_BIN_EXE_plumb");
    let out = Command::new("script")
        .args([
            "-qec",
            &format!("'{bin}' --workspace '{ws}' analyze one_page_checkout --color never > /dev/null"),
            "/dev/null",
        ])
        .output()
        .expect("util-linux `script` runs the command under a pseudo-terminal");
    let shown = text(&out.stdout);
    assert!(
        shown.contains("one_page_checkout: readout query (7 metrics) on local DuckDB"),
        "{shown}"
    );
    let piped = plumb(demo.path(), &["analyze", "one_page_checkout"]);
    assert_eq!(text(&piped.stderr), "", "no status line on a pipe");
}
