//! Progress bars on stderr, drawn only when stderr is a terminal and the
//! user did not ask for quiet or `--no-progress`; pipes and tests see none.

use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};

use crate::console::Printer;

pub(crate) struct Progress(Option<ProgressBar>);

impl Progress {
    pub fn new(printer: &Printer, len: usize, what: &str) -> Self {
        if !printer.progress || len == 0 {
            return Progress(None);
        }
        let bar = ProgressBar::with_draw_target(Some(len as u64), ProgressDrawTarget::stderr());
        let style = ProgressStyle::with_template(
            "{prefix:>12} {bar:32} {pos}/{len} {msg} ({elapsed}, about {eta} left)",
        )
        .expect("valid template")
        .progress_chars("=> ");
        bar.set_style(style);
        bar.set_prefix(what.to_string());
        Progress(Some(bar))
    }

    pub fn inc(&self) {
        if let Some(b) = &self.0 {
            b.inc(1);
        }
    }

    pub fn inc_by(&self, n: usize) {
        if let Some(b) = &self.0 {
            b.inc(n as u64);
        }
    }

    pub fn finish(&self) {
        if let Some(b) = &self.0 {
            b.finish_and_clear();
        }
    }
}
