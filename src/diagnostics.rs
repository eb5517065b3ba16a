//! Diagnostics: what went wrong, where, and how to fix it.
//!
//! Every stage collects problems as [`Diagnostic`] values instead of failing on the first, so a
//! user sees every error in one run. A diagnostic carries a stable code (`E0xx` for errors),
//! the span of the offending YAML key or value, optional secondary labels and hints. Rendering
//! happens once, at the top (the CLI), as plain text with the source line underlined or as JSON.

use crate::source::{SourceMap, Span};
use codespan_reporting::diagnostic as cs;
use codespan_reporting::files::SimpleFiles;
use codespan_reporting::term;
use serde::Serialize;

/// How bad a diagnostic is.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Severity {
    Error,
    Warning,
}

/// One problem found in the workspace.
#[derive(Debug, Clone)]
pub struct Diagnostic {
    pub severity: Severity,
    /// Stable code, e.g. `E010`; documented in DEVELOPERS.md.
    pub code: &'static str,
    pub message: String,
    /// Where the problem is; `None` for problems without a place (a missing file).
    pub span: Option<Span>,
    /// Secondary places worth showing, e.g. the first definition of a duplicate.
    pub labels: Vec<(Span, String)>,
    pub hints: Vec<String>,
}

impl Diagnostic {
    pub fn error(code: &'static str, message: impl Into<String>) -> Self {
        Diagnostic {
            severity: Severity::Error,
            code,
            message: message.into(),
            span: None,
            labels: Vec::new(),
            hints: Vec::new(),
        }
    }

    pub fn warning(code: &'static str, message: impl Into<String>) -> Self {
        Diagnostic {
            severity: Severity::Warning,
            ..Diagnostic::error(code, message)
        }
    }

    pub fn at(mut self, span: Option<Span>) -> Self {
        self.span = span;
        self
    }

    pub fn label(mut self, span: Option<Span>, text: impl Into<String>) -> Self {
        if let Some(span) = span {
            self.labels.push((span, text.into()));
        }
        self
    }

    pub fn hint(mut self, text: impl Into<String>) -> Self {
        self.hints.push(text.into());
        self
    }

    pub fn is_error(&self) -> bool {
        self.severity == Severity::Error
    }
}

/// A "did you mean" hint: the closest of `candidates` to `word`, if close enough.
pub fn did_you_mean<'a>(word: &str, candidates: impl IntoIterator<Item = &'a str>) -> Option<String> {
    candidates
        .into_iter()
        .map(|c| (strsim::jaro_winkler(word, c), c))
        .filter(|(score, _)| *score >= 0.8)
        .max_by(|a, b| a.0.total_cmp(&b.0).then_with(|| b.1.cmp(a.1)))
        .map(|(_, c)| format!("did you mean `{c}`?"))
}

/// Renders diagnostics as plain text, each with `file:line:column`, the source line and a
/// caret under the fault, followed by its hints.
pub fn render_plain(sources: &SourceMap, diagnostics: &[Diagnostic]) -> String {
    let mut files = SimpleFiles::new();
    for (_, f) in sources.files() {
        files.add(f.path.display().to_string(), f.text.clone());
    }
    let config = term::Config::default();
    let mut out = String::new();
    for d in diagnostics {
        let severity = match d.severity {
            Severity::Error => cs::Severity::Error,
            Severity::Warning => cs::Severity::Warning,
        };
        let mut labels = Vec::new();
        if let Some(span) = &d.span {
            labels.push(cs::Label::primary(span.file.0, span.range.clone()));
        }
        for (span, text) in &d.labels {
            labels.push(cs::Label::secondary(span.file.0, span.range.clone()).with_message(text));
        }
        let diag = cs::Diagnostic::new(severity)
            .with_code(d.code)
            .with_message(&d.message)
            .with_labels(labels)
            .with_notes(d.hints.iter().map(|h| format!("hint: {h}")).collect());
        if term::emit_to_string(&mut out, &config, &files, &diag).is_err() {
            // A span outside its file is a bug in plumb; still show the message.
            out.push_str(&format!("error[{}]: {}\n", d.code, d.message));
        }
    }
    out
}

/// JSON form of one diagnostic, for tools.
#[derive(Debug, Serialize)]
pub struct JsonDiagnostic {
    pub severity: Severity,
    pub code: &'static str,
    pub message: String,
    pub file: Option<String>,
    pub line: Option<usize>,
    pub column: Option<usize>,
    pub hints: Vec<String>,
}

pub fn to_json(sources: &SourceMap, diagnostics: &[Diagnostic]) -> Vec<JsonDiagnostic> {
    diagnostics
        .iter()
        .map(|d| {
            let (file, line, column) = match &d.span {
                Some(span) => {
                    let f = sources.get(span.file);
                    let (l, c) = f.line_col(span.range.start);
                    (Some(f.path.display().to_string()), Some(l), Some(c))
                }
                None => (None, None, None),
            };
            JsonDiagnostic {
                severity: d.severity,
                code: d.code,
                message: d.message.clone(),
                file,
                line,
                column,
                hints: d.hints.clone(),
            }
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn suggests_close_names_only() {
        let keys = ["per_unit", "events", "window"];
        assert_eq!(
            did_you_mean("per_unt", keys).as_deref(),
            Some("did you mean `per_unit`?")
        );
        assert_eq!(did_you_mean("zzz", keys), None);
    }
}
