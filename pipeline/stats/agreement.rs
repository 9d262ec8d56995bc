//! Agreement with the reference and paired comparisons.
//!
//! - Bias, precision and Arms as in the validation of pulse oximeters
//!   (ISO 80601-2-61): bias = mean(test − reference), precision = SD of the
//!   differences, Arms = √mean((test − reference)²), so that
//!   Arms² = bias² + precision²·(n − 1)/n.
//! - Limits of agreement for repeated measurements per subject when the
//!   true value varies (Bland & Altman 2007, J Biopharm Stat 17:571–582):
//!   the differences' variance is split into between- and within-subject
//!   components by one-way analysis of variance (method of moments, unequal
//!   replicates), and the limits are `bias ± 1.96·√(σ²_between + σ²_within)`.
//! - The paired t test.

use statrs::distribution::{ContinuousCDF, StudentsT};

#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Agreement {
    pub n: usize,
    pub subjects: usize,
    pub bias: f64,
    pub precision: f64,
    pub arms: f64,
    pub var_between: f64,
    pub var_within: f64,
    pub lower: f64,
    pub upper: f64,
}

/// Limits from a bias and the two variance components.
pub fn limits(bias: f64, var_between: f64, var_within: f64) -> (f64, f64) {
    let h = 1.96 * (var_between.max(0.0) + var_within).sqrt();
    (bias - h, bias + h)
}

/// Agreement of paired values `(subject, test, reference)`.
pub fn agreement<S: AsRef<str> + Ord + Clone>(pairs: &[(S, f64, f64)]) -> Option<Agreement> {
    let n = pairs.len();
    if n < 3 {
        return None;
    }
    let d: Vec<f64> = pairs.iter().map(|p| p.1 - p.2).collect();
    let nf = n as f64;
    let bias = d.iter().sum::<f64>() / nf;
    let precision = (d.iter().map(|x| (x - bias).powi(2)).sum::<f64>() / (nf - 1.0)).sqrt();
    let arms = (d.iter().map(|x| x * x).sum::<f64>() / nf).sqrt();
    // One-way ANOVA of the differences by subject.
    let mut subj: Vec<S> = pairs.iter().map(|p| p.0.clone()).collect();
    subj.sort();
    subj.dedup();
    let k = subj.len();
    let mut ss_w = 0.0;
    let mut ss_b = 0.0;
    let mut sum_m2 = 0.0;
    for s in &subj {
        let g: Vec<f64> = pairs
            .iter()
            .zip(&d)
            .filter(|(p, _)| p.0 == *s)
            .map(|(_, x)| *x)
            .collect();
        let m = g.len() as f64;
        let mean = g.iter().sum::<f64>() / m;
        ss_w += g.iter().map(|x| (x - mean).powi(2)).sum::<f64>();
        ss_b += m * (mean - bias).powi(2);
        sum_m2 += m * m;
    }
    if k < 2 || n <= k {
        return None;
    }
    let ms_w = ss_w / (nf - k as f64);
    let ms_b = ss_b / (k as f64 - 1.0);
    let divisor = (nf * nf - sum_m2) / ((k as f64 - 1.0) * nf);
    let var_between = ((ms_b - ms_w) / divisor).max(0.0);
    let (lower, upper) = limits(bias, var_between, ms_w);
    Some(Agreement {
        n,
        subjects: k,
        bias,
        precision,
        arms,
        var_between,
        var_within: ms_w,
        lower,
        upper,
    })
}

/// Paired t test of `a − b`: (mean difference, SE, df, t, two-sided p).
pub(crate) fn paired_t(a: &[f64], b: &[f64]) -> Option<(f64, f64, f64, f64, f64)> {
    let d: Vec<f64> = a.iter().zip(b).map(|(x, y)| x - y).collect();
    let n = d.len() as f64;
    if d.len() < 2 {
        return None;
    }
    let m = d.iter().sum::<f64>() / n;
    let sd = (d.iter().map(|x| (x - m).powi(2)).sum::<f64>() / (n - 1.0)).sqrt();
    let se = sd / n.sqrt();
    let t = m / se;
    let p = StudentsT::new(0.0, 1.0, n - 1.0)
        .ok()
        .map(|dist| 2.0 * dist.sf(t.abs()))?;
    Some((m, se, n - 1.0, t, p))
}

/// A difference of two groups' means with its interval.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct MeanDifference {
    pub difference: f64,
    pub se: f64,
    pub df: f64,
    pub t: f64,
    pub p: f64,
    pub lower: f64,
    pub upper: f64,
}

/// Welch's t test of `mean(a) − mean(b)` (unequal variances,
/// Welch–Satterthwaite df; Welch 1947, Biometrika 34:28–35), with an
/// interval at `confidence`; `None` with fewer than two values in a group
/// or no spread in either.
pub fn welch(a: &[f64], b: &[f64], confidence: f64) -> Option<MeanDifference> {
    let moments = |v: &[f64]| {
        let n = v.len() as f64;
        let m = v.iter().sum::<f64>() / n;
        (
            n,
            m,
            v.iter().map(|x| (x - m).powi(2)).sum::<f64>() / (n - 1.0),
        )
    };
    if a.len() < 2 || b.len() < 2 {
        return None;
    }
    let ((na, ma, va), (nb, mb, vb)) = (moments(a), moments(b));
    let (qa, qb) = (va / na, vb / nb);
    let se = (qa + qb).sqrt();
    if !(se > 0.0) {
        return None;
    }
    let df = (qa + qb).powi(2) / (qa * qa / (na - 1.0) + qb * qb / (nb - 1.0));
    let difference = ma - mb;
    let t = difference / se;
    let dist = StudentsT::new(0.0, 1.0, df).ok()?;
    let q = dist.inverse_cdf(0.5 + confidence / 2.0);
    Some(MeanDifference {
        difference,
        se,
        df,
        t,
        p: 2.0 * dist.sf(t.abs()),
        lower: difference - q * se,
        upper: difference + q * se,
    })
}

#[cfg(test)]
// Values here are exact by construction (sums of binary fractions, integers).
#[allow(clippy::float_cmp)]
mod tests {
    use super::*;

    // Bland & Altman (2007), J Biopharm Stat 17:571–582, worked example:
    // bias −0.05, between-subject variance 0.463, within-subject 1.131 →
    // limits −2.52 and +2.43 (as published, to two decimals; the formula
    // gives +2.425 from these rounded inputs).
    #[test]
    fn bland_altman_2007_limits_from_published_components() {
        let (lo, hi) = limits(-0.05, 0.463, 1.131);
        assert!((lo - -2.52).abs() < 0.006, "{lo}");
        assert!((hi - 2.43).abs() < 0.006, "{hi}");
    }

    #[test]
    fn arms_identity_holds() {
        let pairs: Vec<(&str, f64, f64)> = [
            ("a", 95.0, 97.0),
            ("a", 93.5, 96.0),
            ("b", 90.0, 89.0),
            ("b", 88.0, 87.5),
            ("c", 85.0, 88.0),
            ("c", 86.0, 86.5),
        ]
        .to_vec();
        let a = agreement(&pairs).unwrap();
        let n = pairs.len() as f64;
        assert!(
            (a.arms.powi(2) - (a.bias.powi(2) + a.precision.powi(2) * (n - 1.0) / n)).abs() < 1e-12
        );
    }

    #[test]
    fn equal_replicates_reduce_to_the_textbook_components() {
        // Two subjects, two replicates each: MS_within = pooled variance,
        // σ²_between = (MS_between − MS_within)/m with m = 2.
        let pairs = [
            ("a", 1.0, 0.0),
            ("a", 3.0, 0.0),
            ("b", 5.0, 0.0),
            ("b", 9.0, 0.0),
        ];
        let a = agreement(&pairs).unwrap();
        assert!((a.var_within - 5.0).abs() < 1e-12);
        // MS_between = 2·(2 − 4.5)² + 2·(7 − 4.5)² = 25 on 1 df.
        assert!((a.var_between - (25.0 - 5.0) / 2.0).abs() < 1e-12);
    }

    #[test]
    fn welch_agrees_with_scipy() {
        // scipy 1.17.1: stats.ttest_ind(a, b, equal_var=False) and its
        // confidence_interval(0.95) on these values.
        let a = [2.1, 3.4, 1.9, 4.2, 3.3];
        let b = [0.5, 1.1, -0.2, 0.9];
        let w = welch(&a, &b, 0.95).unwrap();
        let close = |x: f64, y: f64| (x - y).abs() < 1e-9 * y.abs().max(1.0);
        assert!(close(w.difference, 2.405), "{w:?}");
        assert!(close(w.t, 4.648337518245522), "{w:?}");
        assert!(close(w.df, 6.604137460846498), "{w:?}");
        assert!(close(w.p, 0.0027339526365734793), "{w:?}");
        assert!(close(w.lower, 1.1665443871379384), "{w:?}");
        assert!(close(w.upper, 3.643455612862062), "{w:?}");
        assert!(welch(&a, &[1.0], 0.95).is_none());
    }

    #[test]
    fn paired_t_by_hand() {
        let (m, se, df, t, p) = paired_t(&[5.0, 7.0, 9.0], &[4.0, 5.0, 6.0]).unwrap();
        assert_eq!((m, df), (2.0, 2.0));
        assert!(
            (se - (1.0f64 / 3.0).sqrt()).abs() < 1e-12 && (t - 2.0 * 3.0f64.sqrt()).abs() < 1e-12
        );
        assert!((p - 0.0742).abs() < 1e-3, "{p}");
    }
}
