//! The eye's optics as the simulator renders them: the base vessel model
//! and, as scenario options, the ways real eyes depart from it.
//!
//! Every effect is evaluated wavelength by wavelength on the band's 1 nm
//! grid, and none of them has the exact form of the fitting model's
//! extensions ([`crate::oximetry::model`]), so that a fit meets physics
//! richer than its own:
//!
//! - `veil_slope`: the veil grows linearly with wavelength, `k(λ) = k +
//!   k_1·(λ − 560)/100`, applied per band at the band's mean wavelength.
//! - `backscatter_scale`: the blood's backscatter follows its albedo,
//!   `μ_s'/(μ_s' + μ_a(λ))` with μ_s' = 20 /cm, times the scale, evaluated
//!   per nm (the fit's extension assumes 15 /cm).
//! - `fundus_exponent`: the double-pass share follows the fundus
//!   reflectance, `F_2(λ) = F_2·(R(λ)/R(560))^η` with `R` the background
//!   spectrum of [`super::render::background_reflectance`], a sigmoid that
//!   rises towards the red (the fit's extension is linear in λ).
//! - `psf_px`: a Gaussian point-spread function of this SD in pixels blurs
//!   the light reaching the sensor.
//! - `reflex`: a central light reflex on arterioles, a bright stripe over
//!   the central third of the vessel (before the blur).

use crate::oximetry::bands::SampledBand;
use crate::oximetry::hemoglobin::{HB_MOLAR_MASS_G_PER_MOL, extinction};
use crate::oximetry::model::BLOOD_BACKSCATTER;

/// Reduced scattering of blood the simulator's backscatter uses, 1/cm
/// (deliberately not the fit's 15 /cm).
pub const SIM_BLOOD_SCATTER_PER_CM: f64 = 20.0;

/// Departures from the base model, all at rest by default.
#[derive(Debug, Clone, Copy, PartialEq, Default, serde::Serialize)]
pub struct Optics {
    /// Change of the veil per 100 nm.
    pub veil_slope: f64,
    /// Scale of the albedo-shaped blood backscatter; 0 keeps the base
    /// model's constant 4 %.
    pub backscatter_scale: f64,
    /// Exponent of the fundus reflectance in the double-pass share.
    pub fundus_exponent: f64,
    /// SD of the Gaussian point-spread function, pixels.
    pub psf_px: f64,
    /// Brightness of the central reflex on arterioles, as a fraction of
    /// the light the vessel absorbs at its axis; 0 for none.
    pub reflex: f64,
}

/// Per band: the vessel transmission without veil at a chord is
/// `c0 + F_2·c1`; `x` is the band's mean wavelength less 560 nm in units
/// of 100 nm (for the veil).
#[derive(Debug, Clone)]
pub struct BandOptics {
    grid: Vec<(f64, f64, f64, f64)>, // weight, eps_HbO2, eps_Hb, fundus factor
    pub x: f64,
}

impl BandOptics {
    /// `background(λ)` weights the band (the fundus behind the vessel).
    pub fn new(
        band: &SampledBand,
        optics: &Optics,
        background: impl Fn(f64) -> f64,
        fundus: impl Fn(f64) -> f64,
    ) -> Self {
        let at560 = fundus(560.0);
        let raw: Vec<(f64, f64, f64, f64, f64)> = band
            .samples
            .iter()
            .filter_map(|(l, w)| {
                extinction(*l).map(|(o, d)| {
                    let r = (fundus(*l) / at560).powf(optics.fundus_exponent);
                    (w * background(*l), o, d, r, *l)
                })
            })
            .collect();
        let sum: f64 = raw.iter().map(|r| r.0).sum();
        let mean_nm = raw.iter().map(|r| r.0 * r.4).sum::<f64>() / sum;
        BandOptics {
            grid: raw
                .into_iter()
                .map(|(w, o, d, r, _)| (w / sum, o, d, r))
                .collect(),
            x: (mean_nm - 560.0) / 100.0,
        }
    }

    /// `(c0, c1)` at a chord of `chord_um` through blood of saturation
    /// `so2` (fraction) and hemoglobin `hb` g/L.
    pub fn terms(&self, optics: &Optics, so2: f64, hb: f64, chord_um: f64) -> (f64, f64) {
        let c = hb / HB_MOLAR_MASS_G_PER_MOL;
        let d_cm = chord_um * 1e-4;
        let (mut c0, mut c1) = (0.0, 0.0);
        for &(w, eo, ed, r) in &self.grid {
            let mu = std::f64::consts::LN_10 * c * (so2 * eo + (1.0 - so2) * ed);
            let t = (-mu * d_cm).exp();
            let fbs = if optics.backscatter_scale > 0.0 {
                optics.backscatter_scale * SIM_BLOOD_SCATTER_PER_CM
                    / (SIM_BLOOD_SCATTER_PER_CM + mu)
            } else {
                BLOOD_BACKSCATTER
            };
            c0 += w * (fbs * (1.0 - t) + t);
            c1 += w * r * (t * t - t);
        }
        (c0, c1)
    }

    /// The veil in this band for a subject's veil `k`.
    pub fn veil(&self, optics: &Optics, k: f64) -> f64 {
        (k + optics.veil_slope * self.x).clamp(0.0, 0.99)
    }
}

/// Blurs a row-major image by a separable Gaussian of SD `sigma` pixels
/// (edges clamped).
pub fn blur(img: &mut [f64], w: usize, h: usize, sigma: f64) {
    if sigma <= 0.0 {
        return;
    }
    let r = (3.0 * sigma).ceil() as isize;
    let kernel: Vec<f64> = (-r..=r)
        .map(|i| (-(i * i) as f64 / (2.0 * sigma * sigma)).exp())
        .collect();
    let sum: f64 = kernel.iter().sum();
    let kernel: Vec<f64> = kernel.iter().map(|k| k / sum).collect();
    // Rows, then columns: `at(line, i)` is the index of the i-th pixel of
    // a line.
    let pass = |src: &[f64],
                dst: &mut [f64],
                lines: usize,
                len: usize,
                at: &dyn Fn(usize, usize) -> usize| {
        for l in 0..lines {
            for i in 0..len {
                dst[at(l, i)] = kernel
                    .iter()
                    .enumerate()
                    .map(|(j, k)| {
                        let ii = (i as isize + j as isize - r).clamp(0, len as isize - 1) as usize;
                        k * src[at(l, ii)]
                    })
                    .sum();
            }
        }
    };
    let mut tmp = vec![0.0; img.len()];
    pass(img, &mut tmp, h, w, &|y, x| y * w + x);
    pass(&tmp, img, w, h, &|x, y| y * w + x);
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn at_rest_the_optics_are_the_base_model() {
        use crate::oximetry::model::{Shared, VesselModel};
        let band = SampledBand::gaussian(570.0, 10.0);
        let o = Optics::default();
        let bo = BandOptics::new(&band, &o, |_| 1.0, |l| l);
        let m = VesselModel::new(std::slice::from_ref(&band), |_| 1.0, BLOOD_BACKSCATTER);
        let (c0, c1) = bo.terms(&o, 0.7, 150.0, 110.0);
        let mut t = [0.0];
        m.transmission(&Shared::new(0.7, 150.0, 0.0), 0.3, 110.0, &mut t, None);
        assert!((c0 + 0.3 * c1 - t[0]).abs() < 1e-12);
    }

    #[test]
    fn blur_keeps_the_mean_and_spreads_a_point() {
        let (w, h) = (21, 21);
        let mut img = vec![0.0; w * h];
        img[10 * w + 10] = 1.0;
        blur(&mut img, w, h, 1.5);
        assert!((img.iter().sum::<f64>() - 1.0).abs() < 1e-12);
        // Half the light within 1.18 σ of the centre in 2-D (Rayleigh median).
        assert!(img[10 * w + 10] < 0.1 && img[10 * w + 11] > 0.05);
    }
}
