//! `two-band`: the optical density ratio method.
//!
//! `OD = log10(1/T)` in a band where oxy- and deoxyhemoglobin absorb
//! differently (the sensitive band, 600–610 nm) and in one where they absorb
//! equally (isosbestic, near 570 or 586 nm); `ODR = OD_sensitive /
//! OD_isosbestic` is close to linear in SO2, `SO2 = a + b·ODR` with `b < 0`
//! (Beach et al., J Appl Physiol 86:748–758, 1999; Hardarson et al., IOVS
//! 47:5011–5016, 2006; both cited from memory). Constants belong to one instrument: they are set by
//! calibration, in one of three ways:
//!
//! - fixed constants from the study file;
//! - two reference points from a named epoch: the cohort's mean arteriolar
//!   ODR at the cohort's mean reference SpO2 and the mean venular ODR at a
//!   stated venular value;
//! - a calibration line between arteriolar ODR and the reference SpO2
//!   across calibration subjects, leaving each subject out of its own
//!   calibration ([`inverse_calibration`]);
//! - within each subject: the line between the subject's own arteriolar
//!   ODR and the reference SpO2 across the protocol's epochs, so that the
//!   slope is not confounded by what differs between subjects (each
//!   subject's veil and vessel diameters move ODR at a given SO2). The
//!   arterioles then agree with the reference by construction; the
//!   venules, and the change between epochs, are what it measures.
//!
//! Every mode reports its slope with a standard error ([`Calibrated`]).
//!
//! An optional diameter correction removes the linear dependence of ODR on
//! vessel diameter, with the slope estimated within captures (pooled
//! within-capture regression), before calibration.

/// Optical density ratio from the two band transmissions; `None` when a
/// transmission is not in (0, 1) and so has no positive optical density.
pub fn odr(t_sensitive: f64, t_isosbestic: f64) -> Option<f64> {
    if !(t_sensitive > 0.0 && t_sensitive < 1.0 && t_isosbestic > 0.0 && t_isosbestic < 1.0) {
        return None;
    }
    Some(t_sensitive.log10() / t_isosbestic.log10())
}

/// Segment ODR: ratio of the mean optical densities along the segment
/// (more stable than the mean of per-position ratios when OD_isosbestic is small).
pub(crate) fn segment_odr(t_sensitive: &[f64], t_isosbestic: &[f64]) -> Option<f64> {
    let (mut s, mut i, mut n) = (0.0, 0.0, 0);
    for (a, b) in t_sensitive.iter().zip(t_isosbestic) {
        if *a > 0.0 && *b > 0.0 {
            s -= a.log10();
            i -= b.log10();
            n += 1;
        }
    }
    (n > 0 && i > 0.0).then(|| s / i)
}

/// `SO2 (%) = intercept + slope · ODR`.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub(crate) struct Linear {
    pub intercept: f64,
    pub slope: f64,
}

impl Linear {
    pub fn apply(&self, odr: f64) -> f64 {
        self.intercept + self.slope * odr
    }
}

/// Two-point calibration: arterioles (`odr_a`) at `spo2_a`, venules (`odr_v`) at `so2_v`.
pub(crate) fn two_point(odr_a: f64, spo2_a: f64, odr_v: f64, so2_v: f64) -> Option<Linear> {
    let d = odr_a - odr_v;
    if d.abs() < 1e-12 {
        return None;
    }
    let slope = (spo2_a - so2_v) / d;
    Some(Linear {
        intercept: spo2_a - slope * odr_a,
        slope,
    })
}

/// A calibration line with the standard error of its slope (NaN when the
/// mode has none, as for stated constants) and the points behind it.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Calibrated {
    pub intercept: f64,
    pub slope: f64,
    pub slope_se: f64,
    pub points: usize,
}

/// Ordinary least squares of `y` on `x`, with the slope's standard error
/// `√(s²/Sxx)`, `s²` the residual variance on n − 2 degrees of freedom
/// (NaN with two points).
pub(crate) fn ols_with_se(x: &[f64], y: &[f64]) -> Option<Calibrated> {
    let l = ols(x, y)?;
    let n = x.len() as f64;
    let mx = x.iter().sum::<f64>() / n;
    let sxx: f64 = x.iter().map(|v| (v - mx).powi(2)).sum();
    let ss: f64 = x
        .iter()
        .zip(y)
        .map(|(a, b)| (b - l.apply(*a)).powi(2))
        .sum();
    Some(Calibrated {
        intercept: l.intercept,
        slope: l.slope,
        slope_se: if x.len() > 2 {
            (ss / (n - 2.0) / sxx).sqrt()
        } else {
            f64::NAN
        },
        points: x.len(),
    })
}

/// A calibration line `SO2 = intercept + slope·ODR` from pairs of ODR and
/// reference SpO2, by classical calibration: ODR (the measurement, which
/// carries the noise) regressed on SpO2 (the standard), then inverted
/// (Eisenhart, J Res Natl Bur Stand 22:207–246, 1939; cited from memory).
/// Regressing SpO2 on a noisy ODR instead would shrink the slope towards
/// zero (regression dilution), and with it every change between epochs.
/// The slope's standard error is the delta method's `se_b/b²`.
pub(crate) fn inverse_calibration(odr: &[f64], spo2: &[f64]) -> Option<Calibrated> {
    let r = ols_with_se(spo2, odr)?;
    if r.slope.abs() < 1e-12 {
        return None;
    }
    Some(Calibrated {
        intercept: -r.intercept / r.slope,
        slope: 1.0 / r.slope,
        slope_se: r.slope_se / (r.slope * r.slope),
        points: r.points,
    })
}

/// The standard error of a two-point slope `(S_a − S_v)/(O_a − O_v)` by the
/// delta method, from the standard errors of the arteriolar and venular
/// mean ODRs and of the mean reference SpO2 (the venular value is stated).
pub(crate) fn two_point_slope_se(
    line: &Linear,
    odr_a: f64,
    odr_v: f64,
    se_a: f64,
    se_v: f64,
    se_spo2: f64,
) -> f64 {
    let d = odr_a - odr_v;
    ((line.slope / d).powi(2) * (se_a * se_a + se_v * se_v) + (se_spo2 / d).powi(2)).sqrt()
}

/// Ordinary least squares of `y` on `x`.
pub(crate) fn ols(x: &[f64], y: &[f64]) -> Option<Linear> {
    let n = x.len() as f64;
    if x.len() < 2 || x.len() != y.len() {
        return None;
    }
    let (mx, my) = (x.iter().sum::<f64>() / n, y.iter().sum::<f64>() / n);
    let sxx: f64 = x.iter().map(|v| (v - mx).powi(2)).sum();
    if sxx <= 0.0 {
        return None;
    }
    let sxy: f64 = x.iter().zip(y).map(|(a, b)| (a - mx) * (b - my)).sum();
    let slope = sxy / sxx;
    Some(Linear {
        intercept: my - slope * mx,
        slope,
    })
}

/// Leave-one-subject-out regression calibration: for each subject, the
/// line of all *other* subjects' (ODR, SpO2) pairs, by
/// [`inverse_calibration`].
pub(crate) fn leave_one_subject_out<'a>(
    pairs: &[(&'a str, f64, f64)],
) -> Vec<(&'a str, Option<Calibrated>)> {
    let mut subjects: Vec<&str> = pairs.iter().map(|p| p.0).collect();
    subjects.sort();
    subjects.dedup();
    subjects
        .into_iter()
        .map(|s| {
            let (x, y): (Vec<f64>, Vec<f64>) = pairs
                .iter()
                .filter(|p| p.0 != s)
                .map(|p| (p.1, p.2))
                .unzip();
            (s, inverse_calibration(&x, &y))
        })
        .collect()
}

/// Pooled within-group slope of ODR on diameter: each group (a capture and
/// vessel kind) is centred on its own means, so the slope reflects diameter
/// alone and not differences in saturation between groups.
pub fn within_group_slope(groups: &[Vec<(f64, f64)>]) -> Option<f64> {
    let (mut sxx, mut sxy) = (0.0, 0.0);
    for g in groups {
        if g.len() < 2 {
            continue;
        }
        let n = g.len() as f64;
        let (mx, my) = (
            g.iter().map(|p| p.0).sum::<f64>() / n,
            g.iter().map(|p| p.1).sum::<f64>() / n,
        );
        for (d, o) in g {
            sxx += (d - mx).powi(2);
            sxy += (d - mx) * (o - my);
        }
    }
    (sxx > 0.0).then(|| sxy / sxx)
}

/// ODR corrected to the reference diameter.
pub(crate) fn diameter_corrected(odr: f64, diameter_um: f64, slope: f64, reference_um: f64) -> f64 {
    odr - slope * (diameter_um - reference_um)
}

/// Arteriole or venule for each vessel of one eye, from its ODR, with the
/// probability that the kind is right. Arterioles carry more oxygen, so
/// absorb relatively less in an oxygen-sensitive band and have the lower
/// ODR (the principle of two-band oximetry). The eye's values are split
/// into two groups where the within-group sum of squares is least; the
/// probability is that of the two-class linear discriminant with the
/// pooled within-group SD (equal priors). With fewer than two values, or
/// groups that do not separate, the probabilities say so.
pub fn split_kinds(odr: &[f64]) -> Vec<(crate::config::segments::VesselKind, f64)> {
    use crate::config::segments::VesselKind;
    let n = odr.len();
    if n < 2 {
        return odr.iter().map(|_| (VesselKind::Arteriole, 0.5)).collect();
    }
    let mut sorted: Vec<f64> = odr.to_vec();
    sorted.sort_by(f64::total_cmp);
    let ss = |v: &[f64]| {
        let m = v.iter().sum::<f64>() / v.len() as f64;
        (m, v.iter().map(|x| (x - m) * (x - m)).sum::<f64>())
    };
    let (mut best, mut at) = (f64::INFINITY, 1);
    for k in 1..n {
        let total = ss(&sorted[..k]).1 + ss(&sorted[k..]).1;
        if total < best {
            (best, at) = (total, k);
        }
    }
    let (ma, _) = ss(&sorted[..at]);
    let (mv, _) = ss(&sorted[at..]);
    // The pooled SD, floored so that two tight groups do not claim
    // certainty beyond what a capture's noise allows (0.01 in ODR).
    let sd = if n > 2 {
        (best / (n - 2) as f64).sqrt()
    } else {
        0.0
    }
    .max(0.01);
    let threshold = 0.5 * (ma + mv);
    odr.iter()
        .map(|x| {
            let kind = if *x < threshold {
                VesselKind::Arteriole
            } else {
                VesselKind::Venule
            };
            let z = (x - threshold).abs() * (mv - ma) / (sd * sd);
            (kind, 1.0 / (1.0 + (-z).exp()))
        })
        .collect()
}

#[cfg(test)]
// Values here are exact by construction (sums of binary fractions, integers).
#[allow(clippy::float_cmp)]
mod tests {
    use super::*;

    #[test]
    fn odr_of_known_transmissions() {
        // OD_s = 0.1, OD_i = 0.2 → ODR 0.5.
        let r = odr(10f64.powf(-0.1), 10f64.powf(-0.2)).unwrap();
        assert!((r - 0.5).abs() < 1e-12);
        assert!(odr(1.2, 0.5).is_none() && odr(0.5, 0.0).is_none());
    }

    #[test]
    fn two_point_passes_through_both_points() {
        let c = two_point(0.6, 97.0, 0.9, 60.0).unwrap();
        assert!((c.apply(0.6) - 97.0).abs() < 1e-12 && (c.apply(0.9) - 60.0).abs() < 1e-12);
        assert!(c.slope < 0.0);
    }

    #[test]
    fn leave_one_out_never_uses_the_subject_itself() {
        // Subject C is an outlier; its own calibration must not see it.
        let pairs = [
            ("A", 0.5, 98.0),
            ("A", 0.7, 80.0),
            ("B", 0.55, 93.5),
            ("B", 0.65, 84.5),
            ("C", 0.6, 10.0),
        ];
        let cal = leave_one_subject_out(&pairs);
        let c = cal.iter().find(|(s, _)| *s == "C").unwrap().1.unwrap();
        assert!(
            (c.slope + 90.0).abs() < 1e-9 && (c.intercept - 143.0).abs() < 1e-9,
            "{c:?}"
        );
        let a = cal.iter().find(|(s, _)| *s == "A").unwrap().1.unwrap();
        assert!(a.slope != c.slope);
    }

    #[test]
    fn within_group_slope_ignores_differences_between_groups() {
        // Two groups at different levels, both with slope 0.002 per µm.
        let g1 = vec![(80.0, 0.60), (120.0, 0.68)];
        let g2 = vec![(90.0, 0.90), (130.0, 0.98)];
        assert!((within_group_slope(&[g1, g2]).unwrap() - 0.002).abs() < 1e-12);
    }

    #[test]
    fn kinds_split_where_the_odr_groups_separate() {
        use crate::config::segments::VesselKind::{Arteriole, Venule};
        let odr = [0.42, 0.71, 0.40, 0.69, 0.45, 0.74];
        let k = split_kinds(&odr);
        let kinds: Vec<_> = k.iter().map(|x| x.0).collect();
        assert_eq!(
            kinds,
            [Arteriole, Venule, Arteriole, Venule, Arteriole, Venule]
        );
        assert!(k.iter().all(|x| x.1 > 0.99), "{k:?}");
        // One group only: the split is arbitrary and says so.
        let k = split_kinds(&[0.50, 0.51, 0.52, 0.515]);
        assert!(k.iter().any(|x| x.1 < 0.9), "{k:?}");
        assert_eq!(split_kinds(&[0.5]), [(Arteriole, 0.5)]);
    }
}
