//! `satstep check`: validates a study and everything it names; writes nothing.

use std::path::Path;

use anyhow::Result;

use super::Exit;
use crate::console::Printer;
use crate::study::{load_study, resolve_study_path};

/// Validates a study and everything it names. Writes nothing.
pub fn check(arg: &Path, printer: &Printer) -> Result<Exit> {
    let path = resolve_study_path(arg);
    let (study, findings) = load_study(&path);
    printer.findings(&findings);
    match study {
        Some(s) => {
            printer.info(format!(
                "`{}` is valid: {} subjects, {} captures, {} epochs, {} methods ({} warnings)",
                path.display(),
                s.subjects.len(),
                s.capture_count(),
                s.protocol.epochs.len(),
                s.methods.len(),
                findings.warning_count()
            ));
            Ok(Exit::Ok)
        }
        None => {
            printer.error(format!(
                "`{}` has {} errors and {} warnings; nothing was written",
                path.display(),
                findings.error_count(),
                findings.warning_count()
            ));
            Ok(Exit::Problem)
        }
    }
}
