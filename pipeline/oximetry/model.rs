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
//!
//! That is the **base** model. Real eyes depart from it in three ways the
//! [`Extensions`] name, each adding one shared parameter (`x_b` is the
//! band's mean wavelength minus 560 nm, in units of 100 nm):
//!
//! - `veil-slope`: the veil changes smoothly with wavelength,
//!   `k_b = k + k_1·x_b` (light scattered in the ocular media depends on
//!   wavelength; a first-order term of any smooth law).
//! - `backscatter-spectrum`: the blood's backscatter follows its
//!   single-scattering albedo, `F_bs(λ) = β·μ_s'/(μ_s' + μ_a(λ))`, so it
//!   is larger where blood absorbs less (towards the red, and more so in
//!   oxygenated blood); `β` is fitted, `μ_s'` is [`BLOOD_SCATTER_PER_CM`].
//!   The albedo form is the leading term of diffusion and Kubelka–Munk
//!   reflectance of a turbid medium (Kubelka & Munk 1931; the form is
//!   common practice, quoted from memory).
//! - `fundus-slope`: light that crossed the vessel twice was reflected by
//!   the fundus behind it, so its share follows the fundus reflectance
//!   spectrum, which rises towards the red: `F_2,b = F_2·(1 + γ·x_b)`.
//!
//! `T = B_0 − B_1 + (1 − F_2,b)·⟨t⟩ + F_2,b·⟨t²⟩` with `B_0 = ⟨F_bs⟩` and
//! `B_1 = ⟨F_bs·t⟩` covers the base and every extension.

use super::bands::SampledBand;
use super::hemoglobin::{HB_MOLAR_MASS_G_PER_MOL, extinction};

/// The blood backscatter fraction `F_bs` the multiband methods assume and
/// the simulator renders: a fixed setting of the model, not fitted (see
/// the model in DEVELOPERS.md).
pub const BLOOD_BACKSCATTER: f64 = 0.04;

/// Reduced scattering coefficient of whole blood, 1/cm, for the
/// `backscatter-spectrum` extension: of the order of 10–20 /cm in the
/// visible at normal hematocrit (a value from memory of published blood
/// optics; the fit's β absorbs a wrong scale, only the albedo's shape
/// matters).
pub const BLOOD_SCATTER_PER_CM: f64 = 15.0;

/// Wavelength the extensions' slopes are taken about, nm.
pub const SLOPE_CENTRE_NM: f64 = 560.0;

pub use crate::config::vessel_model::{EXTENSION_NAMES, Extensions};

/// The fit's view of the extensions.
impl Extensions {
    /// The columns of [`VesselModel::transmission`]'s derivative that are
    /// shared unknowns of a segment fit, in the fit's order: S, hb, k, then
    /// the extensions' parameters.
    pub fn shared_columns(self) -> Vec<usize> {
        let mut c = vec![D_SO2, D_HB, D_VEIL];
        for (on, col) in self
            .flags()
            .into_iter()
            .zip([D_VEIL_SLOPE, D_BACKSCATTER, D_FUNDUS])
        {
            if on {
                c.push(col);
            }
        }
        c
    }
}

/// One band prepared for evaluation: (weight, eps_HbO2, eps_Hb) per grid
/// point, and `x`, the band's mean wavelength less [`SLOPE_CENTRE_NM`] in
/// units of 100 nm.
#[derive(Debug, Clone)]
pub struct PreparedBand {
    pub samples: Vec<(f64, f64, f64)>,
    pub x: f64,
}

/// The bands of an instrument, prepared once, and which extensions of the
/// base model are switched on.
#[derive(Debug, Clone)]
pub struct VesselModel {
    pub bands: Vec<PreparedBand>,
    /// Blood backscatter fraction F_bs of the base model.
    pub backscatter: f64,
    pub extensions: Extensions,
}

/// Parameters shared along a segment. The extensions' parameters are
/// ignored unless the model switches them on.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct Shared {
    pub so2: f64,
    pub hb_g_per_l: f64,
    pub veil: f64,
    /// `k_1`: change of the veil per 100 nm.
    pub veil_slope: f64,
    /// `β`: scale of the albedo-shaped blood backscatter.
    pub backscatter: f64,
    /// `γ`: relative change of the double-pass fraction per 100 nm.
    pub fundus_slope: f64,
}

impl Shared {
    /// The base model's parameters, with every extension at rest.
    pub fn new(so2: f64, hb_g_per_l: f64, veil: f64) -> Self {
        Shared {
            so2,
            hb_g_per_l,
            veil,
            ..Default::default()
        }
    }
}

/// Columns of one band transmission's derivative: S, hb, k, F_2, then the
/// extensions' k_1, β, γ.
pub(crate) const N_DERIV: usize = 7;
pub const D_SO2: usize = 0;
pub const D_HB: usize = 1;
pub const D_VEIL: usize = 2;
pub const D_DOUBLE_PASS: usize = 3;
pub const D_VEIL_SLOPE: usize = 4;
pub const D_BACKSCATTER: usize = 5;
pub const D_FUNDUS: usize = 6;

/// Band averages along one path: value and derivatives by S and hb.
#[derive(Debug, Clone, Copy, Default)]
pub struct PathTerm {
    pub v: f64,
    pub ds: f64,
    pub dh: f64,
}

/// The band averages the transmission is made of: `⟨t⟩`, `⟨t²⟩`, and for
/// the albedo-shaped backscatter `⟨a⟩` and `⟨a·t⟩`.
#[derive(Debug, Clone, Copy, Default)]
pub struct PathTerms {
    pub t1: PathTerm,
    pub t2: PathTerm,
    pub a0: PathTerm,
    pub a1: PathTerm,
}

impl VesselModel {
    /// Prepares bands, each averaged over its response weighted by
    /// `background(λ)` (use `|_| 1.0` when the background spectrum is
    /// unknown), for the base model.
    pub fn new(bands: &[SampledBand], background: impl Fn(f64) -> f64, backscatter: f64) -> Self {
        let bands = bands
            .iter()
            .map(|b| {
                let raw: Vec<(f64, f64, f64, f64)> = b
                    .samples
                    .iter()
                    .filter_map(|(l, w)| {
                        extinction(*l).map(|(o, d)| (w * background(*l), o, d, *l))
                    })
                    .collect();
                let sum: f64 = raw.iter().map(|r| r.0).sum();
                let mean_nm = raw.iter().map(|r| r.0 * r.3).sum::<f64>() / sum;
                PreparedBand {
                    samples: raw
                        .into_iter()
                        .map(|(w, o, d, _)| (w / sum, o, d))
                        .collect(),
                    x: (mean_nm - SLOPE_CENTRE_NM) / 100.0,
                }
            })
            .collect();
        VesselModel {
            bands,
            backscatter,
            extensions: Extensions::BASE,
        }
    }

    /// The same bands with the given extensions switched on.
    pub fn with_extensions(mut self, extensions: Extensions) -> Self {
        self.extensions = extensions;
        self
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
        let p = self.terms(band, so2, hb_g_per_l, d_um, false);
        ((p.t1.v, p.t1.ds, p.t1.dh), (p.t2.v, p.t2.ds, p.t2.dh))
    }

    /// Every band average of one band; the albedo terms only when
    /// `albedo` is asked for (they cost a division per grid point).
    pub fn terms(
        &self,
        band: usize,
        so2: f64,
        hb_g_per_l: f64,
        d_um: f64,
        albedo: bool,
    ) -> PathTerms {
        let c = hb_g_per_l / HB_MOLAR_MASS_G_PER_MOL;
        let d_cm = d_um * 1e-4;
        let ln10 = std::f64::consts::LN_10;
        let mut o = PathTerms::default();
        for &(w, eo, ed) in &self.bands[band].samples {
            let eps = so2 * eo + (1.0 - so2) * ed;
            let mu = ln10 * c * eps;
            let dmu_ds = ln10 * c * (eo - ed);
            let dmu_dh = ln10 * eps / HB_MOLAR_MASS_G_PER_MOL;
            let t1 = (-mu * d_cm).exp();
            let t2 = t1 * t1;
            o.t1.v += w * t1;
            o.t2.v += w * t2;
            o.t1.ds -= w * t1 * d_cm * dmu_ds;
            o.t1.dh -= w * t1 * d_cm * dmu_dh;
            o.t2.ds -= w * t2 * 2.0 * d_cm * dmu_ds;
            o.t2.dh -= w * t2 * 2.0 * d_cm * dmu_dh;
            if albedo {
                let s = BLOOD_SCATTER_PER_CM;
                let a = s / (s + mu);
                let da = -a / (s + mu);
                o.a0.v += w * a;
                o.a0.ds += w * da * dmu_ds;
                o.a0.dh += w * da * dmu_dh;
                o.a1.v += w * a * t1;
                o.a1.ds += w * (da * dmu_ds * t1 - a * t1 * d_cm * dmu_ds);
                o.a1.dh += w * (da * dmu_dh * t1 - a * t1 * d_cm * dmu_dh);
            }
        }
        o
    }

    /// Observed transmission in every band at one position, and when asked
    /// its derivatives (columns [`D_SO2`] … [`D_FUNDUS`]) per band. An
    /// extension's column is zero unless the model switches it on.
    pub fn transmission(
        &self,
        p: &Shared,
        f2: f64,
        d_um: f64,
        out: &mut [f64],
        mut jac: Option<&mut [[f64; N_DERIV]]>,
    ) {
        let ext = self.extensions;
        for (b, band) in self.bands.iter().enumerate() {
            let pt = self.terms(b, p.so2, p.hb_g_per_l, d_um, ext.backscatter);
            let (e1, e2) = (pt.t1, pt.t2);
            // B_0 − B_1: the backscattered light less its share that the
            // one-pass path would otherwise have carried.
            let (bs, bs_s, bs_h) = if ext.backscatter {
                let beta = p.backscatter;
                (
                    beta * (pt.a0.v - pt.a1.v),
                    beta * (pt.a0.ds - pt.a1.ds),
                    beta * (pt.a0.dh - pt.a1.dh),
                )
            } else {
                let f = self.backscatter;
                (f * (1.0 - e1.v), -f * e1.ds, -f * e1.dh)
            };
            let (g, x) = if ext.fundus {
                (1.0 + p.fundus_slope * band.x, band.x)
            } else {
                (1.0, band.x)
            };
            let f2b = f2 * g;
            let t = bs + e1.v + f2b * (e2.v - e1.v);
            let k = if ext.veil_slope {
                p.veil + p.veil_slope * x
            } else {
                p.veil
            };
            out[b] = (1.0 - k) * t + k;
            if let Some(j) = jac.as_deref_mut() {
                let s = 1.0 - k;
                j[b] = [
                    s * (bs_s + e1.ds + f2b * (e2.ds - e1.ds)),
                    s * (bs_h + e1.dh + f2b * (e2.dh - e1.dh)),
                    1.0 - t,
                    s * g * (e2.v - e1.v),
                    if ext.veil_slope { x * (1.0 - t) } else { 0.0 },
                    if ext.backscatter {
                        s * (pt.a0.v - pt.a1.v)
                    } else {
                        0.0
                    },
                    if ext.fundus {
                        s * f2 * x * (e2.v - e1.v)
                    } else {
                        0.0
                    },
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
        // Analytic derivatives against central finite differences, for the
        // base model and every combination of extensions.
        #[test]
        fn jacobian_matches_finite_differences(
            so2 in 0.0f64..1.0, hb in 80.0f64..220.0, k in 0.0f64..0.6, f2 in 0.0f64..0.9,
            d in 40.0f64..200.0, k1 in -0.2f64..0.2, beta in 0.0f64..0.4, gamma in -0.5f64..1.5,
            which in 0usize..8,
        ) {
            let m = model().with_extensions(Extensions::all()[which]);
            let p = Shared { so2, hb_g_per_l: hb, veil: k, veil_slope: k1, backscatter: beta, fundus_slope: gamma };
            let n = m.n_bands();
            let mut t = vec![0.0; n];
            let mut j = vec![[0.0; N_DERIV]; n];
            m.transmission(&p, f2, d, &mut t, Some(&mut j));
            let steps = [1e-6, 1e-4, 1e-6, 1e-6, 1e-6, 1e-6, 1e-6];
            let on = m.extensions;
            for q in 0..N_DERIV {
                let shift = |s: f64| {
                    let mut pp = p;
                    let mut ff = f2;
                    match q {
                        D_SO2 => pp.so2 += s,
                        D_HB => pp.hb_g_per_l += s,
                        D_VEIL => pp.veil += s,
                        D_DOUBLE_PASS => ff += s,
                        D_VEIL_SLOPE => pp.veil_slope += s,
                        D_BACKSCATTER => pp.backscatter += s,
                        _ => pp.fundus_slope += s,
                    }
                    let mut o = vec![0.0; n];
                    m.transmission(&pp, ff, d, &mut o, None);
                    o
                };
                let (hi, lo) = (shift(steps[q]), shift(-steps[q]));
                for b in 0..n {
                    let fd = (hi[b] - lo[b]) / (2.0 * steps[q]);
                    prop_assert!((fd - j[b][q]).abs() <= 1e-6 * (1.0 + fd.abs()), "model {} param {q} band {b}: fd {fd} analytic {}", on.name(), j[b][q]);
                }
            }
        }

        // Every extension at rest is the base model: the family nests it.
        #[test]
        fn extensions_at_rest_are_the_base_model(so2 in 0.0f64..1.0, k in 0.0f64..0.6, f2 in 0.0f64..0.9, d in 40.0f64..200.0) {
            let base = model();
            let p = Shared::new(so2, 150.0, k);
            let mut t0 = vec![0.0; base.n_bands()];
            base.transmission(&p, f2, d, &mut t0, None);
            for e in [Extensions::BASE.with("veil-slope").unwrap(), Extensions::BASE.with("fundus-slope").unwrap()] {
                let mut t = vec![0.0; base.n_bands()];
                base.clone().with_extensions(e).transmission(&p, f2, d, &mut t, None);
                for b in 0..t.len() {
                    prop_assert!((t[b] - t0[b]).abs() < 1e-14);
                }
            }
        }
    }

    #[test]
    fn the_albedo_backscatter_rises_where_blood_absorbs_less() {
        // Oxygenated blood absorbs far less at 600 than at 560 nm (Prahl's
        // table: 3 200 vs 32 613 cm⁻¹/M), so its backscatter is larger there.
        let m = model();
        let a = |b: usize, s: f64| m.terms(b, s, 150.0, 100.0, true).a0.v;
        assert!(a(6, 0.97) > 3.0 * a(3, 0.97));
        assert!(a(6, 0.97) > a(6, 0.5));
        // At the vessel's edge (no path) the light is all accounted for.
        let m = m.with_extensions(Extensions::all()[7]);
        let mut t = vec![0.0; m.n_bands()];
        let p = Shared {
            so2: 0.8,
            hb_g_per_l: 150.0,
            veil: 0.0,
            veil_slope: 0.0,
            backscatter: 0.2,
            fundus_slope: 0.5,
        };
        m.transmission(&p, 0.3, 0.0, &mut t, None);
        assert!(t.iter().all(|v| (v - 1.0).abs() < 1e-12), "{t:?}");
    }

    #[test]
    fn names_round_trip() {
        for e in Extensions::all() {
            let back = e
                .name()
                .split('+')
                .filter(|n| *n != "base")
                .fold(Extensions::BASE, |acc, n| acc.with(n).unwrap());
            assert_eq!(back, e);
        }
        assert_eq!(Extensions::all()[0], Extensions::BASE);
        assert_eq!(Extensions::all().len(), 8);
    }

    #[test]
    fn limits_of_the_model() {
        let m = model();
        let mut t = vec![0.0; m.n_bands()];
        // No blood in the path: full transmission.
        m.transmission(&Shared::new(0.5, 150.0, 0.0), 0.3, 0.0, &mut t, None);
        assert!(t.iter().all(|v| (v - 1.0).abs() < 1e-12));
        // A complete veil hides the vessel.
        m.transmission(&Shared::new(0.5, 150.0, 1.0), 0.3, 150.0, &mut t, None);
        assert!(t.iter().all(|v| (v - 1.0).abs() < 1e-12));
        // Deoxygenated blood absorbs more than oxygenated blood at 600 nm
        // (Prahl's table: 14 677 vs 3 200 cm⁻¹/M), so venules look darker there.
        let mut ta = vec![0.0; m.n_bands()];
        let mut tv = vec![0.0; m.n_bands()];
        m.transmission(&Shared::new(0.97, 150.0, 0.0), 0.3, 120.0, &mut ta, None);
        m.transmission(&Shared::new(0.55, 150.0, 0.0), 0.3, 120.0, &mut tv, None);
        assert!(tv[6] < ta[6]);
    }
}
