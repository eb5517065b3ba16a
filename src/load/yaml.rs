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

/// Parses `text` into a positioned tree. An empty document gives `Ok(None)`.
pub fn parse(text: &str) -> Result<Option<Node>, SyntaxError> {
    let mut builder = Builder {
        text,
        char_to_byte: CharIndex::new(text),
        stack: Vec::new(),
        root: None,
    };
    let mut parser = Parser::new_from_str(text);
    parser.load(&mut builder, false).map_err(|e| SyntaxError {
        offset: builder.char_to_byte.byte(e.marker().index()),
        message: e.info().to_string(),
    })?;
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
}

impl Builder<'_> {
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
        let at = self.char_to_byte.byte(mark.index());
        match ev {
            Event::Scalar(value, style, _, _) => {
                let range = self.scalar_range(at, &value, style);
                self.push_node(Node {
                    range,
                    kind: NodeKind::Scalar(value),
                });
            }
            Event::Alias(_) => self.push_node(Node {
                range: at..at + 1,
                kind: NodeKind::Alias,
            }),
            Event::SequenceStart(..) => self.stack.push(Frame::Seq(at, Vec::new())),
            Event::MappingStart(..) => self.stack.push(Frame::Map(at, Vec::new(), None)),
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
    fn reports_syntax_errors_with_offsets() {
        let text = "metrics:\n  - name: [unclosed\n";
        let err = parse(text).unwrap_err();
        assert!(err.offset > 0 && err.offset <= text.len());
    }
}
