//! Parsing the SQL fragments users write in the catalog (`where`, `of`, `value`, `sql`).
//!
//! Fragments are parsed once, here, with sqlparser's generic dialect, so a typo is a located
//! catalog error rather than a database error at run time. The parsed expression is what the
//! later stages qualify and re-emit for the target dialect.

use sqlparser::ast::{Expr, Query, Statement, Value, ValueWithSpan, Visit, Visitor};
use sqlparser::dialect::GenericDialect;
use sqlparser::parser::Parser;
use sqlparser::tokenizer::Token;
use std::ops::ControlFlow;

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
    portable_literals(&expr)?;
    Ok(expr)
}

/// Parses a single `SELECT` query (an event table's `sql:`).
pub fn parse_query(text: &str) -> Result<Box<Query>, FragmentError> {
    let dialect = GenericDialect {};
    let statements = Parser::parse_sql(&dialect, text).map_err(error)?;
    match statements.as_slice() {
        [Statement::Query(q)] => {
            portable_literals(q.as_ref())?;
            Ok(q.clone())
        }
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

/// The text of a string literal that every dialect can spell (`'text'`, and `E'...'`,
/// `N'...'`, `U&'...'` whose text sqlparser has already unescaped), or `None` for other values.
/// The render stage writes this text again with the target dialect's own escaping.
pub fn string_content(value: &Value) -> Option<String> {
    match value {
        Value::SingleQuotedString(s)
        | Value::DoubleQuotedString(s)
        | Value::EscapedStringLiteral(s)
        | Value::NationalStringLiteral(s)
        | Value::UnicodeStringLiteral(s) => Some(s.clone()),
        _ => None,
    }
}

/// Rejects string literal forms that the render stage cannot re-emit for every dialect
/// (dollar-quoted, byte, hex and other engine-specific strings): printed as written, their
/// quotes would mean something else to another engine.
fn portable_literals<T: Visit>(node: &T) -> Result<(), FragmentError> {
    struct Check(Option<FragmentError>);
    impl Visitor for Check {
        type Break = ();
        fn pre_visit_value(&mut self, v: &ValueWithSpan) -> ControlFlow<()> {
            let portable = string_content(&v.value).is_some()
                || matches!(v.value, Value::Number(..) | Value::Boolean(_) | Value::Null);
            if portable {
                return ControlFlow::Continue(());
            }
            self.0 = Some(FragmentError {
                message: format!(
                    "the literal `{}` is written in a form that not every SQL dialect reads the same way; write text as 'text' (a quote inside doubled: 'it''s')",
                    v.value
                ),
                line: v.span.start.line.max(1) as usize,
                column: v.span.start.column.max(1) as usize,
            });
            ControlFlow::Break(())
        }
    }
    let mut check = Check(None);
    let _ = node.visit(&mut check);
    check.0.map_or(Ok(()), Err)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn accepts_expressions_and_rejects_trailing_statements() {
        assert!(parse_expr("status = 'paid' and not is_test").is_ok());
        assert!(parse_expr("status = E'it\\'s' or status = N'x'").is_ok());
        let e = parse_expr("status = $$x' OR 1 = 1 --$$").unwrap_err();
        assert!(e.message.contains("'text'"), "{}", e.message);
        assert_eq!((e.line, e.column), (1, 10));
        let e = parse_expr("status = 'paid'; drop table orders").unwrap_err();
        assert!(e.message.contains(";"), "{}", e.message);
        let e = parse_expr("amount +").unwrap_err();
        assert_eq!(e.line, 1);
        assert!(parse_query("select * from orders").is_ok());
        assert!(parse_query("delete from orders").is_err());
    }
}
