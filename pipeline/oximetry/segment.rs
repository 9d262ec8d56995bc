//! `multiband`: the joint fit of one vessel segment in one capture.
//!
//! Inputs: the band transmissions and the diameter at each position along
//! the segment. Unknowns: saturation `S`, hemoglobin `hb` and veil `k`,
//! shared along the segment (the blood and the eye's media are the same all
//! along it), and the double-pass fraction `F_2` at each position (it
//! changes with the vessel's depth and the fundus beneath). Residuals are
//! `ln T_model − ln T_measured` (the noise of a transmission is
//! multiplicative), with a Huber loss applied by iteratively reweighted
//! least squares so that positions spoilt by crossings or reflexes do not
//! drag the fit.
//!
//! Each damped step eliminates the per-position unknowns through the Schur
//! complement of the normal equations, so one iteration costs O(positions)
//! and the 3×3 reduced system is all that is ever factorised.
//!
//! Outputs ([`SegmentFit`]): the estimates, standard errors of the shared
//! parameters from the Jacobian at the optimum (`s²·(JᵀWJ)⁻¹` restricted to
//! the shared block, `s²` the weighted residual variance), the reduced
//! chi-square against the stated measurement noise, iterations, evaluations
//! and the termination reason.

use std::cell::RefCell;

use nalgebra::{SMatrix, SVector};

use super::model::{
    Along, D_BACKSCATTER, D_DOUBLE_PASS, D_FUNDUS, D_VEIL_SLOPE, Extensions, N_DERIV, Shared,
    VesselModel,
};
use crate::fit::{Linearization, Options, Problem, Termination, minimize};

/// Transmissions along one segment in one capture.
#[derive(Debug, Clone, PartialEq)]
pub struct SegmentSpectra {
    pub diameters_um: Vec<f64>,
    /// `[position][band]`.
    pub transmissions: Vec<Vec<f64>>,
}

/// Loss for the fit's residuals.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum RobustLoss {
    Squared,
    /// Residuals beyond `scale` times the robust residual SD are down-weighted.
    Huber {
        scale: f64,
    },
}

#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FitSettings {
    pub loss: RobustLoss,
    /// Expected relative noise of a transmission, for the reduced chi-square.
    pub noise: f64,
    pub so2_bounds: (f64, f64),
    pub hb_bounds: (f64, f64),
    pub veil_max: f64,
}

impl Default for FitSettings {
    fn default() -> Self {
        FitSettings {
            loss: RobustLoss::Huber { scale: 1.5 },
            noise: 0.01,
            so2_bounds: (-0.5, 1.5),
            hb_bounds: (20.0, 400.0),
            veil_max: 0.98,
        }
    }
}

#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct SegmentFit {
    pub so2: f64,
    pub so2_se: f64,
    pub hb_g_per_l: f64,
    pub hb_se: f64,
    pub veil: f64,
    pub veil_se: f64,
    pub double_pass: Vec<f64>,
    pub reduced_chi2: f64,
    pub iterations: usize,
    pub evaluations: usize,
    pub termination: Termination,
    pub converged: bool,
    /// Positions whose Huber weight fell below 0.5 in some band.
    pub downweighted_positions: usize,
    /// Mean residual `ln T_model − ln T_measured` over the positions, per
    /// band (≈ the model's relative error in that band).
    pub band_residuals: Vec<f64>,
    /// Largest `|t|` of a band's mean residual over blocks of positions
    /// ([`adequacy`]); NaN with too few positions.
    pub misfit_t: f64,
    pub adequacy: Adequacy,
    /// The model fitted: the base model and the extensions switched on.
    pub model: Extensions,
    /// The extensions' parameters and their standard errors, NaN where the
    /// model does not have them.
    pub veil_slope: (f64, f64),
    pub backscatter_scale: (f64, f64),
    pub fundus_slope: (f64, f64),
    /// What the information criterion needs of the residuals.
    pub residuals: ResidualSummary,
}

/// Whether the model describes a segment's spectra.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Adequacy {
    /// No band departs systematically from the model.
    Ok,
    /// Some band's residual has the same sign all along the segment: the
    /// light in this eye does not behave as the model says (a veil or
    /// backscatter that changes with wavelength, a fundus spectrum), and
    /// SO2 may be biased by several points.
    Misfit,
    /// The fit passes on its own, but the fits of all the eye's segments
    /// together depart from the model in some band ([`eye_adequacy`]):
    /// the eye's optics are not the model's, though this segment is too
    /// short or too noisy to show it alone.
    EyeMisfit,
}

impl Adequacy {
    pub fn as_str(self) -> &'static str {
        match self {
            Adequacy::Ok => "ok",
            Adequacy::Misfit => "misfit",
            Adequacy::EyeMisfit => "eye-misfit",
        }
    }

    /// Whether the model fails to describe the fit, alone or with its eye.
    pub fn is_misfit(self) -> bool {
        self != Adequacy::Ok
    }
}

/// Contiguous blocks of positions the adequacy test averages over: the
/// image stage's errors are correlated between neighbouring positions (they
/// share pixels), so positions are not independent, while blocks of a
/// segment's length mostly are.
pub const ADEQUACY_BLOCKS: usize = 8;
/// Share of adequate fits the test may call misfits (Bonferroni over bands).
pub const ADEQUACY_FALSE_ALARM: f64 = 0.01;
/// A band's mean residual below this (1.5 % of the transmission) is no
/// misfit however significant. Noise that wanders along a segment (image
/// errors shared by neighbouring profiles) leaves band means of that order
/// with no misfit at all: at 1 % independent plus 1 % AR(1) (ρ = 0.9)
/// noise over 60 positions their 95th percentile was 1.2 %, while a veil
/// 0.03 higher at 616 than at 506 nm, which moves SO2 by about 4 points,
/// left at least 1.55 % in 95 % of fits (`tests/suite/engines/oximetry.rs`).
pub const MISFIT_MIN_RESIDUAL: f64 = 0.015;

/// The adequacy test of one fit from its residuals `[position][band]`: per
/// band, the mean residual of each of [`ADEQUACY_BLOCKS`] contiguous blocks
/// of positions (fewer, at least 3, on short segments), and `t` = mean of
/// the block means over their standard error (K − 1 df). A misfit when some
/// band's `|t|` exceeds the two-sided Bonferroni quantile for
/// [`ADEQUACY_FALSE_ALARM`] over the bands and its mean residual exceeds
/// [`MISFIT_MIN_RESIDUAL`]. Returns (band means, largest |t|, status).
pub fn adequacy(res: &[Vec<f64>]) -> (Vec<f64>, f64, Adequacy) {
    let np = res.len();
    let nb = res.first().map_or(0, Vec::len);
    let means: Vec<f64> = (0..nb)
        .map(|b| res.iter().map(|r| r[b]).sum::<f64>() / np.max(1) as f64)
        .collect();
    let k = ADEQUACY_BLOCKS.min(np / 2);
    if k < 3 || nb == 0 {
        return (means, f64::NAN, Adequacy::Ok);
    }
    let blocks: Vec<Vec<f64>> = (0..k)
        .map(|i| {
            let (lo, hi) = (i * np / k, (i + 1) * np / k);
            (0..nb)
                .map(|b| res[lo..hi].iter().map(|r| r[b]).sum::<f64>() / (hi - lo) as f64)
                .collect()
        })
        .collect();
    let (worst, misfit) = band_t_test(&blocks, &means, MISFIT_MIN_RESIDUAL);
    (
        means,
        worst,
        if misfit {
            Adequacy::Misfit
        } else {
            Adequacy::Ok
        },
    )
}

/// An eye's mean residual in a band below this (0.75 % of the
/// transmission, half a single fit's [`MISFIT_MIN_RESIDUAL`]) is no misfit
/// of the eye however significant. Averaged over an eye's segments and
/// captures, the noise that wanders along a segment mostly cancels; what
/// stays is the image stage's own small systematic error, which the
/// between-segment t test alone would call significant on studies without
/// any optics effect (|t| up to 12.7 on the demo, at 0.5 %). On whole
/// simulated studies without an optics effect the largest eye mean was
/// 0.85 % (`layout: crowded`, |t| 1.6), and 0.52 % on the demo; a fundus
/// effect that moves SO2 by 7 points at veil 0.4 left 1.0–1.3 %, and a
/// veil slope 3–12 % (`tests/suite/engines/extensions.rs`).
pub const EYE_MISFIT_MIN_RESIDUAL: f64 = 0.0075;

/// The adequacy test of an eye's fits of one model together, from each
/// segment's band means `[segment][band]` (a segment's fits in several
/// captures averaged first, so that the unit is the vessel, not the
/// capture): per band, `t` = the mean over segments over its standard
/// error between segments (n − 1 df), and the eye misfits when some
/// band's `|t|` exceeds the two-sided Bonferroni quantile for
/// [`ADEQUACY_FALSE_ALARM`] and its mean exceeds
/// [`EYE_MISFIT_MIN_RESIDUAL`]. An optics effect belongs to the eye and
/// leaves the same residual in all its vessels, so the eye shows what a
/// short segment's own test lacks the power for. Needs three segments.
/// Returns (band means, largest |t|, whether the eye misfits).
pub fn eye_adequacy(segments: &[Vec<f64>]) -> (Vec<f64>, f64, bool) {
    let n = segments.len();
    let nb = segments.first().map_or(0, Vec::len);
    let means: Vec<f64> = (0..nb)
        .map(|b| segments.iter().map(|s| s[b]).sum::<f64>() / n.max(1) as f64)
        .collect();
    if n < 3 || nb == 0 {
        return (means, f64::NAN, false);
    }
    let (worst, misfit) = band_t_test(segments, &means, EYE_MISFIT_MIN_RESIDUAL);
    (means, worst, misfit)
}

/// One fit as the adequacy test of its eye sees it.
pub struct EyeFit<'a> {
    /// The segment, whose fits in several captures are averaged first.
    pub segment: &'a str,
    /// The fit's mean residual per band (fractions of the transmission),
    /// the same bands in every fit.
    pub band_residuals: &'a [f64],
    /// The fit's own adequacy.
    pub adequacy: Adequacy,
}

/// The band means of each segment among `fits`, averaged over its fits,
/// for [`eye_adequacy`]; segments in order of first appearance.
fn segment_means(fits: &[EyeFit]) -> Vec<Vec<f64>> {
    let (unit, n) = unit_indices(fits.iter().map(|f| f.segment));
    let mut sums: Vec<(Vec<f64>, usize)> = vec![(Vec::new(), 0); n];
    for (f, &u) in fits.iter().zip(&unit) {
        let (sum, count) = &mut sums[u];
        if *count == 0 {
            *sum = vec![0.0; f.band_residuals.len()];
        }
        if sum.len() == f.band_residuals.len() {
            for (a, r) in sum.iter_mut().zip(f.band_residuals) {
                *a += r;
            }
            *count += 1;
        }
    }
    sums.into_iter()
        .filter(|(_, n)| *n > 0)
        .map(|(v, n)| v.into_iter().map(|x| x / n as f64).collect())
        .filter(|v: &Vec<f64>| v.iter().all(|x| x.is_finite()))
        .collect()
}

/// Each of `names`' index among the distinct names in order of first
/// appearance, and how many distinct names there are: the segments a
/// list of an eye's fits belongs to.
fn unit_indices<'a>(names: impl IntoIterator<Item = &'a str>) -> (Vec<usize>, usize) {
    let mut order: Vec<&str> = Vec::new();
    let unit = names
        .into_iter()
        .map(|s| match order.iter().position(|o| *o == s) {
            Some(i) => i,
            None => {
                order.push(s);
                order.len() - 1
            }
        })
        .collect();
    (unit, order.len())
}

/// The mean of `v` over its standard error (n − 1 df); the SE is kept
/// from zero so that identical values give a finite `t`.
fn t_of_mean(v: &[f64]) -> f64 {
    let n = v.len() as f64;
    let m = v.iter().sum::<f64>() / n;
    let var = v.iter().map(|x| (x - m).powi(2)).sum::<f64>() / (n - 1.0);
    m / (var / n).sqrt().max(1e-12)
}

/// Whether an eye's fits of one model misfit together ([`eye_adequacy`]
/// over their segments).
pub fn eye_misfits(fits: &[EyeFit]) -> bool {
    eye_adequacy(&segment_means(fits)).2
}

/// Largest share of an eye's base-model fits that may misfit on their own
/// while `model: auto` keeps the base model for the eye (see
/// [`base_describes_eye`]); ten times the share the test calls misfits on
/// spectra the model describes (1.7 % with image-like noise).
pub const KEEP_BASE_MISFIT_SHARE: f64 = 0.1;

/// Whether the base model describes an eye, judged on its base fits: at
/// least three segments, the eye's fits together not a misfit
/// ([`eye_misfits`]), and at most [`KEEP_BASE_MISFIT_SHARE`] of them
/// misfits on their own. `model: auto` then keeps the base model
/// ([`choose_for_eye`]). Without the test first, the information
/// criterion chose an extension for one eye in two on spectra without
/// any optics effect (ten segments per eye with 1 % noise that wanders
/// along them, `tests/suite/engines/extensions.rs`), paying its wider SE
/// and, at veil 0.4, a bias of −1.3 points against the base model's −0.9.
pub fn base_describes_eye(base: &[EyeFit]) -> bool {
    let alone = base
        .iter()
        .filter(|f| f.adequacy == Adequacy::Misfit)
        .count();
    segment_means(base).len() >= 3
        && !eye_misfits(base)
        && alone as f64 <= KEEP_BASE_MISFIT_SHARE * base.len() as f64
}

/// One-sided level of the test by which an eye's segments exclude a
/// candidate model in favour of the criterion's best ([`choose_for_eye`]).
pub const MODEL_EXCLUSION_LEVEL: f64 = 0.05;

/// `model: auto`'s choice for an eye.
#[derive(Debug, Clone, PartialEq)]
pub struct EyeChoice {
    /// Per fit, the chosen candidate's index and its SO2 standard error.
    pub picks: Vec<Option<(usize, f64)>>,
    /// The models the eye's segments could not tell apart, the
    /// criterion's best (the one fitted) first; empty when the choice was
    /// clear.
    pub tied: Vec<String>,
}

/// `model: auto`'s choice for an eye whose fit `c` is of segment
/// `segments[c]`: the base model in every fit when `base_describes`
/// ([`base_describes_eye`]), each with its own SE; else the summed
/// criterion's best ([`choose_across`]), with an SE that also covers the
/// models the segments cannot tell from it.
///
/// The summed criterion counts every capture of every segment as new
/// evidence, but the image stage's errors repeat along a segment from
/// capture to capture, so a sum of thousands of residuals can settle on a
/// model that the segments, taken one by one, do not agree on: its
/// Schwarz weights then leave the other models none, and the SE none of
/// their difference. A model is set aside only when the segments favour
/// the best: their mean criterion difference (each segment's averaged
/// over its fits) over its standard error between segments exceeds
/// Student's one-sided quantile at [`MODEL_EXCLUSION_LEVEL`] (n − 1 df,
/// three segments or more). The models left are tied with the best; each
/// fit's SE is then Buckland et al.'s unconditional SE (as in
/// [`choose_across`]) with the tied models weighed alike, and the eye's
/// fits name them. On the fundus-effect study of
/// `tests/suite/stages/optics.rs`, one eye in three (a dark fundus, veil
/// 0.3) gave the veil slope and the fundus slope mean criteria over its
/// seven segments that differed by 0.75 standard errors, while the summed
/// criterion chose the veil slope by 24 units: its venules read 5.3 points
/// low with an SE of 1.3. Fitting the tied models' union instead was
/// tried: it contains the truth, but with eight bands its venules were 1.4
/// to 4.7 points low from the noise alone, worse than the criterion's
/// choice in most eyes.
pub fn choose_for_eye(
    fits: &[Vec<Candidate>],
    segments: &[&str],
    base_describes: bool,
) -> EyeChoice {
    let base = Extensions::BASE.name();
    if base_describes && fits.iter().all(|c| c.iter().any(|f| f.model == base)) {
        let picks = fits
            .iter()
            .map(|c| {
                let i = c.iter().position(|f| f.model == base)?;
                Some((i, c[i].so2_se))
            })
            .collect();
        return EyeChoice {
            picks,
            tied: Vec::new(),
        };
    }
    let criteria = fit_criteria(fits);
    let picks = choose_with(fits, &criteria);
    let clear = EyeChoice {
        picks: picks.clone(),
        tied: Vec::new(),
    };
    let Some(best) = fits
        .iter()
        .zip(&picks)
        .find_map(|(c, p)| p.map(|(i, _)| c[i].model.clone()))
    else {
        return clear;
    };
    if !fits.iter().all(|c| c.iter().any(|f| f.model == best)) {
        return clear;
    }
    let tied = tied_models(fits, &criteria, segments, &best);
    if tied.len() < 2 {
        return clear;
    }
    let picks = fits
        .iter()
        .zip(&picks)
        .map(|(c, p)| {
            let (i, own) = (*p)?;
            let s = c[i].so2;
            let se = tied
                .iter()
                .filter_map(|m| c.iter().find(|f| f.model == *m))
                .map(|f| (f.so2_se.powi(2) + (f.so2 - s).powi(2)).sqrt())
                .sum::<f64>()
                / tied.len() as f64;
            Some((i, if se.is_finite() { se } else { own }))
        })
        .collect();
    EyeChoice { picks, tied }
}

/// The models that `segments` cannot tell from `best` by their fits'
/// `criteria` (see [`choose_for_eye`]), `best` first; only `best` with
/// fewer than three segments.
fn tied_models(
    fits: &[Vec<Candidate>],
    criteria: &[Vec<f64>],
    segments: &[&str],
    best: &str,
) -> Vec<String> {
    use statrs::distribution::{ContinuousCDF, StudentsT};
    let (unit, n) = unit_indices(segments.iter().copied());
    let mut tied = vec![best.to_string()];
    if n < 3 {
        return tied;
    }
    let q = StudentsT::new(0.0, 1.0, (n - 1) as f64)
        .map(|t| t.inverse_cdf(1.0 - MODEL_EXCLUSION_LEVEL))
        .unwrap_or(f64::INFINITY);
    let Some(first) = fits.iter().find(|c| !c.is_empty()) else {
        return tied;
    };
    for m in first
        .iter()
        .map(|f| f.model.as_str())
        .filter(|m| *m != best)
    {
        // Per segment: the sum and count of the fits' criterion differences.
        let mut sums = vec![(0.0, 0usize); n];
        for ((c, cr), &u) in fits.iter().zip(criteria).zip(&unit) {
            let i = c.iter().position(|f| f.model == m);
            let j = c.iter().position(|f| f.model == best);
            if let (Some(i), Some(j)) = (i, j) {
                let d = cr[i] - cr[j];
                if d.is_finite() {
                    sums[u].0 += d;
                    sums[u].1 += 1;
                }
            }
        }
        if sums.iter().any(|(_, k)| *k == 0) {
            continue;
        }
        let means: Vec<f64> = sums.iter().map(|(d, k)| d / *k as f64).collect();
        if t_of_mean(&means) <= q {
            tied.push(m.to_string());
        }
    }
    tied
}

/// Per band of `units[unit][band]`: `t` of the units' mean over its
/// standard error between units (n − 1 df). Returns the largest `|t|` and
/// whether some band's `|t|` exceeds the two-sided Bonferroni quantile for
/// [`ADEQUACY_FALSE_ALARM`] over the bands while its `level` (the band's
/// mean residual) exceeds `floor`.
fn band_t_test(units: &[Vec<f64>], level: &[f64], floor: f64) -> (f64, bool) {
    use statrs::distribution::{ContinuousCDF, StudentsT};
    let k = units.len();
    let nb = units.first().map_or(0, Vec::len);
    let q = StudentsT::new(0.0, 1.0, (k - 1) as f64)
        .map(|t| t.inverse_cdf(1.0 - ADEQUACY_FALSE_ALARM / (2.0 * nb as f64)))
        .unwrap_or(f64::INFINITY);
    let mut worst = 0.0f64;
    let mut misfit = false;
    for b in 0..nb {
        let t = t_of_mean(&units.iter().map(|u| u[b]).collect::<Vec<_>>());
        worst = worst.max(t.abs());
        misfit |= t.abs() > q && level[b].abs() > floor;
    }
    (worst, misfit)
}

struct Joint<'a> {
    model: &'a VesselModel,
    data: &'a SegmentSpectra,
    /// `ln T_measured`, `[position · bands + band]`; NaN where the
    /// measurement is not positive (the model cannot match it).
    ln_meas: Vec<f64>,
    /// sqrt of the robust weight, `[position · bands + band]`.
    sqrt_w: Vec<f64>,
    settings: &'a FitSettings,
    /// Derivative columns of the shared unknowns, in the fit's order.
    cols: Vec<usize>,
    /// The band averages of the last evaluation and the interpolation
    /// weights, kept so that evaluations reuse them rather than build them
    /// anew.
    terms: RefCell<Along>,
}

/// Most shared unknowns of any model: S, hb, k and three extensions.
const MAX_SHARED: usize = 6;
type SharedMatrix = SMatrix<f64, MAX_SHARED, MAX_SHARED>;
type SharedVector = SVector<f64, MAX_SHARED>;

/// The normal equations `JᵀJ` and `Jᵀr` of the joint fit at one point, in
/// blocks: `A` (shared × shared), per position `b_p` (shared × its own),
/// `c_p` (its own, squared), and the gradients. The shared blocks are of
/// the largest size; past the model's own `g` unknowns A is the identity
/// and everything else zero, so that those steps are zero. The residuals
/// and Jacobian themselves are not kept: every quantity the damped loop
/// needs is one of these blocks.
pub(crate) struct JointLin {
    a: SharedMatrix,
    bs: Vec<SharedVector>,
    cs: Vec<f64>,
    gg: SharedVector,
    gl: Vec<f64>,
    g: usize,
}

/// The shared parameters of the fit vector `x` (S, hb, k, then the
/// model's extensions in [`Extensions::shared_columns`] order).
fn shared_of(cols: &[usize], x: &[f64]) -> Shared {
    let mut sh = Shared::new(x[0], x[1], x[2]);
    for (i, c) in cols.iter().enumerate().skip(3) {
        match *c {
            D_VEIL_SLOPE => sh.veil_slope = x[i],
            D_BACKSCATTER => sh.backscatter = x[i],
            _ => sh.fundus_slope = x[i],
        }
    }
    sh
}

impl<'a> Joint<'a> {
    fn new(model: &'a VesselModel, data: &'a SegmentSpectra, settings: &'a FitSettings) -> Self {
        let ln_meas = data
            .transmissions
            .iter()
            .flatten()
            .map(|t| if *t > 0.0 { t.ln() } else { f64::NAN })
            .collect::<Vec<_>>();
        Joint {
            model,
            data,
            sqrt_w: vec![1.0; ln_meas.len()],
            ln_meas,
            settings,
            cols: model.extensions.shared_columns(),
            terms: RefCell::new(Along::default()),
        }
    }

    fn n_pos(&self) -> usize {
        self.data.diameters_um.len()
    }

    fn g(&self) -> usize {
        self.cols.len()
    }

    /// Evaluates the model at `x` and hands each position's weighted
    /// residuals (and with `jac` the model's derivative rows and the
    /// weight over the model's value, `w/T`) to `visit`; a position where
    /// the model or the measurement is not positive is handed `None`.
    fn evaluate(
        &self,
        x: &[f64],
        jac: bool,
        mut visit: impl FnMut(usize, Option<(&[f64], &[[f64; N_DERIV]], &[f64])>),
    ) {
        let nb = self.model.n_bands();
        let g = self.g();
        let sh = shared_of(&self.cols, x);
        let mut along = self.terms.borrow_mut();
        self.model.terms_along(
            sh.so2,
            sh.hb_g_per_l,
            &self.data.diameters_um,
            jac,
            &mut along,
        );
        let terms = &along.terms;
        let mut r = vec![0.0; nb];
        let mut rows = vec![[0.0; N_DERIV]; nb];
        let mut scale = vec![0.0; nb];
        for p in 0..self.n_pos() {
            let mut ok = true;
            for k in 0..nb {
                let i = p * nb + k;
                let t =
                    self.model
                        .combine(k, &sh, x[g + p], &terms[i], jac.then_some(&mut rows[k]));
                if !(t > 0.0) || self.ln_meas[i].is_nan() {
                    ok = false;
                    break;
                }
                let w = self.sqrt_w[i];
                r[k] = w * (t.ln() - self.ln_meas[i]);
                scale[k] = w / t;
            }
            visit(p, ok.then_some((&r[..], &rows[..], &scale[..])));
        }
    }

    /// Unweighted residuals at `x`, `[position][band]` (zeros where the
    /// model is not finite).
    fn residuals(&mut self, x: &[f64]) -> Vec<Vec<f64>> {
        let weights = std::mem::replace(&mut self.sqrt_w, vec![1.0; self.ln_meas.len()]);
        let nb = self.model.n_bands();
        let mut out = vec![vec![0.0; nb]; self.n_pos()];
        self.evaluate(x, false, |p, e| {
            if let Some((r, _, _)) = e {
                out[p].copy_from_slice(r);
            }
        });
        self.sqrt_w = weights;
        out
    }
}

impl<'a> Problem for Joint<'a> {
    type Lin = JointLin;

    fn n_params(&self) -> usize {
        self.g() + self.n_pos()
    }

    fn cost(&self, x: &[f64]) -> Option<f64> {
        let mut c = 0.0;
        let mut ok = true;
        self.evaluate(x, false, |_, e| match e {
            // Summed as `cost_and_linearize` sums, so that the two agree to the bit.
            Some((r, _, _)) => r.iter().for_each(|v| c += v * v),
            None => ok = false,
        });
        ok.then_some(0.5 * c)
    }

    fn linearize(&self, x: &[f64]) -> JointLin {
        self.cost_and_linearize(x).1.expect("always linearised")
    }

    /// One evaluation with derivatives gives both: a rejected step wastes
    /// the derivatives, an accepted one saves a second evaluation.
    fn cost_and_linearize(&self, x: &[f64]) -> (Option<f64>, Option<JointLin>) {
        let g = self.g();
        let np = self.n_pos();
        let mut lin = JointLin {
            a: SharedMatrix::zeros(),
            bs: Vec::with_capacity(np),
            cs: Vec::with_capacity(np),
            gg: SharedVector::zeros(),
            gl: Vec::with_capacity(np),
            g,
        };
        let mut cost = 0.0;
        let mut finite = true;
        self.evaluate(x, true, |_, e| {
            let (mut b, mut c, mut gp) = (SharedVector::zeros(), 0.0, 0.0);
            // A position the model cannot evaluate contributes nothing to
            // the linearisation and makes the cost undefined.
            match e {
                Some((r, rows, scale)) => {
                    for k in 0..r.len() {
                        cost += r[k] * r[k];
                        let mut jg = SharedVector::zeros();
                        for (i, col) in self.cols.iter().enumerate() {
                            jg[i] = scale[k] * rows[k][*col];
                        }
                        let jl = scale[k] * rows[k][D_DOUBLE_PASS];
                        // Only the model's own g × g block of A.
                        for i in 0..g {
                            for j in 0..g {
                                lin.a[(i, j)] += jg[i] * jg[j];
                            }
                            lin.gg[i] += jg[i] * r[k];
                            b[i] += jl * jg[i];
                        }
                        c += jl * jl;
                        gp += jl * r[k];
                    }
                }
                None => finite = false,
            }
            lin.bs.push(b);
            lin.cs.push(c);
            lin.gl.push(gp);
        });
        for i in g..MAX_SHARED {
            lin.a[(i, i)] = 1.0;
        }
        (finite.then_some(0.5 * cost), Some(lin))
    }

    fn lower(&self) -> Vec<f64> {
        let s = self.settings;
        let mut v = vec![s.so2_bounds.0, s.hb_bounds.0, 0.0];
        v.extend(self.cols[3..].iter().map(|c| extension_bounds(*c).0));
        v.extend(std::iter::repeat_n(0.0, self.n_pos()));
        v
    }

    fn upper(&self) -> Vec<f64> {
        let s = self.settings;
        let mut v = vec![s.so2_bounds.1, s.hb_bounds.1, s.veil_max];
        v.extend(self.cols[3..].iter().map(|c| extension_bounds(*c).1));
        v.extend(std::iter::repeat_n(
            1.0 - self.model.backscatter,
            self.n_pos(),
        ));
        v
    }
}

/// Bounds of an extension's parameter: a veil change of at most 0.5 per
/// 100 nm, an albedo scale 0–1, a double-pass share that may fall to a
/// tenth or treble per 100 nm.
fn extension_bounds(col: usize) -> (f64, f64) {
    match col {
        D_VEIL_SLOPE => (-0.5, 0.5),
        D_BACKSCATTER => (0.0, 1.0),
        _ => (-0.9, 2.0),
    }
}

/// Where an extension's parameter starts: at rest, except the albedo
/// scale, which starts where the base model's 4 % backscatter lies for
/// oxygenated blood in the green.
fn extension_start(col: usize) -> f64 {
    match col {
        D_BACKSCATTER => 0.3,
        _ => 0.0,
    }
}

impl JointLin {
    /// The reduced (Schur) matrix for the shared parameters, undamped.
    fn schur(&self) -> SharedMatrix {
        let mut s = self.a;
        for (b, c) in self.bs.iter().zip(&self.cs) {
            if *c > 0.0 {
                s -= b * b.transpose() / *c;
            }
        }
        s
    }
}

impl Linearization for JointLin {
    fn jtj_diagonal(&self) -> Vec<f64> {
        let mut d: Vec<f64> = (0..self.g).map(|i| self.a[(i, i)]).collect();
        d.extend(&self.cs);
        d
    }

    fn gradient(&self) -> Vec<f64> {
        let mut g: Vec<f64> = self.gg.iter().take(self.g).copied().collect();
        g.extend(&self.gl);
        g
    }

    fn step(&self, lambda: f64, damping: &[f64]) -> Option<Vec<f64>> {
        let g = self.g;
        let mut s = self.a;
        for i in 0..g {
            s[(i, i)] += lambda * damping[i];
        }
        let mut rhs = -self.gg;
        let mut cl = Vec::with_capacity(self.cs.len());
        for p in 0..self.cs.len() {
            let c = self.cs[p] + lambda * damping[g + p];
            if !(c > 0.0) {
                return None;
            }
            cl.push(c);
            s.ger(-1.0 / c, &self.bs[p], &self.bs[p], 1.0);
            rhs.axpy(self.gl[p] / c, &self.bs[p], 1.0);
        }
        let dg = s.cholesky()?.solve(&rhs);
        let mut out: Vec<f64> = dg.iter().take(g).copied().collect();
        for p in 0..self.cs.len() {
            out.push(-(self.gl[p] + self.bs[p].dot(&dg)) / cl[p]);
        }
        out.iter().all(|v| v.is_finite()).then_some(out)
    }

    /// `−δᵀJᵀr − ½·δᵀJᵀJδ` from the blocks: `δ_gᵀAδ_g + 2Σ δ_p·b_pᵀδ_g +
    /// Σ c_p·δ_p²` is `‖Jδ‖²`.
    fn predicted_reduction(&self, delta: &[f64]) -> f64 {
        let g = self.g;
        let mut dg = SharedVector::zeros();
        for i in 0..g {
            dg[i] = delta[i];
        }
        let mut rjd = self.gg.dot(&dg);
        let mut jd2 = (self.a * dg).dot(&dg);
        for p in 0..self.cs.len() {
            let dp = delta[g + p];
            rjd += self.gl[p] * dp;
            jd2 += 2.0 * dp * self.bs[p].dot(&dg) + self.cs[p] * dp * dp;
        }
        -rjd - 0.5 * jd2
    }
}

/// Huber weights from residuals: 1 inside `c`, `c/|r|` beyond.
fn huber_weights(res: &[Vec<f64>], scale: f64, floor: f64) -> Vec<Vec<f64>> {
    let mut abs: Vec<f64> = res.iter().flatten().map(|r| r.abs()).collect();
    abs.sort_by(f64::total_cmp);
    let mad = if abs.is_empty() {
        0.0
    } else {
        abs[abs.len() / 2]
    };
    let sigma = (1.4826 * mad).max(floor);
    let c = scale * sigma;
    res.iter()
        .map(|row| {
            row.iter()
                .map(|r| if r.abs() <= c { 1.0 } else { c / r.abs() })
                .collect()
        })
        .collect()
}

/// Why a segment could not be fitted at all.
#[derive(
    Debug, Clone, Copy, PartialEq, Eq, thiserror::Error, serde::Serialize, serde::Deserialize,
)]
pub enum SegmentFitError {
    #[error("no positions, fewer than 2 bands, or transmissions that do not match the bands")]
    Shape,
    #[error("the model is not finite at any starting point")]
    NoStart,
    #[error("the fit ended at a non-finite cost")]
    NonFinite,
}

/// What the information criterion needs of a fit's residuals: their
/// count, their loss sum `Q` (the sum of squares, or under the Huber loss
/// twice the Huber loss at a cut-off fixed from the stated noise, 1.5 × it,
/// the same for every candidate model so that their criteria compare: a
/// crossing then weighs alike whichever model is fitted), the shared
/// unknowns, and the lag-1 autocorrelation of the residuals along the
/// segment (pooled over bands).
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct ResidualSummary {
    pub n: usize,
    pub loss_sum: f64,
    pub shared: usize,
    pub lag1: f64,
}

impl ResidualSummary {
    fn of(res: &[Vec<f64>], shared: usize, loss: &RobustLoss, noise: f64) -> Self {
        let n = res.iter().map(Vec::len).sum::<usize>();
        let loss_sum: f64 = res
            .iter()
            .flatten()
            .map(|r| match loss {
                RobustLoss::Squared => r * r,
                RobustLoss::Huber { scale } => {
                    let c = scale * noise;
                    if r.abs() <= c {
                        r * r
                    } else {
                        2.0 * c * r.abs() - c * c
                    }
                }
            })
            .sum();
        let nb = res.first().map_or(0, Vec::len);
        let (mut num, mut den) = (0.0, 0.0);
        for b in 0..nb {
            let m = res.iter().map(|r| r[b]).sum::<f64>() / res.len() as f64;
            for p in 0..res.len() {
                let d = res[p][b] - m;
                den += d * d;
                if p > 0 {
                    num += d * (res[p - 1][b] - m);
                }
            }
        }
        ResidualSummary {
            n,
            loss_sum,
            shared,
            lag1: if den > 0.0 { num / den } else { 0.0 },
        }
    }
}

/// Schwarz's Bayesian information criterion (Schwarz, Annals of
/// Statistics 6:461–464, 1978) over an effective number of residuals,
/// `n_e·ln(Q/n) + p·ln n_e`, `p` the shared unknowns (the per-position
/// ones are common to every candidate). Residuals of neighbouring positions
/// share image pixels and are correlated, so they carry less information
/// than their count: `n_e = n·(1 − ρ)/(1 + ρ)`, the effective sample size
/// of an AR(1) series with lag-1 correlation `ρ` (common practice, e.g.
/// for the mean of an autocorrelated series), `ρ` from the most flexible
/// candidate's residuals so that a misfit's systematic residuals do not
/// count as correlation.
pub fn information_criterion(s: &ResidualSummary, rho: f64) -> f64 {
    let rho = rho.clamp(0.0, 0.95);
    let n = s.n as f64;
    let ne = (n * (1.0 - rho) / (1.0 + rho)).max(2.0);
    ne * (s.loss_sum.max(1e-300) / n).ln() + s.shared as f64 * ne.ln()
}

/// Every candidate model fitted to one segment's spectra, those that could
/// be fitted in the candidates' order; the first candidate's error when
/// none could.
pub fn fit_candidates(
    candidates: &[VesselModel],
    data: &SegmentSpectra,
    settings: &FitSettings,
) -> Result<Vec<SegmentFit>, SegmentFitError> {
    let mut fits = Vec::new();
    let mut first_err = None;
    for m in candidates {
        match fit_segment(m, data, settings) {
            Ok(f) => fits.push(f),
            Err(e) => {
                first_err.get_or_insert(e);
            }
        }
    }
    if fits.is_empty() {
        return Err(first_err.unwrap_or(SegmentFitError::Shape));
    }
    Ok(fits)
}

/// What choosing among candidate models needs of one candidate's fit.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Candidate {
    /// The model's name ([`Extensions::name`]), which identifies it across
    /// fits.
    pub model: String,
    pub residuals: ResidualSummary,
    pub so2: f64,
    pub so2_se: f64,
}

impl Candidate {
    pub fn of(f: &SegmentFit) -> Self {
        Candidate {
            model: f.model.name(),
            residuals: f.residuals,
            so2: f.so2,
            so2_se: f.so2_se,
        }
    }
}

/// Each fit's candidates' criteria ([`information_criterion`], `ρ` from
/// the fit's most flexible candidate).
fn fit_criteria(fits: &[Vec<Candidate>]) -> Vec<Vec<f64>> {
    fits.iter()
        .map(|c| {
            let rho = c
                .iter()
                .max_by_key(|f| f.residuals.shared)
                .map_or(0.0, |f| f.residuals.lag1);
            c.iter()
                .map(|f| information_criterion(&f.residuals, rho))
                .collect()
        })
        .collect()
}

/// One model for several fits in the same eye: `fits[c]` holds fit `c`'s
/// candidates (one segment in one capture). The optics a model extension
/// describes (the media's veil, the fundus behind the vessels) belong to
/// the eye, so the model's form is chosen once for all of them, by the sum
/// over the fits of each model's Schwarz criterion
/// ([`information_criterion`], `ρ` per fit from its most flexible
/// candidate), among the models fitted in every one; each fit keeps its own
/// parameters. On the veil study of `tests/suite/stages/optics.rs`, chosen
/// fit by fit, segments switched models between epochs and some venules
/// took the fundus extension with biases that grew as SO2 fell: the
/// induced changes came out 0.89–1.09 of the truth; chosen per segment
/// over its captures, 1.04–1.13; per eye, 0.99–1.05.
///
/// Returns, per fit, the index of the chosen candidate and its SO2
/// standard error widened by the uncertainty of the choice: the
/// unconditional SE of Buckland, Burnham & Augustin (Biometrics
/// 53:603–618, 1997; cited from memory), `Σ w_m·√(se_m² + (S_m − S_chosen)²)`
/// with Schwarz weights `w_m ∝ exp(−ΔC_m/2)` of the summed criteria. A fit
/// with no candidates gets `None`. When no model was fitted in every one,
/// each fit chooses on its own.
pub fn choose_across(fits: &[Vec<Candidate>]) -> Vec<Option<(usize, f64)>> {
    choose_with(fits, &fit_criteria(fits))
}

/// [`choose_across`] with each fit's candidates' criteria given.
fn choose_with(fits: &[Vec<Candidate>], criteria: &[Vec<f64>]) -> Vec<Option<(usize, f64)>> {
    let Some(first) = fits.iter().find(|c| !c.is_empty()) else {
        return vec![None; fits.len()];
    };
    // The models fitted in every capture, with their summed criteria.
    let common: Vec<(&str, f64)> = first
        .iter()
        .filter_map(|cand| {
            let mut sum = 0.0;
            for (c, crit) in fits.iter().zip(criteria) {
                let i = c.iter().position(|f| f.model == cand.model)?;
                sum += crit[i];
            }
            Some((cand.model.as_str(), sum))
        })
        .filter(|(_, c)| c.is_finite())
        .collect();
    if common.is_empty() && fits.len() > 1 {
        return fits
            .iter()
            .map(|c| choose_across(std::slice::from_ref(c))[0])
            .collect();
    }
    let Some(&(best, c_min)) = common.iter().min_by(|a, b| a.1.total_cmp(&b.1)) else {
        return vec![None; fits.len()];
    };
    let weights: Vec<(&str, f64)> = common
        .iter()
        .map(|(m, c)| (*m, (-(c - c_min) / 2.0).exp()))
        .collect();
    let total: f64 = weights.iter().map(|(_, w)| w).sum();
    fits.iter()
        .map(|c| {
            let i = c.iter().position(|f| f.model == best)?;
            let s = c[i].so2;
            let se: f64 = weights
                .iter()
                .filter_map(|(m, w)| {
                    let f = c.iter().find(|f| f.model == *m)?;
                    Some(w / total * (f.so2_se.powi(2) + (f.so2 - s).powi(2)).sqrt())
                })
                .sum();
            Some((i, if se.is_finite() { se } else { c[i].so2_se }))
        })
        .collect()
}

/// Fits one segment. Needs at least as many bands as 3 shared unknowns
/// spread over the positions plus one per position (in practice ≥ 4 bands).
pub fn fit_segment(
    model: &VesselModel,
    data: &SegmentSpectra,
    settings: &FitSettings,
) -> Result<SegmentFit, SegmentFitError> {
    let np = data.diameters_um.len();
    let nb = model.n_bands();
    if np == 0
        || nb < 2
        || data.transmissions.len() != np
        || data.transmissions.iter().any(|t| t.len() != nb)
    {
        return Err(SegmentFitError::Shape);
    }
    let opts = Options {
        max_iterations: 300,
        ftol: 1e-10,
        xtol: 1e-10,
        gtol: 1e-8,
        tau: 1e-3,
    };
    let mut prob = Joint::new(model, data, settings);
    let g = prob.g();
    // Start from the best of a coarse grid over SO2 (cheap cost
    // evaluations), so that arteriolar and venular segments alike begin on
    // the right side of the valley.
    let start = |s0: f64| {
        let mut x0 = vec![s0, 150.0, 0.2];
        x0.extend(prob.cols[3..].iter().map(|c| extension_start(*c)));
        x0.extend(std::iter::repeat_n(0.3, np));
        x0
    };
    let x0 = [0.3, 0.45, 0.6, 0.75, 0.9, 1.0]
        .iter()
        .map(|s| start(*s))
        .filter_map(|x| prob.cost(&x).map(|c| (c, x)))
        .min_by(|a, b| a.0.total_cmp(&b.0))
        .ok_or(SegmentFitError::NoStart)?
        .1;
    let mut rep = minimize(&prob, &x0, &opts);
    if !rep.cost.is_finite() {
        return Err(SegmentFitError::NonFinite);
    }
    let (mut iterations, mut evaluations) = (rep.iterations, rep.evaluations);
    if let RobustLoss::Huber { scale } = settings.loss {
        for _ in 0..10 {
            let res = prob.residuals(&rep.x);
            let w = huber_weights(&res, scale, settings.noise * 0.1);
            let sw: Vec<f64> = w.iter().flatten().map(|v| v.sqrt()).collect();
            let change = sw
                .iter()
                .zip(&prob.sqrt_w)
                .map(|(a, b)| (a - b).abs())
                .fold(0.0, f64::max);
            prob.sqrt_w = sw;
            if change < 1e-4 {
                break;
            }
            // A warm start sits near the optimum: begin with little damping
            // so that Gauss–Newton steps are taken at once.
            let before = [rep.x[0], rep.x[1], rep.x[2]];
            rep = minimize(&prob, &rep.x, &Options { tau: 1e-9, ..opts });
            iterations += rep.iterations;
            evaluations += rep.evaluations;
            // Stop once the shared estimates no longer move (1e-6 in S and k,
            // 1e-6 relative in hb: far below any standard error).
            if (rep.x[0] - before[0]).abs() < 1e-6
                && (rep.x[1] - before[1]).abs() < 1e-6 * before[1].abs()
                && (rep.x[2] - before[2]).abs() < 1e-6
            {
                break;
            }
        }
    }
    let lin = prob.linearize(&rep.x);
    let m = (np * nb) as f64;
    let dof = m - (g + np) as f64;
    let ssr = 2.0 * rep.cost;
    let s2 = if dof > 0.0 { ssr / dof } else { f64::NAN };
    let cov = lin.schur().try_inverse().map(|c| c * s2);
    let se = |i: usize| {
        cov.as_ref()
            .map(|c| c[(i, i)].max(0.0).sqrt())
            .unwrap_or(f64::NAN)
    };
    let downweighted = prob
        .sqrt_w
        .chunks(nb)
        .filter(|row| row.iter().any(|w| w * w < 0.5))
        .count();
    let termination: Termination = rep.termination;
    let res = prob.residuals(&rep.x);
    let summary = ResidualSummary::of(&res, g, &settings.loss, settings.noise);
    let (band_residuals, misfit_t, adequacy) = adequacy(&res);
    let extension = |col: usize| {
        prob.cols
            .iter()
            .position(|c| *c == col)
            .map_or((f64::NAN, f64::NAN), |i| (rep.x[i], se(i)))
    };
    Ok(SegmentFit {
        model: model.extensions,
        veil_slope: extension(D_VEIL_SLOPE),
        backscatter_scale: extension(D_BACKSCATTER),
        fundus_slope: extension(D_FUNDUS),
        residuals: summary,
        band_residuals,
        misfit_t,
        adequacy,
        so2: rep.x[0],
        so2_se: se(0),
        hb_g_per_l: rep.x[1],
        hb_se: se(1),
        veil: rep.x[2],
        veil_se: se(2),
        double_pass: rep.x[g..].to_vec(),
        reduced_chi2: if dof > 0.0 {
            ssr / dof / (settings.noise * settings.noise)
        } else {
            f64::NAN
        },
        iterations,
        evaluations,
        termination,
        converged: termination.converged(),
        downweighted_positions: downweighted,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn cand(model: &str, loss_sum: f64, so2: f64) -> Candidate {
        Candidate {
            model: model.into(),
            residuals: ResidualSummary {
                n: 480,
                loss_sum,
                shared: if model == "base" { 3 } else { 4 },
                lag1: 0.0,
            },
            so2,
            so2_se: 0.01,
        }
    }

    #[test]
    fn one_model_is_chosen_for_all_of_an_eyes_fits() {
        // Alone, the first fit would keep the base model (its extension
        // lowers the loss too little to pay for its parameter) and the
        // second the extension; summed, the extension wins for both.
        let fits = vec![
            vec![cand("base", 0.0480, 0.90), cand("veil-slope", 0.0479, 0.92)],
            vec![cand("base", 0.0600, 0.60), cand("veil-slope", 0.0400, 0.65)],
        ];
        assert_eq!(choose_across(&fits[..1])[0].unwrap().0, 0);
        let both = choose_across(&fits);
        assert_eq!(
            both.iter().map(|c| c.unwrap().0).collect::<Vec<_>>(),
            [1, 1]
        );
        // The summed criteria leave the base model no weight, so the SE is
        // the chosen fit's own.
        assert!((both[0].unwrap().1 - 0.01).abs() < 1e-9);
        // Equal criteria: weights one half each, and the SE includes half
        // the distance to the other candidate's SO2 (Buckland et al.).
        let tie = vec![vec![
            cand("veil-slope", 0.048, 0.90),
            cand("fundus-slope", 0.048, 0.94),
        ]];
        let (i, se) = choose_across(&tie)[0].unwrap();
        assert_eq!(i, 0);
        assert!(
            (se - (0.5 * 0.01 + 0.5 * (0.01f64.powi(2) + 0.04f64.powi(2)).sqrt())).abs() < 1e-12
        );
        // A model missing from one fit cannot be chosen for the eye; with
        // none in common, each fit chooses on its own.
        let apart = vec![
            vec![cand("base", 0.048, 0.9)],
            vec![cand("veil-slope", 0.040, 0.6)],
        ];
        let own = choose_across(&apart);
        assert_eq!(own.iter().map(|c| c.unwrap().0).collect::<Vec<_>>(), [0, 0]);
        assert_eq!(
            choose_across(&[vec![], vec![cand("base", 0.048, 0.9)]])[0],
            None
        );
    }

    /// Ten segments' band means: noise of SD 0.27 % around `offset` in the
    /// last band, around zero elsewhere (a fixed pseudo-random sequence).
    fn eye(offset: f64) -> Vec<Vec<f64>> {
        let noise = [0.4, -0.7, 0.1, 0.9, -0.3, -0.5, 0.6, -0.2, 0.3, -0.6];
        (0..10)
            .map(|s| {
                (0..8)
                    .map(|b| {
                        let e = noise[(s + 3 * b) % 10] * 0.005;
                        if b == 7 { offset + e } else { e }
                    })
                    .collect()
            })
            .collect()
    }

    #[test]
    fn an_eye_misfits_when_its_segments_share_a_residual_above_the_floor() {
        // No common residual: no misfit.
        assert!(!eye_adequacy(&eye(0.0)).2);
        // 1.2 % in one band in every segment, under a single fit's 1.5 %
        // floor: the eye shows it.
        let (means, t, misfit) = eye_adequacy(&eye(0.012));
        assert!(misfit && t > 5.0, "t {t}");
        assert!((means[7] - 0.012).abs() < 0.002);
        // Significant but below the eye's floor (0.75 %): image-stage
        // error, not a misfit.
        let (_, t, misfit) = eye_adequacy(&eye(0.006));
        assert!(!misfit && t > 3.0, "t {t}");
        // Two segments cannot be judged.
        assert!(!eye_adequacy(&eye(0.05)[..2]).2);
    }

    #[test]
    fn auto_keeps_the_base_model_where_it_describes_the_eye() {
        let (ok, off) = (eye(0.0), eye(0.012));
        let names: Vec<String> = (0..10).map(|s| format!("S{}", s % 5)).collect();
        fn fits<'a>(m: &'a [Vec<f64>], names: &'a [String], a: Adequacy) -> Vec<EyeFit<'a>> {
            m.iter()
                .zip(names)
                .map(|(r, n)| EyeFit {
                    segment: n,
                    band_residuals: r,
                    adequacy: a,
                })
                .collect()
        }
        // Ten fits of five segments, two captures each.
        assert!(base_describes_eye(&fits(&ok, &names, Adequacy::Ok)));
        assert!(!base_describes_eye(&fits(&off, &names, Adequacy::Ok)));
        assert!(!base_describes_eye(&fits(&ok, &names, Adequacy::Misfit)));
        // Two segments cannot show that it does.
        assert!(!base_describes_eye(&fits(&ok[..2], &names, Adequacy::Ok)));
        // The extension would win on the criterion; kept out when the base
        // model describes the eye, with the base fit's own SE.
        let cands = vec![
            vec![cand("base", 0.0600, 0.60), cand("veil-slope", 0.0400, 0.65)],
            vec![cand("base", 0.0480, 0.90), cand("veil-slope", 0.0470, 0.92)],
        ];
        let two = ["S0", "S1"];
        let kept = choose_for_eye(&cands, &two, true);
        assert_eq!(kept.picks, vec![Some((0, 0.01)), Some((0, 0.01))]);
        assert!(kept.tied.is_empty());
        // Two segments cannot tie models: the criterion's choice.
        let chosen = choose_for_eye(&cands, &two, false);
        assert_eq!(chosen.picks, choose_across(&cands));
        assert!(chosen.tied.is_empty());
        assert_eq!(choose_across(&cands)[0].unwrap().0, 1);
    }

    /// Six segments' fits of two models whose losses differ by `gap` plus
    /// `spread` times a fixed zero-mean sequence, the veil slope's SO2
    /// 0.04 above the fundus slope's.
    fn rivals(gap: f64, spread: f64) -> Vec<Vec<Candidate>> {
        let wobble = [1.0, -1.0, 0.5, -0.5, 0.8, -0.8];
        (0..6)
            .map(|s| {
                let d = gap + spread * wobble[s];
                vec![
                    cand("veil-slope", 0.048 * (1.0 + d), 0.64),
                    cand("fundus-slope", 0.048, 0.60),
                ]
            })
            .collect()
    }

    #[test]
    fn auto_widens_the_se_by_models_its_segments_cannot_tell_apart() {
        let segments = ["A1", "A2", "A3", "V1", "V2", "V3"];
        // Every segment favours the fundus slope alike: a clear choice,
        // and the summed criteria leave the other model no weight.
        let clear = choose_for_eye(&rivals(0.01, 0.0), &segments, false);
        assert!(clear.tied.is_empty());
        let (i, se) = clear.picks[0].unwrap();
        assert!(i == 1 && (se - 0.01).abs() < 1e-6, "{i} {se}");
        // The segments disagree (the sum favours the fundus slope by
        // about 29 units, their mean by 0.6 of its standard error): tied,
        // and the SE weighs both models alike (Buckland et al.).
        let split = choose_for_eye(&rivals(0.01, 0.05), &segments, false);
        assert_eq!(split.tied, ["fundus-slope", "veil-slope"]);
        let both = 0.5 * 0.01 + 0.5 * (0.01f64.powi(2) + 0.04f64.powi(2)).sqrt();
        for p in &split.picks {
            let (i, se) = p.unwrap();
            assert_eq!(i, 1);
            assert!((se - both).abs() < 1e-12, "{se}");
        }
        // The criterion alone would have left the SE at the fit's own.
        let alone = choose_across(&rivals(0.01, 0.05));
        assert!((alone[0].unwrap().1 - 0.01).abs() < 1e-6);
        // Three fits of one segment are one segment: nothing to test.
        let one = choose_for_eye(&rivals(0.01, 0.05)[..3], &["A1"; 3], false);
        assert!(one.tied.is_empty());
    }
}
