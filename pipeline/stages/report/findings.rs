//! The report's words about its own numbers: the summary of findings, in
//! sentences generated from the statistics stage's results, and for a
//! simulated study the comparison of the estimates with the simulator's
//! `truth/` tables. Every number here is read from a result; nothing is
//! said that a table of the report does not also show.

use std::collections::BTreeMap;
use std::path::Path;

use crate::stages::statistics::{ContrastRow, StatisticsTables};

/// `v` with a true minus sign and `d` decimals.
fn signed(v: f64, d: usize) -> String {
    let s = format!("{v:.d$}");
    match s.strip_prefix('-') {
        Some(rest) if rest.chars().any(|c| c != '0' && c != '.') => format!("−{rest}"),
        Some(rest) => rest.to_string(),
        None => s,
    }
}

fn p_text(p: f64) -> String {
    if p < 0.001 {
        "p < 0.001".into()
    } else {
        format!("p = {p:.3}")
    }
}

/// The plural of a vessel kind as a sentence names it.
fn kind_adjective(kind: &str) -> &'static str {
    if kind == "arteriole" {
        "arteriolar"
    } else {
        "venular"
    }
}

/// One contrast in words: "fell by 9.3 points from air to low-15 (95 % CI
/// 8.1 to 10.6; p < 0.001)". A contrast whose interval holds zero is said
/// to show no detectable change, with its numbers.
fn contrast_clause(c: &ContrastRow, confidence: f64) -> String {
    let t = &c.result.test;
    let (to, from) = t
        .label
        .split_once(" - ")
        .map(|(a, b)| (a.trim(), b.trim()))
        .unwrap_or((t.label.as_str(), "baseline"));
    let ci = format!("{:.0} % CI", confidence * 100.0);
    let p = c.result.p_adjusted;
    if t.lower <= 0.0 && t.upper >= 0.0 {
        format!(
            "showed no detectable change from {from} to {to} ({} points, {ci} {} to {}; {})",
            signed(t.estimate, 1),
            signed(t.lower, 1),
            signed(t.upper, 1),
            p_text(p)
        )
    } else if t.estimate < 0.0 {
        format!(
            "fell by {:.1} points from {from} to {to} ({ci} {:.1} to {:.1}; {})",
            -t.estimate,
            -t.upper,
            -t.lower,
            p_text(p)
        )
    } else {
        format!(
            "rose by {:.1} points from {from} to {to} ({ci} {:.1} to {:.1}; {})",
            t.estimate,
            t.lower,
            t.upper,
            p_text(p)
        )
    }
}

/// Joins clauses as a sentence lists them: "a, b and c".
fn listing(items: &[String]) -> String {
    match items {
        [] => String::new(),
        [one] => one.clone(),
        [rest @ .., last] => format!("{} and {last}", rest.join(", ")),
    }
}

/// The summary of findings: one sentence per method on the epoch
/// contrasts, one on agreement with the reference, and the method
/// comparison's repeatability and response.
pub(crate) fn summary(
    stats: &StatisticsTables,
    methods: &[String],
    adjustment: &str,
) -> Vec<String> {
    let mut out = Vec::new();
    let confidence = stats.confidence;
    for m in methods {
        let mut parts = Vec::new();
        for kind in ["arteriole", "venule"] {
            let clauses: Vec<String> = stats
                .contrasts
                .iter()
                .filter(|c| &c.method == m && c.kind == kind)
                .map(|c| contrast_clause(c, confidence))
                .collect();
            if !clauses.is_empty() {
                parts.push(format!(
                    "{} SO2 {}",
                    kind_adjective(kind),
                    listing(&clauses)
                ));
            }
        }
        if !parts.is_empty() {
            let mut s = format!("With `{m}`, {}.", listing(&parts));
            s[..1].make_ascii_uppercase();
            out.push(s);
        }
    }
    if !out.is_empty() && adjustment == "holm" {
        out.push("p values are Holm-adjusted within each method and vessel kind; the subject is the unit of replication.".into());
    }
    let agreement: Vec<String> = stats
        .agreement
        .iter()
        .filter(|a| methods.contains(&a.method))
        .map(|a| {
            let g = &a.agreement;
            format!(
                "{} points for `{}` (limits of agreement {} to {}, Arms {:.1})",
                signed(g.bias, 1),
                a.method,
                signed(g.lower, 1),
                signed(g.upper, 1),
                g.arms
            )
        })
        .collect();
    if !agreement.is_empty() {
        out.push(format!(
            "Against the reference SpO2, the bias of capture-mean arteriolar SO2 was {}.",
            listing(&agreement)
        ));
    }
    // The method comparison: who repeats best and who follows the
    // reference's change most nearly in full.
    let value = |m: &str, q: &str| {
        stats
            .comparison
            .iter()
            .find(|r| r.method == m && r.kind == "arteriole" && r.quantity == q)
            .map(|r| r.value)
            .filter(|v| v.is_finite())
    };
    if methods.len() > 1 {
        let rep: Vec<(String, f64)> = methods
            .iter()
            .filter_map(|m| Some((m.clone(), value(m, "repeatability_sd")?)))
            .collect();
        if rep.len() > 1 {
            let items: Vec<String> = rep
                .iter()
                .map(|(m, v)| format!("{v:.2} points for `{m}`"))
                .collect();
            out.push(format!(
                "The repeatability SD of arteriolar SO2 (capture means within subject and epoch) was {}.",
                listing(&items)
            ));
        }
        let ratio: Vec<String> = methods
            .iter()
            .filter_map(|m| {
                let r = value(m, "change_ratio")?;
                let lo = value(m, "change_ratio_lower");
                let hi = value(m, "change_ratio_upper");
                Some(match (lo, hi) {
                    (Some(lo), Some(hi)) => format!("{r:.2} for `{m}` ({lo:.2} to {hi:.2})"),
                    _ => format!("{r:.2} for `{m}`"),
                })
            })
            .collect();
        if ratio.len() > 1 {
            out.push(format!(
                "Arteriolar SO2 followed the reference's change by a ratio of {} (1 is a change in full; below 1 the method shrinks it).",
                listing(&ratio)
            ));
        }
    }
    out
}

/// The simulator's true values of a simulated study, read from `truth/`.
pub(crate) struct Truth {
    /// (contrast label, kind) → cohort mean of the subjects' true contrasts.
    pub contrasts: BTreeMap<(String, String), f64>,
    /// (subject, epoch, kind) → true mean SO2 of the steady captures.
    pub epoch_means: BTreeMap<(String, String, String), f64>,
}

/// The truth files a simulated study carries, relative to its folder.
pub(crate) const TRUTH_FILES: [&str; 2] = ["truth/contrasts.csv", "truth/epoch_means.csv"];

/// Reads `truth/` beside the study file, if the study was simulated.
/// A truth folder that cannot be read is reported and left out, never
/// fatal: it is not an input of the analysis.
pub(crate) fn read_truth(root: &Path) -> Option<Result<Truth, String>> {
    let contrasts = root.join(TRUTH_FILES[0]);
    if !contrasts.exists() {
        return None;
    }
    let read = |path: &Path, width: usize| -> Result<Vec<(Vec<String>, f64)>, String> {
        let mut r =
            csv::Reader::from_path(path).map_err(|e| format!("`{}`: {e}", path.display()))?;
        let mut rows = Vec::new();
        for rec in r.records() {
            let rec = rec.map_err(|e| format!("`{}`: {e}", path.display()))?;
            let v: f64 = rec.get(width).and_then(|x| x.parse().ok()).ok_or_else(|| {
                format!(
                    "`{}`: row {rec:?} has no number in column {}",
                    path.display(),
                    width + 1
                )
            })?;
            rows.push((
                (0..width)
                    .map(|i| rec.get(i).unwrap_or("").to_string())
                    .collect(),
                v,
            ));
        }
        Ok(rows)
    };
    Some((|| {
        let c = read(&contrasts, 2)?;
        let e = read(&root.join(TRUTH_FILES[1]), 3)?;
        Ok(Truth {
            contrasts: c
                .into_iter()
                .map(|(k, v)| ((k[0].clone(), k[1].clone()), v))
                .collect(),
            epoch_means: e
                .into_iter()
                .map(|(k, v)| ((k[0].clone(), k[1].clone(), k[2].clone()), v))
                .collect(),
        })
    })())
}

/// One method and kind against the truth.
pub(crate) struct TruthRow {
    pub method: String,
    pub kind: String,
    /// Subject × epoch means: count, mean and RMS of estimate − truth.
    pub means: (usize, f64, f64),
    /// Contrasts: count, mean of estimate − truth, and how many intervals
    /// hold the true value.
    pub contrasts: (usize, f64, usize),
}

/// The estimates of every method and kind against the simulator's truth.
pub(crate) fn against_truth(stats: &StatisticsTables, truth: &Truth) -> Vec<TruthRow> {
    let mut keys: Vec<(String, String)> = stats
        .contrasts
        .iter()
        .map(|c| (c.method.clone(), c.kind.clone()))
        .collect();
    keys.dedup();
    let mut out = Vec::new();
    for (method, kind) in keys {
        let d: Vec<f64> = stats
            .summaries
            .iter()
            .filter(|s| s.method == method && s.kind == kind && s.mean.is_finite())
            .filter_map(|s| {
                let t =
                    truth
                        .epoch_means
                        .get(&(s.subject.clone(), s.epoch.clone(), kind.clone()))?;
                Some(s.mean - t)
            })
            .collect();
        let (mut n, mut sum, mut covered) = (0, 0.0, 0);
        for c in stats
            .contrasts
            .iter()
            .filter(|c| c.method == method && c.kind == kind)
        {
            let t = &c.result.test;
            if let Some(v) = truth.contrasts.get(&(t.label.clone(), kind.clone())) {
                n += 1;
                sum += t.estimate - v;
                covered += usize::from(t.lower <= *v && *v <= t.upper);
            }
        }
        let m = d.len().max(1) as f64;
        out.push(TruthRow {
            method,
            kind,
            means: (
                d.len(),
                d.iter().sum::<f64>() / m,
                (d.iter().map(|x| x * x).sum::<f64>() / m).sqrt(),
            ),
            contrasts: (n, sum / n.max(1) as f64, covered),
        });
    }
    out
}

/// The truth comparison in one sentence per method.
pub(crate) fn truth_sentences(rows: &[TruthRow], confidence: f64) -> Vec<String> {
    let mut by_method: BTreeMap<&str, Vec<&TruthRow>> = BTreeMap::new();
    let mut order = Vec::new();
    for r in rows {
        if !by_method.contains_key(r.method.as_str()) {
            order.push(r.method.as_str());
        }
        by_method.entry(&r.method).or_default().push(r);
    }
    order
        .iter()
        .map(|m| {
            let rs = &by_method[m];
            let n: usize = rs.iter().map(|r| r.contrasts.0).sum();
            let covered: usize = rs.iter().map(|r| r.contrasts.2).sum();
            let parts: Vec<String> = rs
                .iter()
                .map(|r| {
                    format!(
                        "{} epoch means off by {} points on average (RMS {:.1})",
                        kind_adjective(&r.kind),
                        signed(r.means.1, 1),
                        r.means.2
                    )
                })
                .collect();
            format!(
                "`{m}`: {}; the {:.0} % intervals of the epoch contrasts held the true change in {covered} of {n}.",
                listing(&parts),
                confidence * 100.0
            )
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::stats::epoch_model::{Basis, ContrastResult};
    use crate::stats::infer::Test;

    fn row(label: &str, estimate: f64, lower: f64, upper: f64, p: f64) -> ContrastRow {
        ContrastRow {
            method: "m".into(),
            kind: "arteriole".into(),
            result: ContrastResult {
                test: Test {
                    label: label.into(),
                    estimate,
                    std_error: 1.0,
                    df: 7.0,
                    t: estimate,
                    p,
                    lower,
                    upper,
                },
                p_adjusted: p,
                basis: Basis::MixedModel,
                subjects: 8,
            },
        }
    }

    #[test]
    fn a_contrast_is_said_with_its_direction_and_interval() {
        assert_eq!(
            contrast_clause(&row("low - air", -9.33, -10.57, -8.09, 1e-6), 0.95),
            "fell by 9.3 points from air to low (95 % CI 8.1 to 10.6; p < 0.001)"
        );
        assert_eq!(
            contrast_clause(&row("oxygen - air", 2.04, 0.5, 3.5, 0.0123), 0.9),
            "rose by 2.0 points from air to oxygen (90 % CI 0.5 to 3.5; p = 0.012)"
        );
        // An interval holding zero is no detectable change, whatever the sign.
        assert_eq!(
            contrast_clause(&row("recovery - air", -0.38, -0.8, 0.04, 0.069), 0.95),
            "showed no detectable change from air to recovery (−0.4 points, 95 % CI −0.8 to 0.0; p = 0.069)"
        );
    }

    #[test]
    fn lists_join_as_a_sentence_does() {
        let v = |s: &[&str]| s.iter().map(|x| x.to_string()).collect::<Vec<_>>();
        assert_eq!(listing(&v(&["a"])), "a");
        assert_eq!(listing(&v(&["a", "b"])), "a and b");
        assert_eq!(listing(&v(&["a", "b", "c"])), "a, b and c");
        assert_eq!(signed(-0.04, 1), "0.0");
        assert_eq!(signed(-1.26, 1), "−1.3");
    }
}
