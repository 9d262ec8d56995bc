//! `satstep mixed`: a linear mixed model on an exported table, with
//! Satterthwaite tests, for re-analysing results outside a study run. Rows
//! can be chosen with `--where COL=VALUE`; rows with a missing value (an
//! empty cell, or `NaN`) in a column the model uses are left out and
//! counted, as a study's own tables have them (a segment without an SO2).

use std::path::{Path, PathBuf};

use anyhow::Result;
use nalgebra::DMatrix;

use crate::commands::Exit;
use crate::config::csvfile::read_csv;
use crate::config::diag::Findings;
use crate::console::Printer;
use crate::stats::design::{RandomSpec, Spec, build};
use crate::stats::infer::{Test, contrast, f_test, holm};
use crate::stats::lmm::{Criterion, Model};
use crate::tables::Table;

pub struct MixedArgs {
    pub data: PathBuf,
    pub response: String,
    pub fixed: Vec<String>,
    pub random: Vec<String>,
    pub reference: Vec<String>,
    pub contrasts: Vec<String>,
    /// `COL=VALUE`: rows kept.
    pub filters: Vec<String>,
    pub ml: bool,
    pub out: Option<PathBuf>,
}

fn tests_table(rows: &[Test], holm_p: Option<&[f64]>) -> Table {
    let mut t = Table::new();
    t.text("term", rows.iter().map(|r| &r.label))
        .real("estimate", rows.iter().map(|r| r.estimate))
        .real("se", rows.iter().map(|r| r.std_error))
        .real("df", rows.iter().map(|r| r.df))
        .real("t", rows.iter().map(|r| r.t))
        .real("p", rows.iter().map(|r| r.p))
        .real("lower", rows.iter().map(|r| r.lower))
        .real("upper", rows.iter().map(|r| r.upper))
        .real("confidence", rows.iter().map(|_| 0.95));
    if let Some(h) = holm_p {
        t.real("p_adjusted", h.iter().copied())
            .text("adjustment", h.iter().map(|_| "holm"));
    }
    t
}

pub fn mixed(a: &MixedArgs, printer: &Printer) -> Result<Exit> {
    let mut findings = Findings::new();
    let mut random = Vec::new();
    for r in &a.random {
        match RandomSpec::parse(r) {
            Ok(s) => random.push(s),
            Err(e) => {
                printer.error(format!("`--random {e}"));
                return Ok(Exit::Problem);
            }
        }
    }
    if random.is_empty() {
        printer.error("give at least one `--random GROUP` (a mixed model needs a grouping factor)");
        return Ok(Exit::Problem);
    }
    let mut reference = Vec::new();
    for r in &a.reference {
        match r.split_once('=') {
            Some((c, l)) => reference.push((c.to_string(), l.to_string())),
            None => {
                printer.error(format!(
                    "`--reference {r}`: write `COLUMN=LEVEL`, e.g. `epoch=air`"
                ));
                return Ok(Exit::Problem);
            }
        }
    }
    let spec = Spec {
        response: a.response.clone(),
        fixed: a.fixed.clone(),
        random,
        reference,
    };
    let Some(mut table) = read_csv(&a.data, &mut findings) else {
        printer.findings(&findings);
        return Ok(Exit::Problem);
    };
    let total = table.rows.len();
    for w in &a.filters {
        let Some((col, value)) = w.split_once('=') else {
            printer.error(format!(
                "`--where {w}`: write `COLUMN=VALUE`, e.g. `method=multiband`"
            ));
            return Ok(Exit::Problem);
        };
        let Some(c) = table.column(&a.data, col.trim(), "`--where`", &mut findings) else {
            printer.findings(&findings);
            return Ok(Exit::Problem);
        };
        table
            .rows
            .retain(|r| r.field(c).is_some_and(|(t, _)| t.trim() == value.trim()));
    }
    let chosen = table.rows.len();
    if !a.filters.is_empty() {
        printer.info(format!(
            "`--where` keeps {chosen} of {total} rows of `{}`",
            a.data.display()
        ));
        if chosen == 0 {
            printer.error("no row is left to fit: check the `--where` columns and values (they are compared as text)");
            return Ok(Exit::Problem);
        }
    }
    // Rows missing a value the model needs are left out, and counted.
    let mut used: Vec<String> = vec![spec.response.clone()];
    used.extend(spec.fixed.iter().cloned());
    for r in &spec.random {
        used.extend(r.groups.iter().cloned());
        used.extend(r.slopes.iter().cloned());
    }
    let mut cols = Vec::new();
    for name in &used {
        match table.column(&a.data, name, "the model", &mut findings) {
            Some(c) => cols.push((name.clone(), c)),
            None => {
                printer.findings(&findings);
                return Ok(Exit::Problem);
            }
        }
    }
    let missing = |t: &str| {
        let t = t.trim();
        t.is_empty() || t.eq_ignore_ascii_case("nan")
    };
    let mut by_column: Vec<(String, usize)> = Vec::new();
    table.rows.retain(|r| {
        let gap = cols
            .iter()
            .find(|(_, c)| r.field(*c).is_none_or(|(t, _)| missing(t)));
        if let Some((name, _)) = gap {
            match by_column.iter_mut().find(|(n, _)| n == name) {
                Some(e) => e.1 += 1,
                None => by_column.push((name.clone(), 1)),
            }
        }
        gap.is_none()
    });
    if !by_column.is_empty() {
        let dropped: usize = by_column.iter().map(|(_, n)| n).sum();
        let detail: Vec<String> = by_column
            .iter()
            .map(|(c, n)| format!("{n} in `{c}`"))
            .collect();
        printer.warn(format!(
            "left out {dropped} of {chosen} rows with a missing value ({})",
            detail.join(", ")
        ));
    }
    let Some(design) = build(&table, &a.data, &spec, &mut findings) else {
        printer.findings(&findings);
        printer.error(format!(
            "cannot build the model from `{}`",
            a.data.display()
        ));
        return Ok(Exit::Problem);
    };
    let mut contrast_weights = Vec::new();
    for c in &a.contrasts {
        match design.contrast(c) {
            Ok(l) => contrast_weights.push((c.clone(), l)),
            Err(e) => {
                printer.error(format!("`--contrast {c}`: {e}"));
                return Ok(Exit::Problem);
            }
        }
    }
    let factors = design.factors.clone();
    let model = Model::new(
        design.data,
        if a.ml { Criterion::Ml } else { Criterion::Reml },
    );
    let fit = match model.fit() {
        Ok(f) => f,
        Err(e) => {
            printer.error(format!("the model could not be fitted: {e}"));
            return Ok(Exit::Problem);
        }
    };
    let p = fit.beta.len();
    let fixed: Vec<Test> = (0..p)
        .map(|k| {
            let mut l = vec![0.0; p];
            l[k] = 1.0;
            contrast(&model, &fit, &model.fixed_names()[k], &l)
        })
        .collect();
    let cons: Vec<Test> = contrast_weights
        .iter()
        .map(|(label, l)| contrast(&model, &fit, label, l))
        .collect();
    let holm_p = holm(&cons.iter().map(|c| c.p).collect::<Vec<_>>());
    let comps = model.components(&fit);

    let crit = if a.ml { "ML" } else { "REML" };
    let mut s = format!(
        "linear mixed model fitted by {crit}: {} observations; {crit} criterion (−2 log-likelihood) {:.4}; {}\n",
        fit.n_obs,
        fit.deviance,
        if fit.converged {
            "converged"
        } else {
            "NOT converged"
        }
    );
    s.push_str("random effects:\n");
    let mut vc_group = Vec::new();
    let mut vc_var = Vec::new();
    for (name, cols, cov) in &comps.terms {
        for (i, c) in cols.iter().enumerate() {
            let g = if cols.len() == 1 {
                name.clone()
            } else {
                format!("{name} {c}")
            };
            s.push_str(&format!(
                "  {g:<28} variance {:>12.6}  sd {:>10.6}\n",
                cov[(i, i)],
                cov[(i, i)].sqrt()
            ));
            vc_group.push(g);
            vc_var.push(cov[(i, i)]);
        }
        for i in 0..cols.len() {
            for j in 0..i {
                let r = cov[(i, j)] / (cov[(i, i)] * cov[(j, j)]).sqrt();
                s.push_str(&format!(
                    "  {name}: correlation of {} and {}: {:.4}\n",
                    cols[j], cols[i], r
                ));
            }
        }
    }
    s.push_str(&format!(
        "  {:<28} variance {:>12.6}  sd {:>10.6}\n",
        "Residual",
        comps.residual,
        comps.residual.sqrt()
    ));
    vc_group.push("Residual".into());
    vc_var.push(comps.residual);
    let line = |t: &Test| {
        format!(
            "  {:<24} {:>12.6} {:>10.6} {:>10.3} {:>9.3} {:>10.3e}\n",
            t.label, t.estimate, t.std_error, t.df, t.t, t.p
        )
    };
    s.push_str(&format!(
        "fixed effects (Satterthwaite df):\n  {:<24} {:>12} {:>10} {:>10} {:>9} {:>10}\n",
        "term", "estimate", "SE", "df", "t", "p"
    ));
    for t in &fixed {
        s.push_str(&line(t));
    }
    for fa in &factors {
        if fa.x_columns.len() > 1 {
            let l = DMatrix::from_fn(fa.x_columns.len(), p, |i, j| {
                if j == fa.x_columns[i] { 1.0 } else { 0.0 }
            });
            let (f, ndf, ddf, pv) = f_test(&model, &fit, &l);
            s.push_str(&format!(
                "  F test for `{}`: F = {f:.4} on {ndf} and {ddf:.3} df, p = {pv:.3e}\n",
                fa.column
            ));
        }
    }
    if !cons.is_empty() {
        s.push_str("contrasts (Holm-adjusted p across them):\n");
        for (t, h) in cons.iter().zip(&holm_p) {
            s.push_str(&format!(
                "{}    95 % CI {:.4} to {:.4}; Holm p {:.3e}\n",
                line(t).trim_end(),
                t.lower,
                t.upper,
                h
            ));
        }
    }
    printer.data(s);

    if let Some(out) = &a.out {
        write_outputs(out, &fixed, &cons, &holm_p, &vc_group, &vc_var, &fit, crit)?;
        printer.info(format!("wrote fixed_effects.csv, contrasts.csv, variance_components.csv and fit.csv under `{}`", out.display()));
    }
    Ok(Exit::Ok)
}

#[allow(clippy::too_many_arguments)]
fn write_outputs(
    out: &Path,
    fixed: &[Test],
    cons: &[Test],
    holm_p: &[f64],
    g: &[String],
    v: &[f64],
    fit: &crate::stats::lmm::Fit,
    crit: &str,
) -> Result<()> {
    tests_table(fixed, None).write(out, "fixed_effects")?;
    tests_table(cons, Some(holm_p)).write(out, "contrasts")?;
    let mut t = Table::new();
    t.text("group", g)
        .real("variance", v.iter().copied())
        .real("sd", v.iter().map(|x| x.sqrt()));
    t.write(out, "variance_components")?;
    let mut t = Table::new();
    t.int("n_obs", [fit.n_obs as i64])
        .real("criterion", [fit.deviance])
        .text("method", [crit])
        .text("converged", [if fit.converged { "true" } else { "false" }]);
    t.write(out, "fit")?;
    Ok(())
}
