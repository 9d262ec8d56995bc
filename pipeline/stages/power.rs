//! Power for a follow-up study: the outputs of a plan (`simulate::power`),
//! shared by `satstep power` and the study's `power` stage. Writes the
//! power table, the smallest design per method, kind and contrast, the
//! power-curve figure and a text fit for an ethics application that says
//! what was assumed and where the variances came from.

use std::fmt::Write as _;
use std::path::{Path, PathBuf};

use anyhow::Result;

use super::report::figures::{Curve, PowerCurves};
use super::stage::{Run, Stage};
use super::statistics::StatisticsStage;
use crate::config::study::Study;
use crate::runner::Runner;
use crate::runner::key::{Key, KeyBuilder};
use crate::simulate::power::{
    Missing, Plan, PowerRow, Question, Studies, grid, needed, run as simulate_plan, simulated,
    smallest, variances_from,
};
use crate::tables::{Table, create_folder, write_bytes_atomic};

/// The power stage: with a `power:` section, plans a follow-up study from
/// the variance components this run's statistics stage estimated; without
/// one, does nothing.
pub struct Power;

impl Stage for Power {
    const NAME: &'static str = "power";
    const VERSION: u32 = 1;
    const COHORT_LEVEL: bool = true;
    const SUMMARY: &'static str =
        "power of a follow-up study by simulation, from this run's variance components";
    const UPSTREAM: &'static [&'static str] = &["statistics"];
    type Output = Vec<PowerRow>;

    fn settings(study: &Study) -> Key {
        let mut k = KeyBuilder::new("power-settings", Self::VERSION);
        k.value("power", &study.power)
            .value("statistics", &study.statistics)
            .value("protocol", &study.protocol);
        k.finish()
    }

    fn build(run: &Run, _: &Runner) -> Result<(Vec<PowerRow>, String)> {
        let Some((plan, _)) = plan_for(run)? else {
            return Ok((Vec::new(), "no `power:` section".into()));
        };
        let rows = simulate_plan(&plan, &|_| {});
        let d = format!(
            "{} simulated studies over {} designs and {} methods and kinds",
            simulated(&rows, plan.question.contrasts.len()),
            plan.designs.len(),
            plan.variances.len()
        );
        Ok((rows, d))
    }

    fn write(rows: &Vec<PowerRow>, run: &Run, _: &Runner) -> Result<Vec<PathBuf>> {
        match plan_for(run)? {
            Some((plan, missing)) if !rows.is_empty() => write_outputs(
                &run.out().join("power"),
                &plan,
                rows,
                &Source::ThisRun,
                &missing,
                &run.study.protocol.name,
            ),
            _ => Ok(Vec::new()),
        }
    }

    fn describe(run: &Run) -> Option<String> {
        let p = run.study.power.as_ref()?;
        let effects: Vec<String> = p
            .effects
            .iter()
            .map(|(c, e)| format!("{e:+} points in `{c}`"))
            .collect();
        Some(format!(
            "The power of a follow-up study to detect {} was estimated by simulation from the variance components estimated here, each simulated study analysed with the same model and test ({}).",
            effects.join(" and "),
            studies_text(p.simulations.map_or(Studies::Auto, Studies::Fixed))
        ))
    }
}

/// The plan of the study's `power:` section over this run's variance
/// components; `None` without a section.
pub(crate) fn plan_for(run: &Run) -> Result<Option<(Plan, Vec<Missing>)>> {
    let study = run.study;
    let Some(p) = &study.power else {
        return Ok(None);
    };
    let question = Question::for_protocol(
        &study.protocol,
        &p.effects,
        study.statistics.confidence,
        study.statistics.adjustment.into(),
    )
    .map_err(|e| anyhow::anyhow!("the `power:` section's effects: {e}"))?;
    let stats = run.output::<StatisticsStage>();
    let rows: Vec<(String, String, String, f64)> = stats
        .variance
        .iter()
        .map(|v| {
            (
                v.method.clone(),
                v.kind.clone(),
                v.component.group.clone(),
                v.component.variance,
            )
        })
        .collect();
    let (variances, missing) = variances_from(&rows, &question.epochs, &p.methods, &p.kinds);
    let designs = grid(
        &p.subjects,
        &p.captures_per_epoch,
        &p.segments_per_eye,
        &p.eyes,
        &p.sessions,
    );
    let missing = needed(missing, &designs);
    let plan = Plan {
        question,
        effects: p.effects.clone(),
        designs,
        variances,
        target: p.target,
        studies: p.simulations.map_or(Studies::Auto, Studies::Fixed),
        seed: p.seed,
    };
    Ok(Some((plan, missing)))
}

/// Where the variance components came from.
#[derive(Debug, Clone, PartialEq)]
pub enum Source {
    /// A finished run's (or another) `variance_components` table.
    Table(PathBuf),
    /// The study's own statistics stage, in this run.
    ThisRun,
    /// Stated on the command line.
    Stated,
}

fn design_columns<'a>(t: &mut Table, rows: impl Iterator<Item = &'a PowerRow> + Clone) {
    t.int("subjects", rows.clone().map(|r| r.design.subjects as i64))
        .int("eyes", rows.clone().map(|r| r.design.eyes as i64))
        .int("sessions", rows.clone().map(|r| r.design.sessions as i64))
        .int(
            "segments_per_eye",
            rows.clone().map(|r| r.design.segments_per_eye as i64),
        )
        .int(
            "captures_per_epoch",
            rows.clone().map(|r| r.design.captures_per_epoch as i64),
        );
}

/// Writes `power.*`, `smallest.*`, `power_curve.{svg,png}` and `power.md` into `dir`.
pub fn write_outputs(
    dir: &Path,
    plan: &Plan,
    rows: &[PowerRow],
    source: &Source,
    missing: &[Missing],
    protocol: &str,
) -> Result<Vec<PathBuf>> {
    create_folder(dir)?;
    let mut files = Vec::new();
    let mut t = Table::new();
    design_columns(&mut t, rows.iter());
    t.text("method", rows.iter().map(|r| &r.method))
        .text("kind", rows.iter().map(|r| &r.kind))
        .text("contrast", rows.iter().map(|r| &r.contrast))
        .real("effect", rows.iter().map(|r| r.effect))
        .text(
            "effect_source",
            rows.iter()
                .map(|r| if r.stated { "stated" } else { "implied" }),
        )
        .int("simulations", rows.iter().map(|r| r.counts.studies as i64))
        .real("power", rows.iter().map(|r| r.counts.power()))
        .real("mc_se", rows.iter().map(|r| r.counts.mc_se()))
        .real("type1", rows.iter().map(|r| r.counts.type1()));
    files.extend(t.write(dir, "power")?);
    let epochs = plan.question.epochs.len();
    let best = smallest(rows, plan.target, epochs);
    let mut t = Table::new();
    t.text("method", best.iter().map(|b| &b.0.method))
        .text("kind", best.iter().map(|b| &b.0.kind))
        .text("contrast", best.iter().map(|b| &b.0.contrast))
        .real("effect", best.iter().map(|b| b.0.effect))
        .real("target", best.iter().map(|_| plan.target))
        .text(
            "reached",
            best.iter().map(|b| if b.1 { "yes" } else { "no" }),
        );
    design_columns(&mut t, best.iter().map(|b| b.0));
    t.int(
        "captures",
        best.iter().map(|b| b.0.design.captures(epochs) as i64),
    )
    .real("power", best.iter().map(|b| b.0.counts.power()))
    .real("mc_se", best.iter().map(|b| b.0.counts.mc_se()));
    files.extend(t.write(dir, "smallest")?);
    let fig = crate::stages::report::figures::power_curves(
        dir,
        &curves(plan, rows),
        crate::stages::report::figures::Print::default(),
    )?;
    files.extend(fig.files);
    let md = dir.join("power.md");
    write_bytes_atomic(&md, text(plan, rows, source, missing, protocol).as_bytes())?;
    files.push(md);
    Ok(files)
}

pub(crate) fn curves(plan: &Plan, rows: &[PowerRow]) -> PowerCurves {
    let mut out = PowerCurves {
        target: plan.target,
        rows: Vec::new(),
    };
    let mut methods: Vec<&str> = Vec::new();
    let mut kinds: Vec<&str> = Vec::new();
    for (m, k, _) in &plan.variances {
        if !methods.contains(&m.as_str()) {
            methods.push(m);
        }
        if !kinds.contains(&k.as_str()) {
            kinds.push(k);
        }
    }
    let vary = |f: fn(&PowerRow) -> usize| {
        let mut v: Vec<usize> = rows.iter().map(f).collect();
        v.sort_unstable();
        v.dedup();
        v.len() > 1
    };
    let (c, g, e, s) = (
        vary(|r| r.design.captures_per_epoch),
        vary(|r| r.design.segments_per_eye),
        vary(|r| r.design.eyes),
        vary(|r| r.design.sessions),
    );
    let label = |r: &PowerRow| {
        let mut parts = Vec::new();
        if c || !(g || e || s) {
            parts.push(format!("{} captures/epoch", r.design.captures_per_epoch));
        }
        if g {
            parts.push(format!("{} segments", r.design.segments_per_eye));
        }
        if e {
            parts.push(format!("{} eyes", r.design.eyes));
        }
        if s {
            parts.push(format!("{} sessions", r.design.sessions));
        }
        parts.join(", ")
    };
    for (contrast, effect) in &plan.effects {
        for kind in &kinds {
            let mut panels = Vec::new();
            for m in &methods {
                let mut curves: Vec<Curve> = Vec::new();
                for r in rows
                    .iter()
                    .filter(|r| &r.contrast == contrast && r.kind == *kind && r.method == *m)
                {
                    let l = label(r);
                    let point = (r.design.subjects as f64, r.counts.power(), r.counts.mc_se());
                    match curves.iter_mut().find(|c| c.0 == l) {
                        Some(c) => c.1.push(point),
                        None => curves.push((l, vec![point])),
                    }
                }
                if !curves.is_empty() {
                    panels.push((m.to_string(), curves));
                }
            }
            if !panels.is_empty() {
                out.rows
                    .push((format!("{kind}, `{contrast}` = {effect:+} points"), panels));
            }
        }
    }
    out
}

/// How many studies were simulated per design, in words.
pub(crate) fn studies_text(s: Studies) -> String {
    match s {
        Studies::Fixed(n) => format!("{n} simulated studies per design"),
        Studies::Auto => format!(
            "{} simulated studies per design, more (up to {}) where a power lay within 10 points of the target, so that its Monte Carlo standard error is at most 1 point",
            crate::simulate::power::AUTO_FIRST,
            crate::simulate::power::AUTO_MOST
        ),
    }
}

/// One line per stated contrast, method and kind: the smallest design.
pub fn summary_lines(plan: &Plan, rows: &[PowerRow]) -> Vec<String> {
    let epochs = plan.question.epochs.len();
    smallest(rows, plan.target, epochs)
        .into_iter()
        .map(|(r, reached)| {
            let d = &r.design;
            if reached {
                format!(
                    "{}, {}: `{}` = {:+} points: {} subjects ({} eye(s), {} session(s), {} segments per eye, {} captures per epoch) reach {:.0} % power ({:.1} % ± {:.1})",
                    r.method, r.kind, r.contrast, r.effect, d.subjects, d.eyes, d.sessions, d.segments_per_eye, d.captures_per_epoch, plan.target * 100.0, r.counts.power() * 100.0, r.counts.mc_se() * 100.0
                )
            } else {
                format!(
                    "{}, {}: `{}` = {:+} points: no design tried reaches {:.0} % power; the best, {} subjects with {} captures per epoch, has {:.1} % ± {:.1}",
                    r.method, r.kind, r.contrast, r.effect, plan.target * 100.0, d.subjects, d.captures_per_epoch, r.counts.power() * 100.0, r.counts.mc_se() * 100.0
                )
            }
        })
        .collect()
}

/// The text for an ethics application or a grant: design, effect,
/// analysis, assumptions and the sources of the variances.
pub fn text(
    plan: &Plan,
    rows: &[PowerRow],
    source: &Source,
    missing: &[Missing],
    protocol: &str,
) -> String {
    let q = &plan.question;
    let mut s = String::new();
    let _ = writeln!(s, "# Sample size by simulation\n");
    let _ = writeln!(
        s,
        "Research use only. Breathing challenges need medical supervision, ethics approval, continuous monitoring and stopping rules set by the study's physician; local rules decide.\n"
    );
    let effects: Vec<String> = plan
        .effects
        .iter()
        .map(|(c, e)| format!("{e:+} points of SO2 in `{c}`"))
        .collect();
    let alpha = 1.0 - q.confidence;
    let _ = writeln!(
        s,
        "The planned study follows the protocol `{protocol}` (epochs {}; baseline `{}`). It should detect {} with at least {:.0} % power at a two-sided level of {:.3}{}.\n",
        q.epochs.join(", "),
        q.epochs[q.baseline],
        effects.join(" and "),
        plan.target * 100.0,
        alpha,
        match q.adjustment {
            crate::stats::epoch_model::Adjustment::Holm => format!(
                ", the p-values adjusted by Holm's method over the protocol's {} contrasts",
                q.contrasts.len()
            ),
            crate::stats::epoch_model::Adjustment::None => String::new(),
        }
    );
    let _ = writeln!(s, "## Result\n");
    for line in summary_lines(plan, rows) {
        let _ = writeln!(s, "- {line}.");
    }
    let _ = writeln!(s, "\n## How\n");
    let _ = writeln!(
        s,
        "Power was estimated by simulation ({}; seed {}). Each simulated study draws per-capture SO2 for every subject, eye, session, vessel segment and epoch from the variance components below, with the stated change between epochs, and is analysed exactly as satstep's statistics stage analyses a real study: a linear mixed model with random intercepts for subject, session, eye and segment and a subject-specific deviation in each epoch (REML), each contrast tested with Satterthwaite's degrees of freedom, or by a t test over subjects when the model puts the subjects' spread of a response on its boundary. Power is the share of simulated studies whose adjusted p-value is below {alpha:.3}; its Monte Carlo standard error is `sqrt(p(1 − p)/N)`. The type-I error column of the table is the share of studies whose interval misses the true contrast, estimated from the same studies.\n",
        studies_text(plan.studies),
        plan.seed,
    );
    let _ = writeln!(s, "## Assumptions\n");
    let _ = writeln!(
        s,
        "- Variance components: {}.",
        match source {
            Source::Table(p) => format!("read from `{}`", p.display()),
            Source::ThisRun => "those the study's own statistics stage estimated (`statistics/variance_components`)".into(),
            Source::Stated => "stated by the investigators".into(),
        }
    );
    for (m, k, v) in &plan.variances {
        let resp: Vec<String> = q
            .epochs
            .iter()
            .zip(&v.response)
            .map(|(e, r)| format!("{e} {r:.2}"))
            .collect();
        let _ = writeln!(
            s,
            "  - {m}, {k}: SD subject {:.2}, session {:.2}, eye {:.2}, segment {:.2}, residual {:.2}; subject-specific response per epoch {} (points of SO2).",
            v.subject,
            v.session,
            v.eye,
            v.segment,
            v.residual,
            resp.join(", ")
        );
    }
    for m in missing {
        let _ = writeln!(s, "- The table had no component {m}; it was taken as 0.");
    }
    let _ = writeln!(
        s,
        "- Random effects and residuals are normal; every capture yields a value for every segment (no blinks or failed captures: plan for losses on top); every subject has the same number of eyes, sessions, segments and captures.\n- Variance components estimated from a small pilot are themselves uncertain; a design near the target power is worth a margin.\n"
    );
    s
}
