//! Stage 1, `load`: files -> syntax structs with source positions.
//!
//! Finds the workspace (`plumb.yaml`), reads every `*.yaml`/`*.yml` file under its catalog in a
//! stable (sorted) order, and turns each top-level list item into a typed [`syntax`] struct
//! wrapped in an [`Item`] that remembers where it was written. Problems (YAML syntax, unknown
//! keys, values of the wrong type) are collected, never thrown: one bad item does not hide the
//! next. Nothing here knows what a metric means; that is `resolve`.

pub mod syntax;
pub mod yaml;

use crate::diagnostics::{Diagnostic, did_you_mean};
use crate::source::{FileId, SourceMap, Span};
use serde::de::DeserializeOwned;
use std::path::{Path, PathBuf};
use yaml::{Node, NodeKind, Seg};

/// One item of a top-level list, with the file and positioned YAML it came from.
#[derive(Debug, Clone)]
pub struct Item<T> {
    pub value: T,
    pub file: FileId,
    pub node: Node,
}

impl<T> Item<T> {
    /// Where the item is: its `name` value if it has one, else the item start.
    pub fn span(&self) -> Span {
        self.value_span("name").unwrap_or_else(|| {
            let start = self.node.range.start;
            Span::new(self.file, start..start + 1)
        })
    }

    pub fn value_span(&self, key: &str) -> Option<Span> {
        self.node.get(key).map(|n| Span::new(self.file, n.range.clone()))
    }

    pub fn key_span(&self, key: &str) -> Option<Span> {
        self.node.key_range(key).map(|r| Span::new(self.file, r))
    }

    /// Span of element `index` of a list value, e.g. the second name in `primary: [a, b]`.
    pub fn elem_span(&self, key: &str, index: usize) -> Option<Span> {
        self.node
            .at(&[Seg::Key(key.into()), Seg::Index(index)])
            .map(|n| Span::new(self.file, n.range.clone()))
            .or_else(|| self.value_span(key))
    }

    /// Span of the key `key` inside the mapping value of `parent` (e.g. an arm in `split`).
    pub fn nested_key_span(&self, parent: &str, key: &str) -> Option<Span> {
        self.node
            .get(parent)
            .and_then(|n| n.key_range(key))
            .map(|r| Span::new(self.file, r))
            .or_else(|| self.value_span(parent))
    }
}

/// Every declaration in the catalog, as written.
#[derive(Debug, Clone, Default)]
pub struct RawCatalog {
    pub units: Vec<Item<syntax::Unit>>,
    pub event_tables: Vec<Item<syntax::EventTable>>,
    pub exposure_logs: Vec<Item<syntax::ExposureLog>>,
    pub segments: Vec<Item<syntax::Segment>>,
    pub metrics: Vec<Item<syntax::Metric>>,
    pub experiments: Vec<Item<syntax::Experiment>>,
}

/// The workspace file as written, plus where it lives.
#[derive(Debug, Clone)]
pub struct RawWorkspace {
    /// The folder holding `plumb.yaml`; relative paths in it are relative to this folder.
    pub root: PathBuf,
    pub file: Option<FileId>,
    pub node: Option<Node>,
    pub value: syntax::WorkspaceFile,
}

impl RawWorkspace {
    pub fn value_span(&self, path: &[Seg]) -> Option<Span> {
        let file = self.file?;
        let node = self.node.as_ref()?.at(path)?;
        Some(Span::new(file, node.range.clone()))
    }

    /// Folder of the catalog (default `metrics/`).
    pub fn catalog_dir(&self) -> PathBuf {
        self.root.join(self.value.catalog.as_deref().unwrap_or("metrics"))
    }
}

/// Errors that stop loading before any catalog diagnostics make sense (usage errors).
#[derive(Debug)]
pub enum LoadError {
    NoWorkspace(PathBuf),
    Io(PathBuf, std::io::Error),
}

impl std::fmt::Display for LoadError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            LoadError::NoWorkspace(dir) => write!(
                f,
                "no plumb.yaml in {} (without --workspace, plumb looks in the current folder and the folders above it; run `plumb demo` to create an example workspace, or pass --workspace DIR)",
                dir.display()
            ),
            LoadError::Io(path, e) => write!(f, "cannot read {}: {e}", path.display()),
        }
    }
}

/// The workspace file's name.
pub const WORKSPACE_FILE: &str = "plumb.yaml";

/// Reads `plumb.yaml` in `dir` and every catalog file it points to.
pub fn load_workspace(
    dir: &Path,
    sources: &mut SourceMap,
) -> Result<(RawWorkspace, RawCatalog, Vec<Diagnostic>), LoadError> {
    let ws_path = dir.join(WORKSPACE_FILE);
    if !ws_path.is_file() {
        return Err(LoadError::NoWorkspace(dir.to_path_buf()));
    }
    let text = std::fs::read_to_string(&ws_path).map_err(|e| LoadError::Io(ws_path.clone(), e))?;
    let file = sources.add(display_path(&ws_path), text);
    let mut diags = Vec::new();
    let (node, value) = parse_workspace(sources, file, &mut diags);
    let ws = RawWorkspace {
        root: dir.to_path_buf(),
        file: Some(file),
        node,
        value,
    };
    let catalog_dir = ws.catalog_dir();
    let mut paths = Vec::new();
    if catalog_dir.is_dir() {
        collect_yaml(&catalog_dir, &mut paths, &mut diags)
            .map_err(|e| LoadError::Io(catalog_dir.clone(), e))?;
    } else {
        diags.push(
            Diagnostic::error(
                "E005",
                format!("catalog folder {} does not exist", catalog_dir.display()),
            )
            .at(ws.value_span(&[Seg::Key("catalog".into())]))
            .hint("set `catalog:` in plumb.yaml to the folder holding your YAML definitions"),
        );
    }
    paths.sort();
    let mut catalog = RawCatalog::default();
    for path in paths {
        let bytes = std::fs::read(&path).map_err(|e| LoadError::Io(path.clone(), e))?;
        match String::from_utf8(bytes) {
            Ok(text) => {
                let id = sources.add(display_path(&path), text);
                parse_catalog_file(sources, id, &mut catalog, &mut diags);
            }
            // A catalog file that is not UTF-8 is a catalog error at the first bad byte (the
            // valid text before it is kept so the caret can point there), not an I/O failure.
            Err(e) => {
                let valid = e.utf8_error().valid_up_to();
                let text = String::from_utf8_lossy(&e.as_bytes()[..valid]).into_owned();
                let id = sources.add(display_path(&path), text);
                diags.push(
                    Diagnostic::error(
                        "E001",
                        format!(
                            "{} is not UTF-8 text (byte 0x{:02x})",
                            path.display(),
                            e.as_bytes()[valid]
                        ),
                    )
                    .at(Some(crate::source::Span::new(id, valid..valid)))
                    .hint("save the file as UTF-8; catalog files are YAML, which is UTF-8"),
                );
            }
        }
    }
    Ok((ws, catalog, diags))
}

/// Loads a catalog from in-memory files (tests, `plumb diff`): `(path, text)` pairs.
pub fn load_catalog_texts(files: &[(&str, &str)], sources: &mut SourceMap) -> (RawCatalog, Vec<Diagnostic>) {
    let mut catalog = RawCatalog::default();
    let mut diags = Vec::new();
    for (path, text) in files {
        let id = sources.add(*path, *text);
        parse_catalog_file(sources, id, &mut catalog, &mut diags);
    }
    (catalog, diags)
}

fn display_path(path: &Path) -> PathBuf {
    let cwd = std::env::current_dir().ok();
    match cwd.as_ref().and_then(|c| path.strip_prefix(c).ok()) {
        Some(rel) => rel.to_path_buf(),
        None => path.to_path_buf(),
    }
}

/// The catalog files under `dir`, in any sub-folder. Symbolic links are followed only while
/// they stay inside the catalog folder and reach a file or folder not read yet: a link back up
/// (`metrics/loop -> ..`) once read the catalog again and again, hundreds of duplicate names.
fn collect_yaml(dir: &Path, out: &mut Vec<PathBuf>, diags: &mut Vec<Diagnostic>) -> std::io::Result<()> {
    let root = std::fs::canonicalize(dir)?;
    let mut seen = std::collections::BTreeSet::from([root.clone()]);
    let mut pending = vec![dir.to_path_buf()];
    while let Some(dir) = pending.pop() {
        let mut entries: Vec<PathBuf> = std::fs::read_dir(&dir)?
            .map(|e| e.map(|e| e.path()))
            .collect::<std::io::Result<_>>()?;
        entries.sort();
        for path in entries {
            let is_dir = path.is_dir();
            let yaml = matches!(
                path.extension().and_then(|e| e.to_str()),
                Some("yaml") | Some("yml")
            );
            if !is_dir && !yaml {
                continue;
            }
            let Ok(real) = std::fs::canonicalize(&path) else {
                diags.push(Diagnostic::error(
                    "E005",
                    format!("{} is a link to nothing; remove it", path.display()),
                ));
                continue;
            };
            if !real.starts_with(&root) {
                diags.push(Diagnostic::error(
                    "E005",
                    format!(
                        "{} links to {}, outside the catalog folder; catalog files must live inside it",
                        path.display(),
                        real.display()
                    ),
                ));
                continue;
            }
            if !seen.insert(real) {
                // The same folder or file reached a second time through a link (a loop).
                diags.push(Diagnostic::error(
                    "E005",
                    format!(
                        "{} links to a file or folder of the catalog that is read already (a loop, or the same file twice); remove the link",
                        path.display()
                    ),
                ));
                continue;
            }
            if is_dir {
                pending.push(path);
            } else {
                out.push(path);
            }
        }
    }
    Ok(())
}

/// Parses text into the position tree and the serde value, reporting YAML syntax errors.
fn parse_text(
    sources: &SourceMap,
    file: FileId,
    diags: &mut Vec<Diagnostic>,
) -> Option<(Node, serde_yaml::Value)> {
    let text = &sources.get(file).text;
    let node = match yaml::parse(text) {
        Ok(Some(node)) => node,
        Ok(None) => return None,
        Err(e) => {
            let end = (e.offset + 1).min(text.len()).max(e.offset);
            diags.push(
                Diagnostic::error("E001", format!("YAML syntax error: {}", e.message))
                    .at(Some(Span::new(file, e.offset..end)))
                    .hint("check indentation, colons and closing brackets or quotes near here"),
            );
            return None;
        }
    };
    match serde_yaml::from_str::<serde_yaml::Value>(text) {
        Ok(value) => Some((node, value)),
        Err(e) => {
            let offset = e.location().map(|l| l.index()).unwrap_or(0);
            diags.push(
                Diagnostic::error("E001", format!("YAML syntax error: {e}"))
                    .at(Some(Span::new(file, offset..offset))),
            );
            None
        }
    }
}

fn parse_workspace(
    sources: &SourceMap,
    file: FileId,
    diags: &mut Vec<Diagnostic>,
) -> (Option<Node>, syntax::WorkspaceFile) {
    let Some((node, value)) = parse_text(sources, file, diags) else {
        return (None, syntax::WorkspaceFile::default());
    };
    check_keys(file, &node, syntax::WORKSPACE_KEYS, "plumb.yaml", diags);
    if let Some(local) = node.get("local") {
        check_keys(file, local, syntax::LOCAL_KEYS, "`local`", diags);
    }
    if let Some(NodeKind::Map(engines)) = node.get("engines").map(|n| &n.kind) {
        for (name, _, engine) in engines {
            check_keys(
                file,
                engine,
                syntax::ENGINE_KEYS,
                &format!("engine `{name}`"),
                diags,
            );
        }
    }
    let value = deserialize_item(file, &node, value, diags).unwrap_or_default();
    (Some(node), value)
}

/// Parses one catalog file and appends its items to `catalog`.
pub fn parse_catalog_file(
    sources: &SourceMap,
    file: FileId,
    catalog: &mut RawCatalog,
    diags: &mut Vec<Diagnostic>,
) {
    let Some((node, value)) = parse_text(sources, file, diags) else {
        return;
    };
    let NodeKind::Map(entries) = &node.kind else {
        diags.push(
            Diagnostic::error("E002", "a catalog file must be a mapping of lists")
                .at(Some(Span::new(file, node.range.clone())))
                .hint("start the file with a top-level key such as `metrics:` followed by a list"),
        );
        return;
    };
    let kinds: Vec<&str> = syntax::KINDS.iter().map(|(k, _)| *k).collect();
    for (key, key_range, list) in entries {
        let Some((_, keys)) = syntax::KINDS.iter().find(|(k, _)| k == key) else {
            let mut d = Diagnostic::error("E003", format!("unknown top-level key `{key}`"))
                .at(Some(Span::new(file, key_range.clone())));
            d = match did_you_mean(key, kinds.iter().copied()) {
                Some(h) => d.hint(h),
                None => d.hint(format!("a catalog file may hold: {}", kinds.join(", "))),
            };
            diags.push(d);
            continue;
        };
        let items = match &list.kind {
            NodeKind::Seq(items) => items,
            NodeKind::Scalar(s) if s.is_empty() || s == "~" || s == "null" => continue,
            _ => {
                diags.push(
                    Diagnostic::error("E002", format!("`{key}` must be a list"))
                        .at(Some(Span::new(file, list.range.clone())))
                        .hint(format!(
                            "write each item on its own line starting with `- `, under `{key}:`"
                        )),
                );
                continue;
            }
        };
        let values = value
            .get(key.as_str())
            .and_then(|v| v.as_sequence())
            .cloned()
            .unwrap_or_default();
        for (i, item_node) in items.iter().enumerate() {
            if !matches!(item_node.kind, NodeKind::Map(_)) {
                diags.push(
                    Diagnostic::error("E002", format!("each item of `{key}` must be a mapping"))
                        .at(Some(Span::new(file, item_node.range.clone())))
                        .hint("write `- name: ...` followed by the item's keys, indented"),
                );
                continue;
            }
            check_keys(file, item_node, keys, &format!("an item of `{key}`"), diags);
            check_renamed(file, item_node, key, diags);
            let Some(item_value) = values.get(i).cloned() else {
                continue;
            };
            macro_rules! push {
                ($field:ident) => {
                    if let Some(v) = deserialize_item(file, item_node, item_value, diags) {
                        catalog.$field.push(Item {
                            value: v,
                            file,
                            node: item_node.clone(),
                        });
                    }
                };
            }
            match key.as_str() {
                "units" => push!(units),
                "event_tables" => push!(event_tables),
                "exposure_logs" => push!(exposure_logs),
                "segments" => push!(segments),
                "metrics" => push!(metrics),
                "experiments" => push!(experiments),
                _ => {}
            }
        }
    }
}

/// Reports every key of the mapping `node` that is not in `allowed`, with a did-you-mean.
fn check_keys(file: FileId, node: &Node, allowed: &[&str], what: &str, diags: &mut Vec<Diagnostic>) {
    let NodeKind::Map(entries) = &node.kind else {
        return;
    };
    for (key, range, _) in entries {
        if allowed.contains(&key.as_str()) {
            continue;
        }
        let mut d = Diagnostic::error("E003", format!("unknown key `{key}` in {what}"))
            .at(Some(Span::new(file, range.clone())));
        d = match did_you_mean(key, allowed.iter().copied()) {
            Some(h) => d.hint(h),
            None => d.hint(format!("allowed keys: {}", allowed.join(", "))),
        };
        diags.push(d);
    }
}

/// Old spellings of renamed keys: a warning naming the new key, or an error when an item has
/// both spellings.
fn check_renamed(file: FileId, node: &Node, list: &str, diags: &mut Vec<Diagnostic>) {
    let NodeKind::Map(entries) = &node.kind else {
        return;
    };
    let has = |k: &str| entries.iter().find(|(key, _, _)| key == k);
    for (_, old, new) in syntax::RENAMED.iter().filter(|(l, _, _)| *l == list) {
        let Some((_, range, _)) = has(old) else { continue };
        let span = Some(Span::new(file, range.clone()));
        if has(new).is_some() {
            diags.push(
                Diagnostic::error(
                    "E017",
                    format!("both `{old}` and `{new}` are set; `{old}` is the old name of `{new}`"),
                )
                .at(span)
                .hint(format!("remove `{old}`")),
            );
        } else {
            diags.push(
                Diagnostic::warning("W005", format!("`{old}:` is now called `{new}:`"))
                    .at(span)
                    .hint(format!(
                        "rename the key to `{new}`; `{old}` is still read for now"
                    )),
            );
        }
    }
}

/// Deserializes one item, reporting a type error at the value it concerns.
fn deserialize_item<T: DeserializeOwned>(
    file: FileId,
    node: &Node,
    value: serde_yaml::Value,
    diags: &mut Vec<Diagnostic>,
) -> Option<T> {
    match serde_path_to_error::deserialize::<_, T>(value) {
        Ok(v) => Some(v),
        Err(e) => {
            let mut path = Vec::new();
            for seg in e.path().iter() {
                match seg {
                    serde_path_to_error::Segment::Seq { index } => path.push(Seg::Index(*index)),
                    serde_path_to_error::Segment::Map { key } => path.push(Seg::Key(key.clone())),
                    _ => {}
                }
            }
            let at = node.at(&path).unwrap_or(node);
            let field = e.path().to_string();
            let inner = e.into_inner().to_string();
            diags.push(
                Diagnostic::error("E004", format!("wrong type for `{field}`: {inner}"))
                    .at(Some(Span::new(file, at.range.clone())))
                    .hint("see the catalog reference in README.md for the expected form of this key"),
            );
            None
        }
    }
}
