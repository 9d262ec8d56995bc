//! Dense least-squares problems given as a function returning residuals and
//! Jacobian. The damped step solves the augmented system
//! `[J; √λ·D^½] δ = [−r; 0]` by QR, which keeps the conditioning of J
//! rather than squaring it as the normal equations would.

use nalgebra::{DMatrix, DVector};

use super::lm::{Linearization, Problem};

/// Residuals and, when asked, the Jacobian (rows: residuals, columns: parameters).
pub type Model<'a> =
    dyn Fn(&[f64], &mut DVector<f64>, Option<&mut DMatrix<f64>>) -> bool + Sync + 'a;

pub struct DenseProblem<'a> {
    pub n_params: usize,
    pub n_residuals: usize,
    pub model: &'a Model<'a>,
    pub lower: Vec<f64>,
    pub upper: Vec<f64>,
}

impl<'a> DenseProblem<'a> {
    pub fn new(n_params: usize, n_residuals: usize, model: &'a Model<'a>) -> Self {
        DenseProblem {
            n_params,
            n_residuals,
            model,
            lower: vec![f64::NEG_INFINITY; n_params],
            upper: vec![f64::INFINITY; n_params],
        }
    }

    pub fn with_bounds(mut self, lower: Vec<f64>, upper: Vec<f64>) -> Self {
        self.lower = lower;
        self.upper = upper;
        self
    }

    /// Residuals and Jacobian at `x`.
    pub fn evaluate(&self, x: &[f64]) -> Option<(DVector<f64>, DMatrix<f64>)> {
        let mut r = DVector::zeros(self.n_residuals);
        let mut j = DMatrix::zeros(self.n_residuals, self.n_params);
        ((self.model)(x, &mut r, Some(&mut j))
            && r.iter().all(|v| v.is_finite())
            && j.iter().all(|v| v.is_finite()))
        .then_some((r, j))
    }
}

pub struct DenseLin {
    r: DVector<f64>,
    j: DMatrix<f64>,
}

impl Linearization for DenseLin {
    fn jtj_diagonal(&self) -> Vec<f64> {
        self.j.column_iter().map(|c| c.norm_squared()).collect()
    }

    fn gradient(&self) -> Vec<f64> {
        (self.j.transpose() * &self.r).iter().copied().collect()
    }

    fn step(&self, lambda: f64, damping: &[f64]) -> Option<Vec<f64>> {
        let (m, n) = self.j.shape();
        let mut a = DMatrix::zeros(m + n, n);
        a.view_mut((0, 0), (m, n)).copy_from(&self.j);
        for k in 0..n {
            a[(m + k, k)] = (lambda * damping[k]).sqrt();
        }
        let mut b = DVector::zeros(m + n);
        b.rows_mut(0, m).copy_from(&(-&self.r));
        let qr = a.qr();
        let qtb = qr.q().transpose() * b;
        let delta = qr.r().solve_upper_triangular(&qtb)?;
        delta
            .iter()
            .all(|v| v.is_finite())
            .then(|| delta.iter().copied().collect())
    }

    fn predicted_reduction(&self, delta: &[f64]) -> f64 {
        let d = DVector::from_column_slice(delta);
        let jd = &self.j * d;
        // ½(‖r‖² − ‖r + Jδ‖²) = −rᵀJδ − ½‖Jδ‖²
        -self.r.dot(&jd) - 0.5 * jd.norm_squared()
    }
}

impl<'a> Problem for DenseProblem<'a> {
    type Lin = DenseLin;

    fn n_params(&self) -> usize {
        self.n_params
    }

    fn cost(&self, x: &[f64]) -> Option<f64> {
        let mut r = DVector::zeros(self.n_residuals);
        if !(self.model)(x, &mut r, None) {
            return None;
        }
        let c = 0.5 * r.norm_squared();
        c.is_finite().then_some(c)
    }

    fn linearize(&self, x: &[f64]) -> DenseLin {
        match self.evaluate(x) {
            Some((r, j)) => DenseLin { r, j },
            None => DenseLin {
                r: DVector::zeros(self.n_residuals),
                j: DMatrix::zeros(self.n_residuals, self.n_params),
            },
        }
    }

    fn lower(&self) -> Vec<f64> {
        self.lower.clone()
    }

    fn upper(&self) -> Vec<f64> {
        self.upper.clone()
    }
}

/// Covariance of the parameters at the optimum, `s²·(JᵀJ)⁻¹` with
/// `s² = ‖r‖²/(m − n)`, from the SVD (robust to near-singular J).
pub fn covariance(j: &DMatrix<f64>, r: &DVector<f64>) -> Option<DMatrix<f64>> {
    let (m, n) = j.shape();
    if m <= n {
        return None;
    }
    let s2 = r.norm_squared() / (m - n) as f64;
    let svd = j.clone().svd(false, true);
    let vt = svd.v_t?;
    let smax = svd.singular_values.max();
    let mut cov = DMatrix::zeros(n, n);
    for k in 0..n {
        let s = svd.singular_values[k];
        if s <= smax * 1e-14 {
            return None;
        }
        let v = vt.row(k).transpose();
        cov += (&v * v.transpose()) / (s * s);
    }
    Some(cov * s2)
}
