//! The vessel transmission model family, band-integrated, with analytic
//! derivatives.
//!
//! Light seen over a vessel, relative to the background beside it, is a
//! mixture of light backscattered by the blood, light that crossed the
//! vessel once and light that crossed it twice (the multi-path model of
//! Smith et al., Applied Optics 39(7):1183–1193, 2000; volume and pages
//! cited from memory):
//!
//! ```text
//! T   = F_bs + F_1·⟨t⟩ + F_2·⟨t²⟩,   t = exp(−mu_a(λ)·d),   F_1 = 1 − F_bs − F_2
//! mu_a(λ) = ln(10) · c · [S·eps_HbO2(λ) + (1 − S)·eps_Hb(λ)]     (1/cm, c in mol/L)
//! T_obs = (1 − k)·T + k                                             (veil of scattered light)
//! ```
//!
//! `⟨·⟩` is the average over the band's response on a 1 nm grid (never the
//! band centre alone), optionally weighted by the background's reflectance
//! spectrum. The path fractions sum to one so that the veil is identifiable:
//! the light reaching the camera over the vessel is all accounted for by
//! the three paths. `d` is the path length across the vessel (its diameter
//! at the vessel's centre line), in µm.
//!
//! Parameters and units: `S` saturation as a fraction (not clipped to 0–1),
//! `hb` hemoglobin in g/L (64 500 g/mol), `k` veil fraction 0–1, `F_2`
//! double-pass fraction, `F_bs` blood backscatter fraction (a setting).

use super::bands::SampledBand;
use super::hemoglobin::{HB_MOLAR_MASS_G_PER_MOL, extinction};

/// The blood backscatter fraction `F_bs` the multiband methods assume and
/// the simulator renders: a fixed setting of the model, not fitted (see
/// the model in DEVELOPERS.md).
pub const BLOOD_BACKSCATTER: f64 = 0.04;

/// One band prepared for evaluation: (weight, eps_HbO2, eps_Hb) per grid point.
#[derive(Debug, Clone)]
pub struct PreparedBand {
    pub samples: Vec<(f64, f64, f64)>,
}

/// The bands of an instrument, prepared once.
#[derive(Debug, Clone)]
pub struct VesselModel {
    pub bands: Vec<PreparedBand>,
    /// Blood backscatter fraction F_bs.
    pub backscatter: f64,
}

/// Parameters shared along a segment.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Shared {
    pub so2: f64,
    pub hb_g_per_l: f64,
    pub veil: f64,
}

/// Number of parameters the derivative of one band transmission is taken
/// against: (S, hb, k, F_2).
pub(crate) const N_DERIV: usize = 4;

impl VesselModel {
    /// Prepares bands, each averaged over its response weighted by
    /// `background(λ)` (use `|_| 1.0` when the background spectrum is unknown).
    pub fn new(bands: &[SampledBand], background: impl Fn(f64) -> f64, backscatter: f64) -> Self {
        let bands = bands
            .iter()
            .map(|b| {
                let raw: Vec<(f64, f64, f64)> = b
                    .samples
                    .iter()
                    .filter_map(|(l, w)| extinction(*l).map(|(o, d)| (w * background(*l), o, d)))
                    .collect();
                let sum: f64 = raw.iter().map(|r| r.0).sum();
                PreparedBand {
                    samples: raw.into_iter().map(|(w, o, d)| (w / sum, o, d)).collect(),
                }
            })
            .collect();
        VesselModel { bands, backscatter }
    }

    pub fn n_bands(&self) -> usize {
        self.bands.len()
    }

    /// Band-averaged ⟨t⟩ and ⟨t²⟩ for one band, with their derivatives with
    /// respect to S and hb: `((E1, dE1/dS, dE1/dhb), (E2, dE2/dS, dE2/dhb))`.
    pub fn path_terms(
        &self,
        band: usize,
        so2: f64,
        hb_g_per_l: f64,
        d_um: f64,
    ) -> ((f64, f64, f64), (f64, f64, f64)) {
        let c = hb_g_per_l / HB_MOLAR_MASS_G_PER_MOL;
        let d_cm = d_um * 1e-4;
        let ln10 = std::f64::consts::LN_10;
        let (mut e1, mut e1s, mut e1h, mut e2, mut e2s, mut e2h) = (0.0, 0.0, 0.0, 0.0, 0.0, 0.0);
        for &(w, eo, ed) in &self.bands[band].samples {
            let eps = so2 * eo + (1.0 - so2) * ed;
            let mu = ln10 * c * eps;
            let dmu_ds = ln10 * c * (eo - ed);
            let dmu_dh = ln10 * eps / HB_MOLAR_MASS_G_PER_MOL;
            let t1 = (-mu * d_cm).exp();
            let t2 = t1 * t1;
            e1 += w * t1;
            e2 += w * t2;
            e1s -= w * t1 * d_cm * dmu_ds;
            e1h -= w * t1 * d_cm * dmu_dh;
            e2s -= w * t2 * 2.0 * d_cm * dmu_ds;
            e2h -= w * t2 * 2.0 * d_cm * dmu_dh;
        }
        ((e1, e1s, e1h), (e2, e2s, e2h))
    }

    /// Observed transmission in every band at one position, and when asked
    /// its derivatives `[dS, dhb, dk, dF2]` per band.
    pub fn transmission(
        &self,
        p: &Shared,
        f2: f64,
        d_um: f64,
        out: &mut [f64],
        mut jac: Option<&mut [[f64; N_DERIV]]>,
    ) {
        let fbs = self.backscatter;
        let f1 = 1.0 - fbs - f2;
        let k = p.veil;
        for b in 0..self.bands.len() {
            let ((e1, e1s, e1h), (e2, e2s, e2h)) = self.path_terms(b, p.so2, p.hb_g_per_l, d_um);
            let t = fbs + f1 * e1 + f2 * e2;
            out[b] = (1.0 - k) * t + k;
            if let Some(j) = jac.as_deref_mut() {
                j[b] = [
                    (1.0 - k) * (f1 * e1s + f2 * e2s),
                    (1.0 - k) * (f1 * e1h + f2 * e2h),
                    1.0 - t,
                    (1.0 - k) * (e2 - e1),
                ];
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    fn model() -> VesselModel {
        let bands: Vec<SampledBand> = [506.0, 522.0, 548.0, 560.0, 570.0, 586.0, 600.0, 616.0]
            .iter()
            .map(|c| SampledBand::gaussian(*c, 8.0))
            .collect();
        VesselModel::new(&bands, |_| 1.0, BLOOD_BACKSCATTER)
    }

    proptest! {
        // Analytic derivatives against central finite differences.
        #[test]
        fn jacobian_matches_finite_differences(so2 in 0.0f64..1.0, hb in 80.0f64..220.0, k in 0.0f64..0.9, f2 in 0.0f64..0.9, d in 40.0f64..200.0) {
            let m = model();
            let p = Shared { so2, hb_g_per_l: hb, veil: k };
            let n = m.n_bands();
            let mut t = vec![0.0; n];
            let mut j = vec![[0.0; N_DERIV]; n];
            m.transmission(&p, f2, d, &mut t, Some(&mut j));
            let steps = [1e-6, 1e-4, 1e-6, 1e-6];
            for q in 0..N_DERIV {
                let shift = |s: f64| {
                    let mut pp = p;
                    let mut ff = f2;
                    match q { 0 => pp.so2 += s, 1 => pp.hb_g_per_l += s, 2 => pp.veil += s, _ => ff += s }
                    let mut o = vec![0.0; n];
                    m.transmission(&pp, ff, d, &mut o, None);
                    o
                };
                let (hi, lo) = (shift(steps[q]), shift(-steps[q]));
                for b in 0..n {
                    let fd = (hi[b] - lo[b]) / (2.0 * steps[q]);
                    prop_assert!((fd - j[b][q]).abs() <= 1e-6 * (1.0 + fd.abs()), "param {q} band {b}: fd {fd} analytic {}", j[b][q]);
                }
            }
        }
    }

    #[test]
    fn limits_of_the_model() {
        let m = model();
        let mut t = vec![0.0; m.n_bands()];
        // No blood in the path: full transmission.
        m.transmission(
            &Shared {
                so2: 0.5,
                hb_g_per_l: 150.0,
                veil: 0.0,
            },
            0.3,
            0.0,
            &mut t,
            None,
        );
        assert!(t.iter().all(|v| (v - 1.0).abs() < 1e-12));
        // A complete veil hides the vessel.
        m.transmission(
            &Shared {
                so2: 0.5,
                hb_g_per_l: 150.0,
                veil: 1.0,
            },
            0.3,
            150.0,
            &mut t,
            None,
        );
        assert!(t.iter().all(|v| (v - 1.0).abs() < 1e-12));
        // Deoxygenated blood absorbs more than oxygenated blood at 600 nm
        // (Prahl's table: 14 677 vs 3 200 cm⁻¹/M), so venules look darker there.
        let mut ta = vec![0.0; m.n_bands()];
        let mut tv = vec![0.0; m.n_bands()];
        m.transmission(
            &Shared {
                so2: 0.97,
                hb_g_per_l: 150.0,
                veil: 0.0,
            },
            0.3,
            120.0,
            &mut ta,
            None,
        );
        m.transmission(
            &Shared {
                so2: 0.55,
                hb_g_per_l: 150.0,
                veil: 0.0,
            },
            0.3,
            120.0,
            &mut tv,
            None,
        );
        assert!(tv[6] < ta[6]);
    }
}
