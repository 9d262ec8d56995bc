//! `satstep manual`: manual pages in roff, generated from the command-line
//! definitions themselves (clap_mangen), one page per command and
//! subcommand, so that the pages never disagree with `--help`.

use std::path::Path;

use anyhow::{Context, Result};

use super::Exit;
use crate::console::Printer;

/// Writes `satstep.1` and a page per subcommand (`satstep-run.1`, …) into `out`.
pub fn write_pages(cmd: clap::Command, out: &Path, printer: &Printer) -> Result<Exit> {
    std::fs::create_dir_all(out).with_context(|| format!("cannot create `{}`", out.display()))?;
    clap_mangen::generate_to(cmd, out)
        .with_context(|| format!("cannot write the manual pages into `{}`", out.display()))?;
    let mut pages: Vec<String> = std::fs::read_dir(out)
        .with_context(|| format!("cannot list `{}`", out.display()))?
        .flatten()
        .map(|e| e.file_name().to_string_lossy().to_string())
        .filter(|n| n.ends_with(".1"))
        .collect();
    pages.sort();
    printer.info(format!(
        "wrote {} manual pages into `{}` (read one with `man {}/satstep.1`)",
        pages.len(),
        out.display(),
        out.display()
    ));
    Ok(Exit::Ok)
}
