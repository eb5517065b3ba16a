//! Parsing the SQL fragments users write in the catalog (`where`, `of`, `value`, `sql`).
//!
//! Fragments are parsed once, here, with sqlparser's generic dialect, so a typo is a located
//! catalog error rather than a database error at run time. The parsed expression is what the
//! later stages qualify and re-emit for the target dialect.

use sqlparser::ast::{Expr, Query, Statement};
use sqlparser::dialect::GenericDialect;
use sqlparser::parser::Parser;
use sqlparser::tokenizer::Token;

/// A parse failure with a 1-based line and column inside the fragment, when known.
#[derive(Debug)]
pub struct FragmentError {
    pub message: String,
    pub line: usize,
    pub column: usize,
}

fn error(e: impl ToString) -> FragmentError {
    let message = e.to_string();
    let (line, column) = position(&message).unwrap_or((1, 1));
    let message = match message.find(" at Line: ") {
        Some(i) => message[..i].to_string(),
        None => message,
    };
    FragmentError {
        message: message.trim_start_matches("sql parser error: ").to_string(),
        line,
        column,
    }
}

/// sqlparser writes positions as "Line: L, Column: C".
fn position(message: &str) -> Option<(usize, usize)> {
    let i = message.rfind("Line: ")?;
    let rest = &message[i + 6..];
    let (line, rest) = rest.split_once(", Column: ")?;
    let column: String = rest.chars().take_while(|c| c.is_ascii_digit()).collect();
    Some((line.trim().parse().ok()?, column.parse().ok()?))
}

/// Parses a scalar expression, rejecting trailing text such as `a = 1; drop table x`.
pub fn parse_expr(text: &str) -> Result<Expr, FragmentError> {
    let dialect = GenericDialect {};
    let mut parser = Parser::new(&dialect).try_with_sql(text).map_err(error)?;
    let expr = parser.parse_expr().map_err(error)?;
    let next = parser.peek_token();
    if next.token != Token::EOF {
        return Err(FragmentError {
            message: format!("unexpected `{}` after the expression", next.token),
            line: next.span.start.line as usize,
            column: next.span.start.column as usize,
        });
    }
    Ok(expr)
}

/// Parses a single `SELECT` query (an event table's `sql:`).
pub fn parse_query(text: &str) -> Result<Box<Query>, FragmentError> {
    let dialect = GenericDialect {};
    let statements = Parser::parse_sql(&dialect, text).map_err(error)?;
    match statements.as_slice() {
        [Statement::Query(q)] => Ok(q.clone()),
        [] => Err(FragmentError {
            message: "the query is empty".into(),
            line: 1,
            column: 1,
        }),
        [_] => Err(FragmentError {
            message: "only a SELECT query is allowed here".into(),
            line: 1,
            column: 1,
        }),
        _ => Err(FragmentError {
            message: "only one statement is allowed here".into(),
            line: 1,
            column: 1,
        }),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn accepts_expressions_and_rejects_trailing_statements() {
        assert!(parse_expr("status = 'paid' and not is_test").is_ok());
        let e = parse_expr("status = 'paid'; drop table orders").unwrap_err();
        assert!(e.message.contains(";"), "{}", e.message);
        let e = parse_expr("amount +").unwrap_err();
        assert_eq!(e.line, 1);
        assert!(parse_query("select * from orders").is_ok());
        assert!(parse_query("delete from orders").is_err());
    }
}
