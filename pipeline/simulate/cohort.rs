//! Whole studies at the level of per-capture, per-segment SO2, without
//! rendering images: hundreds of studies a minute, for calibrating the
//! statistics stage's tests (and for planning).
//!
//! The values are drawn from a study, not from the model that analyses
//! them: besides the nesting the model knows (subject, session, eye,
//! segment, a subject-specific deviation in each epoch), every capture
//! carries a shift shared by all its segments (focus, veil, fixation), the
//! subject-specific response grows with the depth of the challenge (its SD
//! is set per epoch), captures go missing and segments drop out, and the
//! numbers of eyes, sessions and captures differ between subjects.

use rand::Rng;
use rand_distr::{Distribution, Normal};

use super::seed::rng_for;
use crate::stats::epoch_model::Observation;

/// One epoch's truth: the population mean change from the baseline and the
/// SD between subjects of their own change (the baseline's SD is the
/// day-to-day wander of a subject's level).
#[derive(Debug, Clone, PartialEq)]
pub struct EpochTruth {
    pub name: String,
    pub change: f64,
    pub response_sd: f64,
}

/// SDs of the study's variance components, in SO2 points.
#[derive(Debug, Clone, PartialEq)]
pub struct Spread {
    pub subject: f64,
    pub session: f64,
    pub eye: f64,
    pub segment: f64,
    pub capture: f64,
    pub residual: f64,
}

/// A cohort design with its truth.
#[derive(Debug, Clone, PartialEq)]
pub struct CohortDesign {
    pub subjects: usize,
    /// Share of subjects imaged in both eyes.
    pub two_eye_share: f64,
    /// Share of subjects seen in a second session.
    pub two_session_share: f64,
    pub segments_per_eye: usize,
    /// Captures per epoch, drawn uniformly in this range for each subject, session and epoch.
    pub captures_per_epoch: (usize, usize),
    /// Chance that a capture is missing (blink, failed registration).
    pub missing_capture: f64,
    /// Chance that one segment of a capture has no value.
    pub missing_value: f64,
    /// The baseline's population mean SO2.
    pub level: f64,
    /// The protocol's epochs; the first is the baseline.
    pub epochs: Vec<EpochTruth>,
    pub spread: Spread,
}

impl CohortDesign {
    /// A step-down hypoxia study (air, FiO2 0.15, FiO2 0.12, recovery) of
    /// one eye per subject, 4 segments and 5 steady captures per epoch, with
    /// arteriolar changes of −7 and −12 points, subjects' responses
    /// spreading more the deeper the step (SD 1.5, 2.5, 4.0, 1.5), and
    /// spreads of the order of DOMAIN.md's typical values (subject 4,
    /// session 1.5, eye 1.5, segment 3, capture 1.5, residual 3 points).
    pub fn step_down(subjects: usize) -> CohortDesign {
        let epoch = |name: &str, change: f64, response_sd: f64| EpochTruth {
            name: name.into(),
            change,
            response_sd,
        };
        CohortDesign {
            subjects,
            two_eye_share: 0.0,
            two_session_share: 0.0,
            segments_per_eye: 4,
            captures_per_epoch: (5, 5),
            missing_capture: 0.0,
            missing_value: 0.0,
            level: 95.0,
            epochs: vec![
                epoch("air", 0.0, 1.5),
                epoch("low-15", -7.0, 2.5),
                epoch("low-12", -12.0, 4.0),
                epoch("recovery", 0.0, 1.5),
            ],
            spread: Spread {
                subject: 4.0,
                session: 1.5,
                eye: 1.5,
                segment: 3.0,
                capture: 1.5,
                residual: 3.0,
            },
        }
    }

    pub fn epoch_names(&self) -> Vec<String> {
        self.epochs.iter().map(|e| e.name.clone()).collect()
    }

    /// The true population value of a contrast.
    pub fn true_contrast(&self, weights: &[(usize, f64)]) -> f64 {
        weights
            .iter()
            .map(|(e, w)| w * self.epochs[*e].change)
            .sum()
    }

    /// One simulated study, seeded by `seed` and `name` alone.
    pub fn simulate(&self, seed: u64, name: &str) -> Vec<Observation> {
        let mut rng = rng_for(seed, &["cohort", name]);
        let n = |sd: f64| Normal::new(0.0, sd.max(0.0)).expect("finite SD");
        let mut out = Vec::new();
        for s in 0..self.subjects {
            let subject = format!("S{:02}", s + 1);
            let u_subject = n(self.spread.subject).sample(&mut rng);
            let response: Vec<f64> = self
                .epochs
                .iter()
                .map(|e| n(e.response_sd).sample(&mut rng))
                .collect();
            let eyes: &[&str] = if rng.random::<f64>() < self.two_eye_share {
                &["OD", "OS"]
            } else {
                &["OD"]
            };
            let sessions: &[&str] = if rng.random::<f64>() < self.two_session_share {
                &["s1", "s2"]
            } else {
                &["s1"]
            };
            let u_eye: Vec<f64> = eyes
                .iter()
                .map(|_| n(self.spread.eye).sample(&mut rng))
                .collect();
            let u_segment: Vec<Vec<f64>> = eyes
                .iter()
                .map(|_| {
                    (0..self.segments_per_eye)
                        .map(|_| n(self.spread.segment).sample(&mut rng))
                        .collect()
                })
                .collect();
            for session in sessions {
                let u_session = n(self.spread.session).sample(&mut rng);
                for (ei, epoch) in self.epochs.iter().enumerate() {
                    let (lo, hi) = self.captures_per_epoch;
                    let captures = rng.random_range(lo..=hi.max(lo));
                    for _ in 0..captures {
                        let skip = rng.random::<f64>() < self.missing_capture;
                        for (k, eye) in eyes.iter().enumerate() {
                            let u_capture = n(self.spread.capture).sample(&mut rng);
                            for (g, ug) in u_segment[k].iter().enumerate() {
                                let e = n(self.spread.residual).sample(&mut rng);
                                if skip || rng.random::<f64>() < self.missing_value {
                                    continue;
                                }
                                out.push(Observation {
                                    site: None,
                                    subject: subject.clone(),
                                    session: session.to_string(),
                                    eye: eye.to_string(),
                                    segment: format!("A{}", g + 1),
                                    epoch: ei,
                                    so2: self.level
                                        + epoch.change
                                        + u_subject
                                        + response[ei]
                                        + u_session
                                        + u_eye[k]
                                        + ug
                                        + u_capture
                                        + e,
                                });
                            }
                        }
                    }
                }
            }
        }
        out
    }
}

#[cfg(test)]
// Values here are exact by construction (sums of binary fractions, integers).
#[allow(clippy::float_cmp)]
mod tests {
    use super::*;

    fn design() -> CohortDesign {
        CohortDesign {
            subjects: 6,
            two_eye_share: 0.5,
            two_session_share: 0.5,
            segments_per_eye: 3,
            captures_per_epoch: (3, 5),
            missing_capture: 0.1,
            missing_value: 0.05,
            level: 95.0,
            epochs: vec![
                EpochTruth {
                    name: "air".into(),
                    change: 0.0,
                    response_sd: 1.0,
                },
                EpochTruth {
                    name: "low".into(),
                    change: -8.0,
                    response_sd: 3.0,
                },
            ],
            spread: Spread {
                subject: 3.0,
                session: 1.0,
                eye: 1.0,
                segment: 2.0,
                capture: 1.0,
                residual: 2.5,
            },
        }
    }

    #[test]
    fn same_name_same_study_and_the_effect_shows() {
        let d = design();
        let a = d.simulate(7, "one");
        assert_eq!(a, d.simulate(7, "one"));
        assert_ne!(a, d.simulate(7, "two"));
        let mean = |e: usize| {
            let v: Vec<f64> = a.iter().filter(|o| o.epoch == e).map(|o| o.so2).collect();
            v.iter().sum::<f64>() / v.len() as f64
        };
        assert!(
            (mean(1) - mean(0) + 8.0).abs() < 4.0,
            "{} {}",
            mean(0),
            mean(1)
        );
        assert_eq!(d.true_contrast(&[(1, 1.0), (0, -1.0)]), -8.0);
    }
}
