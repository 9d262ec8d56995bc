//! The one place that knows YAML. Files are read into a small tree whose
//! every node remembers its `line:column`, so that validation can point at
//! the exact spot of each mistake and report all of them at once (a serde
//! deserializer stops at the first error and forgets positions). satstep
//! writes no YAML of its own (the manifest's resolved study is JSON; the
//! simulator writes its few YAML files as text). Swapping the YAML library means changing this file only.

use std::path::Path;

use yaml_rust2::parser::{Event, MarkedEventReceiver, Parser};
use yaml_rust2::scanner::{Marker, TScalarStyle};

use super::diag::{Finding, Mark, Severity};

/// A YAML node with its position.
#[derive(Debug, Clone, PartialEq)]
pub struct Node {
    pub value: Value,
    pub mark: Mark,
}

#[derive(Debug, Clone, PartialEq)]
pub enum Value {
    Null,
    /// A scalar's text; `plain` is false when it was quoted or a block
    /// scalar, so `"0.21"` stays text while `0.21` may read as a number.
    Scalar {
        text: String,
        plain: bool,
    },
    Seq(Vec<Node>),
    /// Entries in file order. Keys are nodes so their positions are kept.
    Map(Vec<(Node, Node)>),
}

impl Node {
    /// What kind of node this is, in words for error messages.
    pub fn kind(&self) -> &'static str {
        match &self.value {
            Value::Null => "nothing",
            Value::Scalar { .. } => "a single value",
            Value::Seq(_) => "a list",
            Value::Map(_) => "a mapping",
        }
    }

    pub fn as_scalar(&self) -> Option<&str> {
        match &self.value {
            Value::Scalar { text, .. } => Some(text),
            _ => None,
        }
    }

    pub fn is_null(&self) -> bool {
        matches!(self.value, Value::Null)
    }

    /// The value under `key` in a mapping.
    pub fn get(&self, key: &str) -> Option<&Node> {
        match &self.value {
            Value::Map(entries) => entries
                .iter()
                .find(|(k, _)| k.as_scalar() == Some(key))
                .map(|(_, v)| v),
            _ => None,
        }
    }
}

/// Builds the tree from parser events.
struct Builder {
    /// Open containers: the node under construction, for maps a pending key,
    /// and the container's anchor id (0 for none).
    stack: Vec<(Node, Option<Node>, usize)>,
    /// Anchored nodes with their size in nodes.
    anchors: Vec<(usize, Node, usize)>,
    root: Option<Node>,
    documents: usize,
    duplicate_keys: Vec<(String, Mark, Mark)>,
    /// Nodes in the tree so far, counting every alias's copy.
    nodes: usize,
    /// Where the tree grew past [`MAX_NODES`]; nothing is built after it.
    too_large: Option<Mark>,
}

/// Most nodes a file may expand to. Aliases copy their anchored node, so
/// a few kB of nested aliases can expand to billions; a study of a thousand
/// captures is some tens of thousands of nodes.
const MAX_NODES: usize = 1_000_000;

/// Largest file read as YAML (bytes): study, protocol and segment files
/// are kilobytes; capture lists and logs are CSV.
pub(crate) const MAX_YAML_BYTES: u64 = 16 << 20;

fn size_of(n: &Node) -> usize {
    1 + match &n.value {
        Value::Seq(items) => items.iter().map(size_of).sum(),
        Value::Map(entries) => entries.iter().map(|(k, v)| size_of(k) + size_of(v)).sum(),
        _ => 0,
    }
}

fn mark_of(m: &Marker) -> Mark {
    // yaml-rust2 counts lines from 1 and columns from 0.
    Mark::new(m.line(), m.col() + 1)
}

impl Builder {
    fn attach(&mut self, node: Node, anchor: usize) {
        if anchor > 0 {
            let size = size_of(&node);
            self.anchors.push((anchor, node.clone(), size));
        }
        match self.stack.last_mut() {
            None => {
                if self.root.is_none() {
                    self.root = Some(node);
                }
            }
            Some((parent, pending, _)) => match &mut parent.value {
                Value::Seq(items) => items.push(node),
                Value::Map(entries) => match pending.take() {
                    None => *pending = Some(node),
                    Some(key) => {
                        if let Some(text) = key.as_scalar() {
                            if let Some((first, _)) =
                                entries.iter().find(|(k, _)| k.as_scalar() == Some(text))
                            {
                                self.duplicate_keys
                                    .push((text.to_string(), first.mark, key.mark));
                            }
                        }
                        entries.push((key, node));
                    }
                },
                _ => unreachable!("only containers are pushed on the stack"),
            },
        }
    }
}

impl MarkedEventReceiver for Builder {
    fn on_event(&mut self, ev: Event, marker: Marker) {
        let mark = mark_of(&marker);
        if self.too_large.is_some() {
            return;
        }
        let grows = match &ev {
            Event::Scalar(..) | Event::SequenceStart(..) | Event::MappingStart(..) => 1,
            Event::Alias(id) => self
                .anchors
                .iter()
                .rev()
                .find(|(a, _, _)| a == id)
                .map_or(1, |(_, _, n)| *n),
            _ => 0,
        };
        self.nodes = self.nodes.saturating_add(grows);
        if self.nodes > MAX_NODES {
            self.too_large = Some(mark);
            return;
        }
        match ev {
            Event::DocumentStart => self.documents += 1,
            Event::Scalar(text, style, anchor, tag) => {
                let plain = style == TScalarStyle::Plain;
                let is_null_tag = tag.as_ref().is_some_and(|t| t.suffix == "null");
                let value = if is_null_tag
                    || (plain && matches!(text.as_str(), "" | "~" | "null" | "Null" | "NULL"))
                {
                    Value::Null
                } else {
                    Value::Scalar { text, plain }
                };
                self.attach(Node { value, mark }, anchor);
            }
            Event::SequenceStart(anchor, _) => {
                self.stack.push((
                    Node {
                        value: Value::Seq(Vec::new()),
                        mark,
                    },
                    None,
                    anchor,
                ));
            }
            Event::MappingStart(anchor, _) => {
                self.stack.push((
                    Node {
                        value: Value::Map(Vec::new()),
                        mark,
                    },
                    None,
                    anchor,
                ));
            }
            Event::SequenceEnd | Event::MappingEnd => {
                if let Some((node, _, anchor)) = self.stack.pop() {
                    self.attach(node, anchor);
                }
            }
            Event::Alias(id) => {
                let node = self
                    .anchors
                    .iter()
                    .rev()
                    .find(|(a, _, _)| *a == id)
                    .map(|(_, n, _)| Node {
                        value: n.value.clone(),
                        mark,
                    })
                    .unwrap_or(Node {
                        value: Value::Null,
                        mark,
                    });
                self.attach(node, 0);
            }
            _ => {}
        }
    }
}

/// Parses one YAML document. A syntax error, a second document in the same
/// file and a repeated key are findings with their positions.
pub fn parse(file: &Path, text: &str) -> Result<Node, Vec<Finding>> {
    let mut b = Builder {
        stack: Vec::new(),
        anchors: Vec::new(),
        root: None,
        documents: 0,
        duplicate_keys: Vec::new(),
        nodes: 0,
        too_large: None,
    };
    let mut parser = Parser::new_from_str(text);
    if let Err(e) = parser.load(&mut b, true) {
        let m = e.marker();
        return Err(vec![Finding {
            severity: Severity::Error,
            file: file.to_path_buf(),
            mark: Some(mark_of(m)),
            message: format!("this is not valid YAML: {}", e.info()),
            hint: Some(
                "check the indentation and the `key: value` layout around this position".into(),
            ),
        }]);
    }
    if let Some(mark) = b.too_large {
        return Err(vec![Finding {
            severity: Severity::Error,
            file: file.to_path_buf(),
            mark: Some(mark),
            message: format!(
                "the file expands to more than {MAX_NODES} values here (aliases `*name` copy what their anchor `&name` holds)"
            ),
            hint: Some("a study needs far fewer: check the anchors and aliases".into()),
        }]);
    }
    let mut errors = Vec::new();
    for (key, first, again) in &b.duplicate_keys {
        errors.push(Finding {
            severity: Severity::Error,
            file: file.to_path_buf(),
            mark: Some(*again),
            message: format!("key `{key}` is given twice (first at line {})", first.line),
            hint: Some("keep one of the two".into()),
        });
    }
    if b.documents > 1 {
        errors.push(Finding {
            severity: Severity::Error,
            file: file.to_path_buf(),
            mark: None,
            message: "the file holds more than one YAML document".into(),
            hint: Some(
                "remove the extra `---` separators: one file is one protocol or study".into(),
            ),
        });
    }
    if !errors.is_empty() {
        return Err(errors);
    }
    Ok(b.root.unwrap_or(Node {
        value: Value::Null,
        mark: Mark::new(1, 1),
    }))
}

#[cfg(test)]
mod tests {
    #[test]
    fn an_alias_bomb_is_refused_quickly() {
        // Nine levels of ten aliases each: 10^9 values from 300 bytes.
        let mut text = String::from("a0: &a0 [x, x, x, x, x, x, x, x, x, x]\n");
        for i in 1..10 {
            let p = i - 1;
            text.push_str(&format!(
                "a{i}: &a{i} [*a{p}, *a{p}, *a{p}, *a{p}, *a{p}, *a{p}, *a{p}, *a{p}, *a{p}, *a{p}]\n"
            ));
        }
        let t0 = std::time::Instant::now();
        let errs = super::parse(std::path::Path::new("bomb.yaml"), &text).unwrap_err();
        assert!(errs[0].message.contains("expands to more than"), "{errs:?}");
        assert!(t0.elapsed().as_secs_f64() < 5.0);
    }

    use super::*;

    fn p(text: &str) -> Node {
        parse(Path::new("t.yaml"), text).expect("parses")
    }

    #[test]
    fn positions_are_one_based_line_and_column() {
        let n = p("name: a\nepochs:\n  - name: air\n    duration: 5min\n");
        assert_eq!(n.get("name").unwrap().mark, Mark::new(1, 7));
        let epochs = n.get("epochs").unwrap();
        let Value::Seq(items) = &epochs.value else {
            panic!("seq")
        };
        assert_eq!(items[0].get("duration").unwrap().mark, Mark::new(4, 15));
        assert_eq!(items[0].get("duration").unwrap().as_scalar(), Some("5min"));
    }

    #[test]
    fn quoted_scalars_are_not_plain_and_nulls_are_null() {
        let n = p("a: \"0.21\"\nb: 0.21\nc: ~\nd:\n");
        assert_eq!(
            n.get("a").unwrap().value,
            Value::Scalar {
                text: "0.21".into(),
                plain: false
            }
        );
        assert_eq!(
            n.get("b").unwrap().value,
            Value::Scalar {
                text: "0.21".into(),
                plain: true
            }
        );
        assert!(n.get("c").unwrap().is_null());
        assert!(n.get("d").unwrap().is_null());
    }

    #[test]
    fn duplicate_keys_are_reported_with_both_lines() {
        let e = parse(Path::new("t.yaml"), "a: 1\nb: 2\na: 3\n").unwrap_err();
        assert_eq!(
            e[0].to_string(),
            "error: t.yaml:3:1: key `a` is given twice (first at line 1)\n  hint: keep one of the two"
        );
    }

    #[test]
    fn syntax_errors_have_a_position() {
        let e = parse(Path::new("t.yaml"), "a: [1, 2\nb: 3\n").unwrap_err();
        assert!(e[0].mark.is_some());
        assert!(e[0].message.starts_with("this is not valid YAML"));
    }

    #[test]
    fn aliases_copy_the_anchored_node() {
        let n = p("base: &b {x: 1}\nother: *b\n");
        assert_eq!(
            n.get("other").unwrap().get("x").unwrap().as_scalar(),
            Some("1")
        );
    }
}
