//! Source files and positions.
//!
//! Every diagnostic points into a file the user wrote. The loader registers each file it reads
//! here once, and everything downstream refers to it by a small [`FileId`] plus a byte range,
//! so spans stay cheap to copy and the renderer can print `file:line:column` with the source
//! line underneath.

use std::ops::Range;
use std::path::{Path, PathBuf};

/// Index of a file in a [`SourceMap`].
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub struct FileId(pub usize);

/// A byte range inside one source file.
#[derive(Debug, Clone, PartialEq, Eq, Hash)]
pub struct Span {
    pub file: FileId,
    pub range: Range<usize>,
}

impl Span {
    pub fn new(file: FileId, range: Range<usize>) -> Self {
        Span { file, range }
    }
}

/// One loaded file: its path as shown to the user and its full text.
#[derive(Debug, Clone)]
pub struct SourceFile {
    pub path: PathBuf,
    pub text: String,
    line_starts: Vec<usize>,
}

impl SourceFile {
    fn new(path: PathBuf, text: String) -> Self {
        let mut line_starts = vec![0];
        line_starts.extend(text.match_indices('\n').map(|(i, _)| i + 1));
        SourceFile {
            path,
            text,
            line_starts,
        }
    }

    /// 1-based line and column (in characters) of a byte offset.
    pub fn line_col(&self, offset: usize) -> (usize, usize) {
        let offset = offset.min(self.text.len());
        let line = match self.line_starts.binary_search(&offset) {
            Ok(i) => i,
            Err(i) => i - 1,
        };
        let start = self.line_starts[line];
        let col = self.text[start..offset].chars().count();
        (line + 1, col + 1)
    }

    /// Byte offset of a 1-based line and column (in characters); clamps to the text.
    pub fn offset(&self, line: usize, col: usize) -> usize {
        let Some(&start) = self.line_starts.get(line.saturating_sub(1)) else {
            return self.text.len();
        };
        let rest = &self.text[start..];
        rest.char_indices()
            .nth(col.saturating_sub(1))
            .map(|(i, _)| start + i)
            .unwrap_or(self.text.len())
    }

    /// Byte offset of a character index (what YAML parsers report).
    pub fn char_to_byte(&self, char_index: usize) -> usize {
        self.text
            .char_indices()
            .nth(char_index)
            .map(|(i, _)| i)
            .unwrap_or(self.text.len())
    }
}

/// All files read during one run, addressed by [`FileId`].
#[derive(Debug, Default, Clone)]
pub struct SourceMap {
    files: Vec<SourceFile>,
}

impl SourceMap {
    pub fn new() -> Self {
        Self::default()
    }

    pub fn add(&mut self, path: impl Into<PathBuf>, text: impl Into<String>) -> FileId {
        self.files.push(SourceFile::new(path.into(), text.into()));
        FileId(self.files.len() - 1)
    }

    pub fn get(&self, id: FileId) -> &SourceFile {
        &self.files[id.0]
    }

    pub fn files(&self) -> impl Iterator<Item = (FileId, &SourceFile)> {
        self.files.iter().enumerate().map(|(i, f)| (FileId(i), f))
    }

    pub fn path(&self, id: FileId) -> &Path {
        &self.files[id.0].path
    }

    /// `path:line:column` of the start of a span.
    pub fn location(&self, span: &Span) -> String {
        let file = self.get(span.file);
        let (line, col) = file.line_col(span.range.start);
        format!("{}:{}:{}", file.path.display(), line, col)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn line_col_round_trips() {
        let mut map = SourceMap::new();
        let id = map.add("a.yaml", "ab\ncdé\nf");
        let f = map.get(id);
        assert_eq!(f.line_col(0), (1, 1));
        assert_eq!(f.line_col(3), (2, 1));
        assert_eq!(f.line_col(5), (2, 3));
        assert_eq!(f.offset(2, 3), 5);
        assert_eq!(f.offset(3, 1), 8);
        assert_eq!(f.char_to_byte(6), 7);
    }
}
