//! `satstep simulate`: writes a synthetic study with known truth from a scenario.

use std::path::Path;

use anyhow::Result;

use super::Exit;
use crate::console::Printer;

/// Writes a synthetic study from a scenario.
pub fn simulate(scenario: &Path, out: &Path, printer: &Printer) -> Result<Exit> {
    let sc = match crate::simulate::load_scenario(scenario) {
        Ok(s) => s,
        Err(findings) => {
            printer.findings(&findings);
            printer.error(format!(
                "`{}` has {} errors; nothing was simulated",
                scenario.display(),
                findings.error_count()
            ));
            return Ok(Exit::Problem);
        }
    };
    let started = std::time::Instant::now();
    let study = crate::simulate::simulate(&sc, out)?;
    printer.info(format!(
        "simulated `{}`: {} subjects, protocol `{}`, seed {} ({:.1} s); study file `{}`, truth under `{}`",
        sc.id,
        sc.subjects,
        sc.protocol.name,
        sc.seed,
        started.elapsed().as_secs_f64(),
        study.display(),
        out.join("truth").display()
    ));
    Ok(Exit::Ok)
}
