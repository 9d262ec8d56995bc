//! `satstep protocol show`: prints a protocol's timeline.

use std::path::Path;

use anyhow::Result;

use super::Exit;
use crate::config::protocol::load_protocol;
use crate::console::Printer;
use crate::timeline::show::render_timeline;

/// Prints a protocol's timeline.
pub(crate) fn show_protocol(file: &Path, printer: &Printer) -> Result<Exit> {
    match load_protocol(file) {
        Ok(p) => {
            printer.data(render_timeline(&p));
            Ok(Exit::Ok)
        }
        Err(findings) => {
            printer.findings(&findings);
            printer.error(format!(
                "`{}` has {} errors",
                file.display(),
                findings.error_count()
            ));
            Ok(Exit::Problem)
        }
    }
}
