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
            &Shared {
                so2: op.so2,
                hb_g_per_l: op.hb_g_per_l,
                veil: k,
            },
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
