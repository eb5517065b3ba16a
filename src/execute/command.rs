//! A command engine: any warehouse's own command-line client, run once per statement.
//!
//! plumb writes the compiled statement to a temporary file, runs the engine's argv without a
//! shell (`{sql_file}` replaced by the file's path; without the placeholder the statement goes
//! to the client's stdin), and reads the result the client prints on stdout as CSV or TSV with
//! a header row. A readout is then checked exactly as a statistics file is (fingerprint,
//! layout, every cell), so a client that prints the wrong thing can never become a readout.
//! A non-zero exit is an engine error with the end of the client's stderr; a timeout kills the
//! client. Environment variables pass through untouched; plumb prints only the program's name,
//! never the rest of the argv (it may hold credentials).

use super::{Engine, NamedRow};
use crate::engines::{CommandSpec, Output, SQL_FILE};
use crate::error::{Error, Result};
use crate::plan::ExperimentPlan;
use std::io::{Read, Write};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

/// How much of the client's stderr an error shows.
const STDERR_TAIL_LINES: usize = 15;

pub struct CommandEngine {
    spec: CommandSpec,
    /// Folder of the temporary statement files.
    dir: std::path::PathBuf,
    statements: u32,
}

impl CommandEngine {
    pub fn new(spec: CommandSpec) -> CommandEngine {
        CommandEngine {
            spec,
            dir: std::env::temp_dir(),
            statements: 0,
        }
    }

    fn program(&self) -> &str {
        &self.spec.argv[0]
    }

    /// The argv with `{sql_file}` replaced by `file`, and whether the statement goes to stdin.
    pub fn argv(&self, file: &str) -> (Vec<String>, bool) {
        let stdin = !self.spec.argv.iter().any(|a| a.contains(SQL_FILE));
        (
            self.spec.argv.iter().map(|a| a.replace(SQL_FILE, file)).collect(),
            stdin,
        )
    }

    fn err(&self, message: String) -> Error {
        Error::engine(format!(
            "engine `{}` (`{}`): {message}",
            self.spec.name,
            self.program()
        ))
    }

    /// Runs the client on `sql` and returns its stdout.
    fn run(&mut self, sql: &str) -> Result<String> {
        self.statements += 1;
        let file = self
            .dir
            .join(format!("plumb-{}-{}.sql", std::process::id(), self.statements));
        std::fs::write(&file, format!("{sql}\n"))
            .map_err(|e| self.err(format!("cannot write the statement to {}: {e}", file.display())))?;
        let result = self.run_file(&file, sql);
        let _ = std::fs::remove_file(&file);
        result
    }

    fn run_file(&self, file: &std::path::Path, sql: &str) -> Result<String> {
        let (argv, stdin) = self.argv(&file.to_string_lossy());
        let mut child = Command::new(&argv[0])
            .args(&argv[1..])
            .stdin(if stdin { Stdio::piped() } else { Stdio::null() })
            .stdout(Stdio::piped())
            .stderr(Stdio::piped())
            .spawn()
            .map_err(|e| {
                self.err(format!(
                    "cannot start it ({e}); is the client installed and on PATH?"
                ))
            })?;
        if stdin && let Some(mut input) = child.stdin.take() {
            let text = format!("{sql}\n");
            std::thread::spawn(move || {
                let _ = input.write_all(text.as_bytes());
            });
        }
        let mut out = child.stdout.take().map(|mut s| {
            std::thread::spawn(move || {
                let mut buf = Vec::new();
                let _ = s.read_to_end(&mut buf);
                buf
            })
        });
        let mut errs = child.stderr.take().map(|mut s| {
            std::thread::spawn(move || {
                let mut buf = Vec::new();
                let _ = s.read_to_end(&mut buf);
                buf
            })
        });
        let started = Instant::now();
        let status = loop {
            match child.try_wait() {
                Ok(Some(status)) => break status,
                Ok(None) => {}
                Err(e) => return Err(self.err(format!("lost track of it: {e}"))),
            }
            if let Some(limit) = self.spec.timeout
                && started.elapsed() > Duration::from_secs(limit)
            {
                let _ = child.kill();
                let _ = child.wait();
                return Err(self.err(format!(
                    "did not finish within its timeout of {}; plumb stopped it (raise `timeout:` in plumb.yaml if the statement needs longer)",
                    human_duration(limit)
                )));
            }
            std::thread::sleep(Duration::from_millis(20));
        };
        let stdout = out.take().and_then(|h| h.join().ok()).unwrap_or_default();
        let stderr = errs.take().and_then(|h| h.join().ok()).unwrap_or_default();
        if !status.success() {
            let stderr = String::from_utf8_lossy(&stderr);
            let lines: Vec<&str> = stderr.lines().filter(|l| !l.trim().is_empty()).collect();
            let tail = lines[lines.len().saturating_sub(STDERR_TAIL_LINES)..].join("\n  ");
            return Err(self.err(format!(
                "exited with {status}{}",
                if tail.is_empty() {
                    " and printed nothing on stderr".to_string()
                } else {
                    format!("; the end of its error output:\n  {tail}")
                }
            )));
        }
        String::from_utf8(stdout).map_err(|_| self.err("printed a result that is not UTF-8 text".into()))
    }
}

/// `45 s`, `30 min`, `2 h`.
fn human_duration(seconds: u64) -> String {
    if seconds.is_multiple_of(3600) {
        format!("{} h", seconds / 3600)
    } else if seconds.is_multiple_of(60) {
        format!("{} min", seconds / 60)
    } else {
        format!("{seconds} s")
    }
}

/// Tab-separated values with a header row, as clients print them (`NULL` / `\N` are empty).
fn parse_tsv(text: &str) -> std::result::Result<Vec<NamedRow>, String> {
    let mut lines = text
        .lines()
        .map(|l| l.trim_end_matches('\r'))
        .filter(|l| !l.is_empty());
    let header: Vec<String> = lines
        .next()
        .ok_or("it printed nothing")?
        .split('\t')
        .map(|h| h.trim().to_ascii_lowercase())
        .collect();
    lines
        .enumerate()
        .map(|(i, l)| {
            let cells: Vec<&str> = l.split('\t').collect();
            if cells.len() != header.len() {
                return Err(format!(
                    "line {} has {} fields, the header {}",
                    i + 2,
                    cells.len(),
                    header.len()
                ));
            }
            Ok(header
                .iter()
                .cloned()
                .zip(cells.into_iter().map(super::cell_from_text))
                .collect())
        })
        .collect()
}

impl Engine for CommandEngine {
    fn describe(&self) -> String {
        format!(
            "engine `{}` ({}, {} dialect)",
            self.spec.name,
            self.program(),
            self.spec.dialect
        )
    }

    fn dialect(&self) -> &str {
        &self.spec.dialect
    }

    fn query(&mut self, sql: &str) -> Result<Vec<NamedRow>> {
        let text = self.run(sql)?;
        if text.trim().is_empty() {
            return Err(self.err(
                "printed nothing on stdout; it must print the result with a header row (psql: --csv; spark-sql: --conf spark.hive.cli.print.header=true)".into(),
            ));
        }
        let parsed = match self.spec.output {
            Output::Csv => super::parse_csv(&text),
            Output::Tsv => parse_tsv(&text),
        };
        parsed.map_err(|e| {
            self.err(format!(
                "its output is not the {} table with a header row that plumb reads: {e}",
                match self.spec.output {
                    Output::Csv => "CSV",
                    Output::Tsv => "tab-separated",
                }
            ))
        })
    }

    /// The readout, checked as a statistics file is: same fingerprint and layout.
    fn readout(&mut self, plan: &ExperimentPlan, sql: &str) -> Result<Vec<NamedRow>> {
        let rows = self.query(sql)?;
        super::check_fingerprint(plan, &rows)
            .map_err(|e| self.err(format!("its result does not fit: {e}")))?;
        Ok(rows)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn tsv_reads_labels_as_text_and_null_as_empty() {
        let rows = parse_tsv("arm\tunits\tx\n007\t12\tNULL\n").unwrap();
        assert_eq!(rows[0]["arm"], super::super::Cell::Text("007".into()));
        assert_eq!(rows[0]["x"], super::super::Cell::Null);
        assert!(
            parse_tsv("a\tb\n1\n")
                .unwrap_err()
                .contains("line 2 has 1 fields")
        );
        assert!(parse_tsv("").is_err());
    }
}
