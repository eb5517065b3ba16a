//! The library's one error type: what went wrong, of which kind, and why (a source chain).
//!
//! Every stage and command returns [`Error`]; only `cli` turns a kind into an exit code and
//! prints it. The kind says whose problem it is: the user's flags or catalog, their data, the
//! engine that ran the SQL, a dialect folder, or plumb itself (a bug, which says how to report
//! it). Catalog errors carry their diagnostics and the sources they point into, so they can be
//! rendered with file:line:column once, at the top.

use crate::diagnostics::Diagnostic;
use crate::source::SourceMap;
use std::fmt;

/// Whose problem an [`Error`] is. New kinds may be added.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[non_exhaustive]
pub enum ErrorKind {
    /// Bad flags, an unknown experiment or metric, a missing workspace.
    Usage,
    /// The catalog or `plumb.yaml` has errors; see [`Error::diagnostics`].
    Catalog,
    /// Input data (local tables, a statistics file) cannot be read or does not fit.
    Data,
    /// The engine that runs the SQL failed (connection, query, result).
    Engine,
    /// A dialect folder (built-in or `--dialects-dir`) is broken.
    Dialect,
    /// An internal error: plumb produced something it should never produce.
    Bug,
}

/// Catalog diagnostics with the sources their spans point into.
#[derive(Debug)]
pub struct CatalogErrors {
    pub sources: SourceMap,
    pub diagnostics: Vec<Diagnostic>,
}

/// A failure of any stage or command.
#[derive(Debug)]
pub struct Error {
    kind: ErrorKind,
    message: String,
    source: Option<Box<dyn std::error::Error + Send + Sync + 'static>>,
    catalog: Option<Box<CatalogErrors>>,
}

impl Error {
    pub fn new(kind: ErrorKind, message: impl Into<String>) -> Error {
        Error {
            kind,
            message: message.into(),
            source: None,
            catalog: None,
        }
    }

    pub fn usage(message: impl Into<String>) -> Error {
        Error::new(ErrorKind::Usage, message)
    }

    pub fn data(message: impl Into<String>) -> Error {
        Error::new(ErrorKind::Data, message)
    }

    pub fn engine(message: impl Into<String>) -> Error {
        Error::new(ErrorKind::Engine, message)
    }

    pub fn dialect(message: impl Into<String>) -> Error {
        Error::new(ErrorKind::Dialect, message)
    }

    pub fn bug(message: impl Into<String>) -> Error {
        Error::new(ErrorKind::Bug, message)
    }

    /// Catalog diagnostics (at least one of them an error).
    pub fn catalog(sources: SourceMap, diagnostics: Vec<Diagnostic>) -> Error {
        let errors = diagnostics.iter().filter(|d| d.is_error()).count();
        Error {
            kind: ErrorKind::Catalog,
            message: format!(
                "{errors} error{} in the catalog",
                if errors == 1 { "" } else { "s" }
            ),
            source: None,
            catalog: Some(Box::new(CatalogErrors { sources, diagnostics })),
        }
    }

    /// Keeps `source` as the cause (shown by `std::error::Error::source`).
    pub fn with_source(mut self, source: impl std::error::Error + Send + Sync + 'static) -> Error {
        self.source = Some(Box::new(source));
        self
    }

    pub fn kind(&self) -> ErrorKind {
        self.kind
    }

    /// The one-line message (without the cause).
    pub fn message(&self) -> &str {
        &self.message
    }

    /// The diagnostics of a catalog error.
    pub fn diagnostics(&self) -> Option<&CatalogErrors> {
        self.catalog.as_deref()
    }

    /// The same error with `context: ` before its message (the kind is kept).
    pub fn context(mut self, context: impl fmt::Display) -> Error {
        self.message = format!("{context}: {}", self.message);
        self
    }
}

impl fmt::Display for Error {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.message)
    }
}

impl std::error::Error for Error {
    fn source(&self) -> Option<&(dyn std::error::Error + 'static)> {
        self.source
            .as_deref()
            .map(|e| e as &(dyn std::error::Error + 'static))
    }
}

/// Shorthand for results of the library.
pub type Result<T, E = Error> = std::result::Result<T, E>;

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn kinds_messages_and_sources() {
        let io = std::io::Error::other("disk on fire");
        let e = Error::data("cannot read x.csv")
            .with_source(io)
            .context("local table `x`");
        assert_eq!(e.kind(), ErrorKind::Data);
        assert_eq!(e.to_string(), "local table `x`: cannot read x.csv");
        assert_eq!(
            std::error::Error::source(&e).map(|s| s.to_string()).as_deref(),
            Some("disk on fire")
        );
        let c = Error::catalog(SourceMap::new(), vec![Diagnostic::error("E010", "x")]);
        assert_eq!(c.kind(), ErrorKind::Catalog);
        assert_eq!(c.to_string(), "1 error in the catalog");
        assert_eq!(c.diagnostics().map(|d| d.diagnostics.len()), Some(1));
    }
}
