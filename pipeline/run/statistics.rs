//! The statistics stage, per method and vessel kind over steady captures:
//! per subject × epoch summaries, a linear mixed model (REML) of SO2 on the
//! epoch with random intercepts for subject, session within subject (when
//! a subject was seen in more than one session), eye within subject and
//! segment within eye, its variance components, the protocol's contrasts
//! with Satterthwaite df and Holm adjustment, paired differences against
//! the baseline (paired t tests), the agreement of arteriolar SO2 with the
//! reference SpO2 (with the slope of SO2 on SpO2, subject random
//! intercepts), and quantities for comparing the methods on the same
//! cohort.

use std::collections::BTreeMap;
use std::path::Path;

use anyhow::Result;
use nalgebra::DMatrix;
use rayon::prelude::*;

use crate::config::study::Study;
use crate::run::epochs::EpochTables;
use crate::run::fits::FitRow;
use crate::stats::agreement::agreement;
use crate::stats::infer::{contrast_at, holm, Test};
use crate::stats::lmm::{Criterion, LmmData, Model, RandomTerm};
use crate::tables::Table;

#[derive(Default, serde::Serialize, serde::Deserialize)]
pub struct Statistics {
    /// (method, kind, subject, epoch, captures, segments, mean, sd).
    pub summaries: Vec<(String, String, String, String, i64, i64, f64, f64)>,
    /// (method, kind, test, holm p).
    pub contrasts: Vec<(String, String, Test, f64)>,
    /// The epoch models' variance components: (method, kind, group, levels, variance); the residual as group `Residual` with the observations as levels.
    pub variance: Vec<(String, String, String, i64, f64)>,
    /// (method, agreement, slope of SO2 on SpO2 with subject random intercepts: estimate, SE, df, lower, upper).
    pub agreement: Vec<(String, crate::stats::agreement::Agreement, Option<Test>)>,
    /// (method, kind, epoch, subjects, mean difference from baseline, SE, df, t, p).
    pub paired: Vec<(String, String, String, i64, f64, f64, f64, f64, f64)>,
    /// Method comparison rows: (method, kind, quantity, value).
    pub comparison: Vec<(String, String, String, f64)>,
    /// The pairs behind the agreement: (method, subject, capture-mean arteriolar SO2, reference SpO2).
    pub agreement_pairs: Vec<(String, String, f64, f64)>,
    /// (method, intercept) of the fitted line of SO2 on SpO2.
    pub agreement_intercepts: Vec<(String, f64)>,
}

impl Statistics {
    /// Adds another part's rows after this one's.
    fn append(&mut self, other: Statistics) {
        self.summaries.extend(other.summaries);
        self.contrasts.extend(other.contrasts);
        self.variance.extend(other.variance);
        self.agreement.extend(other.agreement);
        self.paired.extend(other.paired);
        self.comparison.extend(other.comparison);
        self.agreement_pairs.extend(other.agreement_pairs);
        self.agreement_intercepts.extend(other.agreement_intercepts);
    }
}

fn term(name: &str, keys: &[String]) -> RandomTerm {
    let mut levels: Vec<String> = keys.to_vec();
    levels.sort();
    levels.dedup();
    let group = keys.iter().map(|k| levels.binary_search(k).expect("present")).collect();
    RandomTerm { name: name.into(), levels, group, column_names: vec!["(Intercept)".into()], columns: vec![vec![1.0; keys.len()]] }
}

/// Random intercepts of the epoch model from per-observation keys (each key
/// names its level within its parents, e.g. `V01:OD:A1`). Session and eye
/// levels enter only when some subject has two; otherwise they duplicate
/// the subject. Sessions are crossed with eyes and segments: the same
/// vessels are seen on each visit.
fn epoch_model_terms(subject: &[String], session: &[String], eye: &[String], segment: &[String]) -> Vec<RandomTerm> {
    let mut terms = vec![term("subject", subject)];
    let subjects = terms[0].levels.len();
    if term("session", session).levels.len() > subjects {
        terms.push(term("subject:session", session));
    }
    if term("eye", eye).levels.len() > subjects {
        terms.push(term("subject:eye", eye));
    }
    terms.push(term("subject:eye:segment", segment));
    terms
}

/// Version of this stage's computation; bump when its results change.
pub const VERSION: u32 = 3;

/// The stage's settings: its own section of the study, the protocol's
/// epochs and contrasts, and the method labels it groups by.
pub fn settings_key(study: &Study) -> crate::stages::key::Key {
    let labels: Vec<&str> = study.methods.iter().map(|m| m.label.as_str()).collect();
    let mut k = crate::stages::key::KeyBuilder::new("statistics-settings", VERSION);
    k.value("statistics", &study.statistics).value("protocol", &study.protocol).value("methods", &labels);
    k.finish()
}

pub fn build(study: &Study, epochs: &EpochTables, fits: &[FitRow]) -> Statistics {
    let c = &epochs.captures;
    let p = &study.protocol;
    let mut st = Statistics::default();
    // Each method and vessel kind is modelled on its own, in parallel; the
    // parts are joined in the study's order, so the result does not depend
    // on the number of threads.
    let pairs: Vec<(&crate::config::study::Method, &str)> = study.methods.iter().flat_map(|m| [(m, "arteriole"), (m, "venule")]).collect();
    let parts: Vec<Statistics> = pairs
        .par_iter()
        .map(|&(m, kind)| {
            let mut st = Statistics::default();
            let rows: Vec<&FitRow> = fits
                .iter()
                .filter(|r| r.method == m.label && r.kind == kind && c[r.capture_index].status == "steady" && r.so2.is_some_and(f64::is_finite))
                .collect();
            // Summaries: capture means first, then over captures.
            let mut by: BTreeMap<(String, String), BTreeMap<usize, Vec<f64>>> = BTreeMap::new();
            for r in &rows {
                let cr = &c[r.capture_index];
                by.entry((cr.subject.clone(), cr.epoch.clone().unwrap_or_default())).or_default().entry(r.capture_index).or_default().push(r.so2.unwrap());
            }
            for ((s, e), caps) in &by {
                let means: Vec<f64> = caps.values().map(|v| v.iter().sum::<f64>() / v.len() as f64).collect();
                let n = means.len() as f64;
                let mean = means.iter().sum::<f64>() / n;
                let sd = if n > 1.0 { (means.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / (n - 1.0)).sqrt() } else { f64::NAN };
                let segs = caps.values().map(|v| v.len() as i64).sum();
                st.summaries.push((m.label.clone(), kind.into(), s.clone(), e.clone(), means.len() as i64, segs, mean, sd));
            }
            // Paired differences against the baseline, over subjects with both.
            let base = &p.epochs[p.baseline].name;
            let subj_mean = |subject: &str, epoch: &str| -> Option<f64> {
                by.get(&(subject.to_string(), epoch.to_string())).map(|caps| {
                    let m: Vec<f64> = caps.values().map(|v| v.iter().sum::<f64>() / v.len() as f64).collect();
                    m.iter().sum::<f64>() / m.len() as f64
                })
            };
            let subjects: Vec<String> = {
                let mut v: Vec<String> = by.keys().map(|k| k.0.clone()).collect();
                v.dedup();
                v
            };
            for e in p.epochs.iter().filter(|e| &e.name != base) {
                let pairs: Vec<(f64, f64)> = subjects.iter().filter_map(|s| Some((subj_mean(s, &e.name)?, subj_mean(s, base)?))).collect();
                let (a, b): (Vec<f64>, Vec<f64>) = pairs.iter().copied().unzip();
                if let Some((md, se, df, t, pv)) = crate::stats::agreement::paired_t(&a, &b) {
                    st.paired.push((m.label.clone(), kind.into(), e.name.clone(), pairs.len() as i64, md, se, df, t, pv));
                }
            }
            // Method comparison: repeatability (pooled within subject × epoch
            // SD of capture means), along-segment spread (mean SE of the
            // segment estimates), share of values outside 0–100 %.
            let (mut ss, mut dfw) = (0.0, 0.0);
            for caps in by.values() {
                let means: Vec<f64> = caps.values().map(|v| v.iter().sum::<f64>() / v.len() as f64).collect();
                if means.len() > 1 {
                    let mu = means.iter().sum::<f64>() / means.len() as f64;
                    ss += means.iter().map(|x| (x - mu).powi(2)).sum::<f64>();
                    dfw += means.len() as f64 - 1.0;
                }
            }
            let all: Vec<&FitRow> = fits.iter().filter(|r| r.method == m.label && r.kind == kind && r.so2.is_some_and(f64::is_finite)).collect();
            let outside = all.iter().filter(|r| !(0.0..=100.0).contains(&r.so2.unwrap())).count();
            let ses: Vec<f64> = rows.iter().filter_map(|r| r.so2_se).filter(|v| v.is_finite()).collect();
            let mut comp = |q: &str, v: f64| st.comparison.push((m.label.clone(), kind.into(), q.into(), v));
            comp("repeatability_sd", if dfw > 0.0 { (ss / dfw).sqrt() } else { f64::NAN });
            comp("mean_segment_se", if ses.is_empty() { f64::NAN } else { ses.iter().sum::<f64>() / ses.len() as f64 });
            let along: Vec<f64> = rows.iter().filter_map(|r| r.along_sd).collect();
            if !along.is_empty() {
                comp("along_segment_sd", along.iter().sum::<f64>() / along.len() as f64);
            }
            comp("values", all.len() as f64);
            comp("share_outside_0_100", if all.is_empty() { f64::NAN } else { outside as f64 / all.len() as f64 });
            // Slope of the retinal change on the SpO2 change (per subject and
            // epoch against the baseline, pooled).
            let (mut dx, mut dy) = (Vec::new(), Vec::new());
            for s in &subjects {
                let spo2_mean = |epoch: &str| -> Option<f64> {
                    let v: Vec<f64> = c.iter().filter(|r| &r.subject == s && r.status == "steady" && r.epoch.as_deref() == Some(epoch)).filter_map(|r| r.spo2).collect();
                    (!v.is_empty()).then(|| v.iter().sum::<f64>() / v.len() as f64)
                };
                for e in p.epochs.iter().filter(|e| &e.name != base) {
                    if let (Some(r1), Some(r0), Some(s1), Some(s0)) = (subj_mean(s, &e.name), subj_mean(s, base), spo2_mean(&e.name), spo2_mean(base)) {
                        dx.push(s1 - s0);
                        dy.push(r1 - r0);
                    }
                }
            }
            if let Some(l) = crate::oximetry::odr::ols(&dx, &dy) {
                comp("slope_change_on_spo2_change", l.slope);
            }

            // Mixed model with the epochs present; the baseline is the reference.
            let present: Vec<usize> = (0..p.epochs.len()).filter(|e| rows.iter().any(|r| c[r.capture_index].epoch.as_deref() == Some(p.epochs[*e].name.as_str()))).collect();
            if rows.len() < 10 || !present.contains(&p.baseline) || present.len() < 2 {
                return st;
            }
            let others: Vec<usize> = present.iter().copied().filter(|e| *e != p.baseline).collect();
            let n = rows.len();
            let x = DMatrix::from_fn(n, 1 + others.len(), |i, j| {
                if j == 0 {
                    1.0
                } else {
                    (c[rows[i].capture_index].epoch.as_deref() == Some(p.epochs[others[j - 1]].name.as_str())) as u8 as f64
                }
            });
            let key = |i: usize, depth: usize| {
                let cr = &c[rows[i].capture_index];
                match depth {
                    0 => cr.subject.clone(),
                    1 => format!("{}:{}", cr.subject, cr.eye),
                    2 => format!("{}:{}:{}", cr.subject, cr.eye, rows[i].segment),
                    _ => format!("{}:{}", cr.subject, cr.session),
                }
            };
            let keys: Vec<Vec<String>> = (0..4).map(|d| (0..n).map(|i| key(i, d)).collect()).collect();
            let terms = epoch_model_terms(&keys[0], &keys[3], &keys[1], &keys[2]);
            let levels: Vec<i64> = terms.iter().map(|t| t.levels.len() as i64).collect();
            let data = LmmData {
                y: rows.iter().map(|r| r.so2.unwrap()).collect(),
                x,
                x_names: std::iter::once("(Intercept)".to_string()).chain(others.iter().map(|e| p.epochs[*e].name.clone())).collect(),
                terms,
            };
            let model = Model::new(data, Criterion::Reml);
            let Some(fit) = model.fit() else { return st };
            let comps = model.components(&fit);
            for ((name, _, cov), lv) in comps.terms.iter().zip(&levels) {
                st.variance.push((m.label.clone(), kind.into(), name.clone(), *lv, cov[(0, 0)]));
            }
            st.variance.push((m.label.clone(), kind.into(), "Residual".into(), n as i64, comps.residual));
            let tests: Vec<Test> = p
                .contrasts
                .iter()
                .filter(|ct| ct.weights.iter().all(|(e, _)| present.contains(e)))
                .map(|ct| {
                    let mut l = vec![0.0; 1 + others.len()];
                    for (e, w) in &ct.weights {
                        if let Some(j) = others.iter().position(|o| o == e) {
                            l[1 + j] += w;
                        }
                    }
                    contrast_at(&model, &fit, &ct.label, &l, study.statistics.confidence)
                })
                .collect();
            let raw: Vec<f64> = tests.iter().map(|t| t.p).collect();
            let adj = if study.statistics.holm { holm(&raw) } else { raw };
            for (t, h) in tests.into_iter().zip(adj) {
                st.contrasts.push((m.label.clone(), kind.into(), t, h));
            }
            if kind == "arteriole" {
                let mut per_capture: BTreeMap<usize, Vec<f64>> = BTreeMap::new();
                for r in &rows {
                    per_capture.entry(r.capture_index).or_default().push(r.so2.unwrap());
                }
                let pairs: Vec<(String, f64, f64)> = per_capture
                    .iter()
                    .filter_map(|(ci, v)| c[*ci].spo2.map(|s| (c[*ci].subject.clone(), v.iter().sum::<f64>() / v.len() as f64, s)))
                    .collect();
                if let Some(a) = agreement(&pairs) {
                    // Slope of retinal SO2 on SpO2 with subject random intercepts.
                    let n = pairs.len();
                    let data = LmmData {
                        y: pairs.iter().map(|q| q.1).collect(),
                        x: DMatrix::from_fn(n, 2, |i, j| if j == 0 { 1.0 } else { pairs[i].2 }),
                        x_names: vec!["(Intercept)".into(), "spo2".into()],
                        terms: vec![term("subject", &pairs.iter().map(|q| q.0.clone()).collect::<Vec<_>>())],
                    };
                    let sm = Model::new(data, Criterion::Reml);
                    let fit = sm.fit();
                    let slope = fit.as_ref().map(|f| contrast_at(&sm, f, "slope on SpO2", &[0.0, 1.0], study.statistics.confidence));
                    if let Some(f) = &fit {
                        st.agreement_intercepts.push((m.label.clone(), f.beta[0]));
                    }
                    st.agreement.push((m.label.clone(), a, slope));
                    st.agreement_pairs.extend(pairs.iter().map(|(s, so2, spo2)| (m.label.clone(), s.clone(), *so2, *spo2)));
                }
            }
            st
        })
        .collect();
    for part in parts {
        st.append(part);
    }
    // Arteriovenous difference per method, subject and epoch: per capture
    // the mean arteriolar minus the mean venular SO2, then over captures.
    for m in &study.methods {
        let mut per: BTreeMap<usize, (Vec<f64>, Vec<f64>)> = BTreeMap::new();
        for r in fits.iter().filter(|r| r.method == m.label && c[r.capture_index].status == "steady") {
            if let Some(v) = r.so2.filter(|v| v.is_finite()) {
                let e = per.entry(r.capture_index).or_default();
                if r.kind == "arteriole" { e.0.push(v) } else { e.1.push(v) }
            }
        }
        let mut by: BTreeMap<(String, String), Vec<(f64, i64)>> = BTreeMap::new();
        for (ci, (a, v)) in &per {
            if !a.is_empty() && !v.is_empty() {
                let d = a.iter().sum::<f64>() / a.len() as f64 - v.iter().sum::<f64>() / v.len() as f64;
                by.entry((c[*ci].subject.clone(), c[*ci].epoch.clone().unwrap_or_default())).or_default().push((d, (a.len() + v.len()) as i64));
            }
        }
        for ((s, e), d) in by {
            let n = d.len() as f64;
            let mean = d.iter().map(|x| x.0).sum::<f64>() / n;
            let sd = if n > 1.0 { (d.iter().map(|x| (x.0 - mean).powi(2)).sum::<f64>() / (n - 1.0)).sqrt() } else { f64::NAN };
            st.summaries.push((m.label.clone(), "arteriovenous".into(), s, e, d.len() as i64, d.iter().map(|x| x.1).sum(), mean, sd));
        }
    }
    // Agreement between methods on the same segments and captures.
    for (i, ma) in study.methods.iter().enumerate() {
        for mb in &study.methods[i + 1..] {
            for kind in ["arteriole", "venule"] {
                let get = |label: &str| -> BTreeMap<(usize, String), f64> {
                    fits.iter()
                        .filter(|r| r.method == label && r.kind == kind && c[r.capture_index].status == "steady")
                        .filter_map(|r| Some(((r.capture_index, r.segment.clone()), r.so2.filter(|v| v.is_finite())?)))
                        .collect()
                };
                let (a, b) = (get(&ma.label), get(&mb.label));
                let pairs: Vec<(String, f64, f64)> = a.iter().filter_map(|(k, va)| b.get(k).map(|vb| (c[k.0].subject.clone(), *va, *vb))).collect();
                if let Some(ag) = agreement(&pairs) {
                    let label = format!("{} vs {}", ma.label, mb.label);
                    for (q, v) in [("bias", ag.bias), ("loa_lower", ag.lower), ("loa_upper", ag.upper), ("pairs", ag.n as f64)] {
                        st.comparison.push((label.clone(), kind.into(), q.into(), v));
                    }
                }
            }
        }
    }
    st
}

impl Statistics {
    pub fn write(&self, out: &Path) -> Result<Vec<std::path::PathBuf>> {
        let mut written = Vec::new();
        let dir = out.join("statistics");
        let s = &self.summaries;
        let mut t = Table::new();
        t.text("method", s.iter().map(|r| &r.0))
            .text("kind", s.iter().map(|r| &r.1))
            .text("subject", s.iter().map(|r| &r.2))
            .text("epoch", s.iter().map(|r| &r.3))
            .int("captures", s.iter().map(|r| r.4))
            .int("segments", s.iter().map(|r| r.5))
            .real("mean_so2", s.iter().map(|r| r.6))
            .real("sd_so2", s.iter().map(|r| r.7));
        written.extend(t.write(&dir, "summaries")?);
        let c = &self.contrasts;
        let mut t = Table::new();
        t.text("method", c.iter().map(|r| &r.0))
            .text("kind", c.iter().map(|r| &r.1))
            .text("contrast", c.iter().map(|r| &r.2.label))
            .real("estimate", c.iter().map(|r| r.2.estimate))
            .real("std_error", c.iter().map(|r| r.2.std_error))
            .real("df", c.iter().map(|r| r.2.df))
            .real("t", c.iter().map(|r| r.2.t))
            .real("p", c.iter().map(|r| r.2.p))
            .real("lower_95", c.iter().map(|r| r.2.lower))
            .real("upper_95", c.iter().map(|r| r.2.upper))
            .real("p_holm", c.iter().map(|r| r.3));
        written.extend(t.write(&dir, "contrasts")?);
        let v = &self.variance;
        let mut t = Table::new();
        t.text("method", v.iter().map(|r| &r.0))
            .text("kind", v.iter().map(|r| &r.1))
            .text("group", v.iter().map(|r| &r.2))
            .int("levels", v.iter().map(|r| r.3))
            .real("variance", v.iter().map(|r| r.4))
            .real("sd", v.iter().map(|r| r.4.sqrt()));
        written.extend(t.write(&dir, "variance_components")?);
        let a = &self.agreement;
        let mut t = Table::new();
        t.text("method", a.iter().map(|r| &r.0))
            .int("captures", a.iter().map(|r| r.1.n as i64))
            .int("subjects", a.iter().map(|r| r.1.subjects as i64))
            .real("bias", a.iter().map(|r| r.1.bias))
            .real("precision", a.iter().map(|r| r.1.precision))
            .real("arms", a.iter().map(|r| r.1.arms))
            .real("loa_lower", a.iter().map(|r| r.1.lower))
            .real("loa_upper", a.iter().map(|r| r.1.upper))
            .opt_real("slope_on_spo2", a.iter().map(|r| r.2.as_ref().map(|t| t.estimate)))
            .opt_real("slope_se", a.iter().map(|r| r.2.as_ref().map(|t| t.std_error)))
            .opt_real("slope_df", a.iter().map(|r| r.2.as_ref().map(|t| t.df)))
            .opt_real("slope_lower_95", a.iter().map(|r| r.2.as_ref().map(|t| t.lower)))
            .opt_real("slope_upper_95", a.iter().map(|r| r.2.as_ref().map(|t| t.upper)));
        written.extend(t.write(&dir, "agreement")?);
        let q = &self.paired;
        let mut t = Table::new();
        t.text("method", q.iter().map(|r| &r.0))
            .text("kind", q.iter().map(|r| &r.1))
            .text("epoch", q.iter().map(|r| &r.2))
            .int("subjects", q.iter().map(|r| r.3))
            .real("mean_difference", q.iter().map(|r| r.4))
            .real("std_error", q.iter().map(|r| r.5))
            .real("df", q.iter().map(|r| r.6))
            .real("t", q.iter().map(|r| r.7))
            .real("p", q.iter().map(|r| r.8));
        written.extend(t.write(&dir, "paired")?);
        let m = &self.comparison;
        let mut t = Table::new();
        t.text("method", m.iter().map(|r| &r.0)).text("kind", m.iter().map(|r| &r.1)).text("quantity", m.iter().map(|r| &r.2)).real("value", m.iter().map(|r| r.3));
        written.extend(t.write(&dir, "methods")?);
        Ok(written)
    }
}

/// This stage's part of the report's methods text.
pub fn describe(study: &Study) -> String {
    let p = &study.protocol;
    format!(
        "Per method and vessel kind, segment SO2 of steady captures was modelled by a linear mixed model with the epoch as fixed effect (baseline `{}`) and random intercepts for subject, session within subject where a subject was seen in more than one session, eye within subject and segment within eye, fitted by REML in the formulation of lme4; contrasts between epochs were tested with Satterthwaite degrees of freedom and {:.0} % confidence intervals{}. Paired t tests compared each subject's epoch means with the baseline. Agreement of capture-mean arteriolar SO2 with the reference SpO2 was summarised by bias, precision and Arms, with 95 % limits of agreement for repeated measurements per subject (Bland & Altman 2007), and by the slope of SO2 on SpO2 in a mixed model with subject random intercepts. Methods were compared on the same cohort by their within-subject repeatability, segment standard errors, spread along segments, values outside 0–100 % and agreement with one another.",
        p.epochs[p.baseline].name,
        study.statistics.confidence * 100.0,
        if study.statistics.holm { ", p values Holm-adjusted within each method and vessel kind" } else { ", p values not adjusted for multiplicity" }
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    fn keys(v: &[&str]) -> Vec<String> {
        v.iter().map(|s| s.to_string()).collect()
    }

    #[test]
    fn session_and_eye_terms_only_when_some_subject_has_two() {
        let subject = keys(&["V01", "V01", "V02", "V02"]);
        let one_session = keys(&["V01:s1", "V01:s1", "V02:s1", "V02:s1"]);
        let one_eye = keys(&["V01:OD", "V01:OD", "V02:OD", "V02:OD"]);
        let segment = keys(&["V01:OD:A1", "V01:OD:A2", "V02:OD:A1", "V02:OD:A1"]);
        let names = |t: Vec<RandomTerm>| t.into_iter().map(|t| (t.name, t.levels.len())).collect::<Vec<_>>();
        assert_eq!(names(epoch_model_terms(&subject, &one_session, &one_eye, &segment)), [("subject".to_string(), 2), ("subject:eye:segment".to_string(), 3)]);
        let two_sessions = keys(&["V01:s1", "V01:s2", "V02:s1", "V02:s1"]);
        let two_eyes = keys(&["V01:OD", "V01:OD", "V02:OD", "V02:OS"]);
        assert_eq!(
            names(epoch_model_terms(&subject, &two_sessions, &two_eyes, &segment)),
            [("subject".to_string(), 2), ("subject:session".to_string(), 3), ("subject:eye".to_string(), 3), ("subject:eye:segment".to_string(), 3)]
        );
    }
}
