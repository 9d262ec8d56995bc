//! Error propagation from band transmissions to SO2, for choosing bands
//! before a study.
//!
//! Inputs: the band set (as a [`VesselModel`]), an operating point (SO2,
//! diameter, hemoglobin, double-pass fraction), a veil k and a relative
//! transmission error ε. Output: the SO2 error in points caused by ε in
//! each band alone, and by independent errors ε in every band.
//!
//! The model is linearised in the unknowns of one position: for the
//! `multiband` joint fit S, hb and F_2 (the veil is estimated along the
//! whole segment and taken as known here), for `multiband-pointwise` S, hb,
//! k and F_2. A weighted least-squares estimate with row weights v_b moves
//! by `δθ = (JᵀJ)⁻¹Jᵀ·r` for a residual change `r_b = v_b·ε·T_obs,b`,
//! J the Jacobian of `v_b·T_obs,b`. The band's own error is `|δθ_S|` for
//! `r = r_b·e_b`, the all-band figure `√Σ_b δθ_S(b)²`.
//!
//! Two sets of weights are reported, because they answer two questions:
//!
//! - [`Weights::Refitted`]: `v_b = 1/T_obs,b` at this veil, the weights
//!   the fits use (their residuals are `ln T_obs`). This is the error of
//!   satstep's own estimate. As k grows the weights even out across bands
//!   (all `T_obs` approach 1), so a single band's share can shrink at small
//!   k even though the total grows.
//! - [`Weights::Held`]: `v_b = 1/T_b`, the weights of the veil-free case,
//!   held as the veil grows: the band combination is fixed and only the
//!   data change. Every column of J that is not the veil's scales by
//!   (1 − k), so the SO2 row of `(JᵀJ)⁻¹Jᵀ` scales by 1/(1 − k) and a
//!   band's error is its veil-free error times `1 + k/((1 − k)·T_b)`: it
//!   grows with k for every band, most steeply as k approaches 1. This is
//!   the trade's statement that the veil inflates error propagation
//!   (common practice; the closed form is derived here, not quoted).

use nalgebra::DMatrix;

use super::model::{N_DERIV, Shared, VesselModel};

#[derive(Debug, Clone, Copy, PartialEq)]
pub struct OperatingPoint {
    pub so2: f64,
    pub diameter_um: f64,
    pub hb_g_per_l: f64,
    pub double_pass: f64,
}

impl Default for OperatingPoint {
    fn default() -> Self {
        OperatingPoint {
            so2: 0.95,
            diameter_um: 120.0,
            hb_g_per_l: 150.0,
            double_pass: 0.3,
        }
    }
}

/// Which unknowns one position contributes, as in the two multiband methods.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Unknowns {
    /// `multiband`: S, hb, F_2; the veil comes from the whole segment.
    VeilShared,
    /// `multiband-pointwise`: S, hb, k, F_2 at each position.
    VeilPerPosition,
}

impl Unknowns {
    pub fn method(self) -> &'static str {
        match self {
            Unknowns::VeilShared => "multiband",
            Unknowns::VeilPerPosition => "multiband-pointwise",
        }
    }

    fn columns(self) -> &'static [usize] {
        // Columns of the model's derivative: [dS, dhb, dk, dF2].
        match self {
            Unknowns::VeilShared => &[0, 1, 3],
            Unknowns::VeilPerPosition => &[0, 1, 2, 3],
        }
    }
}

/// The least-squares weights of the band combination (see the module docs).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Weights {
    Refitted,
    Held,
}

impl Weights {
    pub const ALL: [Weights; 2] = [Weights::Refitted, Weights::Held];

    pub fn name(self) -> &'static str {
        match self {
            Weights::Refitted => "refitted",
            Weights::Held => "held",
        }
    }
}

/// SO2 error (in points, %) per band for a relative transmission error
/// `eps` in that band alone, and for independent errors in all bands.
/// `None` when the bands do not separate the unknowns.
pub fn so2_errors(
    model: &VesselModel,
    op: &OperatingPoint,
    veil: f64,
    eps: f64,
    unknowns: Unknowns,
    weights: Weights,
) -> Option<(Vec<f64>, f64)> {
    let nb = model.n_bands();
    let at = |k: f64, jac: Option<&mut [[f64; N_DERIV]]>| {
        let mut t = vec![0.0; nb];
        model.transmission(
            &Shared::new(op.so2, op.hb_g_per_l, k),
            op.double_pass,
            op.diameter_um,
            &mut t,
            jac,
        );
        t
    };
    let mut j = vec![[0.0; N_DERIV]; nb];
    let t_obs = at(veil, Some(&mut j));
    let v: Vec<f64> = match weights {
        Weights::Refitted => t_obs.iter().map(|t| 1.0 / t).collect(),
        Weights::Held => at(0.0, None).iter().map(|t| 1.0 / t).collect(),
    };
    let cols = unknowns.columns();
    let jm = DMatrix::from_fn(nb, cols.len(), |b, c| v[b] * j[b][cols[c]]);
    let g = (jm.transpose() * &jm).try_inverse()? * jm.transpose();
    let shift: Vec<f64> = (0..nb)
        .map(|b| 100.0 * g[(0, b)] * v[b] * eps * t_obs[b])
        .collect();
    let all = shift.iter().map(|s| s * s).sum::<f64>().sqrt();
    Some((shift.iter().map(|s| s.abs()).collect(), all))
}

/// The most a model's extensions may inflate the SO2 standard error of a
/// joint segment fit over the base model's and still count as supported by
/// a band set: beyond it the bands barely separate the extension's
/// parameter from SO2, and what the extension removes in bias it returns
/// as scatter (a choice of this project: on 8 bands of 506–616 nm the
/// veil and fundus slopes inflate it 1.3–2.3 times and remove biases of
/// 5–15 points, while the backscatter spectrum inflates it 3.1–4.1 times
/// and leaves biases of 1–3 points; DEVELOPERS.md).
pub const SUPPORT_MAX_INFLATION: f64 = 2.5;

/// Whether one combination of extensions can be identified from a band set.
#[derive(Debug, Clone, PartialEq)]
pub struct Support {
    pub extensions: super::model::Extensions,
    /// SO2 standard error of the joint fit with these extensions over the
    /// base model's, the largest over [`support`]'s operating points;
    /// infinite when the parameters cannot be separated at all.
    pub inflation: f64,
    pub supported: bool,
}

/// Identifiability of every combination of extensions on the bands of
/// `model`: the Fisher information of a joint fit of one segment (40
/// positions, diameters 130 to 100 µm, double-pass fractions 0.2–0.4,
/// equal noise in `ln T`), the per-position unknowns eliminated (Schur
/// complement), at SO2 60 and 95 %, veils 0.1 and 0.4, the extensions at
/// rest (albedo scale 0.3). The base model comes first.
pub fn support(model: &VesselModel) -> Vec<Support> {
    use super::model::{D_DOUBLE_PASS, Extensions};
    let nb = model.n_bands();
    let so2_var = |ext: Extensions, so2: f64, veil: f64| -> Option<f64> {
        let m = model.clone().with_extensions(ext);
        let cols = ext.shared_columns();
        let g = cols.len();
        let mut sh = Shared::new(so2, 150.0, veil);
        sh.backscatter = 0.3;
        let mut a = DMatrix::<f64>::zeros(g, g);
        let mut t = vec![0.0; nb];
        let mut j = vec![[0.0; N_DERIV]; nb];
        for p in 0..40 {
            let f = p as f64 / 40.0;
            let f2 = 0.3 + 0.1 * (7.0 * f).sin();
            m.transmission(&sh, f2, 130.0 - 30.0 * f, &mut t, Some(&mut j));
            let jg = DMatrix::from_fn(nb, g, |b, c| j[b][cols[c]] / t[b]);
            let jl = nalgebra::DVector::from_fn(nb, |b, _| j[b][D_DOUBLE_PASS] / t[b]);
            let c = jl.dot(&jl);
            let bvec = jg.transpose() * &jl;
            a += jg.transpose() * &jg - &bvec * bvec.transpose() / c;
        }
        // Scale to unit diagonal so that the test of singularity does not
        // depend on the parameters' units.
        let d: Vec<f64> = (0..g).map(|i| a[(i, i)].sqrt()).collect();
        if d.iter().any(|v| !(*v > 0.0)) {
            return None;
        }
        let scaled = DMatrix::from_fn(g, g, |i, k| a[(i, k)] / (d[i] * d[k]));
        let eig = scaled.clone().symmetric_eigenvalues();
        let (lo, hi) = eig
            .iter()
            .fold((f64::INFINITY, 0.0f64), |(l, h), v| (l.min(*v), h.max(*v)));
        if !(lo > 1e-12 * hi) {
            return None;
        }
        let inv = scaled.try_inverse()?;
        Some(inv[(0, 0)] / (d[0] * d[0]))
    };
    let points = [(0.6, 0.1), (0.95, 0.1), (0.6, 0.4), (0.95, 0.4)];
    let base: Vec<Option<f64>> = points
        .iter()
        .map(|(s, k)| so2_var(Extensions::BASE, *s, *k))
        .collect();
    Extensions::all()
        .into_iter()
        .map(|ext| {
            let inflation = points
                .iter()
                .zip(&base)
                .map(|((s, k), b)| match (so2_var(ext, *s, *k), b) {
                    (Some(v), Some(b)) => (v / b).sqrt(),
                    _ => f64::INFINITY,
                })
                .fold(0.0, f64::max);
            Support {
                extensions: ext,
                inflation,
                supported: inflation <= SUPPORT_MAX_INFLATION,
            }
        })
        .collect()
}

/// The models `model: auto` chooses among: the base model over `base`'s
/// bands and every combination of extensions those bands support.
pub fn supported_models(base: &VesselModel) -> Vec<VesselModel> {
    support(base)
        .into_iter()
        .filter(|s| s.supported)
        .map(|s| base.clone().with_extensions(s.extensions))
        .collect()
}
