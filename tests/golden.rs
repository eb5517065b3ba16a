//! Golden outputs of every command on a small demo workspace: stdout, stderr and exit code,
//! snapshotted byte for byte. They pin what users and their scripts see (readout tables and
//! JSON, reports, power, check, diff, usage errors), so a refactor that changes any number,
//! word or exit code fails here. `cargo insta review` after an intended change.
#![cfg(feature = "engine")]

use std::path::Path;
use std::process::Command;

/// Runs `plumb --workspace WS args...` and renders what a user would see.
fn run(ws: &Path, args: &[&str]) -> String {
    let out = Command::new(env!("CARGO_BIN_EXE_plumb"))
        .arg("--workspace")
        .arg(ws)
        .args(args)
        .env_remove("PGHOST")
        .output()
        .unwrap();
    let clean = |b: &[u8]| {
        let text = String::from_utf8_lossy(b).replace(&ws.display().to_string(), "[WS]");
        // Timings are the only thing allowed to vary between runs.
        let mut out = String::new();
        for line in text.split_inclusive('\n') {
            match line
                .find(" in ")
                .filter(|_| line.contains("wrote the plant-shop demo"))
            {
                Some(i) => out.push_str(&format!("{} in [time]\n", &line[..i])),
                None => out.push_str(line),
            }
        }
        out
    };
    format!(
        "$ plumb {}\nexit: {:?}\n--- stdout\n{}--- stderr\n{}",
        args.join(" "),
        out.status.code(),
        clean(&out.stdout),
        clean(&out.stderr)
    )
}

fn git(dir: &Path, args: &[&str]) {
    let ok = Command::new("git")
        .arg("-C")
        .arg(dir)
        .args([
            "-c",
            "user.name=plumb test",
            "-c",
            "user.email=test@example.invalid",
        ])
        .args(args)
        .output()
        .unwrap()
        .status
        .success();
    assert!(ok, "git {args:?}");
}

#[test]
fn every_command_on_the_demo() {
    let tmp = tempfile::tempdir().unwrap();
    let ws = tmp.path().join("demo");
    let ws_arg = ws.to_str().unwrap();
    // `demo` itself (writes the workspace, prints the main readout).
    let demo = run(tmp.path(), &["demo", ws_arg, "--shoppers", "4000", "--seed", "7"]);
    insta::assert_snapshot!("demo", demo.replace(ws_arg, "[WS]"));
    let cases: &[(&str, &[&str])] = &[
        ("check", &["check"]),
        ("check_json", &["check", "--format", "json"]),
        ("check_deny", &["check", "--deny", "warnings"]),
        ("analyze_main", &["analyze", "one_page_checkout"]),
        (
            "analyze_main_json",
            &["analyze", "one_page_checkout", "--format", "json"],
        ),
        ("analyze_aa", &["analyze", "care_guide_banner"]),
        (
            "analyze_by_sequential_json",
            &[
                "analyze",
                "one_page_checkout",
                "--by",
                "region",
                "--sequential",
                "--alpha",
                "0.1",
                "--format",
                "json",
            ],
        ),
        (
            "analyze_no_cuped",
            &["analyze", "care_guide_banner", "--no-cuped", "--by", "device"],
        ),
        ("analyze_unknown", &["analyze", "one_page_chekout"]),
        (
            "analyze_bad_alpha",
            &["analyze", "one_page_checkout", "--alpha", "2"],
        ),
        (
            "analyze_unknown_segment",
            &["analyze", "one_page_checkout", "--by", "regoin"],
        ),
        (
            "sql_postgres_by",
            &[
                "sql",
                "care_guide_banner",
                "--dialect",
                "postgres",
                "--by",
                "region",
            ],
        ),
        (
            "sql_unknown_dialect",
            &["sql", "care_guide_banner", "--dialect", "oracle"],
        ),
        (
            "sql_report_bigquery",
            &[
                "sql",
                "--report",
                "orders,avg_basket",
                "--from",
                "2026-03-02",
                "--to",
                "2026-03-05",
                "--dialect",
                "bigquery",
            ],
        ),
        (
            "report_daily",
            &[
                "report",
                "orders",
                "revenue",
                "--from",
                "2026-03-02",
                "--to",
                "2026-03-09",
            ],
        ),
        (
            "report_weekly_csv",
            &[
                "report",
                "avg_basket",
                "page_views",
                "--grain",
                "week",
                "--from",
                "2026-03-02",
                "--to",
                "2026-03-30",
                "--format",
                "csv",
            ],
        ),
        (
            "report_by_region_json",
            &[
                "report",
                "bought",
                "--by",
                "region",
                "--from",
                "2026-03-02",
                "--to",
                "2026-03-04",
                "--format",
                "json",
            ],
        ),
        (
            "report_exposed_in",
            &[
                "report",
                "orders",
                "--exposed-in",
                "one_page_checkout",
                "--by",
                "device",
                "--grain",
                "week",
            ],
        ),
        ("report_needs_from", &["report", "orders"]),
        (
            "report_exposure_segment",
            &[
                "report",
                "orders",
                "--by",
                "device",
                "--from",
                "2026-03-02",
                "--to",
                "2026-03-04",
            ],
        ),
        (
            "report_unknown_metric",
            &["report", "ordres", "--from", "2026-03-02", "--to", "2026-03-04"],
        ),
        ("power_orders", &["power", "orders", "--mde", "5%"]),
        (
            "power_ratio_json",
            &[
                "power",
                "avg_basket",
                "--mde",
                "5%",
                "--days",
                "14",
                "--format",
                "json",
            ],
        ),
        (
            "power_split",
            &[
                "power",
                "bought",
                "--mde",
                "10%",
                "--split",
                "80,20",
                "--history-days",
                "7",
                "--until",
                "2026-03-20",
            ],
        ),
        ("power_bad_mde", &["power", "orders", "--mde", "2"]),
        (
            "power_bad_split",
            &["power", "orders", "--mde", "2%", "--split", "50"],
        ),
    ];
    for (name, args) in cases {
        let out = run(&ws, args);
        if name.starts_with("analyze") && !name.ends_with("json") {
            // The readout fits a 100-column terminal: no line wraps.
            for line in out.lines() {
                let w = line.chars().count();
                assert!(w <= 100, "{name}: a {w}-column line wraps at 100:\n{line}");
            }
        }
        insta::assert_snapshot!(*name, out);
    }
    let wide = run(&ws, &["analyze", "one_page_checkout", "--wide"]);
    assert!(
        wide.lines().any(|l| l.chars().count() > 150),
        "--wide keeps one line per result"
    );

    // `diff`: a definition change between the committed catalog and the working tree.
    git(&ws, &["init", "-q", "-b", "main"]);
    git(&ws, &["add", "plumb.yaml", "metrics"]);
    git(&ws, &["commit", "-q", "-m", "catalog"]);
    let catalog = ws.join("metrics/plant_shop.yaml");
    let text = std::fs::read_to_string(&catalog).unwrap();
    std::fs::write(&catalog, text.replace("window: [0d, 7d]", "window: [0d, 3d]")).unwrap();
    for (name, args) in [
        ("diff_table", &["diff", "--base", "HEAD"][..]),
        (
            "diff_data_json",
            &["diff", "--base", "HEAD", "--data", "--format", "json"][..],
        ),
        (
            "diff_data_markdown",
            &["diff", "--base", "HEAD", "--data", "--format", "markdown"][..],
        ),
    ] {
        insta::assert_snapshot!(name, run(&ws, args));
    }
    assert!(Path::new(&ws).join("data").is_dir());
}
