//! Parsing the SQL fragments users write in the catalog (`where`, `of`, `value`, `sql`).
//!
//! Fragments are parsed once, here, with sqlparser's generic dialect, so a typo is a located
//! catalog error rather than a database error at run time. The parsed expression is what the
//! later stages qualify and re-emit for the target dialect.

use sqlparser::ast::{Expr, Query, SetExpr, Statement, Value, ValueWithSpan, Visit, Visitor};
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

/// How deeply a fragment may nest parentheses, `CASE`, function calls and subqueries. One
/// limit, applied when the catalog is checked: the generated statement wraps each fragment in
/// a few more levels, and [`crate::validate`] accepts [`crate::validate::MAX_DEPTH`], so a
/// fragment that passes here always fits in the statement.
pub const MAX_DEPTH: usize = 24;

/// The most binary operators (`AND`, `OR`, `+`, `=`, ...) one fragment may hold. A chain of
/// them is a left-nested tree as deep as it is long, and every later stage walks it
/// recursively: 200k OR-ed comparisons once overflowed the stack. Long value lists belong in
/// `IN (...)`, which is flat and not limited.
pub const MAX_OPERATORS: usize = 500;

/// A parser over `text` with the fragment depth limit, after the operator count check.
fn parser<'d>(dialect: &'d GenericDialect, text: &str) -> Result<Parser<'d>, FragmentError> {
    let tokens = sqlparser::tokenizer::Tokenizer::new(dialect, text)
        .tokenize_with_location()
        .map_err(error)?;
    let mut operators = 0usize;
    for t in &tokens {
        let is_operator = match &t.token {
            Token::Word(w) => matches!(
                w.keyword,
                sqlparser::keywords::Keyword::AND | sqlparser::keywords::Keyword::OR
            ),
            Token::Eq
            | Token::Neq
            | Token::Lt
            | Token::Gt
            | Token::LtEq
            | Token::GtEq
            | Token::Plus
            | Token::Minus
            | Token::Mul
            | Token::Div
            | Token::Mod
            | Token::StringConcat => true,
            _ => false,
        };
        operators += usize::from(is_operator);
        if operators > MAX_OPERATORS {
            return Err(FragmentError {
                message: format!(
                    "the expression has more than {MAX_OPERATORS} operators; write a long list of alternatives as `column IN ('a', 'b', ...)`, or move the logic into the table's `sql:` or a view"
                ),
                line: t.span.start.line.max(1) as usize,
                column: t.span.start.column.max(1) as usize,
            });
        }
    }
    Ok(Parser::new(dialect)
        // sqlparser's counter also counts the expression around the parentheses.
        .with_recursion_limit(MAX_DEPTH + 3)
        .with_tokens_with_locations(tokens))
}

/// sqlparser's "recursion limit exceeded", said in the catalog's terms.
fn depth_error(e: sqlparser::parser::ParserError) -> FragmentError {
    match e {
        sqlparser::parser::ParserError::RecursionLimitExceeded => FragmentError {
            message: format!(
                "the expression is nested more than {MAX_DEPTH} levels deep (parentheses, CASE, function calls, subqueries); simplify it or move the logic into the table's `sql:` or a view"
            ),
            line: 1,
            column: 1,
        },
        e => error(e),
    }
}

/// Parses a scalar expression, rejecting trailing text such as `a = 1; drop table x`.
pub fn parse_expr(text: &str) -> Result<Expr, FragmentError> {
    let dialect = GenericDialect {};
    let mut parser = parser(&dialect, text)?;
    let expr = parser.parse_expr().map_err(depth_error)?;
    let next = parser.peek_token();
    if next.token != Token::EOF {
        return Err(FragmentError {
            message: format!("unexpected `{}` after the expression", next.token),
            line: next.span.start.line as usize,
            column: next.span.start.column as usize,
        });
    }
    portable_literals(&expr)?;
    pure_query(&expr)?;
    Ok(expr)
}

/// Parses a single `SELECT` query (an event table's `sql:`).
pub fn parse_query(text: &str) -> Result<Box<Query>, FragmentError> {
    let dialect = GenericDialect {};
    let statements = parser(&dialect, text)?.parse_statements().map_err(depth_error)?;
    match statements.as_slice() {
        [Statement::Query(q)] => {
            portable_literals(q.as_ref())?;
            pure_query(q.as_ref())?;
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

/// Rejects anything but reading inside a query or expression, at any depth: a data-modifying
/// CTE (`WITH d AS (DELETE FROM orders RETURNING *) SELECT * FROM d`), `SELECT ... INTO`
/// (creates a table) and row locks (`FOR UPDATE`).
fn pure_query<T: Visit>(node: &T) -> Result<(), FragmentError> {
    struct Check(Option<&'static str>);
    impl Visitor for Check {
        type Break = ();
        fn pre_visit_statement(&mut self, _: &Statement) -> ControlFlow<()> {
            self.0 = Some("a statement that changes data (INSERT, UPDATE, DELETE, MERGE) inside a query");
            ControlFlow::Break(())
        }
        fn pre_visit_query(&mut self, q: &Query) -> ControlFlow<()> {
            if !q.locks.is_empty() {
                self.0 = Some("a row lock (FOR UPDATE / FOR SHARE)");
                return ControlFlow::Break(());
            }
            let mut bodies = vec![q.body.as_ref()];
            while let Some(body) = bodies.pop() {
                match body {
                    SetExpr::Select(select) if select.into.is_some() => {
                        self.0 = Some("SELECT ... INTO, which creates a table");
                        return ControlFlow::Break(());
                    }
                    SetExpr::SetOperation { left, right, .. } => {
                        bodies.push(left);
                        bodies.push(right);
                    }
                    _ => {}
                }
            }
            ControlFlow::Continue(())
        }
    }
    let mut check = Check(None);
    let _ = node.visit(&mut check);
    match check.0 {
        None => Ok(()),
        Some(what) => Err(FragmentError {
            message: format!("only a query that reads data is allowed here, and this holds {what}"),
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
        for hostile in [
            "WITH d AS (DELETE FROM orders RETURNING *) SELECT * FROM d",
            "WITH d AS (UPDATE orders SET x = 1 RETURNING *) SELECT * FROM d",
            "SELECT * INTO copy FROM orders",
            "SELECT * FROM orders FOR UPDATE",
            "SELECT 1 UNION SELECT * INTO copy FROM orders",
        ] {
            let e = parse_query(hostile).unwrap_err();
            assert!(
                e.message.contains("only a query that reads data"),
                "{hostile}: {}",
                e.message
            );
        }
        let e = parse_expr("(WITH d AS (DELETE FROM orders RETURNING *) SELECT count(*) FROM d) > 0")
            .unwrap_err();
        assert!(
            e.message.contains("only a query that reads data"),
            "{}",
            e.message
        );
        assert!(
            parse_query("WITH p AS (SELECT * FROM orders) SELECT * FROM p UNION ALL SELECT * FROM p").is_ok()
        );
    }

    #[test]
    fn bounds_nesting_and_operator_chains() {
        let deep = format!("{}x = 1{}", "(".repeat(46), ")".repeat(46));
        let e = parse_expr(&deep).unwrap_err();
        assert!(e.message.contains("nested more than 24 levels"), "{}", e.message);
        let fits = format!("{}x = 1{}", "(".repeat(MAX_DEPTH), ")".repeat(MAX_DEPTH));
        assert!(parse_expr(&fits).is_ok());
        let over = format!("{}x = 1{}", "(".repeat(MAX_DEPTH + 1), ")".repeat(MAX_DEPTH + 1));
        assert!(parse_expr(&over).is_err());
        let calls = format!("{}x{}", "abs(".repeat(MAX_DEPTH), ")".repeat(MAX_DEPTH));
        assert!(parse_expr(&calls).is_ok());
        let chain = vec!["x = 1"; 200_000].join(" OR ");
        let e = parse_expr(&chain).unwrap_err();
        assert!(e.message.contains("more than 500 operators"), "{}", e.message);
        let list = (0..20_000).map(|i| i.to_string()).collect::<Vec<_>>().join(", ");
        assert!(
            parse_expr(&format!("x IN ({list})")).is_ok(),
            "long IN lists are flat"
        );
    }
}
