//! The one way the program talks to a person: data to stdout, everything
//! else to stderr, at the chosen verbosity, coloured only on a terminal and
//! never when `NO_COLOR` is set.

use std::io::{IsTerminal, Write};

use crate::config::diag::{Finding, Findings, Severity};

#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
pub enum Level {
    Quiet,
    Normal,
    Verbose,
}

#[derive(Debug, Clone, Copy)]
pub struct Printer {
    pub level: Level,
    color: bool,
    pub progress: bool,
}

impl Printer {
    pub fn new(level: Level, no_progress: bool) -> Self {
        let no_color = std::env::var_os("NO_COLOR").is_some_and(|v| !v.is_empty());
        let tty = std::io::stderr().is_terminal();
        Printer {
            level,
            color: tty && !no_color,
            progress: tty && !no_progress && level != Level::Quiet,
        }
    }

    fn paint(&self, code: &str, text: &str) -> String {
        if self.color {
            format!("\x1b[{code}m{text}\x1b[0m")
        } else {
            text.to_string()
        }
    }

    /// Normal messages: what is being done, what was written.
    pub fn info(&self, msg: impl AsRef<str>) {
        if self.level >= Level::Normal {
            eprintln!("{}", msg.as_ref());
        }
    }

    pub fn verbose(&self, msg: impl AsRef<str>) {
        if self.level >= Level::Verbose {
            eprintln!("{}", msg.as_ref());
        }
    }

    pub fn warn(&self, msg: impl AsRef<str>) {
        if self.level >= Level::Normal {
            eprintln!("{}: {}", self.paint("1;33", "warning"), msg.as_ref());
        }
    }

    /// Errors are printed at every verbosity.
    pub fn error(&self, msg: impl AsRef<str>) {
        eprintln!("{}: {}", self.paint("1;31", "error"), msg.as_ref());
    }

    pub fn finding(&self, f: &Finding) {
        let (word, code) = match f.severity {
            Severity::Error => ("error", "1;31"),
            Severity::Warning => ("warning", "1;33"),
        };
        if f.severity == Severity::Warning && self.level < Level::Normal {
            return;
        }
        let mut s = format!(
            "{}: {}: {}",
            self.paint(code, word),
            self.paint("1", &f.location()),
            f.message
        );
        if let Some(h) = &f.hint {
            s.push_str(&format!("\n  {}: {h}", self.paint("36", "hint")));
        }
        eprintln!("{s}");
    }

    pub fn findings(&self, all: &Findings) {
        for f in all.sorted() {
            self.finding(f);
        }
    }

    /// Data output (tables, timelines) goes to stdout.
    pub fn data(&self, text: impl AsRef<str>) {
        let mut out = std::io::stdout().lock();
        let _ = out.write_all(text.as_ref().as_bytes());
        let _ = out.flush();
    }
}
