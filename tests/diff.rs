//! `plumb diff` in temporary git repositories: definitions, indirect effects through a shared
//! event table, SQL diffs, numbers before and after, exit codes, and an untouched work tree.
#![cfg(feature = "engine")]

use std::path::Path;
use std::process::{Command, Output};

fn git(dir: &Path, args: &[&str]) {
    let out = Command::new("git")
        .arg("-C")
        .arg(dir)
        .args([
            "-c",
            "user.name=plumb tests",
            "-c",
            "user.email=tests@example.invalid",
            "-c",
            "commit.gpgsign=false",
        ])
        .args(args)
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "git {args:?}: {}",
        String::from_utf8_lossy(&out.stderr)
    );
}

fn plumb(dir: &Path, args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_plumb"))
        .current_dir(dir)
        .args(args)
        .output()
        .unwrap()
}

/// A git repository holding the demo workspace (data ignored), committed on `main`.
fn repo() -> tempfile::TempDir {
    let dir = tempfile::tempdir().unwrap();
    plumb::demo::write_demo(
        dir.path(),
        &plumb::demo::DemoConfig {
            seed: 5,
            shoppers: 4_000,
        },
    )
    .unwrap();
    std::fs::write(dir.path().join(".gitignore"), "data/\n").unwrap();
    git(dir.path(), &["init", "-q", "-b", "main"]);
    git(dir.path(), &["add", "."]);
    git(dir.path(), &["commit", "-q", "-m", "catalog"]);
    dir
}

fn edit(dir: &Path, from: &str, to: &str) {
    let path = dir.join("metrics/plant_shop.yaml");
    let text = std::fs::read_to_string(&path).unwrap();
    assert!(text.contains(from), "{from}");
    std::fs::write(path, text.replacen(from, to, 1)).unwrap();
}

fn status(dir: &Path) -> String {
    String::from_utf8(
        Command::new("git")
            .arg("-C")
            .arg(dir)
            .args(["status", "--porcelain"])
            .output()
            .unwrap()
            .stdout,
    )
    .unwrap()
}

#[test]
fn no_change_exits_0() {
    let dir = repo();
    let out = plumb(dir.path(), &["diff"]);
    assert_eq!(
        out.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(String::from_utf8_lossy(&out.stdout).contains("no definition changed"));
}

#[test]
fn a_shared_event_table_change_reaches_every_experiment_through_its_metrics() {
    let dir = repo();
    // Only the event table's filter changes: no metric or experiment definition is edited.
    edit(
        dir.path(),
        "where: \"not is_test\"",
        "where: \"not is_test and amount_cents >= 1000\"",
    );
    let before = status(dir.path());
    let out = plumb(
        dir.path(),
        &[
            "diff",
            "--base",
            "HEAD",
            "--data",
            "--format",
            "json",
            "--exit-code",
        ],
    );
    assert_eq!(
        out.status.code(),
        Some(4),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert_eq!(status(dir.path()), before, "the working tree is untouched");
    let d: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(d["changes"].as_array().unwrap().len(), 1);
    assert_eq!(d["changes"][0]["kind"], "event_table");
    assert_eq!(d["changes"][0]["fields"][0], "where");
    let affected: Vec<&str> = d["affected_experiments"]
        .as_array()
        .unwrap()
        .iter()
        .map(|a| a["experiment"].as_str().unwrap())
        .collect();
    assert_eq!(affected, vec!["care_guide_banner", "one_page_checkout"]);
    let checkout = &d["affected_experiments"][1];
    assert!(
        checkout["reasons"][0]
            .as_str()
            .unwrap()
            .contains("event table `orders`")
    );
    assert!(
        checkout["sql_diff"]
            .as_str()
            .unwrap()
            .contains("amount_cents >= 1000")
    );
    let changed_metrics: Vec<&str> = checkout["numbers"]
        .as_array()
        .unwrap()
        .iter()
        .map(|n| n["metric"].as_str().unwrap())
        .collect();
    assert!(
        changed_metrics.contains(&"orders") && !changed_metrics.contains(&"page_views"),
        "{changed_metrics:?}"
    );
    let reports: Vec<&str> = d["affected_reports"]
        .as_array()
        .unwrap()
        .iter()
        .map(|m| m.as_str().unwrap())
        .collect();
    assert!(
        reports.contains(&"avg_basket"),
        "ratio over changed parts: {reports:?}"
    );
    assert!(!reports.contains(&"page_views"));
    // Markdown for the pull request, snapshotted (no numbers, so it does not depend on data).
    let md = plumb(dir.path(), &["diff", "--base", "HEAD", "--format", "markdown"]);
    insta::assert_snapshot!(
        "diff_shared_event_table_markdown",
        String::from_utf8_lossy(&md.stdout)
    );
}

#[test]
fn a_verdict_flip_fails_with_fail_on_verdict_change() {
    let dir = repo();
    // Paid orders become refunded ones: the significant increase disappears.
    edit(
        dir.path(),
        "per_unit: count\n    where: \"status = 'paid'\"",
        "per_unit: count\n    where: \"status = 'refunded'\"",
    );
    git(dir.path(), &["checkout", "-q", "-b", "feature"]);
    git(dir.path(), &["commit", "-q", "-am", "orders counts refunds"]);
    // Both revisions from git objects; the default base is the merge base with main.
    let out = plumb(
        dir.path(),
        &["diff", "--head", "HEAD", "--data", "--fail-on-verdict-change"],
    );
    assert_eq!(
        out.status.code(),
        Some(5),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(text.contains("changed metric `orders` (where)"), "{text}");
    assert!(text.contains("VERDICT CHANGED"), "{text}");
    let out = plumb(dir.path(), &["diff", "--head", "HEAD", "--exit-code"]);
    assert_eq!(
        out.status.code(),
        Some(4),
        "with --exit-code a definition change exits 4"
    );
    let out = plumb(dir.path(), &["diff", "--head", "HEAD"]);
    assert_eq!(out.status.code(), Some(0), "without it, 0 like git diff");
    // --fail-on-verdict-change needs --data (clap refuses it alone, exit 2).
    let out = plumb(dir.path(), &["diff", "--fail-on-verdict-change"]);
    assert_eq!(out.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&out.stderr).contains("--data"));
}
