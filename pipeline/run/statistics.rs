//! The statistics stage, per method and vessel kind over steady captures:
//! per subject × epoch summaries, a linear mixed model (REML) of SO2 on the
//! epoch with random intercepts for subject, eye within subject and segment
//! within eye, the protocol's contrasts with Satterthwaite df and Holm
//! adjustment, and the agreement of arteriolar SO2 with the reference SpO2.

use std::collections::BTreeMap;
use std::path::Path;

use anyhow::Result;
use nalgebra::DMatrix;

use crate::config::study::Study;
use crate::run::epochs::EpochTables;
use crate::run::fits::FitRow;
use crate::stats::agreement::agreement;
use crate::stats::infer::{contrast, holm, Test};
use crate::stats::lmm::{Criterion, LmmData, Model, RandomTerm};
use crate::tables::Table;

pub struct Statistics {
    /// (method, kind, subject, epoch, captures, segments, mean, sd).
    pub summaries: Vec<(String, String, String, String, i64, i64, f64, f64)>,
    /// (method, kind, test, holm p).
    pub contrasts: Vec<(String, String, Test, f64)>,
    /// (method, agreement).
    pub agreement: Vec<(String, crate::stats::agreement::Agreement)>,
}

fn term(name: &str, keys: &[String]) -> RandomTerm {
    let mut levels: Vec<String> = keys.to_vec();
    levels.sort();
    levels.dedup();
    let group = keys.iter().map(|k| levels.binary_search(k).expect("present")).collect();
    RandomTerm { name: name.into(), levels, group, column_names: vec!["(Intercept)".into()], columns: vec![vec![1.0; keys.len()]] }
}

pub fn build(study: &Study, epochs: &EpochTables, fits: &[FitRow]) -> Statistics {
    let c = &epochs.captures;
    let p = &study.protocol;
    let mut st = Statistics { summaries: vec![], contrasts: vec![], agreement: vec![] };
    for m in &study.methods {
        for kind in ["arteriole", "venule"] {
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
            // Mixed model with the epochs present; the baseline is the reference.
            let present: Vec<usize> = (0..p.epochs.len()).filter(|e| rows.iter().any(|r| c[r.capture_index].epoch.as_deref() == Some(p.epochs[*e].name.as_str()))).collect();
            if rows.len() < 10 || !present.contains(&p.baseline) || present.len() < 2 {
                continue;
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
                    _ => format!("{}:{}:{}", cr.subject, cr.eye, rows[i].segment),
                }
            };
            let keys: Vec<Vec<String>> = (0..3).map(|d| (0..n).map(|i| key(i, d)).collect()).collect();
            let mut terms = vec![term("subject", &keys[0])];
            // An eye level only when some subject has two eyes; otherwise it duplicates the subject.
            if term("eye", &keys[1]).levels.len() > terms[0].levels.len() {
                terms.push(term("subject:eye", &keys[1]));
            }
            terms.push(term("subject:eye:segment", &keys[2]));
            let data = LmmData {
                y: rows.iter().map(|r| r.so2.unwrap()).collect(),
                x,
                x_names: std::iter::once("(Intercept)".to_string()).chain(others.iter().map(|e| p.epochs[*e].name.clone())).collect(),
                terms,
            };
            let model = Model::new(data, Criterion::Reml);
            let Some(fit) = model.fit() else { continue };
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
                    contrast(&model, &fit, &ct.label, &l)
                })
                .collect();
            let adj = holm(&tests.iter().map(|t| t.p).collect::<Vec<_>>());
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
                    st.agreement.push((m.label.clone(), a));
                }
            }
        }
    }
    st
}

impl Statistics {
    pub fn write(&self, out: &Path) -> Result<()> {
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
        t.write(&dir, "summaries")?;
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
        t.write(&dir, "contrasts")?;
        let a = &self.agreement;
        let mut t = Table::new();
        t.text("method", a.iter().map(|r| &r.0))
            .int("captures", a.iter().map(|r| r.1.n as i64))
            .int("subjects", a.iter().map(|r| r.1.subjects as i64))
            .real("bias", a.iter().map(|r| r.1.bias))
            .real("precision", a.iter().map(|r| r.1.precision))
            .real("arms", a.iter().map(|r| r.1.arms))
            .real("loa_lower", a.iter().map(|r| r.1.lower))
            .real("loa_upper", a.iter().map(|r| r.1.upper));
        t.write(&dir, "agreement")?;
        Ok(())
    }
}
