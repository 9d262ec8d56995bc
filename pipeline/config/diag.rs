//! Findings about a declarative file: what is wrong, where (`file:line:column`),
//! and how to fix it. Every loader collects all of its findings before it
//! gives up, so a researcher fixes a file in one pass instead of ten.

use std::fmt;
use std::path::{Path, PathBuf};

/// A position in a text file, both numbers counted from 1.
#[derive(
    Debug,
    Clone,
    Copy,
    PartialEq,
    Eq,
    PartialOrd,
    Ord,
    Default,
    serde::Serialize,
    serde::Deserialize,
)]
pub struct Mark {
    pub line: usize,
    pub col: usize,
}

impl Mark {
    pub fn new(line: usize, col: usize) -> Self {
        Mark { line, col }
    }
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
pub enum Severity {
    Error,
    Warning,
}

/// One finding. `mark` is `None` for findings about a whole file (it is missing,
/// it cannot be read).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Finding {
    pub severity: Severity,
    pub file: PathBuf,
    pub mark: Option<Mark>,
    pub message: String,
    pub hint: Option<String>,
}

impl Finding {
    /// `file:line:column` (or just the file), as editors and terminals link it.
    pub fn location(&self) -> String {
        match self.mark {
            Some(m) => format!("{}:{}:{}", self.file.display(), m.line, m.col),
            None => self.file.display().to_string(),
        }
    }
}

impl fmt::Display for Finding {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let word = match self.severity {
            Severity::Error => "error",
            Severity::Warning => "warning",
        };
        write!(f, "{word}: {}: {}", self.location(), self.message)?;
        if let Some(h) = &self.hint {
            write!(f, "\n  hint: {h}")?;
        }
        Ok(())
    }
}

/// Collects findings for one or more files.
#[derive(Debug, Default, Clone)]
pub struct Findings {
    items: Vec<Finding>,
}

impl Findings {
    pub fn new() -> Self {
        Self::default()
    }

    pub fn error(
        &mut self,
        file: &Path,
        mark: Option<Mark>,
        message: impl Into<String>,
    ) -> &mut Finding {
        self.push(Severity::Error, file, mark, message)
    }

    pub fn warning(
        &mut self,
        file: &Path,
        mark: Option<Mark>,
        message: impl Into<String>,
    ) -> &mut Finding {
        self.push(Severity::Warning, file, mark, message)
    }

    fn push(
        &mut self,
        severity: Severity,
        file: &Path,
        mark: Option<Mark>,
        message: impl Into<String>,
    ) -> &mut Finding {
        self.items.push(Finding {
            severity,
            file: file.to_path_buf(),
            mark,
            message: message.into(),
            hint: None,
        });
        self.items.last_mut().expect("just pushed")
    }

    pub fn extend(&mut self, other: Findings) {
        self.items.extend(other.items);
    }

    pub fn has_errors(&self) -> bool {
        self.items.iter().any(|f| f.severity == Severity::Error)
    }

    pub fn error_count(&self) -> usize {
        self.items
            .iter()
            .filter(|f| f.severity == Severity::Error)
            .count()
    }

    pub fn warning_count(&self) -> usize {
        self.items
            .iter()
            .filter(|f| f.severity == Severity::Warning)
            .count()
    }

    pub fn is_empty(&self) -> bool {
        self.items.is_empty()
    }

    /// Findings in file order, then position, so output is stable.
    pub fn sorted(&self) -> Vec<&Finding> {
        let mut v: Vec<&Finding> = self.items.iter().collect();
        v.sort_by(|a, b| (&a.file, a.mark, a.severity).cmp(&(&b.file, b.mark, b.severity)));
        v
    }

    pub fn iter(&self) -> impl Iterator<Item = &Finding> {
        self.items.iter()
    }
}

impl Finding {
    pub fn hint(&mut self, hint: impl Into<String>) -> &mut Self {
        self.hint = Some(hint.into());
        self
    }
}

/// The names in `valid` nearest to `word`, best first, for "expected one of".
pub(crate) fn nearest<'a>(word: &str, valid: &[&'a str]) -> Vec<&'a str> {
    let mut scored: Vec<(f64, &'a str)> = valid
        .iter()
        .map(|v| {
            (
                strsim::normalized_damerau_levenshtein(&word.to_lowercase(), v),
                *v,
            )
        })
        .collect();
    scored.sort_by(|a, b| {
        b.0.partial_cmp(&a.0)
            .unwrap_or(std::cmp::Ordering::Equal)
            .then(a.1.cmp(b.1))
    });
    let close: Vec<&str> = scored
        .iter()
        .filter(|(s, _)| *s >= 0.5)
        .map(|(_, v)| *v)
        .collect();
    if close.is_empty() {
        scored.into_iter().map(|(_, v)| v).collect()
    } else {
        close
    }
}

/// "did you mean `x`? expected one of `a`, `b`, `c`".
pub(crate) fn suggest(word: &str, valid: &[&str]) -> String {
    if valid.is_empty() {
        return "nothing is expected here: remove it".into();
    }
    let near = nearest(word, valid);
    let all = valid
        .iter()
        .map(|v| format!("`{v}`"))
        .collect::<Vec<_>>()
        .join(", ");
    match near.first() {
        Some(best) if strsim::normalized_damerau_levenshtein(&word.to_lowercase(), best) >= 0.5 => {
            format!("did you mean `{best}`? expected one of {all}")
        }
        _ => format!("expected one of {all}"),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn suggestion_names_the_nearest_key_first() {
        let s = suggest("setle", &["name", "gas", "duration", "settle"]);
        assert_eq!(
            s,
            "did you mean `settle`? expected one of `name`, `gas`, `duration`, `settle`"
        );
    }

    #[test]
    fn no_close_name_lists_all() {
        let s = suggest("zzzz", &["name", "gas"]);
        assert_eq!(s, "expected one of `name`, `gas`");
    }

    #[test]
    fn display_has_location_and_hint() {
        let mut f = Findings::new();
        f.error(Path::new("p.yaml"), Some(Mark::new(3, 5)), "bad")
            .hint("fix it");
        assert_eq!(
            f.sorted()[0].to_string(),
            "error: p.yaml:3:5: bad\n  hint: fix it"
        );
    }
}
