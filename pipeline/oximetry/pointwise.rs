//! `multiband-pointwise`: the vessel model fitted independently at each
//! position (S, hb, k and F_2 all free there), then summarised along the
//! segment by the mean of the converged positions, with SE = SD/√n. Kept to
//! compare with the joint segment fit, which shares S, hb and k along the
//! segment and is far more stable.

use nalgebra::{DMatrix, DVector};

use super::model::{N_DERIV, Shared, VesselModel};
use super::segment::{FitSettings, SegmentSpectra};
use crate::fit::dense::{DenseProblem, covariance};
use crate::fit::{Options, minimize};

#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct PositionFit {
    pub so2: f64,
    pub so2_se: f64,
    pub hb_g_per_l: f64,
    pub veil: f64,
    pub double_pass: f64,
    pub iterations: usize,
    pub evaluations: usize,
    pub termination: &'static str,
    pub converged: bool,
}

#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct PointwiseFit {
    pub positions: Vec<PositionFit>,
    /// Mean SO2 over converged positions.
    pub so2: f64,
    pub so2_sd: f64,
    pub so2_se: f64,
    pub n_converged: usize,
}

/// Fits one position.
pub fn fit_position(
    model: &VesselModel,
    t: &[f64],
    d_um: f64,
    settings: &FitSettings,
) -> PositionFit {
    let nb = model.n_bands();
    let f = |x: &[f64], r: &mut DVector<f64>, j: Option<&mut DMatrix<f64>>| {
        let mut tm = vec![0.0; nb];
        let mut jm = vec![[0.0; N_DERIV]; nb];
        let want = j.is_some();
        model.transmission(
            &Shared::new(x[0], x[1], x[2]),
            x[3],
            d_um,
            &mut tm,
            want.then_some(&mut jm[..]),
        );
        if tm.iter().zip(t).any(|(a, b)| !(*a > 0.0) || !(*b > 0.0)) {
            return false;
        }
        for k in 0..nb {
            r[k] = tm[k].ln() - t[k].ln();
        }
        if let Some(j) = j {
            for k in 0..nb {
                // S, hb, k, F_2: the base model's columns.
                for q in 0..4 {
                    j[(k, q)] = jm[k][q] / tm[k];
                }
            }
        }
        true
    };
    let s = settings;
    let p = DenseProblem::new(4, nb, &f).with_bounds(
        vec![s.so2_bounds.0, s.hb_bounds.0, 0.0, 0.0],
        vec![
            s.so2_bounds.1,
            s.hb_bounds.1,
            s.veil_max,
            1.0 - model.backscatter,
        ],
    );
    let opts = Options {
        max_iterations: 300,
        ftol: 1e-10,
        xtol: 1e-10,
        gtol: 1e-8,
        tau: 1e-3,
    };
    let mut best = None;
    for s0 in [0.95, 0.6] {
        let rep = minimize(&p, &[s0, 150.0, 0.2, 0.3], &opts);
        if rep.cost.is_finite()
            && best
                .as_ref()
                .is_none_or(|b: &crate::fit::FitReport| rep.cost < b.cost)
        {
            best = Some(rep);
        }
    }
    let rep = best.expect("at least one start evaluates");
    let se = p
        .evaluate(&rep.x)
        .and_then(|(r, j)| covariance(&j, &r))
        .map(|c| c[(0, 0)].max(0.0).sqrt())
        .unwrap_or(f64::NAN);
    PositionFit {
        so2: rep.x[0],
        so2_se: se,
        hb_g_per_l: rep.x[1],
        veil: rep.x[2],
        double_pass: rep.x[3],
        iterations: rep.iterations,
        evaluations: rep.evaluations,
        termination: rep.termination.as_str(),
        converged: rep.termination.converged(),
    }
}

/// Fits every position and summarises along the segment.
pub fn fit_pointwise(
    model: &VesselModel,
    data: &SegmentSpectra,
    settings: &FitSettings,
) -> PointwiseFit {
    let positions: Vec<PositionFit> = data
        .transmissions
        .iter()
        .zip(&data.diameters_um)
        .map(|(t, d)| fit_position(model, t, *d, settings))
        .collect();
    let ok: Vec<f64> = positions
        .iter()
        .filter(|p| p.converged)
        .map(|p| p.so2)
        .collect();
    let n = ok.len();
    let mean = if n > 0 {
        ok.iter().sum::<f64>() / n as f64
    } else {
        f64::NAN
    };
    let sd = if n > 1 {
        (ok.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / (n - 1) as f64).sqrt()
    } else {
        f64::NAN
    };
    PointwiseFit {
        so2: mean,
        so2_sd: sd,
        so2_se: sd / (n as f64).sqrt(),
        n_converged: n,
        positions,
    }
}
