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

/// One band prepared for evaluation: per grid point its weight and the
/// molar extinctions of HbO2 and Hb (three arrays, so that the loops over
/// grid points vectorise), and `x`, the band's mean wavelength less
/// [`SLOPE_CENTRE_NM`] in units of 100 nm.
#[derive(Debug, Clone)]
pub struct PreparedBand {
    pub w: Vec<f64>,
    pub eps_hbo2: Vec<f64>,
    pub eps_hb: Vec<f64>,
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
                    w: raw.iter().map(|r| r.0 / sum).collect(),
                    eps_hbo2: raw.iter().map(|r| r.1).collect(),
                    eps_hb: raw.iter().map(|r| r.2).collect(),
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
        let pb = &self.bands[band];
        for ((&w, &eo), &ed) in pb.w.iter().zip(&pb.eps_hbo2).zip(&pb.eps_hb) {
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
        for b in 0..self.bands.len() {
            let pt = self.terms(b, p.so2, p.hb_g_per_l, d_um, self.extensions.backscatter);
            out[b] = self.combine(b, p, f2, &pt, jac.as_deref_mut().map(|j| &mut j[b]));
        }
    }

    /// One band's observed transmission from its band averages, and when
    /// asked its derivative row.
    pub(crate) fn combine(
        &self,
        band: usize,
        p: &Shared,
        f2: f64,
        pt: &PathTerms,
        jac: Option<&mut [f64; N_DERIV]>,
    ) -> f64 {
        let ext = self.extensions;
        let x = self.bands[band].x;
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
        let g = if ext.fundus {
            1.0 + p.fundus_slope * x
        } else {
            1.0
        };
        let f2b = f2 * g;
        let t = bs + e1.v + f2b * (e2.v - e1.v);
        let k = if ext.veil_slope {
            p.veil + p.veil_slope * x
        } else {
            p.veil
        };
        if let Some(j) = jac {
            let s = 1.0 - k;
            *j = [
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
        (1.0 - k) * t + k
    }

    /// The band averages of every band at each of `d_um`, for one S and
    /// hb: what [`terms`](Self::terms) gives at each diameter (to within
    /// [`ALONG_TOLERANCE`]), in `along.terms[position · n_bands + band]`,
    /// with the derivatives only when asked. The segment fit's inner loop:
    ///
    /// - what does not depend on the diameter (absorption, its
    ///   derivatives, the albedo) is computed once per grid point rather
    ///   than once per position;
    /// - the grid is summed four points at a time, with [`exp_fast`];
    /// - on a segment with many positions, the grid sums are taken at a few
    ///   Chebyshev nodes spanning the segment's diameters and interpolated
    ///   to each position (barycentric formula, Berrut & Trefethen, SIAM
    ///   Review 46:501–517, 2004): each sum is a sum of exponentials in
    ///   the diameter, entire, and its interpolant converges faster than
    ///   geometrically. The number of nodes comes from the error bound of
    ///   Chebyshev interpolation of `e^(−z·u)` on `[−1, 1]`: at most twice
    ///   the sum of the dropped coefficients `2·I_k(z)` (Trefethen,
    ///   Approximation Theory and Approximation Practice, 2013, ch. 4 and
    ///   8, cited from memory), with `I_k(z) ≤ (z/2)^k·e^(z²/4)/k!` from
    ///   its series, so `4·(z/2)^K·e^(z²/4)/K!` relative to the smallest
    ///   value `e^(−z)`, held below [`ALONG_TOLERANCE`], with `z`
    ///   the largest absorption times the diameters' half-range, doubled
    ///   for `t²`; when that needs more nodes than half the positions, or
    ///   the sums fall so steeply across the diameters that rounding would
    ///   exceed the tolerance, every position is summed directly.
    pub fn terms_along(
        &self,
        so2: f64,
        hb_g_per_l: f64,
        d_um: &[f64],
        derivatives: bool,
        along: &mut Along,
    ) {
        let nb = self.bands.len();
        let np = d_um.len();
        let albedo = self.extensions.backscatter;
        let c = hb_g_per_l / HB_MOLAR_MASS_G_PER_MOL;
        let grids: Vec<GridCoefficients> = self
            .bands
            .iter()
            .map(|band| GridCoefficients::new(band, so2, c, albedo))
            .collect();
        let mu_max = grids
            .iter()
            .flat_map(|g| g.mu.iter())
            .fold(0.0f64, |m, v| m.max(v.abs()));
        let full = derivatives || albedo;
        let sums_at = |g: &GridCoefficients, d_cm: f64| -> [f64; 11] {
            if full {
                g.sums(d_cm)
            } else {
                let [a, b] = g.sums_value(d_cm);
                let mut o = [0.0; 11];
                o[0] = a;
                o[3] = b;
                o
            }
        };
        let plan = plan_for(&mut along.plan, d_um, mu_max);
        let out = &mut along.terms;
        // Every field asked for is written below; the others keep what a
        // previous call left (clearing 100 kB per evaluation shows).
        if out.len() != np * nb {
            out.clear();
            out.resize(np * nb, PathTerms::default());
        }
        // The sums wanted: value only, with derivatives, with the albedo.
        let m = if albedo {
            11
        } else if full {
            6
        } else {
            4
        };
        // One position's sums of one band (the first `m` of
        // [`GridCoefficients::sums`]) into its averages.
        let store = |o: &mut PathTerms, a: &[f64], d_um: f64, g: &GridCoefficients| {
            let d_cm = d_um * 1e-4;
            if !full {
                o.t1.v = a[0];
                o.t2.v = a[3];
                return;
            }
            o.t1 = PathTerm {
                v: a[0],
                ds: -d_cm * a[1],
                dh: -d_cm * a[2],
            };
            o.t2 = PathTerm {
                v: a[3],
                ds: -2.0 * d_cm * a[4],
                dh: -2.0 * d_cm * a[5],
            };
            if albedo {
                o.a0 = g.a0;
                o.a1 = PathTerm {
                    v: a[6],
                    ds: a[7] - d_cm * a[9],
                    dh: a[8] - d_cm * a[10],
                };
            }
        };
        match plan {
            Some(plan) => plan.interpolate(
                &grids,
                m,
                |g, d| sums_at(g, d * 1e-4),
                |p, b, a| store(&mut out[p * nb + b], a, d_um[p], &grids[b]),
            ),
            None => {
                for (p, d) in d_um.iter().enumerate() {
                    for (b, g) in grids.iter().enumerate() {
                        store(&mut out[p * nb + b], &sums_at(g, d * 1e-4), *d, g);
                    }
                }
            }
        }
    }
}

/// Relative error [`VesselModel::terms_along`] allows its interpolated
/// band sums (far below any measurement's: transmissions are known to
/// about 1e-2).
pub const ALONG_TOLERANCE: f64 = 1e-12;

/// Fewest positions for which interpolation between diameters is tried.
const ALONG_MIN_POSITIONS: usize = 16;

/// The band averages [`VesselModel::terms_along`] computes and what it
/// keeps between calls on the same positions (the interpolation weights).
#[derive(Debug, Default)]
pub struct Along {
    pub terms: Vec<PathTerms>,
    plan: Option<Interpolation>,
}

/// Chebyshev nodes spanning a segment's diameters and each position's
/// barycentric weights on them.
#[derive(Debug)]
struct Interpolation {
    d_um: Vec<f64>,
    nodes_um: Vec<f64>,
    /// `[position · nodes + node]`, each row summing to one.
    weights: Vec<f64>,
}

/// The interpolation for these diameters at this largest absorption
/// (1/cm), kept in `cache` while the diameters and node count stay; `None`
/// where summing every position directly is cheaper.
fn plan_for<'a>(
    cache: &'a mut Option<Interpolation>,
    d_um: &[f64],
    mu_max: f64,
) -> Option<&'a Interpolation> {
    let np = d_um.len();
    if np < ALONG_MIN_POSITIONS {
        return None;
    }
    let (lo, hi) = d_um
        .iter()
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), d| {
            (a.min(*d), b.max(*d))
        });
    if !(lo.is_finite() && hi.is_finite()) {
        return None;
    }
    // t² has twice the absorption.
    let z = 2.0 * mu_max * (hi - lo) / 2.0 * 1e-4;
    // Rounding: the interpolant adds values up to e^(2z) times the
    // smallest with weights of either sign (Lebesgue constant below 4
    // for these nodes), so a sum that falls steeply across the
    // diameters is summed directly.
    if 4.0 * f64::EPSILON * (2.0 * z).exp() > ALONG_TOLERANCE {
        return None;
    }
    let limit = np / 2;
    let mut term = 4.0 * (z + z * z / 4.0).exp();
    let mut nodes = None;
    for k in 1..=limit {
        term *= z / 2.0 / k as f64;
        if k >= 2 && term <= ALONG_TOLERANCE {
            nodes = Some(k);
            break;
        }
    }
    let k = nodes?;
    let fits = |p: &Interpolation| p.nodes_um.len() == k && p.d_um == d_um;
    if !cache.as_ref().is_some_and(fits) {
        *cache = Some(Interpolation::new(d_um, lo, hi, k));
    }
    cache.as_ref()
}

impl Interpolation {
    /// `k` Chebyshev points of the second kind on `[lo, hi]` and the
    /// barycentric weights `(−1)^j`, halved at the ends.
    fn new(d_um: &[f64], lo: f64, hi: f64, k: usize) -> Self {
        let (mid, half) = ((hi + lo) / 2.0, (hi - lo) / 2.0);
        let nodes_um: Vec<f64> = (0..k)
            .map(|j| mid + half * (std::f64::consts::PI * j as f64 / (k - 1) as f64).cos())
            .collect();
        let bary: Vec<f64> = (0..k)
            .map(|j| {
                let s = if j % 2 == 0 { 1.0 } else { -1.0 };
                if j == 0 || j == k - 1 { s / 2.0 } else { s }
            })
            .collect();
        let mut weights = vec![0.0; d_um.len() * k];
        for (p, d) in d_um.iter().enumerate() {
            let row = &mut weights[p * k..(p + 1) * k];
            // Exactly on a node the formula would divide by zero.
            #[allow(clippy::float_cmp)]
            match nodes_um.iter().position(|n| n == d) {
                // On a node the interpolant is that node's value.
                Some(j) => row[j] = 1.0,
                None => {
                    for j in 0..k {
                        row[j] = bary[j] / (d - nodes_um[j]);
                    }
                    let sum: f64 = row.iter().sum();
                    row.iter_mut().for_each(|w| *w /= sum);
                }
            }
        }
        Interpolation {
            d_um: d_um.to_vec(),
            nodes_um,
            weights,
        }
    }

    /// The first `m` sums of every band, `sums_at(band, node)` at the
    /// nodes, interpolated to every position and handed to
    /// `visit(position, band, sums)`.
    fn interpolate(
        &self,
        grids: &[GridCoefficients],
        m: usize,
        sums_at: impl Fn(&GridCoefficients, f64) -> [f64; 11],
        mut visit: impl FnMut(usize, usize, &[f64]),
    ) {
        let k = self.nodes_um.len();
        // Node by node, all bands' sums in one contiguous row, so that the
        // weighted accumulation below runs over a long unit-stride row.
        let width = grids.len() * m;
        let mut at_nodes = vec![0.0; k * width];
        for (j, d) in self.nodes_um.iter().enumerate() {
            for (b, g) in grids.iter().enumerate() {
                let s = sums_at(g, *d);
                at_nodes[j * width + b * m..j * width + (b + 1) * m].copy_from_slice(&s[..m]);
            }
        }
        let mut row = vec![0.0; width];
        for (p, weights) in self.weights.chunks_exact(k).enumerate() {
            weighted_rows(weights, &at_nodes, &mut row);
            for (b, sums) in row.chunks_exact(m).enumerate() {
                visit(p, b, sums);
            }
        }
    }
}

/// `row = Σ_j weights[j] · rows[j]` over the rows of `rows` (each as long
/// as `row`), element by element in the order of `j`.
fn weighted_rows(weights: &[f64], rows: &[f64], row: &mut [f64]) {
    #[cfg(target_arch = "x86_64")]
    if std::arch::is_x86_feature_detected!("avx2") {
        // SAFETY: the CPU has just been found to have AVX2.
        return unsafe { weighted_rows_avx2(weights, rows, row) };
    }
    weighted_rows_portable(weights, rows, row);
}

// Element-wise, so wider registers change no bits.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
fn weighted_rows_avx2(weights: &[f64], rows: &[f64], row: &mut [f64]) {
    weighted_rows_portable(weights, rows, row);
}

#[inline(always)]
fn weighted_rows_portable(weights: &[f64], rows: &[f64], row: &mut [f64]) {
    row.iter_mut().for_each(|v| *v = 0.0);
    for (w, node) in weights.iter().zip(rows.chunks_exact(row.len())) {
        for (r, f) in row.iter_mut().zip(node) {
            *r += w * f;
        }
    }
}

/// Grid points summed side by side in [`VesselModel::terms_along`].
pub const LANES: usize = 4;

/// Per grid point of one band, at one S and hb, the factors that do not
/// depend on the diameter, padded to a multiple of [`LANES`] with zero
/// weights: absorption `μ` (1/cm) and the coefficient of each sum.
struct GridCoefficients {
    mu: Vec<f64>,
    /// `w`, `w·∂μ/∂S`, `w·∂μ/∂hb`, then for the albedo `w·a`,
    /// `w·∂a/∂S`, `w·∂a/∂hb`, `w·a·∂μ/∂S`, `w·a·∂μ/∂hb`.
    coef: [Vec<f64>; 8],
    /// The albedo's band average `⟨a⟩`, which no diameter changes.
    a0: PathTerm,
    albedo: bool,
}

impl GridCoefficients {
    fn new(band: &PreparedBand, so2: f64, c: f64, albedo: bool) -> Self {
        let ln10 = std::f64::consts::LN_10;
        let n = band.w.len().div_ceil(LANES) * LANES;
        let mut mu = vec![0.0; n];
        let mut coef: [Vec<f64>; 8] = std::array::from_fn(|_| vec![0.0; n]);
        let mut a0 = PathTerm::default();
        for i in 0..band.w.len() {
            let (w, eo, ed) = (band.w[i], band.eps_hbo2[i], band.eps_hb[i]);
            let eps = so2 * eo + (1.0 - so2) * ed;
            mu[i] = ln10 * c * eps;
            let dmu_ds = ln10 * c * (eo - ed);
            let dmu_dh = ln10 * eps / HB_MOLAR_MASS_G_PER_MOL;
            coef[0][i] = w;
            coef[1][i] = w * dmu_ds;
            coef[2][i] = w * dmu_dh;
            if albedo {
                let s = BLOOD_SCATTER_PER_CM;
                let a = s / (s + mu[i]);
                let da = -a / (s + mu[i]);
                coef[3][i] = w * a;
                coef[4][i] = w * da * dmu_ds;
                coef[5][i] = w * da * dmu_dh;
                coef[6][i] = w * a * dmu_ds;
                coef[7][i] = w * a * dmu_dh;
                a0.v += w * a;
                a0.ds += w * da * dmu_ds;
                a0.dh += w * da * dmu_dh;
            }
        }
        GridCoefficients {
            mu,
            coef,
            a0,
            albedo,
        }
    }

    /// `Σ w·t` and `Σ w·t²` at path `d_cm`, `t = e^(−μ·d)`.
    fn sums_value(&self, d_cm: f64) -> [f64; 2] {
        #[cfg(target_arch = "x86_64")]
        if std::arch::is_x86_feature_detected!("avx2") {
            // SAFETY: the CPU has just been found to have AVX2.
            return unsafe { self.sums_value_avx2(d_cm) };
        }
        self.sums_value_portable(d_cm)
    }

    /// Every sum at path `d_cm` (see [`Self::sums_portable`]).
    fn sums(&self, d_cm: f64) -> [f64; 11] {
        #[cfg(target_arch = "x86_64")]
        if std::arch::is_x86_feature_detected!("avx2") {
            // SAFETY: the CPU has just been found to have AVX2.
            return unsafe { self.sums_avx2(d_cm) };
        }
        self.sums_portable(d_cm)
    }

    // The same arithmetic four grid points at a time in 256-bit
    // registers: every lane does the operations of the portable code in
    // its order (Rust never fuses a multiply and an add unless asked), so
    // both give the same bits and results do not depend on the machine.
    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx2")]
    fn sums_value_avx2(&self, d_cm: f64) -> [f64; 2] {
        use std::arch::x86_64::*;
        let (mut s1, mut s2) = (_mm256_setzero_pd(), _mm256_setzero_pd());
        let nd = _mm256_set1_pd(-d_cm);
        for (mu, w) in self
            .mu
            .chunks_exact(LANES)
            .zip(self.coef[0].chunks_exact(LANES))
        {
            // SAFETY: each chunk holds exactly four f64.
            let (mu, w) = unsafe { (_mm256_loadu_pd(mu.as_ptr()), _mm256_loadu_pd(w.as_ptr())) };
            let t = exp_fast_avx2(_mm256_mul_pd(mu, nd));
            s1 = _mm256_add_pd(s1, _mm256_mul_pd(w, t));
            s2 = _mm256_add_pd(s2, _mm256_mul_pd(w, _mm256_mul_pd(t, t)));
        }
        [lane_sum(s1), lane_sum(s2)]
    }

    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx2")]
    fn sums_avx2(&self, d_cm: f64) -> [f64; 11] {
        use std::arch::x86_64::*;
        let mut acc = [_mm256_setzero_pd(); 11];
        let nd = _mm256_set1_pd(-d_cm);
        let load = |v: &[f64], i: usize| {
            // SAFETY: every array is padded to a multiple of four and
            // `i + 4 <= len`.
            unsafe { _mm256_loadu_pd(v[i..i + LANES].as_ptr()) }
        };
        let mut i = 0;
        while i < self.mu.len() {
            let t = exp_fast_avx2(_mm256_mul_pd(load(&self.mu, i), nd));
            let t2 = _mm256_mul_pd(t, t);
            for j in 0..3 {
                let c = load(&self.coef[j], i);
                acc[j] = _mm256_add_pd(acc[j], _mm256_mul_pd(c, t));
                acc[3 + j] = _mm256_add_pd(acc[3 + j], _mm256_mul_pd(c, t2));
            }
            if self.albedo {
                for (j, c) in [3, 4, 5, 6, 7].into_iter().enumerate() {
                    acc[6 + j] =
                        _mm256_add_pd(acc[6 + j], _mm256_mul_pd(load(&self.coef[c], i), t));
                }
            }
            i += LANES;
        }
        acc.map(|v| lane_sum(v))
    }

    #[inline(always)]
    fn sums_value_portable(&self, d_cm: f64) -> [f64; 2] {
        let (mut s1, mut s2) = ([0.0; LANES], [0.0; LANES]);
        for (mu, w) in self
            .mu
            .chunks_exact(LANES)
            .zip(self.coef[0].chunks_exact(LANES))
        {
            for l in 0..LANES {
                let t = exp_fast(mu[l] * -d_cm);
                s1[l] += w[l] * t;
                s2[l] += w[l] * (t * t);
            }
        }
        [
            ((s1[0] + s1[1]) + s1[2]) + s1[3],
            ((s2[0] + s2[1]) + s2[2]) + s2[3],
        ]
    }

    /// Every sum at path `d_cm`: `Σ w·t`, `Σ w·∂μ/∂S·t`, `Σ w·∂μ/∂hb·t`,
    /// the same three with `t²`, then the albedo's `Σ w·a·t`,
    /// `Σ w·∂a/∂S·t`, `Σ w·∂a/∂hb·t`, `Σ w·a·∂μ/∂S·t`, `Σ w·a·∂μ/∂hb·t`
    /// (zero without the albedo).
    #[inline(always)]
    fn sums_portable(&self, d_cm: f64) -> [f64; 11] {
        let mut acc = [[0.0; LANES]; 11];
        let n = self.mu.len();
        let mut i = 0;
        while i < n {
            let mut t = [0.0; LANES];
            for l in 0..LANES {
                t[l] = exp_fast(self.mu[i + l] * -d_cm);
            }
            for l in 0..LANES {
                let t2 = t[l] * t[l];
                acc[0][l] += self.coef[0][i + l] * t[l];
                acc[1][l] += self.coef[1][i + l] * t[l];
                acc[2][l] += self.coef[2][i + l] * t[l];
                acc[3][l] += self.coef[0][i + l] * t2;
                acc[4][l] += self.coef[1][i + l] * t2;
                acc[5][l] += self.coef[2][i + l] * t2;
            }
            if self.albedo {
                for l in 0..LANES {
                    for (j, c) in [3, 4, 5, 6, 7].into_iter().enumerate() {
                        acc[6 + j][l] += self.coef[c][i + l] * t[l];
                    }
                }
            }
            i += LANES;
        }
        acc.map(|a| ((a[0] + a[1]) + a[2]) + a[3])
    }
}

/// The four lanes' sum, in the portable code's order.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
fn lane_sum(v: std::arch::x86_64::__m256d) -> f64 {
    let mut a = [0.0; LANES];
    // SAFETY: `a` holds four f64.
    unsafe { std::arch::x86_64::_mm256_storeu_pd(a.as_mut_ptr(), v) };
    ((a[0] + a[1]) + a[2]) + a[3]
}

/// [`exp_fast`] on four lanes, operation for operation.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
fn exp_fast_avx2(x: std::arch::x86_64::__m256d) -> std::arch::x86_64::__m256d {
    use std::arch::x86_64::*;
    let x = _mm256_min_pd(
        _mm256_max_pd(x, _mm256_set1_pd(-708.0)),
        _mm256_set1_pd(708.0),
    );
    let t = _mm256_add_pd(
        _mm256_mul_pd(x, _mm256_set1_pd(EXP_LOG2E)),
        _mm256_set1_pd(EXP_SHIFTER),
    );
    let n = _mm256_sub_pd(t, _mm256_set1_pd(EXP_SHIFTER));
    let r = _mm256_sub_pd(
        _mm256_sub_pd(x, _mm256_mul_pd(n, _mm256_set1_pd(EXP_LN2_HI))),
        _mm256_mul_pd(n, _mm256_set1_pd(EXP_LN2_LO)),
    );
    let mut p = _mm256_set1_pd(EXP_TAYLOR[0]);
    for c in &EXP_TAYLOR[1..] {
        p = _mm256_add_pd(_mm256_mul_pd(p, r), _mm256_set1_pd(*c));
    }
    let ni = _mm256_sub_epi64(
        _mm256_castpd_si256(t),
        _mm256_set1_epi64x(EXP_SHIFTER.to_bits() as i64),
    );
    let scale = _mm256_slli_epi64::<52>(_mm256_add_epi64(ni, _mm256_set1_epi64x(1023)));
    _mm256_mul_pd(_mm256_castsi256_pd(scale), p)
}

const EXP_LOG2E: f64 = std::f64::consts::LOG2_E;
/// ln 2 in two parts (fdlibm's): the high part has trailing zero bits, so
/// `n·EXP_LN2_HI` is exact for the `n` that occur.
const EXP_LN2_HI: f64 = f64::from_bits(0x3fe6_2e42_fee0_0000);
const EXP_LN2_LO: f64 = f64::from_bits(0x3dea_39ef_3579_3c76);
/// Adding 1.5·2^52 rounds to an integer, which then sits in the low bits
/// of the mantissa.
const EXP_SHIFTER: f64 = 6_755_399_441_055_744.0;
/// 1/k! for k = 12 down to 0, in Horner's order.
const EXP_TAYLOR: [f64; 13] = [
    1.0 / 479_001_600.0,
    1.0 / 39_916_800.0,
    1.0 / 3_628_800.0,
    1.0 / 362_880.0,
    1.0 / 40_320.0,
    1.0 / 5_040.0,
    1.0 / 720.0,
    1.0 / 120.0,
    1.0 / 24.0,
    1.0 / 6.0,
    0.5,
    1.0,
    1.0,
];

/// `e^x` for `|x| ≤ 708`, to within 3 units in the last place, written
/// without branches or calls so that loops over it vectorise: `x` is split
/// as `n·ln 2 + r` with `|r| ≤ ln 2 / 2` (Cody & Waite's two-part ln 2),
/// `e^r` comes from its Taylor series to degree 12 (truncation below 2e-16
/// there), and `2^n` is put together in the exponent bits. Outside ±708
/// the argument is held there: below, `e^−708` (≈ 3e-308) is zero to any
/// band average; above, a transmission of 1e307 is no answer either way.
/// Absorption is negative, and the exponent positive, only at saturations
/// outside 0–1, which the fit's bounds allow.
#[inline(always)]
pub fn exp_fast(x: f64) -> f64 {
    let x = x.clamp(-708.0, 708.0);
    let t = x * EXP_LOG2E + EXP_SHIFTER;
    let n = t - EXP_SHIFTER;
    let r = (x - n * EXP_LN2_HI) - n * EXP_LN2_LO;
    let mut p = EXP_TAYLOR[0];
    for c in &EXP_TAYLOR[1..] {
        p = p * r + c;
    }
    // n's integer value, two's complement in the low bits of t.
    let ni = t.to_bits().wrapping_sub(EXP_SHIFTER.to_bits());
    f64::from_bits(ni.wrapping_add(1023) << 52) * p
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
    fn the_fast_exponential_matches_the_standard_one() {
        // Every 1e-4 over the range, and the ends.
        let mut worst = 0.0f64;
        for i in -7_080_000..=7_080_000 {
            let x = i as f64 * 1e-4;
            let (a, b) = (exp_fast(x), x.exp());
            worst = worst.max((a - b).abs() / b);
        }
        assert!(worst < 6.7e-16, "largest relative error {worst:e}");
        assert_eq!(exp_fast(0.0).to_bits(), 1.0f64.to_bits());
        assert!(exp_fast(-800.0) < 1e-307 && exp_fast(-800.0) >= 0.0);
        assert!(exp_fast(800.0).is_finite());
    }

    #[test]
    fn interpolated_band_sums_match_direct_ones_along_long_segments() {
        // 200 positions whose diameters wander over narrow and wide
        // ranges, at saturations and hemoglobin across the fit's bounds:
        // the interpolated averages against the direct ones.
        for albedo in [false, true] {
            let m = model().with_extensions(if albedo {
                Extensions::all()[7]
            } else {
                Extensions::BASE
            });
            for (lo, hi) in [(100.0, 140.0), (40.0, 200.0), (150.0, 150.5), (8.0, 260.0)] {
                let ds: Vec<f64> = (0..200)
                    .map(|i| lo + (hi - lo) * (0.5 + 0.5 * (0.37 * i as f64).sin()))
                    .collect();
                for (so2, hb) in [(0.97, 150.0), (0.4, 380.0), (-0.5, 20.0), (1.5, 400.0)] {
                    let mut along = Along::default();
                    m.terms_along(so2, hb, &ds, true, &mut along);
                    for (p, d) in ds.iter().enumerate() {
                        for b in 0..m.n_bands() {
                            let one = m.terms(b, so2, hb, *d, albedo);
                            let got = along.terms[p * m.n_bands() + b];
                            for (a, e, scale) in [
                                (got.t1.v, one.t1.v, one.t1.v),
                                (got.t2.v, one.t2.v, one.t2.v),
                                (got.t1.ds, one.t1.ds, one.t1.v),
                                (got.t1.dh, one.t1.dh, one.t1.v),
                                (got.t2.ds, one.t2.ds, one.t2.v),
                                (got.a1.v, one.a1.v, one.a1.v),
                            ] {
                                // Derivative sums cancel across a band; they
                                // are held to the value's scale times the
                                // absorption's, d·∂μ/∂S being of order 1–10.
                                assert!(
                                    (a - e).abs()
                                        <= 1e-11 * (e.abs() + 10.0 * scale.abs()) + 1e-300,
                                    "{lo}–{hi} µm, S {so2}, hb {hb}, band {b}: {a} vs {e}"
                                );
                            }
                        }
                    }
                }
            }
        }
    }

    #[test]
    fn the_vector_and_portable_sums_give_the_same_bits() {
        let m = model();
        for (so2, hb, d) in [(0.97, 150.0, 120.0), (0.3, 380.0, 30.0), (1.5, 20.0, 240.0)] {
            for albedo in [false, true] {
                let k =
                    GridCoefficients::new(&m.bands[2], so2, hb / HB_MOLAR_MASS_G_PER_MOL, albedo);
                let (a, b) = (k.sums(d * 1e-4), k.sums_portable(d * 1e-4));
                assert!(
                    a.iter().zip(&b).all(|(x, y)| x.to_bits() == y.to_bits()),
                    "{a:?} {b:?}"
                );
                let (a, b) = (k.sums_value(d * 1e-4), k.sums_value_portable(d * 1e-4));
                assert!(
                    a.iter().zip(&b).all(|(x, y)| x.to_bits() == y.to_bits()),
                    "{a:?} {b:?}"
                );
            }
        }
    }

    proptest! {
        // The batched band averages are the per-position ones, for the base
        // model and with the albedo terms.
        #[test]
        fn terms_along_equal_terms_at_each_diameter(
            so2 in -0.3f64..1.3, hb in 30.0f64..350.0, d0 in 5.0f64..250.0, albedo: bool,
        ) {
            let m = model().with_extensions(if albedo { Extensions::all()[7] } else { Extensions::BASE });
            let ds: Vec<f64> = (0..7).map(|i| d0 * (1.0 + 0.1 * i as f64)).collect();
            let mut along = Along::default();
            for derivatives in [false, true] {
                m.terms_along(so2, hb, &ds, derivatives, &mut along);
                let along = &along.terms;
                for (p, d) in ds.iter().enumerate() {
                    let pairs_of = |b: usize| {
                        let one = m.terms(b, so2, hb, *d, albedo);
                        let got = along[p * m.n_bands() + b];
                        let mut pairs = vec![(got.t1.v, one.t1.v), (got.t2.v, one.t2.v)];
                        if derivatives || albedo {
                            pairs.extend([(got.t1.ds, one.t1.ds), (got.t1.dh, one.t1.dh), (got.t2.ds, one.t2.ds), (got.t2.dh, one.t2.dh)]);
                        }
                        if albedo {
                            pairs.extend([(got.a0.v, one.a0.v), (got.a0.ds, one.a0.ds), (got.a0.dh, one.a0.dh), (got.a1.v, one.a1.v), (got.a1.ds, one.a1.ds), (got.a1.dh, one.a1.dh)]);
                        }
                        pairs
                    };
                    let bands: Vec<Vec<(f64, f64)>> = (0..m.n_bands()).map(pairs_of).collect();
                    for (b, pairs) in bands.iter().enumerate() {
                        for (i, (a, e)) in pairs.iter().enumerate() {
                            // Derivative sums cancel across a band (∂μ/∂S changes sign at
                            // isosbestic points), so each term is compared at 1e-11
                            // relative to its largest size over the bands, the scale
                            // its rounding has before that cancellation.
                            let scale = bands.iter().map(|q| q[i].1.abs()).fold(0.0, f64::max);
                            prop_assert!((a - e).abs() <= 1e-11 * scale + 1e-300, "term {i} band {b}: {a} vs {e}");
                        }
                    }
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
