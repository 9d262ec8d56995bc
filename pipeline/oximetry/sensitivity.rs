//! Error propagation from band transmissions to SO2, for choosing bands
//! before a study.
//!
//! At an operating point (SO2, diameter, hemoglobin, double-pass fraction)
//! and a veil k, the model is linearised in the unknowns of one position
//! (SO2, hemoglobin and F_2; the veil is taken as known, as the joint
//! segment fit estimates it from the whole segment). A relative error ε in
//! band b's transmission shifts the least-squares estimate by
//! `δθ = (JᵀJ)⁻¹Jᵀ·ε·e_b`; the SO2 error from that band alone is
//! `|δθ_S|`, and with independent errors ε in every band it is
//! `ε·√Σ_b G_Sb²`, `G = (JᵀJ)⁻¹Jᵀ`. J is the Jacobian of ln T_obs.

use nalgebra::DMatrix;

use super::model::{Shared, VesselModel, N_DERIV};

#[derive(Debug, Clone, Copy, PartialEq)]
pub struct OperatingPoint {
    pub so2: f64,
    pub diameter_um: f64,
    pub hb_g_per_l: f64,
    pub double_pass: f64,
}

impl Default for OperatingPoint {
    fn default() -> Self {
        OperatingPoint { so2: 0.95, diameter_um: 120.0, hb_g_per_l: 150.0, double_pass: 0.3 }
    }
}

/// SO2 error (in points, %) per band for a relative transmission error
/// `eps` in that band alone, and for independent errors in all bands.
pub fn so2_errors(model: &VesselModel, op: &OperatingPoint, veil: f64, eps: f64) -> Option<(Vec<f64>, f64)> {
    let nb = model.n_bands();
    let mut t = vec![0.0; nb];
    let mut j = vec![[0.0; N_DERIV]; nb];
    model.transmission(&Shared { so2: op.so2, hb_g_per_l: op.hb_g_per_l, veil }, op.double_pass, op.diameter_um, &mut t, Some(&mut j));
    // Unknowns: S (column 0), hb (1), F_2 (3).
    let cols = [0usize, 1, 3];
    let jm = DMatrix::from_fn(nb, cols.len(), |b, c| j[b][cols[c]] / t[b]);
    let jtj = jm.transpose() * &jm;
    let g = jtj.try_inverse()? * jm.transpose();
    let per_band: Vec<f64> = (0..nb).map(|b| 100.0 * (g[(0, b)] * eps).abs()).collect();
    let all = 100.0 * eps * (0..nb).map(|b| g[(0, b)].powi(2)).sum::<f64>().sqrt();
    Some((per_band, all))
}
