//! A position index over a YAML document.
//!
//! serde gives plumb typed structs but forgets where each value was written. This module parses
//! the same text with a marked event parser and keeps, for every mapping key and value, its
//! byte range, addressed by a path such as `metrics[2].per_unit`. Diagnostics use it to point
//! at the exact key or value at fault; the unknown-key check walks it to list every stray key.

use std::ops::Range;
use yaml_rust2::parser::{Event, MarkedEventReceiver, Parser};
use yaml_rust2::scanner::{Marker, TScalarStyle};

/// One step in a path from the document root.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Seg {
    Key(String),
    Index(usize),
}

/// A parsed YAML node with byte positions.
#[derive(Debug, Clone)]
pub struct Node {
    pub range: Range<usize>,
    pub kind: NodeKind,
}

#[derive(Debug, Clone)]
pub enum NodeKind {
    Scalar(String),
    Seq(Vec<Node>),
    /// Entries in source order: key text, key range, value.
    Map(Vec<(String, Range<usize>, Node)>),
    Alias,
}

impl Node {
    pub fn get(&self, key: &str) -> Option<&Node> {
        match &self.kind {
            NodeKind::Map(entries) => entries.iter().find(|(k, _, _)| k == key).map(|e| &e.2),
            _ => None,
        }
    }

    pub fn key_range(&self, key: &str) -> Option<Range<usize>> {
        match &self.kind {
            NodeKind::Map(entries) => entries.iter().find(|(k, _, _)| k == key).map(|e| e.1.clone()),
            _ => None,
        }
    }

    /// Follows a path from this node.
    pub fn at(&self, path: &[Seg]) -> Option<&Node> {
        let mut node = self;
        for seg in path {
            node = match (seg, &node.kind) {
                (Seg::Key(k), _) => node.get(k)?,
                (Seg::Index(i), NodeKind::Seq(items)) => items.get(*i)?,
                _ => return None,
            };
        }
        Some(node)
    }
}

/// A YAML syntax error with its byte offset.
#[derive(Debug, Clone)]
pub struct SyntaxError {
    pub offset: usize,
    pub message: String,
}

/// The deepest nesting of lists and mappings a file may have. A catalog needs five levels
/// (`metrics:` → item → `window:` → bound); deeper input is refused before anything recurses
/// over it (100k nested `- - - ...` once overflowed the stack).
pub const MAX_DEPTH: usize = 64;

/// The most values that aliases (`*name`) may add to a file when expanded. An anchor of a
/// 20k-element list referenced 20k times is 4e8 values: refused here, before serde expands it.
pub const MAX_ALIAS_VALUES: u64 = 100_000;

/// Parses `text` into a positioned tree. An empty document gives `Ok(None)`.
pub fn parse(text: &str) -> Result<Option<Node>, SyntaxError> {
    let mut builder = Builder {
        text,
        char_to_byte: CharIndex::new(text),
        stack: Vec::new(),
        root: None,
        counts: Vec::new(),
        anchors: std::collections::HashMap::new(),
        literal: 0,
        expanded: 0,
        refused: None,
    };
    // Events are pulled one by one (the parser's own `load` recurses once per nesting level,
    // so deep input would overflow the stack before the depth check could refuse it).
    let mut parser = Parser::new_from_str(text);
    loop {
        let (ev, mark) = parser.next_token().map_err(|e| SyntaxError {
            offset: builder.char_to_byte.byte(e.marker().index()),
            message: e.info().to_string(),
        })?;
        let last = matches!(ev, Event::DocumentEnd | Event::StreamEnd);
        builder.on_event(ev, mark);
        if let Some(e) = builder.refused.take() {
            return Err(e);
        }
        if last {
            break;
        }
    }
    Ok(builder.root)
}

/// Converts the character indexes the parser reports into byte offsets.
struct CharIndex {
    offsets: Vec<usize>,
    len: usize,
}

impl CharIndex {
    fn new(text: &str) -> Self {
        CharIndex {
            offsets: text.char_indices().map(|(i, _)| i).collect(),
            len: text.len(),
        }
    }
    fn byte(&self, char_index: usize) -> usize {
        self.offsets.get(char_index).copied().unwrap_or(self.len)
    }
}

enum Frame {
    Seq(usize, Vec<Node>),
    Map(
        usize,
        Vec<(String, Range<usize>, Node)>,
        Option<(String, Range<usize>)>,
    ),
}

struct Builder<'a> {
    text: &'a str,
    char_to_byte: CharIndex,
    stack: Vec<Frame>,
    root: Option<Node>,
    /// Per open list or mapping: its anchor id (0: none) and its size with aliases expanded.
    counts: Vec<(usize, u64)>,
    /// Expanded size of each anchored value.
    anchors: std::collections::HashMap<usize, u64>,
    /// Values as written, and with aliases expanded.
    literal: u64,
    expanded: u64,
    /// Set when the input is too deep or expands too much; later events are ignored.
    refused: Option<SyntaxError>,
}

impl Builder<'_> {
    /// Adds a completed value of expanded size `size` to its parent's count.
    fn count(&mut self, anchor: usize, size: u64, at: usize) {
        if anchor > 0 {
            self.anchors.insert(anchor, size);
        }
        match self.counts.last_mut() {
            Some((_, parent)) => *parent = parent.saturating_add(size),
            None => self.expanded = self.expanded.saturating_add(size),
        }
        let pending: u64 = self
            .counts
            .iter()
            .map(|c| c.1)
            .fold(self.expanded, u64::saturating_add);
        if pending.saturating_sub(self.literal) > MAX_ALIAS_VALUES {
            self.refused = Some(SyntaxError {
                offset: at,
                message: format!(
                    "aliases expand this file to more than {MAX_ALIAS_VALUES} values more than it holds; write the values out, or reuse less"
                ),
            });
        }
    }

    fn push_node(&mut self, node: Node) {
        match self.stack.last_mut() {
            None => self.root = Some(node),
            Some(Frame::Seq(_, items)) => items.push(node),
            Some(Frame::Map(_, entries, pending)) => match pending.take() {
                None => {
                    // A key: mappings with non-scalar keys are kept with their text.
                    let key = match &node.kind {
                        NodeKind::Scalar(s) => s.clone(),
                        _ => self.text[node.range.clone()].to_string(),
                    };
                    *pending = Some((key, node.range));
                }
                Some((key, key_range)) => entries.push((key, key_range, node)),
            },
        }
    }

    /// Byte range of a scalar starting at `start`: its source text up to the end of the token.
    fn scalar_range(&self, start: usize, value: &str, style: TScalarStyle) -> Range<usize> {
        let rest = &self.text[start.min(self.text.len())..];
        let len = match style {
            TScalarStyle::SingleQuoted | TScalarStyle::DoubleQuoted => {
                let quote = rest.chars().next().unwrap_or('"');
                let mut end = rest.len();
                let mut escaped = false;
                for (i, c) in rest.char_indices().skip(1) {
                    if escaped {
                        escaped = false;
                    } else if c == '\\' && quote == '"' {
                        escaped = true;
                    } else if c == quote {
                        end = i + 1;
                        break;
                    }
                }
                end
            }
            TScalarStyle::Plain => {
                let line_end = rest.find('\n').unwrap_or(rest.len());
                value.len().min(line_end).max(1.min(rest.len()))
            }
            _ => rest.find('\n').unwrap_or(rest.len()),
        };
        start..start + len
    }
}

impl MarkedEventReceiver for Builder<'_> {
    fn on_event(&mut self, ev: Event, mark: Marker) {
        if self.refused.is_some() {
            return;
        }
        let at = self.char_to_byte.byte(mark.index());
        if matches!(ev, Event::SequenceStart(..) | Event::MappingStart(..)) && self.stack.len() >= MAX_DEPTH {
            self.refused = Some(SyntaxError {
                offset: at,
                message: format!(
                    "lists and mappings are nested more than {MAX_DEPTH} levels deep here; a catalog needs a handful"
                ),
            });
            return;
        }
        match ev {
            Event::Scalar(value, style, anchor, _) => {
                let range = self.scalar_range(at, &value, style);
                self.literal += 1;
                self.count(anchor, 1, at);
                self.push_node(Node {
                    range,
                    kind: NodeKind::Scalar(value),
                });
            }
            Event::Alias(id) => {
                let size = self.anchors.get(&id).copied().unwrap_or(1);
                self.count(0, size, at);
                self.push_node(Node {
                    range: at..at + 1,
                    kind: NodeKind::Alias,
                })
            }
            Event::SequenceStart(anchor, _) => {
                self.literal += 1;
                self.counts.push((anchor, 1));
                self.stack.push(Frame::Seq(at, Vec::new()))
            }
            Event::MappingStart(anchor, _) => {
                self.literal += 1;
                self.counts.push((anchor, 1));
                self.stack.push(Frame::Map(at, Vec::new(), None))
            }
            Event::SequenceEnd | Event::MappingEnd => {
                if let Some((anchor, size)) = self.counts.pop() {
                    self.count(anchor, size, at);
                }
                self.close(ev);
            }
            _ => {}
        }
    }
}

impl Builder<'_> {
    fn close(&mut self, ev: Event) {
        match ev {
            Event::SequenceEnd => {
                if let Some(Frame::Seq(start, items)) = self.stack.pop() {
                    let end = items.last().map(|n| n.range.end).unwrap_or(start + 1).max(start);
                    self.push_node(Node {
                        range: start..end,
                        kind: NodeKind::Seq(items),
                    });
                }
            }
            Event::MappingEnd => {
                if let Some(Frame::Map(start, entries, _)) = self.stack.pop() {
                    let end = entries
                        .last()
                        .map(|e| e.2.range.end)
                        .unwrap_or(start + 1)
                        .max(start);
                    self.push_node(Node {
                        range: start..end,
                        kind: NodeKind::Map(entries),
                    });
                }
            }
            _ => {}
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn indexes_keys_and_values() {
        let text = "metrics:\n  - name: orders\n    per_unit: 'count'\n    window: [0d, 14d]\n";
        let root = parse(text).unwrap().unwrap();
        let item = root.at(&[Seg::Key("metrics".into()), Seg::Index(0)]).unwrap();
        let v = item.get("per_unit").unwrap();
        assert_eq!(&text[v.range.clone()], "'count'");
        assert_eq!(&text[item.key_range("per_unit").unwrap()], "per_unit");
        let w = item.at(&[Seg::Key("window".into()), Seg::Index(1)]).unwrap();
        assert_eq!(&text[w.range.clone()], "14d");
    }

    #[test]
    fn refuses_deep_nesting_and_alias_bombs_before_expanding_them() {
        let deep = format!("units:\n{}x\n", "- ".repeat(100_000));
        let e = parse(&deep).unwrap_err();
        assert!(e.message.contains("nested more than 64"), "{}", e.message);
        let ok = format!("units:\n{}x\n", "- ".repeat(MAX_DEPTH - 2));
        assert!(parse(&ok).is_ok());
        let list = vec!["1"; 20_000].join(",");
        let refs = vec!["*a"; 20_000].join(",");
        let bomb = format!("x: &a [{list}]\ny: [{refs}]\n");
        let e = parse(&bomb).unwrap_err();
        assert!(e.message.contains("aliases expand"), "{}", e.message);
        // A few reuses of a small anchor are fine.
        assert!(parse("x: &w [0d, 7d]\ny: *w\nz: *w\n").is_ok());
    }

    #[test]
    fn reports_syntax_errors_with_offsets() {
        let text = "metrics:\n  - name: [unclosed\n";
        let err = parse(text).unwrap_err();
        assert!(err.offset > 0 && err.offset <= text.len());
    }
}
