//! The epoch model of a breathing-challenge study: how SO2 changes between
//! the protocol's epochs, for the population the subjects stand for.
//!
//! The unit of replication for an epoch effect is the subject: volunteers
//! respond differently to the same gas, so the model carries, besides the
//! random intercepts of the nesting (subject, session within subject, eye
//! within subject, segment within eye), a subject-specific deviation in
//! every epoch with a variance of its own:
//!
//! ```text
//! so2 ~ epoch + (1 | subject) [+ (1 | subject:session)] [+ (1 | subject:eye)]
//!     + (1 | subject:eye:segment) + Σ_e (0 + dummy(epoch, "e") | subject)
//! ```
//!
//! Without that term the captures pose as independent replicates of the
//! epoch effect (pseudo-replication; Hurlbert 1984, Ecol Monogr 54:187–211),
//! and the effect must vary by subject in the model for its test to be
//! calibrated (Barr, Levy, Scheepers & Tily 2013, J Mem Lang 68:255–278).
//! One variance per epoch rather than one shared `subject:epoch` variance,
//! because the spread of responses grows with the depth of the challenge
//! and a pooled error term then misstates individual contrasts (Boik 1981,
//! Psychometrika 46:241–255); rather than a full covariance of epoch effects
//! by subject, because K(K+1)/2 parameters are not estimable from 6–12
//! volunteers (Matuschek, Kliegl, Vasishth, Baayen & Bates 2017, J Mem Lang
//! 94:305–315).
//!
//! A contrast is tested in this model unless the subject-specific variance
//! of every epoch it involves is estimated on the boundary (lme4's
//! singularity tolerance: relative factor θ < 1e-4). Then the model holds
//! no estimate of how much subjects differ in that response and
//! Satterthwaite's df would count captures again, so the contrast falls
//! back to the subject-level test: each subject's contrast computed on its
//! own segments (per segment seen in the contrast's epochs, the contrast
//! of its epoch means; then the mean over segments), one-sample t test over
//! subjects with n − 1 df. (One epoch on the boundary is harmless: the
//! other's variance carries the subjects' spread of the response; the
//! whole-study calibration in `tests/suite/crosscheck/calibration.rs` checks such
//! cases, including a baseline with no subject-specific variance.)
//! The same fallback serves every contrast when the
//! model cannot be fitted at all. Which test ran is written in each row.
//!
//! In a multi-site study (subjects recruited at two sites or more) the
//! model also carries the site: as fixed effects when there are fewer than
//! [`RANDOM_SITE_MIN`] sites, whose variance could not be estimated
//! (Gelman & Hill 2007, *Data Analysis Using Regression and
//! Multilevel/Hierarchical Models*, §11.4, on few groups), else as a random
//! intercept `(1 | site)`. Subjects are nested in sites, so the site term
//! takes up differences of level between sites (instruments, populations)
//! that would otherwise sit in the subject variance; the epoch contrasts
//! stay within subjects.

use std::collections::BTreeMap;

use nalgebra::DMatrix;
use statrs::distribution::{ContinuousCDF, StudentsT};

use super::agreement::paired_t;
use super::infer::{Test, contrast_at, holm};
use super::lmm::{Criterion, LmmData, Model, RandomTerm};
use super::summary::mean;

/// From this many sites on, the site enters as a random intercept; below,
/// as fixed effects.
pub const RANDOM_SITE_MIN: usize = 5;

/// The sites of the observations, sorted; empty when fewer than two.
fn sites(obs: &[Observation]) -> Vec<String> {
    let mut v: Vec<String> = obs.iter().filter_map(|o| o.site.clone()).collect();
    v.sort();
    v.dedup();
    if v.len() < 2 { Vec::new() } else { v }
}

/// lme4's default tolerance for a singular fit (`isSingular(tol = 1e-4)`),
/// on the relative covariance factor θ.
pub(crate) const BOUNDARY_THETA: f64 = 1e-4;

/// One segment value of one capture.
#[derive(Debug, Clone, PartialEq)]
pub struct Observation {
    pub subject: String,
    pub session: String,
    pub eye: String,
    pub segment: String,
    /// Index into the protocol's epochs.
    pub epoch: usize,
    pub so2: f64,
    /// The recruiting site, in a multi-site study (else `None`).
    pub site: Option<String>,
}

/// A contrast between epochs: (epoch index, weight), weights summing to zero.
#[derive(Debug, Clone, PartialEq)]
pub struct ContrastSpec {
    pub label: String,
    pub weights: Vec<(usize, f64)>,
}

/// Multiplicity adjustment across a model's contrasts.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Adjustment {
    Holm,
    None,
}

impl From<crate::config::study::Adjustment> for Adjustment {
    fn from(a: crate::config::study::Adjustment) -> Self {
        match a {
            crate::config::study::Adjustment::Holm => Adjustment::Holm,
            crate::config::study::Adjustment::None => Adjustment::None,
        }
    }
}

impl Adjustment {
    pub fn name(self) -> &'static str {
        match self {
            Adjustment::Holm => "holm",
            Adjustment::None => "none",
        }
    }
    pub fn apply(self, p: &[f64]) -> Vec<f64> {
        match self {
            Adjustment::Holm => holm(p),
            Adjustment::None => p.to_vec(),
        }
    }
}

/// The epochs, baseline, contrasts and inference settings of an analysis.
#[derive(Debug, Clone)]
pub struct Design<'a> {
    pub epochs: &'a [String],
    pub baseline: usize,
    pub contrasts: &'a [ContrastSpec],
    pub confidence: f64,
    pub adjustment: Adjustment,
}

/// How a contrast was tested.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Basis {
    /// The mixed model with subject-specific epoch deviations, Satterthwaite df.
    MixedModel,
    /// Subject-level t test because a subject-specific variance of the
    /// contrast's epochs is on the boundary.
    SubjectLevelBoundary,
    /// Subject-level t test because the mixed model could not be fitted.
    SubjectLevelNoModel,
}

impl Basis {
    /// The string written in tables.
    pub fn name(self) -> &'static str {
        match self {
            Basis::MixedModel => "mixed-model",
            Basis::SubjectLevelBoundary => "subject-level (boundary)",
            Basis::SubjectLevelNoModel => "subject-level (no model)",
        }
    }
}

#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct ContrastResult {
    pub test: Test,
    pub p_adjusted: f64,
    pub basis: Basis,
    /// Subjects contributing to the contrast.
    pub subjects: usize,
}

/// One variance component of the fitted model.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Component {
    pub group: String,
    pub levels: usize,
    pub variance: f64,
    /// Relative factor on lme4's singularity boundary.
    pub boundary: bool,
}

#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct EpochAnalysis {
    pub contrasts: Vec<ContrastResult>,
    /// Empty when the model could not be fitted.
    pub components: Vec<Component>,
    /// The model in lme4's notation.
    pub formula: String,
    pub observations: usize,
    /// REML criterion (−2 restricted log-likelihood) of the fitted model.
    pub reml_criterion: Option<f64>,
}

/// Group name of the subject-specific deviation in epoch `name`.
pub(crate) fn epoch_term_name(name: &str) -> String {
    format!("subject:epoch={name}")
}

fn factor(name: &str, keys: &[String], columns: Option<Vec<f64>>) -> RandomTerm {
    let mut levels: Vec<String> = keys.to_vec();
    levels.sort();
    levels.dedup();
    let group = keys
        .iter()
        .map(|k| levels.binary_search(k).expect("present"))
        .collect();
    RandomTerm {
        name: name.into(),
        levels,
        group,
        column_names: vec!["(Intercept)".into()],
        columns: vec![columns.unwrap_or_else(|| vec![1.0; keys.len()])],
    }
}

/// The model's random terms and its formula. Session and eye levels enter
/// only when some subject has two; otherwise they duplicate the subject.
/// Sessions are crossed with eyes and segments: the same vessels are seen
/// on each visit.
fn random_terms(
    obs: &[Observation],
    epochs: &[String],
    present: &[usize],
) -> (Vec<RandomTerm>, String) {
    let key = |f: &dyn Fn(&Observation) -> String| obs.iter().map(f).collect::<Vec<String>>();
    let subject = key(&|o| o.subject.clone());
    let session = key(&|o| format!("{}:{}", o.subject, o.session));
    let eye = key(&|o| format!("{}:{}", o.subject, o.eye));
    let segment = key(&|o| format!("{}:{}:{}", o.subject, o.eye, o.segment));
    let mut terms = vec![factor("subject", &subject, None)];
    let sites = sites(obs);
    let mut formula = String::from(if sites.is_empty() {
        "so2 ~ epoch + (1 | subject)"
    } else if sites.len() < RANDOM_SITE_MIN {
        "so2 ~ epoch + site + (1 | subject)"
    } else {
        "so2 ~ epoch + (1 | site) + (1 | subject)"
    });
    if sites.len() >= RANDOM_SITE_MIN {
        let site = key(&|o| o.site.clone().unwrap_or_default());
        terms.insert(0, factor("site", &site, None));
    }
    let subjects = terms
        .iter()
        .find(|t| t.name == "subject")
        .map_or(0, |t| t.levels.len());
    let session_term = factor("subject:session", &session, None);
    if session_term.levels.len() > subjects {
        terms.push(session_term);
        formula.push_str(" + (1 | subject:session)");
    }
    let eye_term = factor("subject:eye", &eye, None);
    if eye_term.levels.len() > subjects {
        terms.push(eye_term);
        formula.push_str(" + (1 | subject:eye)");
    }
    terms.push(factor("subject:eye:segment", &segment, None));
    formula.push_str(" + (1 | subject:eye:segment)");
    for &e in present {
        let column = obs.iter().map(|o| (o.epoch == e) as u8 as f64).collect();
        terms.push(factor(&epoch_term_name(&epochs[e]), &subject, Some(column)));
        formula.push_str(&format!(
            " + (0 + dummy(epoch, \"{}\") | subject)",
            epochs[e]
        ));
    }
    (terms, formula)
}

/// Per subject, per (eye, segment), per epoch: a value.
type BySegment<'a, T> = BTreeMap<&'a str, BTreeMap<(&'a str, &'a str), BTreeMap<usize, T>>>;

/// Each subject's mean of each segment's values in each epoch:
/// subject → (eye, segment) → epoch → mean.
fn segment_means(obs: &[Observation]) -> BySegment<'_, f64> {
    let mut sums: BySegment<'_, (f64, usize)> = BTreeMap::new();
    for o in obs {
        let c = sums
            .entry(o.subject.as_str())
            .or_default()
            .entry((o.eye.as_str(), o.segment.as_str()))
            .or_default()
            .entry(o.epoch)
            .or_default();
        c.0 += o.so2;
        c.1 += 1;
    }
    sums.into_iter()
        .map(|(s, segs)| {
            (
                s,
                segs.into_iter()
                    .map(|(k, m)| {
                        (
                            k,
                            m.into_iter()
                                .map(|(e, (sum, n))| (e, sum / n as f64))
                                .collect(),
                        )
                    })
                    .collect(),
            )
        })
        .collect()
}

/// Each subject's value of a contrast, on its own segments: per segment
/// seen in every epoch the contrast involves, the weighted sum of the
/// segment's epoch means; then the mean over those segments. Comparing each
/// vessel with itself keeps the changing mix of segments that yield a
/// value from posing as a change. Subjects without such a segment are left
/// out.
pub(crate) fn subject_contrasts(obs: &[Observation], spec: &ContrastSpec) -> Vec<(String, f64)> {
    let involved: Vec<(usize, f64)> = spec
        .weights
        .iter()
        .copied()
        .filter(|(_, w)| *w != 0.0)
        .collect();
    segment_means(obs)
        .into_iter()
        .filter_map(|(s, segs)| {
            let v: Vec<f64> = segs
                .values()
                .filter_map(|m| {
                    involved
                        .iter()
                        .map(|(e, w)| m.get(e).map(|v| w * v))
                        .sum::<Option<f64>>()
                })
                .collect();
            (!v.is_empty()).then(|| (s.to_string(), mean(&v)))
        })
        .collect()
}

/// One-sample t test over subjects of each subject's contrast
/// ([`subject_contrasts`]); `None` with fewer than two subjects.
pub(crate) fn subject_level_test(
    obs: &[Observation],
    spec: &ContrastSpec,
    confidence: f64,
) -> Option<(Test, usize)> {
    let values: Vec<f64> = subject_contrasts(obs, spec)
        .into_iter()
        .map(|(_, v)| v)
        .collect();
    // A one-sample t test is the paired test against zero.
    let (mean, se, df, t, p) = paired_t(&values, &vec![0.0; values.len()])?;
    let q = StudentsT::new(0.0, 1.0, df)
        .ok()?
        .inverse_cdf(0.5 + confidence / 2.0);
    Some((
        Test {
            label: spec.label.clone(),
            estimate: mean,
            std_error: se,
            df,
            t,
            p,
            lower: mean - q * se,
            upper: mean + q * se,
        },
        values.len(),
    ))
}

fn subjects_with(obs: &[Observation], spec: &ContrastSpec) -> usize {
    subject_contrasts(obs, spec).len()
}

/// Fits the epoch model to the observations and tests the design's
/// contrasts. Contrasts naming an epoch without values are left out.
pub fn analyse(obs: &[Observation], design: &Design) -> EpochAnalysis {
    let present: Vec<usize> = (0..design.epochs.len())
        .filter(|e| obs.iter().any(|o| o.epoch == *e))
        .collect();
    let testable: Vec<&ContrastSpec> = design
        .contrasts
        .iter()
        .filter(|c| {
            c.weights
                .iter()
                .all(|(e, w)| *w == 0.0 || present.contains(e))
        })
        .collect();
    let (terms, formula) = random_terms(obs, design.epochs, &present);
    let mut analysis = EpochAnalysis {
        contrasts: Vec::new(),
        components: Vec::new(),
        formula,
        observations: obs.len(),
        reml_criterion: None,
    };
    let mut results: Vec<(Test, Basis, usize)> = Vec::new();
    let fitted = (obs.len() >= 10 && present.contains(&design.baseline) && present.len() >= 2)
        .then(|| {
            let others: Vec<usize> = present
                .iter()
                .copied()
                .filter(|e| *e != design.baseline)
                .collect();
            // Fixed site effects after the epochs' (treatment coding, the
            // first site in sorted order as reference); contrasts give them
            // weight zero.
            let sites = sites(obs);
            let fixed_sites: &[String] = if sites.len() < RANDOM_SITE_MIN {
                sites.get(1..).unwrap_or(&[])
            } else {
                &[]
            };
            let p = 1 + others.len();
            let x = DMatrix::from_fn(obs.len(), p + fixed_sites.len(), |i, j| {
                if j == 0 {
                    1.0
                } else if j < p {
                    (obs[i].epoch == others[j - 1]) as u8 as f64
                } else {
                    (obs[i].site.as_deref() == Some(fixed_sites[j - p].as_str())) as u8 as f64
                }
            });
            let x_names = std::iter::once("(Intercept)".to_string())
                .chain(others.iter().map(|e| design.epochs[*e].clone()))
                .chain(fixed_sites.iter().map(|s| format!("site{s}")))
                .collect();
            let levels: Vec<usize> = terms.iter().map(|t| t.levels.len()).collect();
            let names: Vec<String> = terms.iter().map(|t| t.name.clone()).collect();
            let model = Model::new(
                LmmData {
                    y: obs.iter().map(|o| o.so2).collect(),
                    x,
                    x_names,
                    terms,
                },
                Criterion::Reml,
            );
            let fit = model.fit().ok()?;
            Some((model, fit, others, levels, names))
        })
        .flatten();
    match &fitted {
        Some((model, fit, others, levels, names)) => {
            let comps = model.components(fit);
            analysis.reml_criterion = Some(fit.deviance);
            // Every term here has one column, so θ holds one relative factor per term.
            for (k, ((_, _, cov), lv)) in comps.terms.iter().zip(levels).enumerate() {
                analysis.components.push(Component {
                    group: names[k].clone(),
                    levels: *lv,
                    variance: cov[(0, 0)],
                    boundary: fit.theta[k] < BOUNDARY_THETA,
                });
            }
            analysis.components.push(Component {
                group: "Residual".into(),
                levels: obs.len(),
                variance: comps.residual,
                boundary: false,
            });
            let epoch_boundary = |e: usize| {
                analysis
                    .components
                    .iter()
                    .find(|c| c.group == epoch_term_name(&design.epochs[e]))
                    .is_none_or(|c| c.boundary)
            };
            for spec in &testable {
                let involved = spec.weights.iter().filter(|(_, w)| *w != 0.0);
                if involved.clone().all(|(e, _)| epoch_boundary(*e)) {
                    if let Some((t, n)) = subject_level_test(obs, spec, design.confidence) {
                        results.push((t, Basis::SubjectLevelBoundary, n));
                    }
                    continue;
                }
                let mut l = vec![0.0; model.fixed_names().len()];
                for (e, w) in &spec.weights {
                    if let Some(j) = others.iter().position(|o| o == e) {
                        l[1 + j] += w;
                    }
                }
                results.push((
                    contrast_at(model, fit, &spec.label, &l, design.confidence),
                    Basis::MixedModel,
                    subjects_with(obs, spec),
                ));
            }
        }
        None => {
            for spec in &testable {
                if let Some((t, n)) = subject_level_test(obs, spec, design.confidence) {
                    results.push((t, Basis::SubjectLevelNoModel, n));
                }
            }
        }
    }
    let adjusted = design
        .adjustment
        .apply(&results.iter().map(|r| r.0.p).collect::<Vec<_>>());
    analysis.contrasts = results
        .into_iter()
        .zip(adjusted)
        .map(|((test, basis, subjects), p_adjusted)| ContrastResult {
            test,
            p_adjusted,
            basis,
            subjects,
        })
        .collect();
    analysis
}

/// The slope of SO2 on the reference SpO2 across epochs, with the subject
/// as the unit of replication: each subject's epoch means of SO2 and SpO2,
/// a mixed model with a random intercept and an uncorrelated random slope
/// by subject (`y ~ spo2 + (1 | subject) + (0 + spo2 | subject)`), so that
/// subjects whose retinal response to the same SpO2 change differs do not
/// pose as replicates. When the slope variance is on the boundary the
/// model falls back to the random intercept alone on the same epoch means
/// (the epochs of a subject are then its replicates), and says so.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct SlopeResult {
    pub test: Test,
    pub intercept: f64,
    /// The model that ran, in lme4's notation.
    pub formula: String,
    /// Subject × epoch means the slope was fitted to.
    pub points: usize,
    pub subjects: usize,
}

/// `cells`: (subject, SO2 epoch mean, SpO2 epoch mean).
pub(crate) fn slope_on_reference(
    cells: &[(String, f64, f64)],
    confidence: f64,
) -> Option<SlopeResult> {
    let n = cells.len();
    let subjects = {
        let mut s: Vec<&str> = cells.iter().map(|c| c.0.as_str()).collect();
        s.sort();
        s.dedup();
        s.len()
    };
    if n < 4 || subjects < 2 {
        return None;
    }
    let keys: Vec<String> = cells.iter().map(|c| c.0.clone()).collect();
    // Centred SpO2 keeps the intercept and slope nearly orthogonal.
    let centre = cells.iter().map(|c| c.2).sum::<f64>() / n as f64;
    let x = DMatrix::from_fn(n, 2, |i, j| if j == 0 { 1.0 } else { cells[i].2 - centre });
    let data = |with_slope: bool| {
        let mut terms = vec![factor("subject", &keys, None)];
        if with_slope {
            let mut t = factor(
                "subject",
                &keys,
                Some(cells.iter().map(|c| c.2 - centre).collect()),
            );
            t.column_names = vec!["spo2".into()];
            terms.push(t);
        }
        LmmData {
            y: cells.iter().map(|c| c.1).collect(),
            x: x.clone(),
            x_names: vec!["(Intercept)".into(), "spo2".into()],
            terms,
        }
    };
    let full = Model::new(data(true), Criterion::Reml);
    let (model, fit, formula) = match full.fit() {
        Ok(f) if f.theta[1] >= BOUNDARY_THETA => (
            full,
            f,
            "so2 ~ spo2 + (1 | subject) + (0 + spo2 | subject), on subject × epoch means",
        ),
        _ => {
            let m = Model::new(data(false), Criterion::Reml);
            let f = m.fit().ok()?;
            (
                m,
                f,
                "so2 ~ spo2 + (1 | subject), on subject × epoch means (slope variance on the boundary)",
            )
        }
    };
    let test = contrast_at(&model, &fit, "slope on SpO2", &[0.0, 1.0], confidence);
    let intercept = fit.beta[0] - fit.beta[1] * centre;
    Some(SlopeResult {
        test,
        intercept,
        formula: formula.into(),
        points: n,
        subjects,
    })
}

#[cfg(test)]
// Values here are exact by construction (sums of binary fractions, integers).
#[allow(clippy::float_cmp)]
mod tests {
    use super::*;

    fn obs(subject: &str, epoch: usize, so2: f64) -> Observation {
        Observation {
            site: None,
            subject: subject.into(),
            session: "s1".into(),
            eye: "OD".into(),
            segment: "A1".into(),
            epoch,
            so2,
        }
    }

    // The subject-level test of `b - a` is the paired t test of the subjects'
    // epoch means: differences 2, 4, 3 → mean 3, SD 1, SE 1/√3, t = 3√3 = 5.196,
    // df 2 (worked by hand).
    #[test]
    fn subject_level_test_is_the_paired_t_test() {
        let mut v = Vec::new();
        for (s, a, b) in [("S1", 90.0, 92.0), ("S2", 91.0, 95.0), ("S3", 89.0, 92.0)] {
            v.push(obs(s, 0, a - 1.0));
            v.push(obs(s, 0, a + 1.0));
            v.push(obs(s, 1, b));
        }
        let spec = ContrastSpec {
            label: "b - a".into(),
            weights: vec![(1, 1.0), (0, -1.0)],
        };
        let (t, n) = subject_level_test(&v, &spec, 0.95).unwrap();
        assert_eq!(n, 3);
        assert!(
            (t.estimate - 3.0).abs() < 1e-12
                && (t.std_error - 1.0 / 3f64.sqrt()).abs() < 1e-12
                && (t.t - 27f64.sqrt()).abs() < 1e-9
                && t.df == 2.0,
            "{t:?}"
        );
        // A subject without the second epoch does not count.
        v.push(obs("S4", 0, 90.0));
        assert_eq!(subject_level_test(&v, &spec, 0.95).unwrap().1, 3);
    }

    // A vessel that yields no value in one epoch does not pose as a change:
    // air A1 90, A2 70; low A1 85 only. Cell means would say +5, the
    // segment compared with itself says −5.
    #[test]
    fn subject_contrasts_compare_each_segment_with_itself() {
        let mut v = vec![obs("S1", 0, 90.0), obs("S1", 0, 70.0), obs("S1", 1, 85.0)];
        v[1].segment = "A2".into();
        let spec = ContrastSpec {
            label: "low - air".into(),
            weights: vec![(1, 1.0), (0, -1.0)],
        };
        assert_eq!(subject_contrasts(&v, &spec), vec![("S1".to_string(), -5.0)]);
    }

    #[test]
    fn formula_names_every_term_that_entered() {
        let mut v = vec![obs("S1", 0, 1.0), obs("S1", 1, 2.0), obs("S2", 0, 1.0)];
        v[2].eye = "OS".into();
        let (terms, formula) = random_terms(&v, &["air".into(), "low".into()], &[0, 1]);
        let names: Vec<&str> = terms.iter().map(|t| t.name.as_str()).collect();
        assert_eq!(
            names,
            [
                "subject",
                "subject:eye:segment",
                "subject:epoch=air",
                "subject:epoch=low"
            ]
        );
        assert_eq!(
            formula,
            "so2 ~ epoch + (1 | subject) + (1 | subject:eye:segment) + (0 + dummy(epoch, \"air\") | subject) + (0 + dummy(epoch, \"low\") | subject)"
        );
    }
}
