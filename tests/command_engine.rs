//! Command engines (`engines:` with `command:` in plumb.yaml) as a user meets them when the
//! client misbehaves: it fails, hangs past its timeout, prints a wrong header, a stale
//! fingerprint, non-numeric cells or nothing, or is not installed. Each is a clear error with
//! exit 2, never a readout. The clients here are small `sh` scripts; tests/engines.rs runs real
//! ones (spark-sql, psql) end to end.
#![cfg(feature = "engine")]

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

/// The demo workspace with `engines` appended to plumb.yaml, and the one_page_checkout
/// statistics table a correct client would print, in `stats.csv`.
fn workspace(engines: &str) -> tempfile::TempDir {
    let dir = tempfile::tempdir().unwrap();
    let ws = dir.path();
    let out = Command::new(env!("CARGO_BIN_EXE_plumb"))
        .args([
            "demo",
            ws.join("ws").to_str().unwrap(),
            "--shoppers",
            "600",
            "--no-readout",
        ])
        .output()
        .unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let ws = ws.join("ws");
    let mut sources = plumb::source::SourceMap::new();
    let plumb::workspace::Opened::Ok(w, _) = plumb::workspace::open(&ws, &mut sources).unwrap() else {
        panic!("demo invalid");
    };
    let mut engine = plumb::execute::duckdb::LocalEngine::open(None, &w.local_tables).unwrap();
    let id = w.catalog.experiment("one_page_checkout").unwrap();
    let dialect = plumb::render::Dialect::load("postgres", None).unwrap();
    let (plan, sql) = plumb::compile_experiment(&w.catalog, id, &[], &dialect).unwrap();
    let rows = plumb::execute::Engine::readout(&mut engine, &plan, &sql).unwrap();
    let cols: Vec<String> = rows[0].keys().cloned().collect();
    let mut csv = cols.join(",") + "\n";
    for r in &rows {
        let cells: Vec<String> = cols
            .iter()
            .map(|c| match &r[c] {
                plumb::execute::Cell::Null => String::new(),
                plumb::execute::Cell::Number(x) => format!("{x:?}"),
                plumb::execute::Cell::Text(t) => t.clone(),
            })
            .collect();
        csv += &(cells.join(",") + "\n");
    }
    std::fs::write(ws.join("stats.csv"), csv).unwrap();
    let yaml = std::fs::read_to_string(ws.join("plumb.yaml")).unwrap();
    std::fs::write(ws.join("plumb.yaml"), format!("{yaml}engines:\n{engines}")).unwrap();
    dir
}

#[test]
fn a_misbehaving_client_is_an_error_never_a_readout() {
    let dir = workspace(
        r#"  fails: {dialect: postgres, command: [sh, -c, "echo 'ERROR:  relation \"orders\" does not exist' >&2; exit 3"]}
  hangs: {dialect: postgres, command: [sh, -c, "sleep 30", sh, "{sql_file}"], timeout: 1s}
  header: {dialect: postgres, command: [sh, -c, "printf 'a,b\n1,2\n'"]}
  stale: {dialect: postgres, command: [sh, -c, "sed 's/fp[0-9a-f]*/fp0000000000000000/' stats.csv"]}
  letters: {dialect: postgres, command: [sh, -c, "sed 's/,0\\.[0-9]*,/,abc,/' stats.csv"]}
  silent: {dialect: postgres, command: ["true"]}
  missing: {dialect: postgres, command: [plumb-no-such-client, "{sql_file}"]}
  tabs: {dialect: postgres, command: [sh, -c, "printf 'arm\tunits\n'"], output: tsv}
"#,
    );
    let ws = dir.path().join("ws");
    // The clients run in plumb's working directory: the workspace.
    let run = |engine: &str| {
        let out = Command::new(env!("CARGO_BIN_EXE_plumb"))
            .current_dir(&ws)
            .args(["analyze", "one_page_checkout", "--engine", engine])
            .output()
            .unwrap();
        (
            out.status.code(),
            String::from_utf8_lossy(&out.stdout).into_owned(),
            String::from_utf8_lossy(&out.stderr).into_owned(),
        )
    };
    let cases = [
        (
            "fails",
            vec![
                "engine `fails` (`sh`)",
                "exited with exit status: 3",
                "relation \"orders\" does not exist",
            ],
        ),
        (
            "hangs",
            vec!["did not finish within its timeout of 1 s", "plumb stopped it"],
        ),
        ("header", vec!["no plumb_layout column"]),
        (
            "stale",
            vec!["comes from another query", "fingerprint `fp0000000000000000`"],
        ),
        ("letters", vec!["not a number"]),
        ("silent", vec!["engine `silent`", "printed nothing on stdout"]),
        (
            "missing",
            vec!["cannot start it", "is the client installed and on PATH?"],
        ),
        ("tabs", vec!["engine `tabs`"]),
    ];
    for (engine, wanted) in cases {
        let started = std::time::Instant::now();
        let (code, stdout, stderr) = run(engine);
        assert_eq!(code, Some(2), "{engine}: {stderr}");
        assert!(stdout.is_empty(), "{engine}: no readout, got {stdout}");
        for w in wanted {
            assert!(stderr.contains(w), "{engine}: `{w}` not in {stderr}");
        }
        if engine == "hangs" {
            assert!(started.elapsed().as_secs() < 15, "the timeout stopped the client");
        }
    }
}

#[test]
fn engines_are_checked_where_they_are_declared_and_named_with_did_you_mean() {
    let dir = workspace(
        r#"  both: {duckdb: {}, url: "postgres://a@b/c"}
  nodialect: {command: [psql]}
  secret: {dialect: postgres, url: "postgres://analyst:hunter2@db:5432/shop"}
  badout: {dialect: spark, command: [spark-sql], output: xml}
  badtime: {dialect: spark, command: [spark-sql], timeout: soon}
  typo: {dialect: spark, comand: [spark-sql]}
default_engine: nowhere
"#,
    );
    let ws = dir.path().join("ws");
    let (code, _, stderr) = plumb(&ws, &["check"]);
    assert_eq!(code, Some(1), "{stderr}");
    for w in [
        "engine `both` must have exactly one of `duckdb`, `url` and `command`",
        "engine `nodialect` does not say which SQL dialect it speaks",
        "the URL holds a password",
        "unknown output `xml`",
        "`soon` is not a timeout",
        "unknown key `comand` in engine `typo`",
        "default_engine `nowhere` is not declared",
        "plumb.yaml:",
    ] {
        assert!(stderr.contains(w), "`{w}` not in {stderr}");
    }
    assert!(
        !stderr.contains("hunter2") || stderr.matches("hunter2").count() <= 1,
        "{stderr}"
    );

    let dir =
        workspace("  sparky: {dialect: spark, command: [spark-sql, -f, \"{sql_file}\"], output: tsv}\n");
    let ws = dir.path().join("ws");
    let (code, _, stderr) = plumb(&ws, &["analyze", "one_page_checkout", "--engine", "sparkie"]);
    assert_eq!(code, Some(2));
    assert!(
        stderr.contains("unknown engine `sparkie`") && stderr.contains("sparky"),
        "{stderr}"
    );
    // A dry run shows the argv and writes the statement, running nothing.
    let (code, stdout, stderr) = plumb(
        &ws,
        &[
            "analyze",
            "one_page_checkout",
            "--engine",
            "sparky",
            "--print-command",
        ],
    );
    assert_eq!(code, Some(0), "{stderr}");
    assert!(
        stdout.contains("engine `sparky` (spark dialect) would run the readout of one_page_checkout as:"),
        "{stdout}"
    );
    let file = stdout
        .lines()
        .find_map(|l| l.strip_prefix("statement: "))
        .unwrap();
    assert!(stdout.contains(&format!("spark-sql -f {file}")), "{stdout}");
    let sql = std::fs::read_to_string(file).unwrap();
    assert!(
        sql.contains("dialect spark") && sql.contains("`orders__m3`"),
        "{sql}"
    );
    // `local` always names the embedded DuckDB, and the local engine refuses --print-command.
    let (code, _, stderr) = plumb(
        &ws,
        &[
            "analyze",
            "one_page_checkout",
            "--engine",
            "local",
            "--print-command",
        ],
    );
    assert_eq!(code, Some(2));
    assert!(stderr.contains("is not one"), "{stderr}");
    let (code, stdout, _) = plumb(&ws, &["analyze", "one_page_checkout", "--engine", "local"]);
    assert_eq!(code, Some(0));
    assert!(stdout.contains("Computed on: local DuckDB"), "{stdout}");
}
