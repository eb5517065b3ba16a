//! Named engines: `engines:` and `default_engine:` in plumb.yaml, read into checked specs.
//!
//! A team names the places its SQL runs once — the local DuckDB, a PostgreSQL server by URL,
//! or any warehouse's own command-line client (a *command engine*) — and picks one with
//! `--engine NAME`. This module turns the declarations into [`EngineSpec`]s and reports every
//! mistake at its place in plumb.yaml (E026, E028, E029); running them is `execute::command`'s and the
//! context's job.

use crate::diagnostics::{Diagnostic, did_you_mean};
use crate::load::{RawWorkspace, yaml::Seg};

/// What one named engine is.
#[derive(Debug, Clone, PartialEq)]
pub enum EngineSpec {
    /// The embedded DuckDB over `local:`.
    Duckdb,
    /// A PostgreSQL server; the URL is completed from the environment by the command line.
    Url { dialect: String, url: String },
    /// A command-line client.
    Command(CommandSpec),
}

/// A command engine: argv run without a shell, the result read from its stdout.
#[derive(Debug, Clone, PartialEq)]
pub struct CommandSpec {
    /// The engine's name in plumb.yaml.
    pub name: String,
    pub dialect: String,
    /// Arguments; `{sql_file}` in any of them is replaced by the statement's file.
    pub argv: Vec<String>,
    pub output: Output,
    /// Seconds one statement may run.
    pub timeout: Option<u64>,
}

/// The result format a command engine prints.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Output {
    Csv,
    Tsv,
}

/// The placeholder of the statement's file in a command engine's argv.
pub const SQL_FILE: &str = "{sql_file}";

/// The engines of a workspace: declared names in order, and the default.
#[derive(Debug, Clone, Default)]
pub struct Engines {
    pub named: Vec<(String, EngineSpec)>,
    /// `default_engine:`; `None` means the local DuckDB.
    pub default: Option<String>,
}

impl Engines {
    pub fn get(&self, name: &str) -> Option<&EngineSpec> {
        self.named.iter().find(|(n, _)| n == name).map(|(_, s)| s)
    }
}

/// Parses `30m`, `90s`, `2h` or `1d` into seconds.
pub fn parse_timeout(text: &str) -> Option<u64> {
    let t = text.trim();
    let split = t.find(|c: char| !c.is_ascii_digit())?;
    let (n, unit) = t.split_at(split);
    let n: u64 = n.parse().ok().filter(|n| *n > 0)?;
    let factor = match unit {
        "s" => 1,
        "m" => 60,
        "h" => 3600,
        "d" => 86_400,
        _ => return None,
    };
    n.checked_mul(factor)
}

/// Reads and checks `engines:` and `default_engine:`; invalid entries are left out, each with
/// an error at its place. (An unknown dialect is reported when the engine is used, since
/// `--dialects-dir` may add it.)
pub fn read(raw: &RawWorkspace, diags: &mut Vec<Diagnostic>) -> Engines {
    let span = |path: &[&str]| {
        let segs: Vec<Seg> = path.iter().map(|k| Seg::Key((*k).to_string())).collect();
        raw.value_span(&segs)
    };
    let mut out = Engines::default();
    for (name, decl) in raw.value.engines.iter().flat_map(|e| &e.0) {
        let at = |key: Option<&str>| match key {
            Some(k) => span(&["engines", name, k]).or_else(|| span(&["engines", name])),
            None => span(&["engines", name]),
        };
        let error = |key: Option<&str>, message: String, hint: &str| {
            Diagnostic::error("E026", message)
                .at(at(key))
                .hint(hint.to_string())
        };
        let kinds = [decl.duckdb.is_some(), decl.url.is_some(), decl.command.is_some()];
        if kinds.iter().filter(|k| **k).count() != 1 {
            diags.push(error(
                None,
                format!("engine `{name}` must have exactly one of `duckdb`, `url` and `command`"),
                "write `duckdb: {}` for the local data, `url: postgres://...` for a PostgreSQL server, or `command: [client, ..., \"{sql_file}\"]` for a command-line client",
            ));
            continue;
        }
        if decl.duckdb.is_some() {
            if let Some(d) = decl.dialect.as_deref().filter(|d| *d != "duckdb") {
                diags.push(error(
                    Some("dialect"),
                    format!(
                        "engine `{name}` is the local DuckDB, which speaks the duckdb dialect, not `{d}`"
                    ),
                    "remove `dialect:` or write `dialect: duckdb`",
                ));
                continue;
            }
            out.named.push((name.clone(), EngineSpec::Duckdb));
            continue;
        }
        let Some(dialect) = decl.dialect.clone() else {
            diags.push(error(
                None,
                format!("engine `{name}` does not say which SQL dialect it speaks"),
                "add `dialect:` (e.g. postgres, spark, snowflake, bigquery, trino, redshift)",
            ));
            continue;
        };
        if let Some(url) = &decl.url {
            if dialect != "postgres" || !(url.starts_with("postgres://") || url.starts_with("postgresql://"))
            {
                diags.push(error(
                    Some("url"),
                    format!("engine `{name}`: plumb connects by URL to PostgreSQL only (`postgres://...`, dialect postgres)"),
                    "for any other engine, run its command-line client: `command: [client, ..., \"{sql_file}\"]`",
                ));
                continue;
            }
            if url.contains('@')
                && url
                    .split('@')
                    .next()
                    .is_some_and(|userinfo| userinfo.matches(':').count() > 1)
            {
                diags.push(error(
                    Some("url"),
                    format!("engine `{name}`: the URL holds a password, and plumb.yaml is in git"),
                    "remove the password from the URL; set PGPASSWORD or use the password file (~/.pgpass)",
                ));
                continue;
            }
            out.named.push((
                name.clone(),
                EngineSpec::Url {
                    dialect,
                    url: url.clone(),
                },
            ));
            continue;
        }
        let argv = decl.command.clone().unwrap_or_default();
        if argv.first().is_none_or(|p| p.trim().is_empty()) {
            diags.push(error(
                Some("command"),
                format!("engine `{name}`: `command` is empty"),
                "write the client's argv, e.g. [psql, --csv, -f, \"{sql_file}\"]",
            ));
            continue;
        }
        let output = match decl.output.as_deref() {
            None | Some("csv") => Output::Csv,
            Some("tsv") => Output::Tsv,
            Some(other) => {
                diags.push(
                    Diagnostic::error("E028", format!("engine `{name}`: unknown output `{other}`"))
                        .at(at(Some("output")))
                        .hint("write `output: csv` or `output: tsv` (the client prints the result with a header row)"),
                );
                continue;
            }
        };
        let timeout = match decl.timeout.as_deref() {
            None => None,
            Some(t) => match parse_timeout(t) {
                Some(s) => Some(s),
                None => {
                    diags.push(
                        Diagnostic::error("E029", format!("engine `{name}`: `{t}` is not a timeout"))
                            .at(at(Some("timeout")))
                            .hint("write a positive whole number with s, m, h or d, e.g. `30m`"),
                    );
                    continue;
                }
            },
        };
        out.named.push((
            name.clone(),
            EngineSpec::Command(CommandSpec {
                name: name.clone(),
                dialect,
                argv,
                output,
                timeout,
            }),
        ));
    }
    if let Some(default) = &raw.value.default_engine {
        let declared = raw
            .value
            .engines
            .iter()
            .flat_map(|e| &e.0)
            .any(|(n, _)| n == default);
        if declared {
            out.default = Some(default.clone());
        } else if default == "local" {
            // The built-in name of the local DuckDB.
        } else {
            let names: Vec<&str> = out.named.iter().map(|(n, _)| n.as_str()).collect();
            diags.push(
                Diagnostic::error(
                    "E026",
                    format!("default_engine `{default}` is not declared under `engines:`"),
                )
                .at(span(&["default_engine"]))
                .hint(did_you_mean(default, names.iter().copied()).unwrap_or_else(|| {
                    format!(
                        "declared engines: {}",
                        if names.is_empty() {
                            "(none)".into()
                        } else {
                            names.join(", ")
                        }
                    )
                })),
            );
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn timeouts() {
        assert_eq!(parse_timeout("30m"), Some(1800));
        assert_eq!(parse_timeout("90s"), Some(90));
        assert_eq!(parse_timeout("2h"), Some(7200));
        assert_eq!(parse_timeout("1d"), Some(86_400));
        for bad in ["", "0m", "m", "30", "30min", "-5m", "1.5h"] {
            assert_eq!(parse_timeout(bad), None, "{bad}");
        }
    }
}
