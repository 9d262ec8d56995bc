//! The statistics stage, per method and vessel kind over steady captures:
//! per subject × epoch summaries; the epoch model (`stats::epoch_model`:
//! random intercepts for the nesting and a subject-specific deviation in
//! each epoch, so that the subject is the unit of replication), its
//! variance components and the protocol's contrasts with Satterthwaite df
//! (or the subject-level test where the model cannot carry a contrast) and
//! the chosen adjustment; paired differences against the baseline (paired
//! t tests over subjects); the agreement of arteriolar SO2 with the
//! reference SpO2 (bias and limits over captures, the slope of SO2 on
//! SpO2 over subject × epoch means with random slopes by subject); and
//! quantities for comparing the methods on the same cohort, each with its
//! unit of replication. Segment values narrower than
//! `exclusions.min_diameter_um` are left out of all of it and counted.

use crate::config::segments::VesselKind;
use crate::oximetry::segment::Adequacy;
use crate::timeline::assign::CaptureStatus;
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use anyhow::Result;
use rayon::prelude::*;

use super::epochs::{CaptureRow, EpochTables, Epochs};
use super::fits::{FitRow, Fits};
use super::stage::{Run, Stage};
use crate::config::study::{Adjustment as Adjust, Method, Study};
use crate::runner::Runner;
use crate::runner::key::{Key, KeyBuilder};
use crate::stats::agreement::{Agreement, agreement};
use crate::stats::epoch_model::{
    self, Adjustment, Component, ContrastResult, ContrastSpec, Design, Observation, SlopeResult,
    analyse, slope_on_reference,
};
use crate::stats::summary::{mean, sd};
use crate::tables::Table;

/// One subject × epoch summary of one method and vessel kind.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct SummaryRow {
    pub method: String,
    pub kind: String,
    pub subject: String,
    pub epoch: String,
    /// Captures with at least one value.
    pub captures: i64,
    /// Segment values used.
    pub segments: i64,
    /// Mean over captures of the capture means.
    pub mean: f64,
    /// SD over captures of the capture means.
    pub sd: f64,
    /// Segment values left out for a diameter below `exclusions.min_diameter_um`.
    pub below_min_diameter: i64,
}

#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct ContrastRow {
    pub method: String,
    pub kind: String,
    pub result: ContrastResult,
}

#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct VarianceRow {
    pub method: String,
    pub kind: String,
    pub component: Component,
}

/// The epoch model that ran for one method and kind.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct ModelRow {
    pub method: String,
    pub kind: String,
    pub formula: String,
    pub observations: i64,
    /// Whether the model was fitted (else every contrast is subject-level).
    pub fitted: bool,
    /// Random terms whose variance is on the boundary.
    pub boundary: Vec<String>,
}

#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct AgreementRow {
    pub method: String,
    pub agreement: Agreement,
    pub slope: Option<SlopeResult>,
}

#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct PairedRow {
    pub method: String,
    pub kind: String,
    pub epoch: String,
    pub subjects: i64,
    pub mean_difference: f64,
    pub std_error: f64,
    pub df: f64,
    pub t: f64,
    pub p: f64,
}

/// One quantity of the method comparison, with the unit it is computed over.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct ComparisonRow {
    pub method: String,
    pub kind: String,
    pub quantity: String,
    pub value: f64,
    pub unit: String,
}

/// Agreement with the reference within one group of subjects (a
/// pigmentation grade, by default).
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct GroupAgreementRow {
    pub method: String,
    /// The attribute (`pigmentation`, `sex`, `site`).
    pub attribute: String,
    pub group: String,
    pub agreement: Agreement,
}

/// The difference in bias between the highest and the lowest group (the
/// darkest and the lightest pigmentation grades), each subject's mean
/// difference from the reference its unit (Welch's t test).
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct BiasDifferenceRow {
    pub method: String,
    pub attribute: String,
    pub high: String,
    pub low: String,
    pub subjects_high: i64,
    pub subjects_low: i64,
    pub test: crate::stats::agreement::MeanDifference,
}

/// A capture-mean arteriolar SO2 and its reference SpO2.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct AgreementPair {
    pub method: String,
    pub subject: String,
    pub so2: f64,
    pub spo2: f64,
}

#[derive(Default, Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct StatisticsTables {
    pub summaries: Vec<SummaryRow>,
    pub contrasts: Vec<ContrastRow>,
    pub variance: Vec<VarianceRow>,
    pub models: Vec<ModelRow>,
    pub agreement: Vec<AgreementRow>,
    pub paired: Vec<PairedRow>,
    pub comparison: Vec<ComparisonRow>,
    pub agreement_pairs: Vec<AgreementPair>,
    pub agreement_groups: Vec<GroupAgreementRow>,
    pub bias_differences: Vec<BiasDifferenceRow>,
    /// Coverage of the intervals and the p-value adjustment the rows carry.
    pub confidence: f64,
    pub adjustment: String,
}

impl StatisticsTables {
    /// Adds another part's rows after this one's.
    fn append(&mut self, other: StatisticsTables) {
        self.summaries.extend(other.summaries);
        self.contrasts.extend(other.contrasts);
        self.variance.extend(other.variance);
        self.models.extend(other.models);
        self.agreement.extend(other.agreement);
        self.paired.extend(other.paired);
        self.comparison.extend(other.comparison);
        self.agreement_pairs.extend(other.agreement_pairs);
        self.agreement_groups.extend(other.agreement_groups);
        self.bias_differences.extend(other.bias_differences);
    }
}

fn adjustment(study: &Study) -> Adjustment {
    match study.statistics.adjustment {
        Adjust::Holm => Adjustment::Holm,
        Adjust::None => Adjustment::None,
    }
}

/// The statistics stage.
pub(crate) struct StatisticsStage;

impl Stage for StatisticsStage {
    const NAME: &'static str = "statistics";
    const VERSION: u32 = 6;
    const COHORT_LEVEL: bool = true;
    const SUMMARY: &'static str =
        "summaries, the epoch model and its contrasts, agreement with SpO2, method comparison";
    const UPSTREAM: &'static [&'static str] = &["epochs", "fits"];
    type Output = StatisticsTables;

    /// Its own section of the study, the minimum diameter, the protocol's
    /// epochs and contrasts, and the method labels it groups by.
    fn settings(study: &Study) -> Key {
        let labels: Vec<&str> = study.methods.iter().map(|m| m.label.as_str()).collect();
        let mut k = KeyBuilder::new("statistics-settings", Self::VERSION);
        k.value("statistics", &study.statistics)
            .value("min-diameter-um", &study.exclusions.min_diameter_um)
            .value("protocol", &study.protocol)
            .value("methods", &labels);
        k.finish()
    }

    fn build(run: &Run, _: &Runner) -> Result<(StatisticsTables, String)> {
        let s = build(
            run.study,
            run.output::<Epochs>(),
            &run.output::<Fits>().rows,
        );
        let d = format!(
            "{} subject × epoch summaries, {} contrasts, {} agreement rows",
            s.summaries.len(),
            s.contrasts.len(),
            s.agreement.len()
        );
        Ok((s, d))
    }

    fn write(s: &StatisticsTables, run: &Run, _: &Runner) -> Result<Vec<PathBuf>> {
        s.write(run.out())
    }

    /// A minimum diameter that empties a method and vessel kind, and every
    /// contrast on one line.
    fn report(run: &Run, runner: &Runner) {
        let (study, stats) = (run.study, run.output::<StatisticsStage>());
        // A minimum diameter that empties a method and vessel kind leaves it
        // out of every statistic: say so rather than let the rows vanish.
        if let Some(d) = study.exclusions.min_diameter_um {
            let mut by: BTreeMap<(&str, &str), (i64, i64)> = BTreeMap::new();
            for r in stats.summaries.iter().filter(|r| r.kind != ARTERIOVENOUS) {
                let e = by.entry((r.method.as_str(), r.kind.as_str())).or_default();
                e.0 += r.segments;
                e.1 += r.below_min_diameter;
            }
            for ((m, k), (used, narrow)) in by {
                if used == 0 && narrow > 0 {
                    runner.printer.warn(format!("`exclusions.min_diameter_um: {d}` leaves no {k} value of `{m}` ({narrow} values are narrower): no {k} statistics for it"));
                }
            }
        }
        // A breakdown by an attribute that few subjects share says nothing
        // within those groups: say which, rather than let rows vanish.
        let by = study.statistics.agreement_by;
        if by != crate::config::study::GroupBy::None {
            let name = by.name();
            let mut count: BTreeMap<String, usize> = BTreeMap::new();
            for s in &study.subjects {
                if let Some(g) = by.of(s) {
                    *count.entry(g).or_default() += 1;
                }
            }
            let missing = study.subjects.len() - count.values().sum::<usize>();
            if count.is_empty() {
                runner.printer.warn(format!("`statistics.agreement_by: {name}`: no subject has a `{name}`, so the agreement with the reference is not broken down by it (give the subjects one, or set `agreement_by: none`)"));
            } else {
                if missing > 0 {
                    runner.printer.warn(format!("{missing} of {} subjects have no `{name}` and are left out of the agreement by {name} group", study.subjects.len()));
                }
                let single: Vec<&str> = count
                    .iter()
                    .filter(|(_, n)| **n < 2)
                    .map(|(g, _)| g.as_str())
                    .collect();
                if !single.is_empty() {
                    runner.printer.warn(format!("{name} group(s) {} have a single subject: no agreement within them, and no difference in bias between the highest and lowest group unless each has at least two subjects", single.join(", ")));
                }
            }
        }
        for c in &stats.contrasts {
            let t = &c.result.test;
            runner.printer.info(format!(
                "  {} {}: {} = {:+.2} points ({:.0} % CI {:+.2} to {:+.2}, df {:.1}, p {} ({}), {})",
                c.method,
                c.kind,
                t.label,
                t.estimate,
                study.statistics.confidence * 100.0,
                t.lower,
                t.upper,
                t.df,
                crate::stats::infer::format_p(c.result.p_adjusted),
                stats.adjustment,
                c.result.basis.name()
            ));
        }
    }

    fn describe(run: &Run) -> Option<String> {
        Some(describe(run.study, run.try_output::<StatisticsStage>()))
    }
}

/// The `kind` of the arteriolar-minus-venular rows of the summaries.
pub const ARTERIOVENOUS: &str = "arteriovenous";

/// Unit of replication of each method-comparison quantity.
const UNIT_CAPTURES: &str = "capture means within subject × epoch";
const UNIT_FITS: &str = "segment fits";
const UNIT_CHANGES: &str = "subject × epoch changes from baseline (descriptive, pooled)";
const UNIT_RATIO: &str =
    "measured change / SpO2 change, mean of subjects' ratios, interval at the study's confidence";
const UNIT_PAIRS: &str = "segment × capture pairs; limits for repeated measures per subject";

/// What every part of the stage reads, and which segment values it uses.
struct Context<'a> {
    study: &'a Study,
    captures: &'a [CaptureRow],
    fits: &'a [FitRow],
    epoch_names: Vec<String>,
    specs: Vec<ContrastSpec>,
    /// Each subject's recruiting site, in a multi-site study.
    sites: BTreeMap<&'a str, &'a str>,
}

impl<'a> Context<'a> {
    fn new(study: &'a Study, epochs: &'a EpochTables, fits: &'a [FitRow]) -> Self {
        let p = &study.protocol;
        Context {
            study,
            captures: &epochs.captures,
            fits,
            epoch_names: p.epochs.iter().map(|e| e.name.clone()).collect(),
            specs: p
                .contrasts
                .iter()
                .map(|ct| ContrastSpec {
                    label: ct.label.clone(),
                    weights: ct.weights.clone(),
                })
                .collect(),
            sites: study
                .subjects
                .iter()
                .filter_map(|s| Some((s.id.as_str(), s.site.as_deref()?)))
                .collect(),
        }
    }

    fn design(&self) -> Design<'_> {
        Design {
            epochs: &self.epoch_names,
            baseline: self.study.protocol.baseline,
            contrasts: &self.specs,
            confidence: self.study.statistics.confidence,
            adjustment: adjustment(self.study),
        }
    }

    fn baseline(&self) -> &str {
        &self.epoch_names[self.study.protocol.baseline]
    }

    fn narrow(&self, r: &FitRow) -> bool {
        self.study
            .exclusions
            .min_diameter_um
            .is_some_and(|d| r.below_diameter(d))
    }

    fn steady(&self, r: &FitRow) -> bool {
        self.captures[r.capture_index].status == CaptureStatus::Steady
    }

    /// A misfit left out by `statistics.adequate_only`.
    fn misfit_left_out(&self, r: &FitRow) -> bool {
        self.study.statistics.adequate_only && r.adequacy.is_some_and(Adequacy::is_misfit)
    }

    /// The values the statistics use: steady captures, a finite SO2, wide
    /// enough, and adequate when only adequate fits are asked for.
    fn usable(&self, r: &FitRow) -> bool {
        self.steady(r)
            && r.so2.is_some_and(f64::is_finite)
            && !self.narrow(r)
            && !self.misfit_left_out(r)
    }

    /// (subject, epoch) of a fit's capture.
    fn cell(&self, capture_index: usize) -> (String, String) {
        let cr = &self.captures[capture_index];
        (cr.subject.clone(), cr.epoch.clone().unwrap_or_default())
    }
}

/// One method and vessel kind: its usable segment values, and the same
/// grouped by subject × epoch and capture.
struct Group<'a> {
    method: &'a Method,
    kind: VesselKind,
    rows: Vec<&'a FitRow>,
    by_cell: BTreeMap<(String, String), BTreeMap<usize, Vec<f64>>>,
}

impl<'a> Group<'a> {
    fn new(cx: &Context<'a>, method: &'a Method, kind: VesselKind) -> Self {
        let rows: Vec<&FitRow> = cx
            .fits
            .iter()
            .filter(|r| r.method == method.label && r.kind == kind && cx.usable(r))
            .collect();
        let mut by_cell: BTreeMap<(String, String), BTreeMap<usize, Vec<f64>>> = BTreeMap::new();
        for r in &rows {
            by_cell
                .entry(cx.cell(r.capture_index))
                .or_default()
                .entry(r.capture_index)
                .or_default()
                .push(r.so2.unwrap_or(f64::NAN));
        }
        Group {
            method,
            kind,
            rows,
            by_cell,
        }
    }

    fn mine(&self, r: &FitRow) -> bool {
        r.method == self.method.label && r.kind == self.kind
    }

    fn label(&self) -> String {
        self.method.label.clone()
    }

    fn kind(&self) -> String {
        self.kind.as_str().to_string()
    }

    /// A subject's mean over captures in an epoch (capture means first).
    fn subject_mean(&self, subject: &str, epoch: &str) -> Option<f64> {
        self.by_cell
            .get(&(subject.to_string(), epoch.to_string()))
            .map(|caps| mean(&caps.values().map(|v| mean(v)).collect::<Vec<_>>()))
    }
}

fn build(study: &Study, epochs: &EpochTables, fits: &[FitRow]) -> StatisticsTables {
    let cx = Context::new(study, epochs, fits);
    let mut st = StatisticsTables {
        confidence: study.statistics.confidence,
        adjustment: cx.design().adjustment.name().to_string(),
        ..StatisticsTables::default()
    };
    // Each method and vessel kind is analysed on its own, in parallel; the
    // parts are joined in the study's order, so the result does not depend
    // on the number of threads.
    let pairs: Vec<(&Method, VesselKind)> = study
        .methods
        .iter()
        .flat_map(|m| [(m, VesselKind::Arteriole), (m, VesselKind::Venule)])
        .collect();
    let parts: Vec<StatisticsTables> = pairs
        .par_iter()
        .map(|&(m, kind)| analyse_group(&cx, &Group::new(&cx, m, kind)))
        .collect();
    for part in parts {
        st.append(part);
    }
    arteriovenous(&cx, &mut st);
    between_methods(&cx, &mut st);
    st
}

/// Everything the stage says about one method and vessel kind, in the
/// order the tables list it.
fn analyse_group(cx: &Context, g: &Group) -> StatisticsTables {
    let mut st = StatisticsTables::default();
    summaries(cx, g, &mut st);
    let obs = observations(cx, g);
    paired(cx, g, &obs, &mut st);
    comparison(cx, g, &mut st);
    epoch_model_rows(cx, g, &obs, &mut st);
    if g.kind == VesselKind::Arteriole {
        agreement_with_reference(cx, g, &mut st);
    }
    st
}

/// Per subject × epoch: capture means first, then over captures; cells
/// that lost every value to the minimum diameter keep a row that says so.
fn summaries(cx: &Context, g: &Group, st: &mut StatisticsTables) {
    let mut narrow_by: BTreeMap<(String, String), i64> = BTreeMap::new();
    for r in cx
        .fits
        .iter()
        .filter(|r| g.mine(r) && cx.steady(r) && r.so2.is_some_and(f64::is_finite) && cx.narrow(r))
    {
        *narrow_by.entry(cx.cell(r.capture_index)).or_default() += 1;
    }
    let cells: std::collections::BTreeSet<&(String, String)> =
        g.by_cell.keys().chain(narrow_by.keys()).collect();
    for key in cells {
        let means: Vec<f64> = g
            .by_cell
            .get(key)
            .map(|caps| caps.values().map(|v| mean(v)).collect())
            .unwrap_or_default();
        st.summaries.push(SummaryRow {
            method: g.label(),
            kind: g.kind(),
            subject: key.0.clone(),
            epoch: key.1.clone(),
            captures: means.len() as i64,
            segments: g
                .by_cell
                .get(key)
                .map(|caps| caps.values().map(|v| v.len() as i64).sum())
                .unwrap_or(0),
            mean: if means.is_empty() {
                f64::NAN
            } else {
                mean(&means)
            },
            sd: sd(&means),
            below_min_diameter: narrow_by.get(key).copied().unwrap_or(0),
        });
    }
}

/// The segment values as the epoch model and the paired tests take them.
fn observations(cx: &Context, g: &Group) -> Vec<Observation> {
    g.rows
        .iter()
        .filter_map(|r| {
            let cr = &cx.captures[r.capture_index];
            let epoch = cx
                .epoch_names
                .iter()
                .position(|e| Some(e.as_str()) == cr.epoch.as_deref())?;
            Some(Observation {
                subject: cr.subject.clone(),
                session: cr.session.clone(),
                eye: cr.eye.clone(),
                segment: r.segment.clone(),
                epoch,
                so2: r.so2?,
                site: cx.sites.get(cr.subject.as_str()).map(|s| s.to_string()),
            })
        })
        .collect()
}

/// Paired differences against the baseline, each subject's segments
/// compared with themselves.
fn paired(cx: &Context, g: &Group, obs: &[Observation], st: &mut StatisticsTables) {
    let p = &cx.study.protocol;
    for (ei, e) in p
        .epochs
        .iter()
        .enumerate()
        .filter(|(ei, _)| *ei != p.baseline)
    {
        let spec = ContrastSpec {
            label: format!("{} - {}", e.name, cx.baseline()),
            weights: vec![(ei, 1.0), (p.baseline, -1.0)],
        };
        if let Some((t, n)) =
            epoch_model::subject_level_test(obs, &spec, cx.study.statistics.confidence)
        {
            st.paired.push(PairedRow {
                method: g.label(),
                kind: g.kind(),
                epoch: e.name.clone(),
                subjects: n as i64,
                mean_difference: t.estimate,
                std_error: t.std_error,
                df: t.df,
                t: t.t,
                p: t.p,
            });
        }
    }
}

/// Method comparison: repeatability (pooled within subject × epoch SD of
/// capture means), along-segment spread (mean SE of the segment
/// estimates), share of values outside 0–100 %, and the slope of the
/// retinal change on the SpO2 change.
fn comparison(cx: &Context, g: &Group, st: &mut StatisticsTables) {
    let (mut ss, mut dfw) = (0.0, 0.0);
    for caps in g.by_cell.values() {
        let means: Vec<f64> = caps.values().map(|v| mean(v)).collect();
        if means.len() > 1 {
            let mu = mean(&means);
            ss += means.iter().map(|x| (x - mu).powi(2)).sum::<f64>();
            dfw += means.len() as f64 - 1.0;
        }
    }
    let all: Vec<&FitRow> = cx
        .fits
        .iter()
        .filter(|r| g.mine(r) && r.so2.is_some_and(f64::is_finite) && !cx.narrow(r))
        .collect();
    let outside = all
        .iter()
        .filter(|r| !(0.0..=100.0).contains(&r.so2.unwrap_or(f64::NAN)))
        .count();
    let ses: Vec<f64> = g
        .rows
        .iter()
        .filter_map(|r| r.so2_se)
        .filter(|v| v.is_finite())
        .collect();
    let mut comp = |q: &str, v: f64, unit: &str| {
        st.comparison.push(ComparisonRow {
            method: g.label(),
            kind: g.kind(),
            quantity: q.into(),
            value: v,
            unit: unit.into(),
        })
    };
    comp(
        "repeatability_sd",
        if dfw > 0.0 {
            (ss / dfw).sqrt()
        } else {
            f64::NAN
        },
        UNIT_CAPTURES,
    );
    comp(
        "mean_segment_se",
        if ses.is_empty() { f64::NAN } else { mean(&ses) },
        UNIT_FITS,
    );
    let along: Vec<f64> = g.rows.iter().filter_map(|r| r.along_sd).collect();
    if !along.is_empty() {
        comp("along_segment_sd", mean(&along), UNIT_FITS);
    }
    comp("values", all.len() as f64, UNIT_FITS);
    comp(
        "share_outside_0_100",
        if all.is_empty() {
            f64::NAN
        } else {
            outside as f64 / all.len() as f64
        },
        UNIT_FITS,
    );
    if let Some(slope) = slope_change_on_spo2_change(cx, g) {
        comp("slope_change_on_spo2_change", slope, UNIT_CHANGES);
    }
    if let Some((ratio, lo, hi, n)) = change_ratio(cx, g) {
        comp("change_ratio", ratio, UNIT_RATIO);
        comp("change_ratio_lower", lo, UNIT_RATIO);
        comp("change_ratio_upper", hi, UNIT_RATIO);
        comp("change_ratio_subjects", n as f64, UNIT_RATIO);
    }
}

/// The measured change over the reference's change, so that a method that
/// shrinks (or inflates) the response shows at a glance: per subject, the
/// least-squares ratio through the origin of the retinal change from
/// baseline on the SpO2 change over the non-baseline epochs
/// `Σ ΔSpO2·ΔSO2 / Σ ΔSpO2²`, then the mean over subjects with a t interval
/// at the study's confidence (n − 1 df); subjects whose SpO2 moved by less
/// than 1 point in every epoch give no ratio. Returns (ratio, lower, upper,
/// subjects).
fn change_ratio(cx: &Context, g: &Group) -> Option<(f64, f64, f64, usize)> {
    use statrs::distribution::{ContinuousCDF, StudentsT};
    let per_subject: Vec<f64> = changes_by_subject(cx, g)
        .into_iter()
        .filter_map(|pairs| {
            let sxx: f64 = pairs.iter().map(|(x, _)| x * x).sum();
            (pairs.iter().any(|(x, _)| x.abs() >= 1.0))
                .then(|| pairs.iter().map(|(x, y)| x * y).sum::<f64>() / sxx)
        })
        .collect();
    let n = per_subject.len();
    if n < 2 {
        return None;
    }
    let m = mean(&per_subject);
    let sd = (per_subject.iter().map(|v| (v - m).powi(2)).sum::<f64>() / (n - 1) as f64).sqrt();
    let q = StudentsT::new(0.0, 1.0, (n - 1) as f64)
        .ok()?
        .inverse_cdf(0.5 + cx.study.statistics.confidence / 2.0);
    let half = q * sd / (n as f64).sqrt();
    Some((m, m - half, m + half, n))
}

/// Slope of the retinal change on the SpO2 change (per subject and epoch
/// against the baseline, pooled): a description, not a test.
fn slope_change_on_spo2_change(cx: &Context, g: &Group) -> Option<f64> {
    let (dx, dy): (Vec<f64>, Vec<f64>) = changes_by_subject(cx, g).into_iter().flatten().unzip();
    crate::oximetry::odr::ols(&dx, &dy).map(|l| l.slope)
}

/// Per subject, its (SpO2 change, retinal change) from the baseline epoch
/// for each other epoch where both exist (steady captures' means).
fn changes_by_subject(cx: &Context, g: &Group) -> Vec<Vec<(f64, f64)>> {
    let spo2_mean = |s: &str, epoch: &str| -> Option<f64> {
        let v: Vec<f64> = cx
            .captures
            .iter()
            .filter(|r| {
                r.subject == s
                    && r.status == CaptureStatus::Steady
                    && r.epoch.as_deref() == Some(epoch)
            })
            .filter_map(|r| r.spo2)
            .collect();
        (!v.is_empty()).then(|| mean(&v))
    };
    let subjects: Vec<String> = {
        let mut v: Vec<String> = g.by_cell.keys().map(|k| k.0.clone()).collect();
        v.dedup();
        v
    };
    let base = cx.baseline();
    subjects
        .iter()
        .map(|s| {
            cx.study
                .protocol
                .epochs
                .iter()
                .filter(|e| e.name != base)
                .filter_map(|e| {
                    Some((
                        spo2_mean(s, &e.name)? - spo2_mean(s, base)?,
                        g.subject_mean(s, &e.name)? - g.subject_mean(s, base)?,
                    ))
                })
                .collect::<Vec<_>>()
        })
        .filter(|v| !v.is_empty())
        .collect()
}

/// The epoch model: its formula and boundary terms, variance components
/// and contrasts.
fn epoch_model_rows(cx: &Context, g: &Group, obs: &[Observation], st: &mut StatisticsTables) {
    if obs.is_empty() {
        return;
    }
    let a = analyse(obs, &cx.design());
    st.models.push(ModelRow {
        method: g.label(),
        kind: g.kind(),
        formula: a.formula.clone(),
        observations: a.observations as i64,
        fitted: !a.components.is_empty(),
        boundary: a
            .components
            .iter()
            .filter(|c| c.boundary)
            .map(|c| c.group.clone())
            .collect(),
    });
    st.variance
        .extend(a.components.into_iter().map(|component| VarianceRow {
            method: g.label(),
            kind: g.kind(),
            component,
        }));
    st.contrasts
        .extend(a.contrasts.into_iter().map(|result| ContrastRow {
            method: g.label(),
            kind: g.kind(),
            result,
        }));
}

/// Arteriolar SO2 against the reference SpO2: bias and limits over
/// captures, and the slope over subject × epoch means.
/// The agreement within each group of the study's `agreement_by`
/// attribute, and the difference in bias between the highest and lowest
/// group (grades in numeric order, other attributes in text order) over
/// subjects: each subject's mean of its capture differences, Welch's t.
fn agreement_by_group(
    cx: &Context,
    g: &Group,
    pairs: &[(String, f64, f64)],
    st: &mut StatisticsTables,
) {
    let by = cx.study.statistics.agreement_by;
    let group_of: BTreeMap<&str, String> = cx
        .study
        .subjects
        .iter()
        .filter_map(|s| Some((s.id.as_str(), by.of(s)?)))
        .collect();
    let mut groups: BTreeMap<&str, Vec<(String, f64, f64)>> = BTreeMap::new();
    for p in pairs {
        if let Some(k) = group_of.get(p.0.as_str()) {
            groups.entry(k.as_str()).or_default().push(p.clone());
        }
    }
    let mut order: Vec<&str> = groups.keys().copied().collect();
    order.sort_by(|a, b| match (a.parse::<f64>(), b.parse::<f64>()) {
        (Ok(x), Ok(y)) => x.total_cmp(&y),
        _ => a.cmp(b),
    });
    for k in &order {
        if let Some(a) = agreement(&groups[k]) {
            st.agreement_groups.push(GroupAgreementRow {
                method: g.label(),
                attribute: by.name().into(),
                group: k.to_string(),
                agreement: a,
            });
        }
    }
    let subject_means = |k: &str| -> Vec<f64> {
        let mut by_subject: BTreeMap<&str, Vec<f64>> = BTreeMap::new();
        for (s, so2, spo2) in &groups[k] {
            by_subject.entry(s.as_str()).or_default().push(so2 - spo2);
        }
        by_subject.values().map(|d| mean(d)).collect()
    };
    if let (Some(low), Some(high)) = (order.first(), order.last()) {
        let (h, l) = (subject_means(high), subject_means(low));
        if let Some(test) = crate::stats::agreement::welch(&h, &l, cx.study.statistics.confidence)
            .filter(|_| high != low)
        {
            st.bias_differences.push(BiasDifferenceRow {
                method: g.label(),
                attribute: by.name().into(),
                high: high.to_string(),
                low: low.to_string(),
                subjects_high: h.len() as i64,
                subjects_low: l.len() as i64,
                test,
            });
        }
    }
}

fn agreement_with_reference(cx: &Context, g: &Group, st: &mut StatisticsTables) {
    let c = cx.captures;
    let mut per_capture: BTreeMap<usize, Vec<f64>> = BTreeMap::new();
    for r in &g.rows {
        per_capture
            .entry(r.capture_index)
            .or_default()
            .push(r.so2.unwrap_or(f64::NAN));
    }
    let captures: Vec<(usize, f64, f64)> = per_capture
        .iter()
        .filter_map(|(ci, v)| c[*ci].spo2.map(|s| (*ci, mean(v), s)))
        .collect();
    let pairs: Vec<(String, f64, f64)> = captures
        .iter()
        .map(|(ci, so2, spo2)| (c[*ci].subject.clone(), *so2, *spo2))
        .collect();
    let Some(a) = agreement(&pairs) else {
        return;
    };
    // The slope over subject × epoch means, subjects as the unit.
    let mut cells: BTreeMap<(String, String), (Vec<f64>, Vec<f64>)> = BTreeMap::new();
    for (ci, so2, spo2) in &captures {
        let e = cells.entry(cx.cell(*ci)).or_default();
        e.0.push(*so2);
        e.1.push(*spo2);
    }
    let cells: Vec<(String, f64, f64)> = cells
        .into_iter()
        .map(|((s, _), (a, b))| (s, mean(&a), mean(&b)))
        .collect();
    let slope = slope_on_reference(&cells, cx.study.statistics.confidence);
    st.agreement.push(AgreementRow {
        method: g.label(),
        agreement: a,
        slope,
    });
    agreement_by_group(cx, g, &pairs, st);
    st.agreement_pairs
        .extend(pairs.iter().map(|(s, so2, spo2)| AgreementPair {
            method: g.label(),
            subject: s.clone(),
            so2: *so2,
            spo2: *spo2,
        }));
}

/// Arteriovenous difference per method, subject and epoch: per capture
/// the mean arteriolar minus the mean venular SO2, then over captures.
fn arteriovenous(cx: &Context, st: &mut StatisticsTables) {
    for m in &cx.study.methods {
        let mut per: BTreeMap<usize, (Vec<f64>, Vec<f64>)> = BTreeMap::new();
        for r in cx
            .fits
            .iter()
            .filter(|r| r.method == m.label && cx.usable(r))
        {
            if let Some(v) = r.so2 {
                let e = per.entry(r.capture_index).or_default();
                if r.kind == VesselKind::Arteriole {
                    e.0.push(v)
                } else {
                    e.1.push(v)
                }
            }
        }
        let mut by: BTreeMap<(String, String), Vec<(f64, i64)>> = BTreeMap::new();
        for (ci, (a, v)) in &per {
            if !a.is_empty() && !v.is_empty() {
                by.entry(cx.cell(*ci))
                    .or_default()
                    .push((mean(a) - mean(v), (a.len() + v.len()) as i64));
            }
        }
        for ((s, e), d) in by {
            let diffs: Vec<f64> = d.iter().map(|x| x.0).collect();
            st.summaries.push(SummaryRow {
                method: m.label.clone(),
                kind: ARTERIOVENOUS.into(),
                subject: s,
                epoch: e,
                captures: d.len() as i64,
                segments: d.iter().map(|x| x.1).sum(),
                mean: mean(&diffs),
                sd: sd(&diffs),
                below_min_diameter: 0,
            });
        }
    }
}

/// Agreement between methods on the same segments and captures.
fn between_methods(cx: &Context, st: &mut StatisticsTables) {
    let methods = &cx.study.methods;
    for (i, ma) in methods.iter().enumerate() {
        for mb in &methods[i + 1..] {
            for kind in [VesselKind::Arteriole, VesselKind::Venule] {
                let get = |label: &str| -> BTreeMap<(usize, String), f64> {
                    cx.fits
                        .iter()
                        .filter(|r| r.method == label && r.kind == kind && cx.usable(r))
                        .filter_map(|r| Some(((r.capture_index, r.segment.clone()), r.so2?)))
                        .collect()
                };
                let (a, b) = (get(&ma.label), get(&mb.label));
                let pairs: Vec<(String, f64, f64)> = a
                    .iter()
                    .filter_map(|(k, va)| {
                        b.get(k)
                            .map(|vb| (cx.captures[k.0].subject.clone(), *va, *vb))
                    })
                    .collect();
                if let Some(ag) = agreement(&pairs) {
                    let label = format!("{} vs {}", ma.label, mb.label);
                    for (q, v) in [
                        ("bias", ag.bias),
                        ("loa_lower", ag.lower),
                        ("loa_upper", ag.upper),
                        ("pairs", ag.n as f64),
                    ] {
                        st.comparison.push(ComparisonRow {
                            method: label.clone(),
                            kind: kind.as_str().into(),
                            quantity: q.into(),
                            value: v,
                            unit: UNIT_PAIRS.into(),
                        });
                    }
                }
            }
        }
    }
}

/// The columns of an agreement with the reference, as every agreement
/// table writes them.
fn agreement_columns<'t>(t: &'t mut Table, a: &[&Agreement]) -> &'t mut Table {
    t.int("captures", a.iter().map(|r| r.n as i64))
        .int("subjects", a.iter().map(|r| r.subjects as i64))
        .real("bias", a.iter().map(|r| r.bias))
        .real("precision", a.iter().map(|r| r.precision))
        .real("arms", a.iter().map(|r| r.arms))
        .real("loa_lower", a.iter().map(|r| r.lower))
        .real("loa_upper", a.iter().map(|r| r.upper))
}

impl StatisticsTables {
    pub fn write(&self, out: &Path) -> Result<Vec<std::path::PathBuf>> {
        let mut written = Vec::new();
        let dir = out.join("statistics");
        let s = &self.summaries;
        let mut t = Table::new();
        t.text("method", s.iter().map(|r| &r.method))
            .text("kind", s.iter().map(|r| &r.kind))
            .text("subject", s.iter().map(|r| &r.subject))
            .text("epoch", s.iter().map(|r| &r.epoch))
            .int("captures", s.iter().map(|r| r.captures))
            .int("segments", s.iter().map(|r| r.segments))
            .real("mean_so2", s.iter().map(|r| r.mean))
            .real("sd_so2", s.iter().map(|r| r.sd))
            .int("below_min_diameter", s.iter().map(|r| r.below_min_diameter));
        written.extend(t.write(&dir, "summaries")?);
        let c = &self.contrasts;
        let mut t = Table::new();
        t.text("method", c.iter().map(|r| &r.method))
            .text("kind", c.iter().map(|r| &r.kind))
            .text("contrast", c.iter().map(|r| &r.result.test.label))
            .real("estimate", c.iter().map(|r| r.result.test.estimate))
            .real("se", c.iter().map(|r| r.result.test.std_error))
            .real("df", c.iter().map(|r| r.result.test.df))
            .real("t", c.iter().map(|r| r.result.test.t))
            .real("p", c.iter().map(|r| r.result.test.p))
            .real("lower", c.iter().map(|r| r.result.test.lower))
            .real("upper", c.iter().map(|r| r.result.test.upper))
            .real("confidence", c.iter().map(|_| self.confidence))
            .real("p_adjusted", c.iter().map(|r| r.result.p_adjusted))
            .text("adjustment", c.iter().map(|_| &self.adjustment))
            .text("test", c.iter().map(|r| r.result.basis.name()))
            .int("subjects", c.iter().map(|r| r.result.subjects as i64));
        written.extend(t.write(&dir, "contrasts")?);
        let v = &self.variance;
        let mut t = Table::new();
        t.text("method", v.iter().map(|r| &r.method))
            .text("kind", v.iter().map(|r| &r.kind))
            .text("group", v.iter().map(|r| &r.component.group))
            .int("levels", v.iter().map(|r| r.component.levels as i64))
            .real("variance", v.iter().map(|r| r.component.variance))
            .real("sd", v.iter().map(|r| r.component.variance.sqrt()))
            .text(
                "boundary",
                v.iter()
                    .map(|r| if r.component.boundary { "yes" } else { "no" }),
            );
        written.extend(t.write(&dir, "variance_components")?);
        let md = &self.models;
        let mut t = Table::new();
        t.text("method", md.iter().map(|r| &r.method))
            .text("kind", md.iter().map(|r| &r.kind))
            .text("formula", md.iter().map(|r| &r.formula))
            .int("observations", md.iter().map(|r| r.observations))
            .text(
                "fitted",
                md.iter().map(|r| if r.fitted { "yes" } else { "no" }),
            )
            .text("boundary", md.iter().map(|r| r.boundary.join("; ")));
        written.extend(t.write(&dir, "models")?);
        let a = &self.agreement;
        let sl = |f: fn(&SlopeResult) -> f64| {
            a.iter()
                .map(move |r| r.slope.as_ref().map(f))
                .collect::<Vec<_>>()
        };
        let mut t = Table::new();
        t.text("method", a.iter().map(|r| &r.method));
        agreement_columns(&mut t, &a.iter().map(|r| &r.agreement).collect::<Vec<_>>())
            .opt_real("slope_on_spo2", sl(|s| s.test.estimate))
            .opt_real("slope_se", sl(|s| s.test.std_error))
            .opt_real("slope_df", sl(|s| s.test.df))
            .opt_real("slope_lower", sl(|s| s.test.lower))
            .opt_real("slope_upper", sl(|s| s.test.upper))
            .real("confidence", a.iter().map(|_| self.confidence))
            .opt_text(
                "slope_model",
                a.iter()
                    .map(|r| r.slope.as_ref().map(|s| s.formula.clone())),
            )
            .opt_int(
                "slope_points",
                a.iter().map(|r| r.slope.as_ref().map(|s| s.points as i64)),
            );
        written.extend(t.write(&dir, "agreement")?);
        let a = &self.agreement_groups;
        let mut t = Table::new();
        t.text("method", a.iter().map(|r| &r.method))
            .text("attribute", a.iter().map(|r| &r.attribute))
            .text("group", a.iter().map(|r| &r.group));
        agreement_columns(&mut t, &a.iter().map(|r| &r.agreement).collect::<Vec<_>>());
        written.extend(t.write(&dir, "agreement_by_group")?);
        let b = &self.bias_differences;
        let mut t = Table::new();
        t.text("method", b.iter().map(|r| &r.method))
            .text("attribute", b.iter().map(|r| &r.attribute))
            .text("high_group", b.iter().map(|r| &r.high))
            .text("low_group", b.iter().map(|r| &r.low))
            .int("subjects_high", b.iter().map(|r| r.subjects_high))
            .int("subjects_low", b.iter().map(|r| r.subjects_low))
            .real("bias_difference", b.iter().map(|r| r.test.difference))
            .real("se", b.iter().map(|r| r.test.se))
            .real("df", b.iter().map(|r| r.test.df))
            .real("t", b.iter().map(|r| r.test.t))
            .real("p", b.iter().map(|r| r.test.p))
            .real("lower", b.iter().map(|r| r.test.lower))
            .real("upper", b.iter().map(|r| r.test.upper))
            .real("confidence", b.iter().map(|_| self.confidence));
        written.extend(t.write(&dir, "bias_difference")?);
        let q = &self.paired;
        let mut t = Table::new();
        t.text("method", q.iter().map(|r| &r.method))
            .text("kind", q.iter().map(|r| &r.kind))
            .text("epoch", q.iter().map(|r| &r.epoch))
            .int("subjects", q.iter().map(|r| r.subjects))
            .real("mean_difference", q.iter().map(|r| r.mean_difference))
            .real("se", q.iter().map(|r| r.std_error))
            .real("df", q.iter().map(|r| r.df))
            .real("t", q.iter().map(|r| r.t))
            .real("p", q.iter().map(|r| r.p));
        written.extend(t.write(&dir, "paired")?);
        let m = &self.comparison;
        let mut t = Table::new();
        t.text("method", m.iter().map(|r| &r.method))
            .text("kind", m.iter().map(|r| &r.kind))
            .text("quantity", m.iter().map(|r| &r.quantity))
            .real("value", m.iter().map(|r| r.value))
            .text("unit", m.iter().map(|r| &r.unit));
        written.extend(t.write(&dir, "methods")?);
        Ok(written)
    }
}

/// This stage's part of the report's methods text.
fn describe(study: &Study, stats: Option<&StatisticsTables>) -> String {
    let p = &study.protocol;
    let level = study.statistics.confidence * 100.0;
    let adjust = match study.statistics.adjustment {
        Adjust::Holm => {
            "p values Holm-adjusted across the protocol's contrasts within each method and vessel kind"
        }
        Adjust::None => "p values not adjusted for multiplicity",
    };
    let mut text = format!(
        "Per method and vessel kind, segment SO2 of steady captures was modelled by a linear mixed model with the epoch as fixed effect (baseline `{}`), random intercepts for subject, session within subject where a subject was seen in more than one session, eye within subject where a subject had two eyes imaged, and segment within eye, and a subject-specific deviation in every epoch with its own variance, fitted by REML in the formulation of lme4. The deviation by subject and epoch makes the subject the unit of replication of an epoch effect: volunteers respond differently to the same gas, and without it the captures would pose as independent replicates of the effect. One variance per epoch was chosen over a single subject × epoch variance because the spread of responses grows with the depth of the challenge (a pooled term misstates individual contrasts; Boik 1981), and over a full covariance of epoch effects by subject because its parameters cannot be estimated from a handful of volunteers (Matuschek et al. 2017). Contrasts between epochs were tested with Satterthwaite degrees of freedom and {level:.0} % confidence intervals, {adjust}. Where the subject-specific variances of all the epochs a contrast involves were estimated on the boundary (relative factor below 1e-4, lme4's singularity tolerance), so that the model held no estimate of how much subjects differ in that response, or where the model could not be fitted, the contrast was tested at the subject level instead: each subject's contrast computed on its own segments (as the paired tests below), one-sample t test with n − 1 degrees of freedom; the table names the test used for every contrast.",
        p.epochs[p.baseline].name,
    );
    if let Some(st) = stats {
        let fallbacks = st
            .contrasts
            .iter()
            .filter(|c| c.result.basis != epoch_model::Basis::MixedModel)
            .count();
        text.push_str(&format!(" In this study {} of {} contrasts were tested in the mixed model and {fallbacks} at the subject level.", st.contrasts.len() - fallbacks, st.contrasts.len()));
    }
    let sites: std::collections::BTreeSet<&str> = study
        .subjects
        .iter()
        .filter_map(|s| s.site.as_deref())
        .collect();
    if sites.len() >= 2 {
        let how = if sites.len() < epoch_model::RANDOM_SITE_MIN {
            format!(
                "as a fixed effect (fewer than {} sites, too few to estimate a variance between sites)",
                epoch_model::RANDOM_SITE_MIN
            )
        } else {
            "as a random intercept".to_string()
        };
        text.push_str(&format!(" Subjects were recruited at {} sites ({}); the site entered the epoch model {how}, so that differences of level between sites are not taken for differences between subjects. The other analyses below pool the sites' subjects without a site term.", sites.len(), sites.iter().copied().collect::<Vec<_>>().join(", ")));
    }
    if !study.sites.is_empty() {
        text.push_str(&format!(" The analysis pooled the {} sites' own runs (their per-capture tables, not their images; each site's manifest hash is in this run's manifest), with each two-band method's diameter correction and calibration recomputed over the pooled cohort.", study.sites.len()));
    }
    if study.statistics.agreement_by != crate::config::study::GroupBy::None {
        let by = study.statistics.agreement_by.name();
        text.push_str(&format!(" The agreement with the reference was also given within each {by} group (bias, precision, Arms and limits of agreement), and the difference in bias between the highest and the lowest {by} group was tested over subjects (each subject's mean difference from the reference, Welch's t test with {level:.0} % interval), as current pulse-oximeter accuracy practice asks for skin pigmentation."));
    }
    if study.statistics.adequate_only {
        text.push_str(" Joint multiband fits whose residuals showed a misfit of the vessel model, on their own or with the other fits of their eye, were left out of all statistics.");
    }
    if let Some(d) = study.exclusions.min_diameter_um {
        text.push_str(&format!(" Segment values with a measured diameter below {d} µm were left out of all statistics and counted per subject and epoch."));
    }
    text.push_str(&format!(
        " Paired t tests compared each subject's change from the baseline, computed on its own segments (per segment seen in both epochs the difference of its epoch means, then the mean over segments, so that a changing mix of segments with a value does not pose as a change). Agreement of capture-mean arteriolar SO2 with the reference SpO2 was summarised by bias, precision and Arms over captures, with 95 % limits of agreement for repeated measurements per subject (Bland & Altman 2007); the slope of SO2 on SpO2 was estimated on each subject's epoch means in a mixed model with a random intercept and a random slope by subject, so that the subject is its unit of replication (the random slope is dropped, and the table says so, when its variance is on the boundary), with a {level:.0} % interval. Methods were compared on the same cohort by their within-subject repeatability (capture means within subject and epoch), segment standard errors, spread along segments and values outside 0–100 % (segment fits), the pooled slope of the subjects' changes on the SpO2 changes (descriptive), and agreement with one another (segment × capture pairs, limits for repeated measures per subject); the table states the unit of each quantity."
    ));
    text
}
