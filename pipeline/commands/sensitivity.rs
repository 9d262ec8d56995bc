//! `satstep sensitivity`: how a 1 % transmission error in each band, and
//! independent 1 % errors in all bands, move the multiband SO2 estimate,
//! for veils from 0 to 0.9, with the fits' own weights refitted at each
//! veil and with the veil-free band combination held (see
//! [`crate::oximetry::sensitivity`]). Writes `sensitivity.csv` (and
//! `.parquet`) and a figure (`sensitivity.svg`, `sensitivity.png`); prints
//! the tables; and which extensions of the vessel model the bands can
//! identify (`model_support.csv`, [`crate::oximetry::sensitivity::support`]).

use std::path::Path;

use anyhow::{Context, Result};

use crate::commands::Exit;
use crate::config::diag::Findings;
use crate::config::read::Reader;
use crate::config::study::Instrument;
use crate::console::Printer;
use crate::oximetry::sensitivity::{OperatingPoint, Unknowns, Weights};
use crate::tables::Table;

/// Reads the instrument from a study file (only its `instrument:` is
/// needed, so this works before any data exist) or from an instrument file
/// (`name`, `pixel_size_um`, `bands` at the top).
pub(crate) fn load_instrument(path: &Path) -> Result<Instrument, Findings> {
    let mut findings = Findings::new();
    let Some(root) = crate::config::read::load_tree(
        path,
        "file",
        "give a study file or an instrument file",
        &mut findings,
    ) else {
        return Err(findings);
    };
    let dir = path.parent().map(Path::to_path_buf).unwrap_or_default();
    let node = root.get("instrument").cloned().unwrap_or(root);
    let inst = {
        let mut r = Reader::new(path, &mut findings);
        crate::config::study::read_instrument(&mut r, &node, &dir)
    };
    match inst {
        Some(i) if !findings.has_errors() => Ok(i),
        _ => Err(findings),
    }
}

/// `only`: band names to keep (all the instrument's bands when empty), so
/// that candidate band sets can be compared before a study.
pub fn sensitivity(
    file: &Path,
    op: &OperatingPoint,
    unknowns: Unknowns,
    only: &[String],
    out: &Path,
    printer: &Printer,
) -> Result<Exit> {
    // The operating point must be one the model can describe.
    let checks = [
        ("--so2", op.so2 * 100.0, 0.0, 100.0, "percent"),
        ("--diameter", op.diameter_um, 5.0, 500.0, "µm"),
        ("--hb", op.hb_g_per_l, 20.0, 400.0, "g/L"),
        (
            "--double-pass",
            op.double_pass,
            0.0,
            0.96,
            "(with the 4 % blood backscatter, the paths sum to one)",
        ),
    ];
    for (name, v, lo, hi, unit) in checks {
        if !(lo..=hi).contains(&v) {
            printer.error(format!(
                "`{name}` is {v}; give a value from {lo} to {hi} {unit}"
            ));
            return Ok(Exit::Problem);
        }
    }
    let inst = match load_instrument(file) {
        Ok(i) => i,
        Err(f) => {
            printer.findings(&f);
            printer.error(format!(
                "`{}` has {} errors",
                file.display(),
                f.error_count()
            ));
            return Ok(Exit::Problem);
        }
    };
    let all: Vec<&str> = inst.bands.iter().map(|b| b.name.as_str()).collect();
    let mut chosen: Vec<usize> = Vec::new();
    for name in only {
        match all.iter().position(|n| n == name) {
            Some(i) if !chosen.contains(&i) => chosen.push(i),
            Some(_) => {}
            None => {
                printer.error(format!(
                    "`--bands`: `{name}` is not a band of the instrument in `{}`; {}",
                    file.display(),
                    crate::config::diag::suggest(name, &all)
                ));
                return Ok(Exit::Problem);
            }
        }
    }
    if chosen.is_empty() {
        chosen = (0..all.len()).collect();
    }
    chosen.sort_unstable();
    if chosen.len() < 4 {
        let what = if only.is_empty() {
            "the instrument has"
        } else {
            "`--bands` selects"
        };
        printer.error(format!(
            "{what} {} bands; `{}` needs at least 4",
            chosen.len(),
            unknowns.method()
        ));
        return Ok(Exit::Problem);
    }
    let Some(curves) =
        crate::stages::report::data::sensitivity_curves(&inst, &chosen, op, unknowns)
    else {
        printer.error("the model cannot be linearised at some veil between 0 and 0.9: the bands do not separate the unknowns");
        return Ok(Exit::Problem);
    };
    let (mut tw, mut tk, mut tb, mut tc, mut te) = (vec![], vec![], vec![], vec![], vec![]);
    for (w, rows) in &curves.rows {
        for (k, per, all) in rows {
            for (b, e) in per
                .iter()
                .enumerate()
                .map(|(b, e)| (Some(b), *e))
                .chain([(None, *all)])
            {
                tw.push(w.name().to_string());
                tk.push(*k);
                tb.push(b.map_or_else(|| "all bands".to_string(), |b| curves.names[b].clone()));
                tc.push(b.map(|b| (curves.centres_nm[b] * 100.0).round() / 100.0));
                te.push(e);
            }
        }
    }
    std::fs::create_dir_all(out).with_context(|| format!("cannot create `{}`", out.display()))?;
    let mut t = Table::new();
    t.text("method", vec![unknowns.method().to_string(); tk.len()])
        .text("weights", &tw)
        .real("veil", tk)
        .text("band", &tb)
        .opt_real("centre_nm", tc)
        .real("so2_error_points", te);
    t.write(out, "sensitivity")?;
    crate::stages::report::figures::sensitivity(
        out,
        &curves,
        crate::stages::report::figures::Print::default(),
    )?;

    let mut s = format!(
        "SO2 error (points) for a 1 % transmission error, `{}`, at SO2 {:.0} %, diameter {:.0} µm, hemoglobin {:.0} g/L, double-pass fraction {:.2}\n",
        unknowns.method(),
        op.so2 * 100.0,
        op.diameter_um,
        op.hb_g_per_l,
        op.double_pass
    );
    for (w, rows) in &curves.rows {
        s.push_str(match w {
            Weights::Refitted => "\nweights refitted at each veil (as the fits weigh the bands)\n",
            Weights::Held => "\nveil-free band combination held (the veil changes the data only)\n",
        });
        s.push_str(&format!("{:>5}", "veil"));
        for n in &curves.names {
            s.push_str(&format!(" {n:>8}"));
        }
        s.push_str(&format!(" {:>9}\n", "all bands"));
        for (k, per, all) in rows {
            s.push_str(&format!("{k:>5.1}"));
            for e in per {
                s.push_str(&format!(" {e:>8.2}"));
            }
            s.push_str(&format!(" {all:>9.2}\n"));
        }
    }
    // Which extensions of the vessel model these bands can identify.
    let sampled: Vec<crate::oximetry::bands::SampledBand> = chosen
        .iter()
        .map(|b| crate::oximetry::bands::SampledBand::from_response(&inst.bands[*b].response))
        .collect();
    let support = crate::oximetry::sensitivity::support(&crate::oximetry::model::VesselModel::new(
        &sampled,
        |_| 1.0,
        crate::oximetry::model::BLOOD_BACKSCATTER,
    ));
    s.push_str(&format!(
        "\nmodel extensions these {} bands support (`model:` of a `multiband` method; SO2 standard error over the base model's, at most {} accepted)\n",
        chosen.len(),
        crate::oximetry::sensitivity::SUPPORT_MAX_INFLATION
    ));
    for x in &support {
        s.push_str(&format!(
            "  {:<48} {:>6.2}  {}\n",
            x.extensions.name(),
            x.inflation,
            if x.supported { "supported" } else { "refused" }
        ));
    }
    let mut t = Table::new();
    t.text("model", support.iter().map(|x| x.extensions.name()))
        .real("so2_se_inflation", support.iter().map(|x| x.inflation))
        .text(
            "supported",
            support
                .iter()
                .map(|x| if x.supported { "yes" } else { "no" }),
        );
    t.write(out, "model_support")?;
    printer.data(s);
    printer.info(format!(
        "wrote `sensitivity.csv`, `model_support.csv` (each with `.parquet`), `sensitivity.svg` and `.png` under `{}`",
        out.display()
    ));
    Ok(Exit::Ok)
}
