//! Stage 5, `validate`: re-parses generated SQL with sqlparser in the target dialect.
//!
//! A template edit that produces invalid SQL is caught here, before a warehouse sees it.
//! Each dialect's capabilities file names the sqlparser dialect to use.

use sqlparser::dialect::dialect_from_str;
use sqlparser::parser::Parser;

/// The nesting depth a generated statement may reach: the templates' own levels plus
/// fragments of at most [`crate::resolve::sql::MAX_DEPTH`] levels each.
pub const MAX_DEPTH: usize = 128;

/// Parses `sql` with the sqlparser dialect `dialect` and checks it is exactly one statement.
pub fn validate(sql: &str, dialect: &str) -> Result<(), String> {
    let d = dialect_from_str(dialect).ok_or_else(|| format!("sqlparser has no dialect `{dialect}`"))?;
    let statements = Parser::new(d.as_ref())
        .with_recursion_limit(MAX_DEPTH)
        .try_with_sql(sql)
        .and_then(|mut p| p.parse_statements())
        .map_err(|e| e.to_string())?;
    match statements.len() {
        1 => Ok(()),
        n => Err(format!("expected one statement, found {n}")),
    }
}

#[cfg(test)]
mod tests {
    #[test]
    fn rejects_two_statements() {
        assert!(super::validate("select 1", "duckdb").is_ok());
        assert!(super::validate("select 1; select 2", "duckdb").is_err());
        assert!(super::validate("select 1", "no-such").is_err());
    }
}
