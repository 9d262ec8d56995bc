//! The vessel's profile model and its fits. Across a vessel, the
//! normalised intensity is that of an absorbing cylinder ([`shape`]); a
//! central light reflex, where present, gives back a share ρ of the light
//! the axis absorbs over the central third of the diameter; and the eye's
//! and camera's optics blur it all with a point-spread function, taken as
//! a Gaussian of known SD ([`Blur`], from the instrument's `psf_sd_px`).
//!
//! Without a blur the profile analysis fits the cylinder alone and finds a
//! reflex as a bump ([`super::profile`]). With one, the blurred model is
//! fitted ([`fit_blurred`]), with the reflex's share where it lowers the
//! residual significantly: a blur of 1–2 px both widens the vessel (about
//! +17 % at σ = 1.5 px on a 130 µm vessel) and flattens the reflex's bump
//! below what a bump test sees. The fit gives the vessel's centre and
//! width; the transmission is still read from the data on the centre line.
//! To first order the blur scales the vessel's depth there by a factor
//! H < 1 (the kernel's mean of the cylinder's profile), `1 − H·A`, and a
//! reflex gives back `ρ(1 − T)` of the light: both have the form of a
//! veil, `k + (1 − k)·T`, which the multiband fits' veil takes up. Removing it with the fitted depth and
//! share did worse on simulated studies (their depth overshoots at strong
//! absorption, and a share decided position by position breaks the joint
//! fit's veil along the segment): DEVELOPERS.md has the figures.

use crate::fit::small::SmallProblem;
use crate::fit::{Options, minimize};

/// Vessel shape and its derivatives in (A, c, r, κ): a cylinder of
/// absorption strength κ seen in transmission,
/// `1 − A·(1 − e^(−κ√(1 − u²)))/(1 − e^(−κ))`, which tends to the chord
/// profile `1 − A·√(1 − u²)` for weak absorption and flattens as κ grows.
/// `ek` is `e^(−κ)`, the same for every sample of one evaluation.
pub(crate) fn shape(s: f64, p: &[f64], ek: f64) -> (f64, [f64; 4]) {
    let (a, c, r, k) = (p[0], p[1], p[2], p[3]);
    let u = (s - c) / r;
    let g = 1.0 - u * u;
    if g <= 0.0 {
        return (1.0, [0.0; 4]);
    }
    let q = g.sqrt();
    let e = (-k * q).exp();
    let d = 1.0 - ek;
    let h = (1.0 - e) / d;
    let dh_dk = (q * e * d - (1.0 - e) * ek) / (d * d);
    let dq = if q > 1e-9 {
        a * k * e * u / (d * q * r)
    } else {
        0.0
    };
    (1.0 - a * h, [-h, -dq, -dq * u, -a * dh_dk])
}

/// Fits the shape to `(s, p)`; `fixed` holds (c, r) when only A and β are free.
pub(crate) fn fit_shape(
    s: &[f64],
    p: &[f64],
    start: [f64; 4],
    fixed: Option<(f64, f64)>,
    half: f64,
) -> ([f64; 4], f64) {
    fit_shape_masked(s, p, start, fixed, half, None, &[])
}

/// The box the shape fit searches, (A, c, r, κ): depth 0–1, centre within
/// half the profile's half-length of the segment, radius from 1 px to 0.9 of
/// the half-length, κ 0.01–30.
pub(crate) fn shape_bounds(half: f64) -> ([f64; 4], [f64; 4]) {
    (
        [0.0, -half / 2.0, 1.0, 0.01],
        [1.0, half / 2.0, half * 0.9, 30.0],
    )
}

/// Did the fit end on a limit of its box in depth (none), centre or
/// radius? Such a fit has not found the vessel: the optimum lies outside
/// what a profile across this segment can show (another vessel, a crossing,
/// or no vessel at all), and where it stops depends on the path the solver
/// took, not on the data.
pub(crate) fn at_limit(q: &[f64; 4], half: f64) -> bool {
    let (lo, hi) = shape_bounds(half);
    let near = |v: f64, b: f64| (v - b).abs() <= 1e-9 * b.abs().max(1.0);
    near(q[0], lo[0]) || (1..3).any(|k| near(q[k], lo[k]) || near(q[k], hi[k]))
}

/// As [`fit_shape`], leaving out the samples inside `skip` (a central
/// reflex); the rms is over the samples used.
pub(crate) fn fit_shape_masked(
    s: &[f64],
    p: &[f64],
    start: [f64; 4],
    fixed: Option<(f64, f64)>,
    half: f64,
    skip: Option<(f64, f64)>,
    keep: &[bool],
) -> ([f64; 4], f64) {
    let used = |i: usize, x: f64| {
        keep.get(i) != Some(&false) && skip.is_none_or(|(lo, hi)| x <= lo || x >= hi)
    };
    let n_used = s
        .iter()
        .enumerate()
        .filter(|(i, x)| used(*i, **x))
        .count()
        .max(1);
    // Residual and shape derivatives of each sample in use.
    let rows = |q: &[f64; 4], out: &mut dyn FnMut(f64, &[f64; 4])| {
        let ek = (-q[3]).exp();
        for (i, (x, v)) in s.iter().zip(p).enumerate() {
            if used(i, *x) {
                let (m, d) = shape(*x, q, ek);
                out(m - v, &d);
            }
        }
        true
    };
    let options = Options {
        max_iterations: 200,
        ftol: 1e-12,
        xtol: 1e-12,
        gtol: 1e-12,
        tau: 1e-3,
    };
    // QR, not the normal equations: see `fit::small`.
    let (q, cost) = match fixed {
        Some((c, r)) => {
            let model = |x: &[f64; 2], out: &mut dyn FnMut(f64, &[f64; 2])| {
                rows(&[x[0], c, r, x[1]], &mut |res, d| out(res, &[d[0], d[3]]))
            };
            let problem = SmallProblem::new(&model, [0.0, 0.01], [1.0, 30.0]).with_qr();
            let rep = minimize(&problem, &[start[0], start[3]], &options);
            ([rep.x[0], c, r, rep.x[1]], rep.cost)
        }
        None => {
            let (lo, hi) = shape_bounds(half);
            let problem = SmallProblem::new(&rows, lo, hi).with_qr();
            let rep = minimize(&problem, &start, &options);
            ([rep.x[0], rep.x[1], rep.x[2], rep.x[3]], rep.cost)
        }
    };
    (q, (2.0 * cost / n_used as f64).sqrt())
}

/// The reflex covers the central third of the diameter, |u| < 1/3.
const REFLEX_HALF_WIDTH: f64 = 1.0 / 3.0;

/// Fine-grid points per profile sample for the blurred model.
const SUB: usize = 4;

/// A Gaussian point-spread function on a profile's equally spaced
/// samples: the unblurred model is evaluated on a grid [`SUB`] times finer
/// and summed with the kernel's weights at each sample (to 4 SD). The
/// reflex's edges are taken by each fine cell's share inside them, so that
/// the model moves smoothly with the centre and radius.
#[derive(Debug, Clone)]
pub(crate) struct Blur {
    step: f64,
    kernel: Vec<f64>,
    reach: usize,
}

impl Blur {
    /// `None` without a blur (SD 0).
    pub(crate) fn new(sd_px: f64, sample_step: f64) -> Option<Blur> {
        if !(sd_px > 0.0) {
            return None;
        }
        let step = sample_step / SUB as f64;
        let reach = (4.0 * sd_px / step).ceil() as usize;
        let mut kernel: Vec<f64> = (0..=2 * reach)
            .map(|k| {
                let d = (k as f64 - reach as f64) * step;
                (-0.5 * d * d / (sd_px * sd_px)).exp()
            })
            .collect();
        let sum: f64 = kernel.iter().sum();
        kernel.iter_mut().for_each(|w| *w /= sum);
        Some(Blur {
            step,
            kernel,
            reach,
        })
    }

    /// The blurred model at each sample of `s` (spaced by the sample step
    /// given to [`Blur::new`]) with its derivatives in (A, c, r, κ, ρ):
    /// `out(i, model, derivatives)`.
    pub(crate) fn eval(&self, s: &[f64], q: &[f64; 5], out: &mut dyn FnMut(usize, f64, &[f64; 5])) {
        let (c, r, rho) = (q[1], q[2], q[4]);
        let n_fine = (s.len().saturating_sub(1)) * SUB + 1 + 2 * self.reach;
        let x0 = s[0] - self.reach as f64 * self.step;
        let ek = (-q[3]).exp();
        let h = self.step;
        // 1 − S and the derivatives of S, on the fine points inside the vessel.
        let lo = ((c - r - x0) / h).floor().max(0.0) as usize;
        let hi = ((((c + r - x0) / h).ceil().max(0.0)) as usize + 1).min(n_fine);
        let inside: Vec<(f64, [f64; 5])> = (lo..hi.max(lo))
            .map(|j| {
                let x = x0 + j as f64 * h;
                let (m, d) = shape(x, &q[..4], ek);
                // The cell's share inside the reflex band [c − w, c + w].
                let w = REFLEX_HALF_WIDTH * r;
                let (top, bottom) = ((x + 0.5 * h).min(c + w), (x - 0.5 * h).max(c - w));
                let (share, dshare_dc, dshare_dr) = if top > bottom {
                    let up = (c + w < x + 0.5 * h) as u8 as f64;
                    let down = (c - w > x - 0.5 * h) as u8 as f64;
                    (
                        (top - bottom) / h,
                        (up - down) / h,
                        REFLEX_HALF_WIDTH * (up + down) / h,
                    )
                } else {
                    (0.0, 0.0, 0.0)
                };
                // S = S0 + ρ·share·(1 − S0).
                let g = rho * share;
                let lift = 1.0 - m;
                (
                    (1.0 - g) * lift,
                    [
                        (1.0 - g) * d[0],
                        (1.0 - g) * d[1] + rho * dshare_dc * lift,
                        (1.0 - g) * d[2] + rho * dshare_dr * lift,
                        (1.0 - g) * d[3],
                        share * lift,
                    ],
                )
            })
            .collect();
        for i in 0..s.len() {
            let at = i * SUB + self.reach;
            let (a, b) = ((at - self.reach).max(lo), (at + self.reach + 1).min(hi));
            let mut m = 1.0;
            let mut d = [0.0; 5];
            for j in a..b.max(a) {
                let wgt = self.kernel[j + self.reach - at];
                let (one_minus, dd) = &inside[j - lo];
                m -= wgt * one_minus;
                for t in 0..5 {
                    d[t] += wgt * dd[t];
                }
            }
            out(i, m, &d);
        }
    }
}

/// Which parameters of the blurred model a fit frees; the others keep
/// their start values.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Free {
    /// (A, c, r, κ, ρ).
    All,
    /// (A, c, r, κ): a vessel without a reflex.
    Shape,
}

/// Fits the blurred model with its reflex share to `(s, p)`, freeing
/// `free`. Returns (A, c, r, κ, ρ) and the RMS residual.
pub(crate) fn fit_blurred(
    s: &[f64],
    p: &[f64],
    start: [f64; 5],
    free: Free,
    half: f64,
    blur: &Blur,
    keep: &[bool],
) -> ([f64; 5], f64) {
    let options = Options {
        max_iterations: 200,
        ftol: 1e-12,
        xtol: 1e-12,
        gtol: 1e-12,
        tau: 1e-3,
    };
    let rows = |q: &[f64; 5], out: &mut dyn FnMut(f64, &[f64; 5])| {
        blur.eval(s, q, &mut |i, m, d| {
            if keep.get(i) != Some(&false) {
                out(m - p[i], d)
            }
        });
        true
    };
    let (lo, hi) = shape_bounds(half);
    let (q, cost) = match free {
        Free::Shape => {
            let model = |x: &[f64; 4], out: &mut dyn FnMut(f64, &[f64; 4])| {
                rows(&[x[0], x[1], x[2], x[3], 0.0], &mut |res, d| {
                    out(res, &[d[0], d[1], d[2], d[3]])
                })
            };
            let problem = SmallProblem::new(&model, lo, hi).with_qr();
            let rep = minimize(&problem, &start[..4], &options);
            ([rep.x[0], rep.x[1], rep.x[2], rep.x[3], 0.0], rep.cost)
        }
        Free::All => {
            let problem = SmallProblem::new(
                &rows,
                [lo[0], lo[1], lo[2], lo[3], 0.0],
                [hi[0], hi[1], hi[2], hi[3], MAX_REFLEX_SHARE],
            )
            .with_qr();
            let rep = minimize(&problem, &start, &options);
            ([rep.x[0], rep.x[1], rep.x[2], rep.x[3], rep.x[4]], rep.cost)
        }
    };
    let n_used = (0..s.len())
        .filter(|i| keep.get(*i) != Some(&false))
        .count();
    (q, (2.0 * cost / n_used.max(1) as f64).sqrt())
}

/// The largest share of the absorbed light a reflex may give back.
const MAX_REFLEX_SHARE: f64 = 0.9;

#[cfg(test)]
mod tests {
    use super::*;

    fn samples() -> Vec<f64> {
        (0..=64).map(|i| -16.0 + 0.5 * i as f64).collect()
    }

    fn model(blur: &Blur, s: &[f64], q: &[f64; 5]) -> (Vec<f64>, Vec<[f64; 5]>) {
        let (mut m, mut d) = (vec![0.0; s.len()], vec![[0.0; 5]; s.len()]);
        blur.eval(s, q, &mut |i, v, g| {
            m[i] = v;
            d[i] = *g;
        });
        (m, d)
    }

    #[test]
    fn the_blurred_models_derivatives_match_central_differences() {
        let s = samples();
        let blur = Blur::new(1.5, 0.5).unwrap();
        // Away from a fine-grid point on the vessel's edge, where the
        // cylinder's √(1 − u²) has no derivative.
        for q in [
            [0.6, 0.3137, 5.2119, 2.0, 0.0],
            [0.8, -1.1071, 7.7043, 6.0, 0.35],
            [0.3, 0.0519, 3.1093, 0.5, 0.6],
        ] {
            let (_, d) = model(&blur, &s, &q);
            for k in 0..5 {
                let h = 1e-6 * q[k].abs().max(1.0);
                let (mut up, mut down) = (q, q);
                up[k] += h;
                down[k] -= h;
                let (mu, _) = model(&blur, &s, &up);
                let (md, _) = model(&blur, &s, &down);
                for i in 0..s.len() {
                    let fd = (mu[i] - md[i]) / (2.0 * h);
                    assert!(
                        (fd - d[i][k]).abs() < 1e-5 * (1.0 + fd.abs()),
                        "q {q:?}, parameter {k}, sample {i}: {fd} vs {}",
                        d[i][k]
                    );
                }
            }
        }
    }

    #[test]
    fn a_narrow_blur_leaves_the_sharp_cylinder_and_any_blur_keeps_its_area() {
        let s = samples();
        let q: [f64; 5] = [0.7, 0.4, 6.0, 3.0, 0.0];
        let ek = (-q[3]).exp();
        let sharp: Vec<f64> = s.iter().map(|x| shape(*x, &q[..4], ek).0).collect();
        let (narrow, _) = model(&Blur::new(0.05, 0.5).unwrap(), &s, &q);
        for (a, b) in sharp.iter().zip(&narrow) {
            assert!((a - b).abs() < 0.02, "{a} vs {b}");
        }
        // The light the vessel takes away is the same, blurred or not.
        let (wide, _) = model(&Blur::new(2.0, 0.5).unwrap(), &s, &q);
        let area = |v: &[f64]| v.iter().map(|m| 1.0 - m).sum::<f64>() * 0.5;
        assert!(
            (area(&wide) / area(&sharp) - 1.0).abs() < 0.01,
            "{} vs {}",
            area(&wide),
            area(&sharp)
        );
        assert!(Blur::new(0.0, 0.5).is_none());
    }

    #[test]
    fn a_blurred_profile_is_fitted_back_to_its_parameters() {
        let s = samples();
        let blur = Blur::new(1.5, 0.5).unwrap();
        for truth in [[0.6, 0.4, 5.5, 2.0, 0.0], [0.7, -0.3, 6.5, 3.0, 0.4]] {
            let (p, _) = model(&blur, &s, &truth);
            let start = [0.4, 0.0, 4.0, 1.0, if truth[4] > 0.0 { 0.2 } else { 0.0 }];
            let free = if truth[4] > 0.0 {
                Free::All
            } else {
                Free::Shape
            };
            let (q, rms) = fit_blurred(&s, &p, start, free, 16.0, &blur, &[]);
            assert!(rms < 1e-6, "{truth:?}: rms {rms}");
            for k in 0..5 {
                assert!((q[k] - truth[k]).abs() < 1e-3, "{truth:?}: {q:?}");
            }
        }
    }
}
