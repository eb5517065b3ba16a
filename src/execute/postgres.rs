//! A PostgreSQL server as the engine (`plumb analyze --engine postgres://...`).
//!
//! Runs the postgres-dialect SQL with the simple query protocol, which returns every value as
//! text (numeric sums, timestamps and floats alike), so no server type needs a Rust mapping.
//! Connection settings are assembled by the command line (URL, libpq environment variables,
//! password file); they are never printed: errors name the user and database only.

use super::{Cell, NamedRow};
use crate::error::{Error, Result};
use postgres::{Client, Config, NoTls, SimpleQueryMessage};

/// An open connection.
pub struct PostgresEngine {
    client: Client,
}

impl PostgresEngine {
    pub fn connect(config: &Config) -> Result<PostgresEngine> {
        let mut client = config.connect(NoTls).map_err(|e| {
            Error::engine(format!(
                "cannot connect to PostgreSQL as user {} to database {}: {e}",
                config.get_user().unwrap_or("(default)"),
                config.get_dbname().unwrap_or("(default)")
            ))
        })?;
        // plumb's literals are UTC: timestamptz columns and day windows must be compared in
        // UTC whatever the server's or the user's default time zone.
        client
            .batch_execute("SET TIME ZONE 'UTC'")
            .map_err(|e| Error::engine(format!("PostgreSQL: setting the session time zone to UTC: {e}")))?;
        Ok(PostgresEngine { client })
    }
}

impl super::Engine for PostgresEngine {
    fn describe(&self) -> String {
        "PostgreSQL".into()
    }

    fn dialect(&self) -> &str {
        "postgres"
    }

    /// Runs one statement and returns its rows by (lowercased) column name.
    fn query(&mut self, sql: &str) -> Result<Vec<NamedRow>> {
        let messages = self
            .client
            .simple_query(sql)
            .map_err(|e| Error::engine(format!("PostgreSQL: {e}")))?;
        let mut out = Vec::new();
        for m in messages {
            if let SimpleQueryMessage::Row(row) = m {
                let mut named = NamedRow::new();
                for (i, col) in row.columns().iter().enumerate() {
                    let cell = match row.get(i) {
                        None => Cell::Null,
                        Some(t) => match t.parse::<f64>() {
                            Ok(x) => Cell::Number(x),
                            Err(_) => Cell::Text(t.to_string()),
                        },
                    };
                    named.insert(col.name().to_ascii_lowercase(), cell);
                }
                out.push(named);
            }
        }
        Ok(out)
    }
}
