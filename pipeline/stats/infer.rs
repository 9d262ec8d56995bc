//! Tests and intervals for fixed effects and contrasts: t tests with
//! Satterthwaite degrees of freedom, an F test for a multi-level term
//! (lmerTest's eigen-decomposition method), 95 % intervals and Holm's
//! step-down adjustment (Holm 1979, Scand J Statist 6:65–70).

use nalgebra::{DMatrix, DVector};
use statrs::distribution::{ContinuousCDF, FisherSnedecor, StudentsT};

use super::lmm::{Fit, Model};

#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Test {
    pub label: String,
    pub estimate: f64,
    pub std_error: f64,
    pub df: f64,
    pub t: f64,
    pub p: f64,
    pub lower: f64,
    pub upper: f64,
}

/// Two-sided t test of `l'β = 0` with Satterthwaite df and a 95 % interval.
pub fn contrast(model: &Model, fit: &Fit, label: &str, l: &[f64]) -> Test {
    contrast_at(model, fit, label, l, 0.95)
}

/// As [`contrast`], with an interval of the given coverage.
pub(crate) fn contrast_at(
    model: &Model,
    fit: &Fit,
    label: &str,
    l: &[f64],
    confidence: f64,
) -> Test {
    let lv = DVector::from_column_slice(l);
    let est = lv.dot(&DVector::from_column_slice(&fit.beta));
    let var = (lv.transpose() * &fit.vcov * &lv)[0];
    let se = var.max(0.0).sqrt();
    let df = model.satterthwaite(fit, l);
    let t = est / se;
    let (p, q) = match StudentsT::new(0.0, 1.0, df) {
        Ok(d) => (2.0 * d.sf(t.abs()), d.inverse_cdf(0.5 + confidence / 2.0)),
        Err(_) => (f64::NAN, f64::NAN),
    };
    Test {
        label: label.to_string(),
        estimate: est,
        std_error: se,
        df,
        t,
        p,
        lower: est - q * se,
        upper: est + q * se,
    }
}

/// F test of `Lβ = 0` (rows of `l` are the hypotheses): the eigenvectors of
/// `L C L'` give independent t statistics whose Satterthwaite df combine into
/// the denominator df `2E/(E − q)`, `E = Σ νᵢ/(νᵢ − 2)`.
pub fn f_test(model: &Model, fit: &Fit, l: &DMatrix<f64>) -> (f64, f64, f64, f64) {
    let q = l.nrows();
    let m = l * &fit.vcov * l.transpose();
    let eig = m.symmetric_eigen();
    let beta = DVector::from_column_slice(&fit.beta);
    let (mut f, mut e) = (0.0, 0.0);
    for i in 0..q {
        let row = eig.eigenvectors.column(i).transpose() * l;
        let r: Vec<f64> = row.iter().copied().collect();
        let t2 = (row * &beta)[0].powi(2) / eig.eigenvalues[i];
        f += t2;
        let nu = model.satterthwaite(fit, &r);
        if nu > 2.0 {
            e += nu / (nu - 2.0);
        }
    }
    f /= q as f64;
    let ddf = if e > q as f64 {
        2.0 * e / (e - q as f64)
    } else {
        f64::NAN
    };
    let p = FisherSnedecor::new(q as f64, ddf)
        .map(|d| d.sf(f))
        .unwrap_or(f64::NAN);
    (f, q as f64, ddf, p)
}

/// A p value for people: three decimals, and `< 0.001` below that, so
/// that a value that underflowed is never printed as 0.
pub(crate) fn format_p(p: f64) -> String {
    if !p.is_finite() {
        "–".into()
    } else if p < 0.001 {
        "< 0.001".into()
    } else {
        format!("{p:.3}")
    }
}

/// Holm's step-down adjusted p-values, in the input order.
pub fn holm(p: &[f64]) -> Vec<f64> {
    let m = p.len();
    let mut idx: Vec<usize> = (0..m).collect();
    idx.sort_by(|a, b| p[*a].total_cmp(&p[*b]));
    let mut out = vec![0.0; m];
    let mut running: f64 = 0.0;
    for (rank, &i) in idx.iter().enumerate() {
        running = running.max(((m - rank) as f64 * p[i]).min(1.0));
        out[i] = running;
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    // Holm (1979): with p = 0.01, 0.04, 0.03 and m = 3 the adjusted values
    // are 0.03, 0.06, 0.06 (3·0.01; max(2·0.03, 0.03); max(1·0.04, 0.06)).
    #[test]
    fn holm_worked_example() {
        let a = holm(&[0.01, 0.04, 0.03]);
        for (x, y) in a.iter().zip([0.03, 0.06, 0.06]) {
            assert!((x - y).abs() < 1e-12, "{a:?}");
        }
        assert_eq!(holm(&[0.6, 0.9]), vec![1.0, 1.0]);
    }
}
