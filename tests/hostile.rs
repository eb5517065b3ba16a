//! The hostile-input corpus: one line per case of what hostile catalogs, workspace files, data
//! and flags must produce (exit code and a phrase of the message), run on a small demo
//! workspace with the `plumb` binary. No case may panic (exit 101), abort, hang or print a
//! readout it should have refused. Add a line here for every hostile input found.
#![cfg(feature = "engine")]

use std::path::Path;
use std::process::Command;
use std::time::Duration;

/// How a case changes the demo workspace before running.
enum Edit {
    /// Replace the first occurrence of a text in a file (the text must be there).
    Replace(&'static str, &'static str, String),
    /// Write (or overwrite) a file.
    Write(&'static str, Vec<u8>),
    /// Anything else.
    Run(fn(&Path)),
}

struct Case {
    name: &'static str,
    edit: Vec<Edit>,
    args: Vec<String>,
    exit: i32,
    /// Must appear in stderr (or stdout when the exit code is 0).
    says: &'static str,
}

const CATALOG: &str = "metrics/plant_shop.yaml";

fn replace(old: &'static str, new: impl Into<String>) -> Edit {
    Edit::Replace(CATALOG, old, new.into())
}

fn write(path: &'static str, text: impl Into<Vec<u8>>) -> Edit {
    Edit::Write(path, text.into())
}

fn case(name: &'static str, edit: Vec<Edit>, args: &str, exit: i32, says: &'static str) -> Case {
    Case {
        name,
        edit,
        args: args.split_whitespace().map(String::from).collect(),
        exit,
        says,
    }
}

fn cases() -> Vec<Case> {
    let bomb = format!(
        "x: &a [{}]\ny: [{}]\n",
        vec!["1"; 20_000].join(","),
        vec!["*a"; 20_000].join(",")
    );
    let ors = (0..200_000)
        .map(|i| format!("amount_cents = {i}"))
        .collect::<Vec<_>>()
        .join(" OR ");
    let parens = |n: usize| format!("where: \"{}status = 'refunded'{}\"", "(".repeat(n), ")".repeat(n));
    let refunds = "where: \"status = 'refunded'\"";
    let many_metrics: String = (0..2_000)
        .map(|i| {
            format!(
                "  - name: o{i}\n    description: paid orders above {i} cents\n    owner: x\n    events: orders\n    per_unit: count\n    where: \"status = 'paid' and amount_cents > {i}\"\n"
            )
        })
        .collect();
    let many_names = (0..2_000).map(|i| format!("o{i}")).collect::<Vec<_>>().join(", ");
    vec![
        // Crashes, hangs and resource blow-ups.
        case(
            "yaml alias bomb",
            vec![write("metrics/bomb.yaml", bomb)],
            "check",
            1,
            "aliases expand this file",
        ),
        case(
            "100k nested block sequences",
            vec![write(
                "metrics/deep.yaml",
                format!("units:\n{}x\n", "- ".repeat(100_000)),
            )],
            "check",
            1,
            "nested more than 64 levels",
        ),
        case(
            "100k nested flow sequences",
            vec![write(
                "metrics/deep.yaml",
                format!("units: {}{}\n", "[".repeat(100_000), "]".repeat(100_000)),
            )],
            "check",
            1,
            "metrics/deep.yaml:1:",
        ),
        case(
            "200k OR-ed comparisons",
            vec![replace(refunds, format!("where: \"{ors}\""))],
            "check",
            1,
            "more than 500 operators",
        ),
        case(
            "46 parentheses",
            vec![replace(refunds, parens(46))],
            "check",
            1,
            "nested more than 24 levels deep",
        ),
        case(
            "24 parentheses run",
            vec![replace(refunds, parens(24))],
            "analyze one_page_checkout",
            0,
            "Experiment one_page_checkout",
        ),
        case(
            "500 additions run",
            vec![replace(
                "of: \"amount_cents / 100.0\"",
                format!("of: \"amount_cents{}\"", " + 1".repeat(500)),
            )],
            "analyze one_page_checkout",
            0,
            "Experiment one_page_checkout",
        ),
        case(
            "non-ASCII --from",
            vec![],
            "report orders --from 2026-03-1é --to 2026-04-01",
            2,
            "is not a timestamp",
        ),
        case(
            // Once failed with DuckDB "Out of Memory" (at 60k units the process was killed at
            // 24 GB): the readout is one statement, so the limit is said before it runs.
            "2,000 metrics in one experiment",
            vec![
                replace("metrics:\n", format!("metrics:\n{many_metrics}")),
                replace(
                    "    secondary: [revenue, page_views]\n",
                    format!("    secondary: [revenue, page_views, {many_names}]\n"),
                ),
            ],
            "analyze care_guide_banner",
            2,
            "has 2005 metrics; plumb computes at most 250 metrics",
        ),
        case(
            "a metric limit below the experiment's metrics",
            vec![],
            "analyze one_page_checkout --max-metrics 3",
            2,
            "plumb computes at most 3 metrics of one readout",
        ),
        case(
            // sqlparser counts columns in characters, spans are bytes: the caret must land on
            // the `)` (character 45 of the line), not 24 bytes early or inside a character.
            "multi-byte fragment located in JSON",
            vec![replace(
                refunds,
                "where: \"'日本語日本語' = status AND (status = ) \"",
            )],
            "check --format json",
            1,
            "\"column\": 45",
        ),
        case(
            "non-ASCII window",
            vec![replace("window: [0d, 7d]", "window: [0d, 7д]")],
            "check",
            1,
            "bad window bound",
        ),
        case(
            "non-UTF-8 catalog",
            vec![write(
                "metrics/latin1.yaml",
                b"units:\n  - name: u\xff\n".to_vec(),
            )],
            "check",
            1,
            "not UTF-8",
        ),
        // Integer overflow.
        case(
            "window overflow",
            vec![replace("window: [0d, 7d]", "window: [0d, 144115188075855879d]")],
            "check",
            1,
            "144115188075855879d",
        ),
        case(
            "covariate window overflow",
            vec![replace(
                "covariate_window: 14d",
                "covariate_window: 144115188075855879d",
            )],
            "check",
            1,
            "144115188075855879d",
        ),
        // Flags.
        case(
            "alpha 1e-300",
            vec![],
            "analyze one_page_checkout --alpha 1e-300",
            2,
            "--alpha must be between",
        ),
        // Values.
        case(
            "negative winsorize",
            vec![replace("winsorize: 99.9%", "winsorize: -5%")],
            "check",
            1,
            "the percentile must be above 50%",
        ),
        case(
            "split shares overflow",
            vec![replace(
                "split: {control: 50, treatment: 50}",
                "split: {control: 1e308, treatment: 1e308}",
            )],
            "check",
            1,
            "add up to more than a number can hold",
        ),
        case(
            "dialect outside the dialect folders",
            vec![Edit::Replace(
                "plumb.yaml",
                "dialect: duckdb",
                "dialect: ../evil".into(),
            )],
            "check",
            2,
            "is not a dialect name",
        ),
        case(
            "dialect flag outside the dialect folders",
            vec![],
            "sql one_page_checkout --dialect ../../etc",
            2,
            "is not a dialect name",
        ),
        case(
            "symlink loop in the catalog",
            vec![Edit::Run(|d| {
                std::os::unix::fs::symlink("..", d.join("metrics/loop")).unwrap()
            })],
            "check",
            1,
            "outside the catalog folder",
        ),
        case(
            "symlink back into the catalog",
            vec![Edit::Run(|d| {
                std::os::unix::fs::symlink(".", d.join("metrics/again")).unwrap()
            })],
            "check",
            1,
            "read already (a loop",
        ),
        // Terminal escapes in data reach the screen escaped.
        case(
            "escape sequences in a segment value",
            vec![Edit::Run(|d| {
                edit_data(
                    d,
                    "data/shoppers.csv",
                    ",north,",
                    ",north\x1b]0;pwned\x07\x1b[2J,",
                )
            })],
            "analyze one_page_checkout --by region",
            0,
            "north\\u001b]0;pwned\\u0007\\u001b[2J",
        ),
        // Statistics files with impossible numbers: every cell is checked.
        case(
            "stats file: NaN mean",
            vec![Edit::Run(|d| {
                stats(d, "one_page_checkout", |r| set(&mut r[0], "orders__mean", "NaN"))
            })],
            STATS,
            2,
            "column `orders__mean`: NaN is not a finite mean",
        ),
        case(
            "stats file: infinite variance",
            vec![Edit::Run(|d| {
                stats(d, "one_page_checkout", |r| set(&mut r[1], "orders__var", "inf"))
            })],
            STATS,
            2,
            "column `orders__var`: inf is not a finite variance",
        ),
        case(
            "stats file: negative variance",
            vec![Edit::Run(|d| {
                stats(d, "one_page_checkout", |r| set(&mut r[0], "revenue__var", "-5"))
            })],
            STATS,
            2,
            "-5 is a negative variance",
        ),
        case(
            "stats file: n above units",
            vec![Edit::Run(|d| {
                stats(d, "one_page_checkout", |r| set(&mut r[0], "orders__n", "999999"))
            })],
            STATS,
            2,
            "more than the arm's",
        ),
        case(
            "stats file: 0/1 mean of 1.7",
            vec![Edit::Run(|d| {
                stats(d, "one_page_checkout", |r| set(&mut r[0], "bought__mean", "1.7"))
            })],
            STATS,
            2,
            "must lie between 0 and 1",
        ),
        case(
            "stats file: covariance beyond Cauchy-Schwarz",
            vec![Edit::Run(|d| {
                stats(d, "one_page_checkout", |r| {
                    set(&mut r[0], "revenue__cov__orders", "1e12")
                })
            })],
            STATS,
            2,
            "by Cauchy–Schwarz",
        ),
        case(
            "stats file: units 1e30",
            vec![Edit::Run(|d| {
                stats(d, "one_page_checkout", |r| set(&mut r[0], "units", "1e30"))
            })],
            STATS,
            2,
            "more than any table holds",
        ),
        case(
            "stats file: duplicated arm row",
            vec![Edit::Run(|d| {
                stats(d, "one_page_checkout", |r| r.push(r[0].clone()))
            })],
            STATS,
            2,
            "a second row for this arm and the overall row",
        ),
        case(
            "stats file: segment row without segments",
            vec![Edit::Run(|d| {
                stats(d, "care_guide_banner", |r| {
                    let mut x = r[0].clone();
                    x.insert("segment_name".into(), plumb::execute::Cell::Text("region".into()));
                    x.insert("segment_value".into(), plumb::execute::Cell::Text("north".into()));
                    r.push(x);
                    for row in r.iter_mut() {
                        row.entry("segment_name".into())
                            .or_insert(plumb::execute::Cell::Null);
                        row.entry("segment_value".into())
                            .or_insert(plumb::execute::Cell::Null);
                    }
                })
            })],
            "analyze care_guide_banner --stats stats.csv",
            2,
            "read without segments",
        ),
        case(
            "stats file: byte-order mark",
            vec![Edit::Run(|d| {
                stats(d, "one_page_checkout", |_| {});
                let p = d.join("stats.csv");
                let t = std::fs::read_to_string(&p).unwrap();
                std::fs::write(p, format!("\u{feff}{t}")).unwrap()
            })],
            STATS,
            0,
            "Experiment one_page_checkout",
        ),
        // Labels are text end to end.
        case(
            "arm labels 007",
            vec![
                // Both experiments read the edited log: rename the arm in both.
                replace(
                    "control: control\n    split: {control: 50",
                    "control: \"007\"\n    split: {\"007\": 50",
                ),
                replace(
                    "control: control\n    split: {control: 50",
                    "control: \"007\"\n    split: {\"007\": 50",
                ),
                Edit::Run(|d| edit_data(d, "data/assignments.csv", ",control,", ",007,")),
            ],
            "analyze one_page_checkout",
            0,
            "Arms: 007 ",
        ),
        case(
            "arm labels stored as numbers",
            vec![
                replace(
                    "control: control\n    split: {control: 50, treatment: 50}",
                    "control: \"1.0\"\n    split: {\"1.0\": 50, \"2.0\": 50}",
                ),
                replace(
                    "control: control\n    split: {control: 50, treatment: 50}",
                    "control: \"1.0\"\n    split: {\"1.0\": 50, \"2.0\": 50}",
                ),
                Edit::Run(|d| {
                    edit_data(d, "data/assignments.csv", ",control,", ",1.0,");
                    edit_data(d, "data/assignments.csv", ",treatment,", ",2.0,")
                }),
            ],
            "analyze one_page_checkout",
            0,
            "Arms: 1.0 ",
        ),
        case(
            "unquoted number label in split",
            vec![replace(
                "split: {control: 50, treatment: 50}",
                "split: {control: 50, 1.10: 50}",
            )],
            "check",
            1,
            "`1.10` is an arm's label, but YAML reads it as the number 1.1",
        ),
        case(
            "unquoted number key",
            vec![replace("logged_as: one-page-checkout", "logged_as: 1.10")],
            "check",
            1,
            "YAML reads it as the number 1.1",
        ),
        // Found by `check` against the local data (bound, not run), located at the item.
        case(
            "qualified column typo",
            vec![replace(
                "of: \"amount_cents / 100.0\"",
                "of: \"e.amout_cents / 100.0\"",
            )],
            "check",
            1,
            "plant_shop.yaml:62:9",
        ),
        case(
            "aggregate inside of",
            vec![replace(
                "of: \"amount_cents / 100.0\"",
                "of: \"sum(amount_cents)\"",
            )],
            "check",
            1,
            "`of` of metric `revenue` holds an aggregate",
        ),
        case(
            "unknown exposure-log column",
            vec![replace("    arm: arm\n", "    arm: arms\n")],
            "check",
            1,
            "unknown column `arms` in `arm` (exposure log `assignments`)",
        ),
        case(
            "unknown local table",
            vec![replace("    table: orders\n", "    table: ordres\n")],
            "check",
            1,
            "did you mean `orders`?",
        ),
        case(
            "empty CSV file",
            vec![write("data/visits.csv", "")],
            "check",
            1,
            "data/visits.csv is empty",
        ),
        case(
            "header-only CSV file",
            vec![write("data/visits.csv", "shopper_id,visited_at,page\n")],
            "check",
            1,
            "the table has no rows",
        ),
        case(
            "text in a numeric column",
            vec![Edit::Run(text_amount)],
            "check",
            1,
            "'/(VARCHAR, DECIMAL(4,1))'",
        ),
        case(
            "text in a numeric column past the rows types are read from",
            vec![Edit::Run(text_past_the_sample)],
            "analyze one_page_checkout",
            2,
            "Could not convert string \"12abc\" to 'BIGINT'",
        ),
        case(
            "epoch-integer timestamps",
            vec![Edit::Run(epoch_visits)],
            "check",
            1,
            "`time` column `visited_at` of event table `visits` is BIGINT, not a timestamp",
        ),
        case(
            "unit ids of different types",
            vec![Edit::Run(integer_visit_ids)],
            "check",
            1,
            "ids of unit `shopper` are integers (BIGINT) in event table `visits` but text (VARCHAR) in event table `orders`",
        ),
        case(
            "where that is not true/false",
            vec![replace("where: \"status = 'paid'\"", "where: \"status\"")],
            "check",
            1,
            "`where` of metric `orders` is VARCHAR, not true/false",
        ),
        case(
            "unreadable Parquet file",
            vec![
                write("data/junk.parquet", "not parquet"),
                Edit::Replace(
                    "plumb.yaml",
                    "    orders: data/orders.csv\n",
                    "    orders: data/junk.parquet\n".into(),
                ),
            ],
            "check",
            1,
            "plumb.yaml:6:13",
        ),
        case(
            "typo in a split arm",
            vec![replace(
                "split: {control: 50, treatment: 50}",
                "split: {control: 50, treatmnet: 50}",
            )],
            "check",
            1,
            "error[E025]: experiment `one_page_checkout`: arm `treatmnet` of `split` is never logged, while the exposure log has arm `treatment`",
        ),
        case(
            "typo in a split arm gets a did-you-mean",
            vec![replace(
                "split: {control: 50, treatment: 50}",
                "split: {control: 50, treatmnet: 50}",
            )],
            "check",
            1,
            "did you mean `treatment`?",
        ),
        case(
            "experiment key never logged",
            vec![replace(
                "logged_as: one-page-checkout",
                "logged_as: one-page-chekout",
            )],
            "check",
            0,
            "1 warning",
        ),
        case(
            "experiment key never logged is denied in CI",
            vec![replace(
                "logged_as: one-page-checkout",
                "logged_as: one-page-chekout",
            )],
            "check --deny warnings",
            1,
            "W004",
        ),
        case(
            "a logging outage of one arm on some days",
            vec![Edit::Run(drop_treatment_days)],
            "analyze one_page_checkout",
            // The whole-period ratio still passes (p > 0.001); only the per-day check sees it.
            0,
            "Sample-ratio mismatch on 3 of 21 days (2026-03-05, 2026-03-06, 2026-03-07",
        ),
        // Reading what it should not.
        case(
            "data-modifying CTE in sql:",
            vec![replace(
                "    table: orders\n",
                "    sql: \"WITH d AS (DELETE FROM orders RETURNING *) SELECT * FROM d\"\n",
            )],
            "check",
            1,
            "only a query that reads data",
        ),
    ]
}

/// 21,000 more orders, the last with `12abc` as its amount: past the 20,480 rows the CSV
/// reader reads types from, so only reading the rows finds it.
fn text_past_the_sample(dir: &Path) {
    let path = dir.join("data/orders.csv");
    let mut text = std::fs::read_to_string(&path).unwrap();
    for i in 0..21_000 {
        text += &format!("x{i},s000001,2026-03-20 10:00:00,refunded,100,false\n");
    }
    text += "x-last,s000001,2026-03-20 10:00:00,paid,12abc,false\n";
    std::fs::write(path, text).unwrap();
}

/// The third order's amount as `12x`.
fn text_amount(dir: &Path) {
    let path = dir.join("data/orders.csv");
    let text = std::fs::read_to_string(&path).unwrap();
    let mut lines: Vec<String> = text.lines().map(String::from).collect();
    let mut cells: Vec<String> = lines[3].split(',').map(String::from).collect();
    cells[4] = "12x".into();
    lines[3] = cells.join(",");
    std::fs::write(path, lines.join("\n") + "\n").unwrap();
}

/// `visited_at` as epoch seconds.
fn epoch_visits(dir: &Path) {
    rewrite_csv(dir, "data/visits.csv", |cells| {
        let t = plumb::time::Timestamp::parse(&cells[1]).unwrap();
        cells[1] = t.0.to_string();
    });
}

/// Visit shopper ids as integers (`s000123` -> `123`), order ids stay text.
fn integer_visit_ids(dir: &Path) {
    rewrite_csv(dir, "data/visits.csv", |cells| {
        cells[0] = cells[0]
            .trim_start_matches('s')
            .trim_start_matches('0')
            .to_string();
    });
}

/// Rewrites each data line of a CSV file without quoted fields.
fn rewrite_csv(dir: &Path, file: &str, change: fn(&mut Vec<String>)) {
    let path = dir.join(file);
    let text = std::fs::read_to_string(&path).unwrap();
    let mut lines = text.lines();
    let mut out = format!("{}\n", lines.next().unwrap());
    for line in lines {
        let mut cells: Vec<String> = line.split(',').map(String::from).collect();
        change(&mut cells);
        out += &(cells.join(",") + "\n");
    }
    std::fs::write(path, out).unwrap();
}

const STATS: &str = "analyze one_page_checkout --stats stats.csv";

/// Writes `stats.csv`: the statistics table of `experiment` computed on the local data
/// (as a warehouse would return it), after `change`.
fn stats(dir: &Path, experiment: &str, change: fn(&mut Vec<plumb::execute::NamedRow>)) {
    let mut sources = plumb::source::SourceMap::new();
    let plumb::workspace::Opened::Ok(ws, _) = plumb::workspace::open(dir, &mut sources).unwrap() else {
        panic!("the demo catalog does not open");
    };
    let mut engine = plumb::execute::duckdb::LocalEngine::open(None, &ws.local_tables).unwrap();
    let id = ws.catalog.experiment(experiment).unwrap();
    let dialect = plumb::render::Dialect::load("duckdb", None).unwrap();
    let (plan, sql) = plumb::compile_experiment(&ws.catalog, id, &[], &dialect).unwrap();
    let mut rows = plumb::execute::Engine::readout(&mut engine, &plan, &sql).unwrap();
    change(&mut rows);
    let cols: Vec<String> = rows[0].keys().cloned().collect();
    let mut out = cols.join(",") + "\n";
    for r in &rows {
        let cells: Vec<String> = cols
            .iter()
            .map(|c| match &r[c] {
                plumb::execute::Cell::Null => String::new(),
                plumb::execute::Cell::Number(x) => format!("{x:?}"),
                plumb::execute::Cell::Text(t) => t.clone(),
            })
            .collect();
        out += &(cells.join(",") + "\n");
    }
    std::fs::write(dir.join("stats.csv"), out).unwrap();
}

fn set(row: &mut plumb::execute::NamedRow, column: &str, value: &str) {
    assert!(row.contains_key(column), "no column {column}: {:?}", row.keys());
    row.insert(column.into(), plumb::execute::Cell::Text(value.into()));
}

/// Replaces every occurrence of `old` in a data file.
/// Treatment exposures of one-page-checkout on 2026-03-05 to 03-07 are lost (a logging outage).
fn drop_treatment_days(dir: &Path) {
    let path = dir.join("data/assignments.csv");
    let text = std::fs::read_to_string(&path).unwrap();
    let kept: Vec<&str> = text
        .lines()
        .filter(|l| {
            !(l.contains(",one-page-checkout,treatment,")
                && ["2026-03-05", "2026-03-06", "2026-03-07"]
                    .iter()
                    .any(|d| l.contains(d)))
        })
        .collect();
    assert!(kept.len() < text.lines().count(), "rows were dropped");
    std::fs::write(&path, kept.join("\n") + "\n").unwrap();
}

fn edit_data(dir: &Path, file: &str, old: &str, new: &str) {
    let path = dir.join(file);
    let text = std::fs::read_to_string(&path).unwrap();
    assert!(text.contains(old), "`{old}` is not in {file}");
    std::fs::write(&path, text.replace(old, new)).unwrap();
}

fn run(case: &Case) -> Result<(), String> {
    let dir = tempfile::tempdir().unwrap();
    plumb::demo::write_demo(
        dir.path(),
        &plumb::demo::DemoConfig {
            seed: 5,
            shoppers: 1_500,
        },
    )
    .unwrap();
    for edit in &case.edit {
        match edit {
            Edit::Replace(file, old, new) => {
                let path = dir.path().join(file);
                let text = std::fs::read_to_string(&path).unwrap();
                assert!(text.contains(old), "{}: `{old}` is not in {file}", case.name);
                std::fs::write(&path, text.replacen(old, new, 1)).unwrap();
            }
            Edit::Write(file, bytes) => {
                let path = dir.path().join(file);
                std::fs::create_dir_all(path.parent().unwrap()).unwrap();
                std::fs::write(path, bytes).unwrap();
            }
            Edit::Run(f) => f(dir.path()),
        }
    }
    let mut child = Command::new(env!("CARGO_BIN_EXE_plumb"))
        .current_dir(dir.path())
        .args(["--workspace", "."])
        .args(&case.args)
        .stdout(std::process::Stdio::piped())
        .stderr(std::process::Stdio::piped())
        .spawn()
        .unwrap();
    // Output is drained while waiting (a full pipe would block the child), and a hang is a
    // failure, not a stuck test run.
    let (mut o, mut e) = (child.stdout.take().unwrap(), child.stderr.take().unwrap());
    let drain_out = std::thread::spawn(move || {
        let mut v = Vec::new();
        std::io::Read::read_to_end(&mut o, &mut v).map(|_| v)
    });
    let drain_err = std::thread::spawn(move || {
        let mut v = Vec::new();
        std::io::Read::read_to_end(&mut e, &mut v).map(|_| v)
    });
    let deadline = std::time::Instant::now() + Duration::from_secs(60);
    let status = loop {
        if let Some(status) = child.try_wait().unwrap() {
            break status;
        }
        if std::time::Instant::now() > deadline {
            child.kill().unwrap();
            return Err(format!("{}: still running after 60 s", case.name));
        }
        std::thread::sleep(Duration::from_millis(20));
    };
    let out = std::process::Output {
        status,
        stdout: drain_out.join().unwrap().unwrap(),
        stderr: drain_err.join().unwrap().unwrap(),
    };
    let stdout = String::from_utf8_lossy(&out.stdout);
    let stderr = String::from_utf8_lossy(&out.stderr);
    let code = out.status.code();
    // Errors are read from stderr, except a JSON document, which is the answer on stdout.
    let json = case.args.windows(2).any(|w| w[0] == "--format" && w[1] == "json");
    let shown = if case.exit == 0 || json { &stdout } else { &stderr };
    if code != Some(case.exit) || !shown.contains(case.says) {
        let cut = |s: &str| s.chars().take(1500).collect::<String>();
        return Err(format!(
            "{}: expected exit {} saying `{}`, got {code:?}\n--- stdout\n{}\n--- stderr\n{}",
            case.name,
            case.exit,
            case.says,
            cut(&stdout),
            cut(&stderr)
        ));
    }
    if stderr.contains("panicked") || stderr.contains("a bug in plumb") {
        return Err(format!("{}: {}", case.name, stderr));
    }
    Ok(())
}

#[test]
fn every_hostile_case_gives_its_exit_code_and_message() {
    let cases = cases();
    let mut names = std::collections::BTreeSet::new();
    for c in &cases {
        assert!(names.insert(c.name), "duplicate case name {}", c.name);
    }
    // Two at a time: the cases are independent workspaces.
    let failures: Vec<String> = std::thread::scope(|s| {
        let chunks: Vec<_> = cases.chunks(cases.len().div_ceil(2)).collect();
        let handles: Vec<_> = chunks
            .into_iter()
            .map(|chunk| s.spawn(move || chunk.iter().filter_map(|c| run(c).err()).collect::<Vec<_>>()))
            .collect();
        handles.into_iter().flat_map(|h| h.join().unwrap()).collect()
    });
    assert!(
        failures.is_empty(),
        "{} of {} cases failed:\n\n{}",
        failures.len(),
        cases.len(),
        failures.join("\n\n")
    );
}
