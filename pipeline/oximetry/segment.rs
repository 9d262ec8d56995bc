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

use nalgebra::{Matrix3, Vector3};

use super::model::{N_DERIV, Shared, VesselModel};
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
}

impl Adequacy {
    pub fn as_str(self) -> &'static str {
        match self {
            Adequacy::Ok => "ok",
            Adequacy::Misfit => "misfit",
        }
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
    use statrs::distribution::{ContinuousCDF, StudentsT};
    let np = res.len();
    let nb = res.first().map_or(0, Vec::len);
    let means: Vec<f64> = (0..nb)
        .map(|b| res.iter().map(|r| r[b]).sum::<f64>() / np.max(1) as f64)
        .collect();
    let k = ADEQUACY_BLOCKS.min(np / 2);
    if k < 3 || nb == 0 {
        return (means, f64::NAN, Adequacy::Ok);
    }
    let mut worst = 0.0f64;
    let mut misfit = false;
    let q = StudentsT::new(0.0, 1.0, (k - 1) as f64)
        .map(|t| t.inverse_cdf(1.0 - ADEQUACY_FALSE_ALARM / (2.0 * nb as f64)))
        .unwrap_or(f64::INFINITY);
    for b in 0..nb {
        let blocks: Vec<f64> = (0..k)
            .map(|i| {
                let (lo, hi) = (i * np / k, (i + 1) * np / k);
                res[lo..hi].iter().map(|r| r[b]).sum::<f64>() / (hi - lo) as f64
            })
            .collect();
        let m = blocks.iter().sum::<f64>() / k as f64;
        let var = blocks.iter().map(|x| (x - m).powi(2)).sum::<f64>() / (k - 1) as f64;
        let t = m / (var / k as f64).sqrt().max(1e-12);
        worst = worst.max(t.abs());
        misfit |= t.abs() > q && means[b].abs() > MISFIT_MIN_RESIDUAL;
    }
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

struct Joint<'a> {
    model: &'a VesselModel,
    data: &'a SegmentSpectra,
    /// sqrt of the robust weight per (position, band).
    sqrt_w: Vec<Vec<f64>>,
    settings: &'a FitSettings,
}

/// Per position: residuals, Jacobian columns for the shared parameters and the local one.
struct Block {
    r: Vec<f64>,
    jg: Vec<[f64; 3]>,
    jl: Vec<f64>,
}

pub(crate) struct JointLin {
    blocks: Vec<Block>,
}

impl<'a> Joint<'a> {
    fn n_pos(&self) -> usize {
        self.data.diameters_um.len()
    }

    fn block(&self, x: &[f64], p: usize, with_jac: bool) -> Option<Block> {
        let nb = self.model.n_bands();
        let sh = Shared {
            so2: x[0],
            hb_g_per_l: x[1],
            veil: x[2],
        };
        let mut t = vec![0.0; nb];
        let mut j = vec![[0.0; N_DERIV]; nb];
        self.model.transmission(
            &sh,
            x[3 + p],
            self.data.diameters_um[p],
            &mut t,
            with_jac.then_some(&mut j[..]),
        );
        let mut b = Block {
            r: Vec::with_capacity(nb),
            jg: Vec::with_capacity(nb),
            jl: Vec::with_capacity(nb),
        };
        for k in 0..nb {
            let meas = self.data.transmissions[p][k];
            if !(t[k] > 0.0) || !(meas > 0.0) {
                return None;
            }
            let w = self.sqrt_w[p][k];
            b.r.push(w * (t[k].ln() - meas.ln()));
            if with_jac {
                let s = w / t[k];
                b.jg.push([s * j[k][0], s * j[k][1], s * j[k][2]]);
                b.jl.push(s * j[k][3]);
            }
        }
        Some(b)
    }
}

impl<'a> Problem for Joint<'a> {
    type Lin = JointLin;

    fn n_params(&self) -> usize {
        3 + self.n_pos()
    }

    fn cost(&self, x: &[f64]) -> Option<f64> {
        let mut c = 0.0;
        for p in 0..self.n_pos() {
            c += self
                .block(x, p, false)?
                .r
                .iter()
                .map(|v| v * v)
                .sum::<f64>();
        }
        Some(0.5 * c)
    }

    fn linearize(&self, x: &[f64]) -> JointLin {
        JointLin {
            blocks: (0..self.n_pos())
                .map(|p| {
                    self.block(x, p, true).unwrap_or(Block {
                        r: vec![0.0; 1],
                        jg: vec![[0.0; 3]; 1],
                        jl: vec![0.0; 1],
                    })
                })
                .collect(),
        }
    }

    fn lower(&self) -> Vec<f64> {
        let s = self.settings;
        let mut v = vec![s.so2_bounds.0, s.hb_bounds.0, 0.0];
        v.extend(std::iter::repeat_n(0.0, self.n_pos()));
        v
    }

    fn upper(&self) -> Vec<f64> {
        let s = self.settings;
        let mut v = vec![s.so2_bounds.1, s.hb_bounds.1, s.veil_max];
        v.extend(std::iter::repeat_n(
            1.0 - self.model.backscatter,
            self.n_pos(),
        ));
        v
    }
}

/// Normal-equation blocks of the joint fit: A (3×3), per position b_p (3)
/// and c_p, the shared gradient (3) and the per-position gradients.
type NormalBlocks = (
    Matrix3<f64>,
    Vec<Vector3<f64>>,
    Vec<f64>,
    Vector3<f64>,
    Vec<f64>,
);

impl JointLin {
    /// Normal-equation blocks: A (3×3), per position b_p (3), c_p, and gradients.
    fn normal(&self) -> NormalBlocks {
        let mut a = Matrix3::zeros();
        let mut gg = Vector3::zeros();
        let mut bs = Vec::with_capacity(self.blocks.len());
        let mut cs = Vec::with_capacity(self.blocks.len());
        let mut gl = Vec::with_capacity(self.blocks.len());
        for blk in &self.blocks {
            let mut b = Vector3::zeros();
            let (mut c, mut g) = (0.0, 0.0);
            for k in 0..blk.r.len() {
                let jg = Vector3::from(blk.jg[k]);
                a += jg * jg.transpose();
                gg += jg * blk.r[k];
                b += jg * blk.jl[k];
                c += blk.jl[k] * blk.jl[k];
                g += blk.jl[k] * blk.r[k];
            }
            bs.push(b);
            cs.push(c);
            gl.push(g);
        }
        (a, bs, cs, gg, gl)
    }

    /// The reduced (Schur) matrix for the shared parameters, undamped.
    fn schur(&self) -> Matrix3<f64> {
        let (a, bs, cs, _, _) = self.normal();
        let mut s = a;
        for (b, c) in bs.iter().zip(&cs) {
            if *c > 0.0 {
                s -= b * b.transpose() / *c;
            }
        }
        s
    }
}

impl Linearization for JointLin {
    fn jtj_diagonal(&self) -> Vec<f64> {
        let (a, _, cs, _, _) = self.normal();
        let mut d = vec![a[(0, 0)], a[(1, 1)], a[(2, 2)]];
        d.extend(cs);
        d
    }

    fn gradient(&self) -> Vec<f64> {
        let (_, _, _, gg, gl) = self.normal();
        let mut g = vec![gg[0], gg[1], gg[2]];
        g.extend(gl);
        g
    }

    fn step(&self, lambda: f64, damping: &[f64]) -> Option<Vec<f64>> {
        let (a, bs, cs, gg, gl) = self.normal();
        let mut s = a;
        for i in 0..3 {
            s[(i, i)] += lambda * damping[i];
        }
        let mut rhs = -gg;
        let mut cl = Vec::with_capacity(cs.len());
        for p in 0..cs.len() {
            let c = cs[p] + lambda * damping[3 + p];
            if !(c > 0.0) {
                return None;
            }
            cl.push(c);
            s -= bs[p] * bs[p].transpose() / c;
            rhs += bs[p] * (gl[p] / c);
        }
        let dg = s.cholesky()?.solve(&rhs);
        let mut out = vec![dg[0], dg[1], dg[2]];
        for p in 0..cs.len() {
            out.push(-(gl[p] + bs[p].dot(&dg)) / cl[p]);
        }
        out.iter().all(|v| v.is_finite()).then_some(out)
    }

    fn predicted_reduction(&self, delta: &[f64]) -> f64 {
        let mut rjd = 0.0;
        let mut jd2 = 0.0;
        for (p, blk) in self.blocks.iter().enumerate() {
            for k in 0..blk.r.len() {
                let jd = blk.jg[k][0] * delta[0]
                    + blk.jg[k][1] * delta[1]
                    + blk.jg[k][2] * delta[2]
                    + blk.jl[k] * delta[3 + p];
                rjd += blk.r[k] * jd;
                jd2 += jd * jd;
            }
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

/// Unweighted residuals `ln T_model − ln T_measured` at `x`, `[position][band]`
/// (zeros where the model is not finite).
fn residuals(
    model: &VesselModel,
    data: &SegmentSpectra,
    settings: &FitSettings,
    x: &[f64],
) -> Vec<Vec<f64>> {
    let nb = model.n_bands();
    let unweighted = Joint {
        model,
        data,
        sqrt_w: vec![vec![1.0; nb]; data.diameters_um.len()],
        settings,
    };
    (0..data.diameters_um.len())
        .map(|p| {
            unweighted
                .block(x, p, false)
                .map(|b| b.r)
                .unwrap_or_else(|| vec![0.0; nb])
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
    let mut prob = Joint {
        model,
        data,
        sqrt_w: vec![vec![1.0; nb]; np],
        settings,
    };
    // Start from the best of a coarse grid over SO2 (cheap cost
    // evaluations), so that arteriolar and venular segments alike begin on
    // the right side of the valley.
    let start = |s0: f64| {
        let mut x0 = vec![s0, 150.0, 0.2];
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
            let res = residuals(model, data, settings, &rep.x);
            let w = huber_weights(&res, scale, settings.noise * 0.1);
            let sw: Vec<Vec<f64>> = w
                .iter()
                .map(|r| r.iter().map(|v| v.sqrt()).collect())
                .collect();
            let change = sw
                .iter()
                .flatten()
                .zip(prob.sqrt_w.iter().flatten())
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
    let dof = m - (3 + np) as f64;
    let ssr = 2.0 * rep.cost;
    let s2 = if dof > 0.0 { ssr / dof } else { f64::NAN };
    let cov = lin.schur().try_inverse().map(|c| c * s2);
    let se = |i: usize| cov.map(|c| c[(i, i)].max(0.0).sqrt()).unwrap_or(f64::NAN);
    let downweighted = prob
        .sqrt_w
        .iter()
        .filter(|row| row.iter().any(|w| w * w < 0.5))
        .count();
    let termination: Termination = rep.termination;
    let (band_residuals, misfit_t, adequacy) = adequacy(&residuals(model, data, settings, &rep.x));
    Ok(SegmentFit {
        band_residuals,
        misfit_t,
        adequacy,
        so2: rep.x[0],
        so2_se: se(0),
        hb_g_per_l: rep.x[1],
        hb_se: se(1),
        veil: rep.x[2],
        veil_se: se(2),
        double_pass: rep.x[3..].to_vec(),
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
