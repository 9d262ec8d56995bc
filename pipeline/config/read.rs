//! Typed reads from the position-keeping YAML tree. Each read that fails
//! records a finding at the node's position and returns `None`, so a loader
//! keeps going and reports every mistake in the file at once.

use std::path::Path;

use chrono::{DateTime, FixedOffset};

use super::diag::{Finding, Findings, Mark, suggest};
use super::duration::parse_seconds;
use super::yaml::{Node, Value};
use crate::config::time::parse_time;

/// Reads and parses a YAML file; a missing file or a syntax error becomes
/// findings (`cannot read the {what}: …` with `hint`).
pub(crate) fn load_tree(
    path: &Path,
    what: &str,
    hint: &str,
    findings: &mut Findings,
) -> Option<Node> {
    if let Ok(m) = std::fs::metadata(path) {
        if m.len() > super::yaml::MAX_YAML_BYTES {
            findings
                .error(
                    path,
                    None,
                    format!(
                        "the {what} is {:.0} MB; it is read as YAML, which is never that large",
                        m.len() as f64 / 1e6
                    ),
                )
                .hint(hint);
            return None;
        }
    }
    let bytes = match std::fs::read(path) {
        Ok(b) => b,
        Err(e) => {
            findings
                .error(path, None, format!("cannot read the {what}: {e}"))
                .hint(hint);
            return None;
        }
    };
    let text = match String::from_utf8(bytes) {
        Ok(t) => t,
        Err(e) => {
            let good = &e.as_bytes()[..e.utf8_error().valid_up_to()];
            // Valid up to here, so the prefix decodes.
            let before = String::from_utf8_lossy(good);
            let line = before.matches('\n').count() + 1;
            let col = before.rsplit('\n').next().map_or(0, |l| l.chars().count()) + 1;
            findings
                .error(
                    path,
                    Some(Mark::new(line, col)),
                    format!("the {what} is not UTF-8 text: the byte here is not valid UTF-8"),
                )
                .hint("save the file as UTF-8 (plain text) and check the character at this place");
            return None;
        }
    };
    // A byte-order mark some editors write at the start is not content.
    let text = text.strip_prefix('\u{feff}').unwrap_or(&text);
    match super::yaml::parse(path, text) {
        Ok(n) => Some(n),
        Err(errs) => {
            for e in errs {
                findings.error(&e.file, e.mark, e.message).hint = e.hint;
            }
            None
        }
    }
}

/// A mapping whose keys have been checked against the allowed names.
pub struct MapView<'n> {
    pub node: &'n Node,
    entries: &'n [(Node, Node)],
}

impl<'n> MapView<'n> {
    pub fn get(&self, key: &str) -> Option<&'n Node> {
        self.entries
            .iter()
            .find(|(k, _)| k.as_scalar() == Some(key))
            .map(|(_, v)| v)
            .filter(|v| !v.is_null())
    }

    pub fn mark(&self) -> Mark {
        self.node.mark
    }
}

/// Reads values from one file, collecting findings.
pub struct Reader<'a> {
    pub file: &'a Path,
    pub findings: &'a mut Findings,
    /// A study read to propose its segments may name segment files that
    /// do not exist yet.
    pub segment_files_may_be_missing: bool,
}

impl<'a> Reader<'a> {
    pub fn new(file: &'a Path, findings: &'a mut Findings) -> Self {
        Reader {
            file,
            findings,
            segment_files_may_be_missing: false,
        }
    }

    pub fn error(&mut self, mark: Mark, message: impl Into<String>) -> &mut Finding {
        self.findings.error(self.file, Some(mark), message)
    }

    pub fn warning(&mut self, mark: Mark, message: impl Into<String>) -> &mut Finding {
        self.findings.warning(self.file, Some(mark), message)
    }

    /// A mapping of `what` with only the `allowed` keys. Unknown keys are
    /// reported with the nearest allowed names.
    pub fn map<'n>(&mut self, node: &'n Node, what: &str, allowed: &[&str]) -> Option<MapView<'n>> {
        let Value::Map(entries) = &node.value else {
            self.error(
                node.mark,
                format!(
                    "{what} must be a mapping of `key: value` lines, found {}",
                    node.kind()
                ),
            )
            .hint(format!(
                "allowed keys: {}",
                allowed
                    .iter()
                    .map(|k| format!("`{k}`"))
                    .collect::<Vec<_>>()
                    .join(", ")
            ));
            return None;
        };
        for (k, _) in entries {
            match k.as_scalar() {
                Some(name) if allowed.contains(&name) => {}
                Some(name) => {
                    let hint = suggest(name, allowed);
                    self.error(k.mark, format!("unknown key `{name}` in {what}"))
                        .hint(hint);
                }
                None => {
                    self.error(
                        k.mark,
                        format!("keys in {what} must be plain names, found {}", k.kind()),
                    );
                }
            }
        }
        Some(MapView { node, entries })
    }

    pub fn required<'n>(&mut self, m: &MapView<'n>, key: &str, what: &str) -> Option<&'n Node> {
        let v = m.get(key);
        if v.is_none() {
            self.error(m.mark(), format!("{what} has no `{key}`"))
                .hint(format!("add `{key}: …` here"));
        }
        v
    }

    pub fn text(&mut self, node: &Node, what: &str) -> Option<String> {
        match node.as_scalar() {
            Some(t) => Some(t.to_string()),
            None => {
                self.error(
                    node.mark,
                    format!("{what} must be a single value, found {}", node.kind()),
                );
                None
            }
        }
    }

    /// A name that tables, figures and reports print (an id, an epoch
    /// name, a label, a title): one line, no control characters.
    pub fn name(&mut self, node: &Node, what: &str) -> Option<String> {
        let t = self.text(node, what)?;
        if t.chars().any(char::is_control) {
            self.error(
                node.mark,
                format!("{what} contains a line break or another control character"),
            )
            .hint("write it on one line: it becomes a cell of every table");
            return None;
        }
        Some(t)
    }

    pub fn number(&mut self, node: &Node, what: &str) -> Option<f64> {
        let t = self.text(node, what)?;
        match t.trim().parse::<f64>() {
            Ok(v) if v.is_finite() => Some(v),
            _ => {
                self.error(node.mark, format!("{what} must be a number, found `{t}`"));
                None
            }
        }
    }

    pub fn integer(&mut self, node: &Node, what: &str) -> Option<i64> {
        let t = self.text(node, what)?;
        match t.trim().parse::<i64>() {
            Ok(v) => Some(v),
            _ => {
                self.error(
                    node.mark,
                    format!("{what} must be a whole number, found `{t}`"),
                );
                None
            }
        }
    }

    pub fn boolean(&mut self, node: &Node, what: &str) -> Option<bool> {
        let t = self.text(node, what)?;
        match t.trim() {
            "true" | "True" | "yes" => Some(true),
            "false" | "False" | "no" => Some(false),
            _ => {
                self.error(
                    node.mark,
                    format!("{what} must be `true` or `false`, found `{t}`"),
                );
                None
            }
        }
    }

    /// A duration in seconds (`90s`, `5min`, `1h30min`).
    pub fn duration(&mut self, node: &Node, what: &str) -> Option<f64> {
        let t = self.text(node, what)?;
        match parse_seconds(&t) {
            Ok(s) => Some(s),
            Err(e) => {
                self.error(node.mark, format!("{what}: {e}"))
                    .hint("write durations like `90s`, `5min` or `1h30min`");
                None
            }
        }
    }

    /// A date-time with its UTC offset.
    pub fn time(&mut self, node: &Node, what: &str) -> Option<DateTime<FixedOffset>> {
        let t = self.text(node, what)?;
        match parse_time(&t) {
            Ok(v) => Some(v),
            Err(e) => {
                self.error(node.mark, format!("{what}: {e}"))
                    .hint("write date-times as ISO 8601 with the UTC offset, e.g. `2026-03-04T09:15:00+01:00`");
                None
            }
        }
    }

    pub fn list<'n>(&mut self, node: &'n Node, what: &str) -> Option<&'n [Node]> {
        match &node.value {
            Value::Seq(items) => Some(items),
            _ => {
                self.error(
                    node.mark,
                    format!(
                        "{what} must be a list (lines starting with `- `), found {}",
                        node.kind()
                    ),
                );
                None
            }
        }
    }

    /// A list, or a single item standing for a list of one.
    pub fn list_or_one<'n>(&mut self, node: &'n Node) -> Option<Vec<&'n Node>> {
        match &node.value {
            Value::Seq(items) => Some(items.iter().collect()),
            _ => Some(vec![node]),
        }
    }

    /// One of a fixed set of words.
    pub fn choice(&mut self, node: &Node, what: &str, allowed: &[&str]) -> Option<String> {
        let t = self.text(node, what)?;
        if allowed.contains(&t.as_str()) {
            Some(t)
        } else {
            let hint = suggest(&t, allowed);
            self.error(node.mark, format!("{what} `{t}` is not known"))
                .hint(hint);
            None
        }
    }
}

/// A list of counts: `6,8,10`, a range `6..30` (every 2), or `6..30/4`.
pub fn parse_counts(text: &str, lo: usize, hi: usize) -> Result<Vec<usize>, String> {
    let mut out: Vec<usize> = Vec::new();
    for part in text.split(',').map(str::trim).filter(|p| !p.is_empty()) {
        let bad = || format!("`{part}`: write a count, a list `6,8,10` or a range `6..30/4`");
        if let Some((a, rest)) = part.split_once("..") {
            let (b, step) = rest.split_once('/').unwrap_or((rest, "2"));
            let (a, b, step): (usize, usize, usize) = (
                a.trim().parse().map_err(|_| bad())?,
                b.trim().parse().map_err(|_| bad())?,
                step.trim().parse().map_err(|_| bad())?,
            );
            if step == 0 || a > b {
                return Err(bad());
            }
            let mut v = a;
            while v <= b {
                out.push(v);
                v += step;
            }
            if out.last() != Some(&b) {
                out.push(b);
            }
        } else {
            out.push(part.parse().map_err(|_| bad())?);
        }
    }
    bounded_counts(out, lo, hi)
}

/// Counts checked against `lo..=hi`, sorted, each once.
pub fn bounded_counts<T: Copy + TryInto<usize> + std::fmt::Display>(
    values: Vec<T>,
    lo: usize,
    hi: usize,
) -> Result<Vec<usize>, String> {
    if values.is_empty() {
        return Err("no value given".into());
    }
    let mut out = Vec::with_capacity(values.len());
    for v in values {
        match v.try_into() {
            Ok(n) if (lo..=hi).contains(&n) => out.push(n),
            _ => return Err(format!("{v} is outside {lo}–{hi}")),
        }
    }
    out.sort_unstable();
    out.dedup();
    Ok(out)
}
