//! Power and sample size by simulation: how often a planned study would
//! find each epoch contrast, analysed exactly as the statistics stage
//! analyses a real one.
//!
//! A design (subjects, eyes, sessions, segments per eye, captures per
//! epoch) and the variance components of a pilot (or stated ones) define
//! a cohort of per-capture SO2 values ([`super::cohort`]); each
//! simulated study goes through [`epoch_model::analyse`], the stage's model
//! and test, and a contrast counts as found when its adjusted p-value is
//! below `1 − confidence`. Power is the share of studies that find it, with
//! its Monte Carlo standard error `sqrt(p(1 − p)/N)`.
//!
//! The type-I error comes from the same studies: the model's estimates
//! move with a shift of the epoch means and nothing else does (REML and
//! the subject-level fallback are both invariant to adding `Xβ` to the
//! data), so testing each contrast against its true value is testing a
//! true null. `type1` is the share of studies whose interval misses the
//! true contrast (unadjusted, as the stage's intervals are).
//!
//! Studies are seeded by the seed, the design and their number alone, and
//! counts are sums, so results do not depend on the thread count.

use nalgebra::{DMatrix, DVector};
use rayon::prelude::*;

use super::cohort::{CohortDesign, EpochTruth, Spread};
use crate::config::protocol::Protocol;
use crate::stats::epoch_model::{Adjustment, ContrastSpec, Design, analyse};

/// SDs of the variance components the statistics stage estimates, in SO2
/// points: the nesting, each epoch's subject-specific response, and the
/// residual (capture-to-capture within a segment).
#[derive(Debug, Clone, PartialEq)]
pub struct Variances {
    pub subject: f64,
    pub session: f64,
    pub eye: f64,
    pub segment: f64,
    /// Per epoch of the protocol, in its order.
    pub response: Vec<f64>,
    pub residual: f64,
}

/// One candidate design of the planned study.
#[derive(
    Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash, serde::Serialize, serde::Deserialize,
)]
pub struct PlanDesign {
    pub subjects: usize,
    /// 1 or 2 eyes per subject.
    pub eyes: usize,
    /// 1 or 2 sessions per subject.
    pub sessions: usize,
    pub segments_per_eye: usize,
    pub captures_per_epoch: usize,
}

impl PlanDesign {
    /// Captures the whole study takes (steady captures of all epochs).
    pub fn captures(&self, epochs: usize) -> usize {
        self.subjects * self.eyes * self.sessions * self.captures_per_epoch * epochs
    }

    fn name(&self) -> String {
        format!(
            "n{}-e{}-s{}-g{}-c{}",
            self.subjects, self.eyes, self.sessions, self.segments_per_eye, self.captures_per_epoch
        )
    }
}

/// What is tested: the protocol's epochs and contrasts, the true change of
/// each epoch from the baseline, and the stage's confidence and adjustment.
#[derive(Debug, Clone)]
pub struct Question {
    pub epochs: Vec<String>,
    pub baseline: usize,
    pub contrasts: Vec<ContrastSpec>,
    /// True change of each epoch from the baseline, points.
    pub changes: Vec<f64>,
    pub confidence: f64,
    pub adjustment: Adjustment,
}

impl Question {
    /// The protocol's epochs and contrasts, with the smallest epoch changes
    /// that give the stated effects ([`changes_for`]).
    pub fn for_protocol(
        protocol: &Protocol,
        effects: &[(String, f64)],
        confidence: f64,
        adjustment: Adjustment,
    ) -> Result<Question, PlanError> {
        let epochs: Vec<String> = protocol.epochs.iter().map(|e| e.name.clone()).collect();
        let contrasts: Vec<ContrastSpec> = protocol
            .contrasts
            .iter()
            .map(|c| ContrastSpec {
                label: c.label.clone(),
                weights: c.weights.clone(),
            })
            .collect();
        let changes = changes_for(epochs.len(), protocol.baseline, &contrasts, effects)?;
        Ok(Question {
            epochs,
            baseline: protocol.baseline,
            contrasts,
            changes,
            confidence,
            adjustment,
        })
    }

    /// The true value of each contrast.
    pub fn effects(&self) -> Vec<f64> {
        self.contrasts
            .iter()
            .map(|c| c.weights.iter().map(|(e, w)| w * self.changes[*e]).sum())
            .collect()
    }
}

/// Counts over simulated studies for one contrast.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
pub struct Counts {
    pub studies: usize,
    /// Studies whose adjusted p-value is below `1 − confidence`.
    pub found: usize,
    /// Studies whose interval misses the true contrast.
    pub missed_truth: usize,
}

impl Counts {
    pub fn power(&self) -> f64 {
        self.found as f64 / self.studies as f64
    }

    /// Monte Carlo standard error of the power.
    pub fn mc_se(&self) -> f64 {
        let p = self.power();
        (p * (1.0 - p) / self.studies as f64).sqrt()
    }

    pub fn type1(&self) -> f64 {
        self.missed_truth as f64 / self.studies as f64
    }

    fn add(self, o: Counts) -> Counts {
        Counts {
            studies: self.studies + o.studies,
            found: self.found + o.found,
            missed_truth: self.missed_truth + o.missed_truth,
        }
    }
}

/// Every combination of the design choices, subjects first.
pub fn grid(
    subjects: &[usize],
    captures: &[usize],
    segments: &[usize],
    eyes: &[usize],
    sessions: &[usize],
) -> Vec<PlanDesign> {
    let mut out = Vec::new();
    for &n in subjects {
        for &c in captures {
            for &g in segments {
                for &e in eyes {
                    for &s in sessions {
                        out.push(PlanDesign {
                            subjects: n,
                            eyes: e,
                            sessions: s,
                            segments_per_eye: g,
                            captures_per_epoch: c,
                        });
                    }
                }
            }
        }
    }
    out
}

/// Of the components a variance table lacked ([`variances_from`]), those
/// the designs need: an eye or session variance only matters when some
/// design has two.
pub fn needed(mut missing: Vec<Missing>, designs: &[PlanDesign]) -> Vec<Missing> {
    let two_eyes = designs.iter().any(|d| d.eyes > 1);
    let two_sessions = designs.iter().any(|d| d.sessions > 1);
    missing.retain(|m| match m.group.as_str() {
        "subject:eye" => two_eyes,
        "subject:session" => two_sessions,
        _ => true,
    });
    missing
}

/// Why the effects cannot be turned into epoch changes.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum PlanError {
    #[error("no contrast `{0}` in the protocol")]
    UnknownContrast(String),
    #[error(
        "the effects contradict each other: no change of the epochs gives them all (closest misses `{contrast}` by {miss:.3} points)"
    )]
    Inconsistent { contrast: String, miss: f64 },
}

/// The epoch changes (baseline 0) that give each named contrast its
/// effect: the smallest such changes (least squares, minimum norm), so
/// that contrasts given no effect change as little as the others allow.
pub fn changes_for(
    epochs: usize,
    baseline: usize,
    contrasts: &[ContrastSpec],
    effects: &[(String, f64)],
) -> Result<Vec<f64>, PlanError> {
    let free: Vec<usize> = (0..epochs).filter(|e| *e != baseline).collect();
    let mut rows = Vec::new();
    for (label, value) in effects {
        let c = contrasts
            .iter()
            .find(|c| &c.label == label)
            .ok_or_else(|| PlanError::UnknownContrast(label.clone()))?;
        let mut row = vec![0.0; free.len()];
        for (e, w) in &c.weights {
            if let Some(j) = free.iter().position(|f| f == e) {
                row[j] += w;
            }
        }
        rows.push((label, row, *value));
    }
    let mut changes = vec![0.0; epochs];
    if rows.is_empty() || free.is_empty() {
        return Ok(changes);
    }
    let a = DMatrix::from_fn(rows.len(), free.len(), |i, j| rows[i].1[j]);
    let b = DVector::from_iterator(rows.len(), rows.iter().map(|r| r.2));
    let x = a
        .clone()
        .svd(true, true)
        .solve(&b, 1e-10)
        .unwrap_or_else(|_| DVector::zeros(free.len()));
    let got = &a * &x;
    for (i, r) in rows.iter().enumerate() {
        let miss = (got[i] - r.2).abs();
        if miss > 1e-6 * (1.0 + r.2.abs()) {
            return Err(PlanError::Inconsistent {
                contrast: r.0.clone(),
                miss,
            });
        }
    }
    for (j, e) in free.iter().enumerate() {
        changes[*e] = x[j];
    }
    Ok(changes)
}

/// The cohort a design draws: every subject with the same nesting,
/// nothing missing, the capture-to-capture scatter all in the residual
/// (as the stage's model sees it).
pub fn cohort(design: &PlanDesign, v: &Variances, q: &Question) -> CohortDesign {
    CohortDesign {
        subjects: design.subjects,
        two_eye_share: if design.eyes >= 2 { 1.0 } else { 0.0 },
        two_session_share: if design.sessions >= 2 { 1.0 } else { 0.0 },
        segments_per_eye: design.segments_per_eye,
        captures_per_epoch: (design.captures_per_epoch, design.captures_per_epoch),
        missing_capture: 0.0,
        missing_value: 0.0,
        level: 90.0,
        epochs: q
            .epochs
            .iter()
            .enumerate()
            .map(|(e, name)| EpochTruth {
                name: name.clone(),
                change: q.changes[e],
                response_sd: v.response.get(e).copied().unwrap_or(0.0),
            })
            .collect(),
        spread: Spread {
            subject: v.subject,
            session: v.session,
            eye: v.eye,
            segment: v.segment,
            capture: 0.0,
            residual: v.residual,
        },
    }
}

/// Simulates studies `from..to` of a design and counts, per contrast, the
/// studies that find it and those whose interval misses the truth.
pub fn simulate(
    design: &PlanDesign,
    v: &Variances,
    q: &Question,
    seed: u64,
    label: &str,
    studies: std::ops::Range<usize>,
) -> Vec<Counts> {
    let cohort = cohort(design, v, q);
    let truth = q.effects();
    let alpha = 1.0 - q.confidence;
    let d = Design {
        epochs: &q.epochs,
        baseline: q.baseline,
        contrasts: &q.contrasts,
        confidence: q.confidence,
        adjustment: q.adjustment,
    };
    let name = format!("{label}/{}", design.name());
    let zero = vec![Counts::default(); q.contrasts.len()];
    studies
        .into_par_iter()
        .map(|i| {
            let obs = cohort.simulate(seed, &format!("{name}/{i}"));
            let a = analyse(&obs, &d);
            let mut c = zero.clone();
            for (k, spec) in q.contrasts.iter().enumerate() {
                c[k].studies = 1;
                // A contrast the study could not test counts as not found.
                if let Some(r) = a.contrasts.iter().find(|r| r.test.label == spec.label) {
                    c[k].found = (r.p_adjusted < alpha) as usize;
                    c[k].missed_truth =
                        (!(r.test.lower <= truth[k] && truth[k] <= r.test.upper)) as usize;
                } else {
                    c[k].missed_truth = 1;
                }
            }
            c
        })
        .reduce(
            || zero.clone(),
            |a, b| a.into_iter().zip(b).map(|(x, y)| x.add(y)).collect(),
        )
}

/// Studies needed for a Monte Carlo SE of at most `se` at power `p`.
pub fn studies_for(p: f64, se: f64) -> usize {
    (p * (1.0 - p) / (se * se)).ceil() as usize
}

/// Power of the two-sided paired (one-sample) t test at level `alpha`
/// with `n` pairs and standardised effect `d` (mean difference over the SD
/// of the differences): `P(|T'| > t_crit)` for T' noncentral t with n − 1
/// df and noncentrality `d·√n`, by integrating the normal tail over the
/// χ² distribution of the variance estimate (Simpson's rule on a fine
/// grid). The reference against which simulated power is checked.
pub fn paired_t_power(n: usize, d: f64, alpha: f64) -> f64 {
    use statrs::distribution::{ChiSquared, Continuous, ContinuousCDF, Normal, StudentsT};
    let df = n as f64 - 1.0;
    let tc = StudentsT::new(0.0, 1.0, df)
        .expect("df > 0")
        .inverse_cdf(1.0 - alpha / 2.0);
    let delta = d * (n as f64).sqrt();
    let z = Normal::new(0.0, 1.0).expect("unit normal");
    let chi = ChiSquared::new(df).expect("df > 0");
    // T' = (Z + δ)/sqrt(V/df), V ~ χ²(df): P(T' > tc) + P(T' < −tc).
    let hi = df + 40.0 * (2.0 * df).sqrt() + 40.0;
    let steps = 20_000;
    let h = hi / steps as f64;
    let f = |v: f64| {
        let s = (v / df).sqrt();
        let tail = (1.0 - z.cdf(tc * s - delta)) + z.cdf(-tc * s - delta);
        tail * chi.pdf(v)
    };
    let mut sum = f(1e-12) + f(hi);
    for i in 1..steps {
        sum += f(i as f64 * h) * if i % 2 == 1 { 4.0 } else { 2.0 };
    }
    sum * h / 3.0
}

/// How many studies to simulate per design.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Studies {
    /// This many for every design.
    Fixed(usize),
    /// 1 000 per design, topped up where a contrast's power lies within
    /// 10 points of the target until its Monte Carlo SE is at most 1 point
    /// (at most 4 000).
    Auto,
}

impl Studies {
    /// Studies per design before any top-up.
    pub fn first_pass(self) -> usize {
        match self {
            Studies::Fixed(n) => n,
            Studies::Auto => AUTO_FIRST,
        }
    }
}

/// Studies of the first pass under [`Studies::Auto`].
pub const AUTO_FIRST: usize = 1000;
/// Most studies per design under [`Studies::Auto`].
pub const AUTO_MOST: usize = 4000;

/// A planning question over designs and methods.
#[derive(Debug, Clone)]
pub struct Plan {
    /// Epochs, contrasts, confidence and adjustment; `changes` follow from
    /// the effects.
    pub question: Question,
    /// The effects the investigators want to detect, by contrast.
    pub effects: Vec<(String, f64)>,
    pub designs: Vec<PlanDesign>,
    /// (method, kind, variances).
    pub variances: Vec<(String, String, Variances)>,
    pub target: f64,
    pub studies: Studies,
    pub seed: u64,
}

/// One row of the power table.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct PowerRow {
    pub design: PlanDesign,
    pub method: String,
    pub kind: String,
    pub contrast: String,
    /// True value of the contrast in the simulation, points.
    pub effect: f64,
    /// Whether the investigators stated this effect (else it follows from the others).
    pub stated: bool,
    pub counts: Counts,
}

/// Simulates every design for every method and kind. Rows are ordered by
/// method, kind, design and contrast.
pub fn run(plan: &Plan, progress: &(dyn Fn(usize) + Sync)) -> Vec<PowerRow> {
    let q = &plan.question;
    let effects = q.effects();
    let mut rows = Vec::new();
    for (method, kind, v) in &plan.variances {
        let label = format!("{method}/{kind}");
        for design in &plan.designs {
            let first = plan.studies.first_pass();
            let mut counts = simulate(design, v, q, plan.seed, &label, 0..first);
            progress(first);
            if plan.studies == Studies::Auto {
                // Top up until every stated contrast near the target has a
                // Monte Carlo SE of at most 1 point (the estimate moves as
                // studies are added, so check again).
                for _ in 0..4 {
                    let have = counts[0].studies;
                    let need = q
                        .contrasts
                        .iter()
                        .zip(&counts)
                        .filter(|(c, _)| plan.effects.iter().any(|(l, _)| *l == c.label))
                        .filter(|(_, n)| (n.power() - plan.target).abs() <= 0.1 && n.mc_se() > 0.01)
                        .map(|(_, n)| studies_for(n.power(), 0.01).max(have + 50).min(AUTO_MOST))
                        .max()
                        .unwrap_or(0);
                    if need <= have {
                        break;
                    }
                    let more = simulate(design, v, q, plan.seed, &label, have..need);
                    counts = counts
                        .into_iter()
                        .zip(more)
                        .map(|(a, b)| a.add(b))
                        .collect();
                    progress(need - have);
                }
            }
            for (k, c) in q.contrasts.iter().enumerate() {
                rows.push(PowerRow {
                    design: *design,
                    method: method.clone(),
                    kind: kind.clone(),
                    contrast: c.label.clone(),
                    effect: effects[k],
                    stated: plan.effects.iter().any(|(l, _)| *l == c.label),
                    counts: counts[k],
                });
            }
        }
    }
    rows
}

/// Per method, kind and contrast with a stated effect: the smallest design
/// whose power reaches the target (fewest subjects, then fewest captures in
/// all) with `true`, or the best design tried with `false` when none does.
pub fn smallest(rows: &[PowerRow], target: f64, epochs: usize) -> Vec<(&PowerRow, bool)> {
    let mut out: Vec<(&PowerRow, bool)> = Vec::new();
    // Rows run through the contrasts within each design, so a key recurs.
    let mut keys: Vec<(&str, &str, &str)> = Vec::new();
    for r in rows.iter().filter(|r| r.stated) {
        let key = (r.method.as_str(), r.kind.as_str(), r.contrast.as_str());
        if !keys.contains(&key) {
            keys.push(key);
        }
    }
    for key in keys {
        let group: Vec<&PowerRow> = rows
            .iter()
            .filter(|r| (r.method.as_str(), r.kind.as_str(), r.contrast.as_str()) == key)
            .collect();
        let size = |r: &PowerRow| (r.design.subjects, r.design.captures(epochs));
        let reached = group
            .iter()
            .filter(|r| r.counts.power() >= target)
            .min_by_key(|r| size(r));
        match reached {
            Some(r) => out.push((r, true)),
            None => {
                if let Some(best) = group
                    .iter()
                    .max_by(|a, b| a.counts.power().total_cmp(&b.counts.power()))
                {
                    out.push((best, false));
                }
            }
        }
    }
    out
}

/// A variance component a table lacked for one method and kind.
#[derive(Debug, Clone, PartialEq)]
pub struct Missing {
    /// As the statistics stage names it (`subject:eye`, `subject:epoch=air`, …).
    pub group: String,
    pub method: String,
    pub kind: String,
}

impl Missing {
    /// The `--sd` groups that state this component.
    pub fn stated_by(&self) -> Vec<String> {
        match self.group.as_str() {
            "subject" => vec!["subject".into()],
            "subject:session" => vec!["session".into()],
            "subject:eye" => vec!["eye".into()],
            "subject:eye:segment" => vec!["segment".into()],
            "Residual" => vec!["residual".into()],
            g => match g.strip_prefix("subject:epoch=") {
                Some(e) => vec!["response".into(), format!("response:{e}")],
                None => Vec::new(),
            },
        }
    }
}

impl std::fmt::Display for Missing {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "{} ({}, {})", self.group, self.method, self.kind)
    }
}

/// Variances by method and kind from the rows of a statistics stage's
/// `variance_components` table (method, kind, group, variance), for the
/// methods and kinds asked for (all when a list is empty), with the
/// components the table lacks (for instance an eye variance when the pilot
/// imaged one eye) set to 0 and listed.
pub fn variances_from(
    rows: &[(String, String, String, f64)],
    epochs: &[String],
    methods: &[String],
    kinds: &[String],
) -> (Vec<(String, String, Variances)>, Vec<Missing>) {
    let mut keys: Vec<(&String, &String)> = Vec::new();
    for r in rows {
        let key = (&r.0, &r.1);
        let wanted = (methods.is_empty() || methods.contains(&r.0))
            && (kinds.is_empty() || kinds.contains(&r.1));
        if wanted && !keys.contains(&key) {
            keys.push(key);
        }
    }
    let mut out = Vec::new();
    let mut missing = Vec::new();
    for (method, kind) in keys {
        let mut sd = |group: &str| -> f64 {
            match rows
                .iter()
                .find(|r| &r.0 == method && &r.1 == kind && r.2 == group)
            {
                Some(r) => r.3.max(0.0).sqrt(),
                None => {
                    missing.push(Missing {
                        group: group.to_string(),
                        method: method.clone(),
                        kind: kind.clone(),
                    });
                    0.0
                }
            }
        };
        let v = Variances {
            subject: sd("subject"),
            session: sd("subject:session"),
            eye: sd("subject:eye"),
            segment: sd("subject:eye:segment"),
            response: epochs
                .iter()
                .map(|e| sd(&crate::stats::epoch_model::epoch_term_name(e)))
                .collect(),
            residual: sd("Residual"),
        };
        out.push((method.clone(), kind.clone(), v));
    }
    (out, missing)
}

/// Studies simulated in all, from the rows of [`run`] (each design, method
/// and kind has one row per contrast, all with the same count).
pub fn simulated(rows: &[PowerRow], contrasts: usize) -> usize {
    rows.chunks(contrasts.max(1))
        .map(|c| c[0].counts.studies)
        .sum()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn spec(label: &str, w: &[(usize, f64)]) -> ContrastSpec {
        ContrastSpec {
            label: label.into(),
            weights: w.to_vec(),
        }
    }

    #[test]
    fn effects_become_epoch_changes() {
        let c = vec![
            spec("b - a", &[(1, 1.0), (0, -1.0)]),
            spec("c - a", &[(2, 1.0), (0, -1.0)]),
            spec("c - b", &[(2, 1.0), (1, -1.0)]),
        ];
        let ch = changes_for(3, 0, &c, &[("b - a".into(), -4.0), ("c - a".into(), -6.0)]).unwrap();
        assert!((ch[1] + 4.0).abs() < 1e-12 && (ch[2] + 6.0).abs() < 1e-12 && ch[0] == 0.0);
        // Contradicting effects are refused, naming one of them.
        let e = changes_for(
            3,
            0,
            &c,
            &[
                ("b - a".into(), -4.0),
                ("c - a".into(), -6.0),
                ("c - b".into(), 5.0),
            ],
        )
        .unwrap_err();
        assert!(matches!(e, PlanError::Inconsistent { .. }), "{e}");
        assert!(matches!(
            changes_for(3, 0, &c, &[("d - a".into(), 1.0)]),
            Err(PlanError::UnknownContrast(_))
        ));
    }

    #[test]
    fn the_smallest_design_is_given_once_per_stated_contrast() {
        let row = |subjects: usize, contrast: &str, found: usize| PowerRow {
            design: PlanDesign {
                subjects,
                eyes: 1,
                sessions: 1,
                segments_per_eye: 4,
                captures_per_epoch: 5,
            },
            method: "m".into(),
            kind: "arteriole".into(),
            contrast: contrast.into(),
            effect: -3.0,
            stated: true,
            counts: Counts {
                studies: 100,
                found,
                missed_truth: 5,
            },
        };
        // Two stated contrasts; rows run through them within each design.
        let rows = vec![
            row(6, "b - a", 50),
            row(6, "c - a", 85),
            row(10, "b - a", 90),
            row(10, "c - a", 99),
        ];
        let best = smallest(&rows, 0.8, 4);
        let got: Vec<(&str, usize, bool)> = best
            .iter()
            .map(|(r, reached)| (r.contrast.as_str(), r.design.subjects, *reached))
            .collect();
        assert_eq!(got, [("b - a", 10, true), ("c - a", 6, true)]);
        assert_eq!(simulated(&rows, 2), 200);
    }

    /// R's `power.t.test(n, delta, sd, type = "paired", strict = TRUE)`
    /// (stats package, R 4.x from Debian, run on this machine): n = 10,
    /// delta = 1, sd = 1 gives 0.8030968566; n = 8, delta = 4, sd = 5 gives
    /// 0.4963820462. The crosscheck suite repeats this against R live.
    #[test]
    fn paired_t_power_matches_the_textbook_case() {
        let p = paired_t_power(10, 1.0, 0.05);
        assert!((p - 0.8030968566).abs() < 1e-6, "{p}");
        let p = paired_t_power(8, 0.8, 0.05);
        assert!((p - 0.4963820462).abs() < 1e-6, "{p}");
        // No effect: the power is the level.
        assert!((paired_t_power(12, 0.0, 0.05) - 0.05).abs() < 1e-6);
    }
}
