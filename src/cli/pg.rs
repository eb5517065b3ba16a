//! PostgreSQL connection settings for `--engine postgres://...`: the URL, completed from
//! libpq's environment variables and password file, as `psql` would. Reading the environment
//! is the command line's job, so this lives in `cli/`; the password is never printed.

use crate::error::{Error, Result};
use std::path::PathBuf;

/// Connection settings for `--engine`: the URL, completed from libpq's environment variables
/// and password file. Reading the environment is the command line's job.
pub fn config(url: &str) -> Result<postgres::Config> {
    let mut config: postgres::Config = url.parse().map_err(|e| {
        Error::usage(format!(
            "--engine: not a PostgreSQL URL ({e}); write postgres://USER@HOST:PORT/DB"
        ))
    })?;
    let env = |k: &str| std::env::var(k).ok().filter(|v| !v.is_empty());
    if config.get_hosts().is_empty() {
        config.host(&env("PGHOST").unwrap_or_else(|| "localhost".into()));
    }
    if config.get_ports().is_empty()
        && let Some(p) = env("PGPORT").and_then(|p| p.parse::<u16>().ok())
    {
        config.port(p);
    }
    if config.get_user().is_none() {
        let user = env("PGUSER")
            .or_else(|| env("USER"))
            .unwrap_or_else(|| "postgres".into());
        config.user(&user);
    }
    if config.get_dbname().is_none()
        && let Some(db) = env("PGDATABASE")
    {
        config.dbname(&db);
    }
    if config.get_password().is_none() {
        if let Some(pw) = env("PGPASSWORD") {
            config.password(pw);
        } else if let Some(pw) = password_from_file(&config, env("PGPASSFILE"), env("HOME")) {
            config.password(pw);
        }
    }
    Ok(config)
}

/// The first matching line `host:port:database:user:password` of the password file
/// (`*` matches anything; `\:` and `\\` are escapes), as libpq reads it.
fn password_from_file(
    config: &postgres::Config,
    file: Option<String>,
    home: Option<String>,
) -> Option<String> {
    let path = file
        .map(PathBuf::from)
        .or_else(|| home.map(|h| PathBuf::from(h).join(".pgpass")))?;
    let text = std::fs::read_to_string(path).ok()?;
    let host = match config.get_hosts().first() {
        Some(postgres::config::Host::Tcp(h)) => h.clone(),
        _ => "localhost".into(),
    };
    let port = config.get_ports().first().copied().unwrap_or(5432).to_string();
    let db = config.get_dbname().unwrap_or("").to_string();
    let user = config.get_user().unwrap_or("").to_string();
    for line in text.lines().filter(|l| !l.trim_start().starts_with('#')) {
        let mut fields = Vec::new();
        let mut field = String::new();
        let mut chars = line.chars();
        while let Some(c) = chars.next() {
            match c {
                '\\' => field.extend(chars.next()),
                ':' if fields.len() < 4 => fields.push(std::mem::take(&mut field)),
                c => field.push(c),
            }
        }
        fields.push(field);
        if fields.len() != 5 {
            continue;
        }
        let ok = |pattern: &str, value: &str| pattern == "*" || pattern == value;
        if ok(&fields[0], &host) && ok(&fields[1], &port) && ok(&fields[2], &db) && ok(&fields[3], &user) {
            return Some(fields[4].clone());
        }
    }
    None
}
