//! Registration of a capture to its eye's reference capture: a rigid
//! motion (rotation about the image centre, then translation) found in two
//! steps. Phase correlation (Kuglin & Hines 1975) gives the translation to
//! the pixel over a coarse set of angles; then the normalised
//! cross-correlation over the central part of the image is maximised in
//! (dx, dy, angle) with sub-pixel, bilinear sampling (argmin's
//! Nelder–Mead). The match score is that correlation; a capture whose score
//! is below the study's limit is flagged as not registered, never guessed.
//!
//! The motion maps reference-capture coordinates to capture coordinates:
//! `q = R(θ)(p − c) + c + (dx, dy)`, the convention of vessel-segment files.

use std::sync::Arc;

use argmin::core::{CostFunction, Executor, State};
use argmin::solver::neldermead::NelderMead;
use rustfft::num_complex::Complex;
use rustfft::{Fft, FftPlanner};

/// Result of a registration.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Registration {
    pub dx: f64,
    pub dy: f64,
    pub angle_deg: f64,
    /// Normalised cross-correlation at the optimum (−1 to 1).
    pub score: f64,
    /// The lowest such correlation in any of the 4 × 4 regions of the
    /// compared area (see `Ncc::worst_region`).
    pub worst_region: f64,
}

impl Registration {
    /// No motion: how the eye's reference capture lies on itself.
    pub const IDENTITY: Registration = Registration {
        dx: 0.0,
        dy: 0.0,
        angle_deg: 0.0,
        score: 1.0,
        worst_region: 1.0,
    };
}

/// The rigid motion `q = R(angle)(p − c) + c + (dx, dy)`, shared by
/// registration and the simulator's eye motion.
pub(crate) fn rigid(
    dx: f64,
    dy: f64,
    angle_deg: f64,
    (x, y): (f64, f64),
    cx: f64,
    cy: f64,
) -> (f64, f64) {
    let (s, c) = angle_deg.to_radians().sin_cos();
    rotate_shift(s, c, dx, dy, (x, y), cx, cy)
}

/// [`rigid`] with the angle's sine and cosine given, for loops over many
/// points at one angle.
fn rotate_shift(
    s: f64,
    c: f64,
    dx: f64,
    dy: f64,
    (x, y): (f64, f64),
    cx: f64,
    cy: f64,
) -> (f64, f64) {
    let (u, v) = (x - cx, y - cy);
    (cx + c * u - s * v + dx, cy + s * u + c * v + dy)
}

impl Registration {
    pub fn apply(&self, p: (f64, f64), cx: f64, cy: f64) -> (f64, f64) {
        rigid(self.dx, self.dy, self.angle_deg, p, cx, cy)
    }
}

/// Bilinear sample of a row-major image; `None` outside.
#[inline]
pub(crate) fn bilinear(img: &[f32], w: usize, h: usize, x: f64, y: f64) -> Option<f64> {
    if !(x >= 0.0 && y >= 0.0 && x <= (w - 1) as f64 && y <= (h - 1) as f64) {
        return None;
    }
    // Truncation is the floor here (both are at least 0), without a libm call.
    let (x0, y0) = (x as usize, y as usize);
    let (x1, y1) = ((x0 + 1).min(w - 1), (y0 + 1).min(h - 1));
    let (fx, fy) = (x - x0 as f64, y - y0 as f64);
    let p = |xx: usize, yy: usize| img[yy * w + xx] as f64;
    Some(
        (p(x0, y0) * (1.0 - fx) + p(x1, y0) * fx) * (1.0 - fy)
            + (p(x0, y1) * (1.0 - fx) + p(x1, y1) * fx) * fy,
    )
}

fn fft2(
    data: &mut [Complex<f64>],
    w: usize,
    h: usize,
    row: &Arc<dyn Fft<f64>>,
    col: &Arc<dyn Fft<f64>>,
) {
    for r in data.chunks_mut(w) {
        row.process(r);
    }
    let mut tmp = vec![Complex::new(0.0, 0.0); h];
    for x in 0..w {
        for y in 0..h {
            tmp[y] = data[y * w + x];
        }
        col.process(&mut tmp);
        for y in 0..h {
            data[y * w + x] = tmp[y];
        }
    }
}

/// Integer translation by phase correlation (Kuglin & Hines 1975), both
/// images windowed (Hann) and de-meaned, against one reference image
/// prepared once (its windowed spectrum, the window and the FFT plans), so
/// that a capture tried at several angles pays for the reference's
/// transform once.
pub(crate) struct PhaseCorrelator {
    w: usize,
    h: usize,
    /// Hann window per column and per row.
    wx: Vec<f64>,
    wy: Vec<f64>,
    reference: Vec<Complex<f64>>,
    plans: [Arc<dyn Fft<f64>>; 4],
}

impl PhaseCorrelator {
    pub(crate) fn new(reference: &[f64], w: usize, h: usize) -> Self {
        let mut planner = FftPlanner::<f64>::new();
        let plans = [
            planner.plan_fft_forward(w),
            planner.plan_fft_forward(h),
            planner.plan_fft_inverse(w),
            planner.plan_fft_inverse(h),
        ];
        let hann = |i: usize, n: usize| {
            0.5 - 0.5 * (2.0 * std::f64::consts::PI * i as f64 / (n - 1) as f64).cos()
        };
        let mut pc = PhaseCorrelator {
            w,
            h,
            wx: (0..w).map(|x| hann(x, w)).collect(),
            wy: (0..h).map(|y| hann(y, h)).collect(),
            reference: vec![],
            plans,
        };
        pc.reference = pc.spectrum(reference);
        pc
    }

    /// The de-meaned, windowed image's spectrum.
    fn spectrum(&self, img: &[f64]) -> Vec<Complex<f64>> {
        let (w, h) = (self.w, self.h);
        let m = img.iter().sum::<f64>() / img.len() as f64;
        let mut a: Vec<Complex<f64>> = (0..w * h)
            .map(|i| Complex::new((img[i] - m) * (self.wx[i % w] * self.wy[i / w]), 0.0))
            .collect();
        fft2(&mut a, w, h, &self.plans[0], &self.plans[1]);
        a
    }

    /// Integer translation of `moving` relative to the reference, and the
    /// correlation peak.
    pub(crate) fn shift(&self, moving: &[f64]) -> (f64, f64, f64) {
        let (w, h) = (self.w, self.h);
        let b = self.spectrum(moving);
        let mut r: Vec<Complex<f64>> = self
            .reference
            .iter()
            .zip(&b)
            .map(|(x, y)| {
                let c = y * x.conj();
                let n = c.norm();
                if n > 0.0 {
                    c / n
                } else {
                    Complex::new(0.0, 0.0)
                }
            })
            .collect();
        fft2(&mut r, w, h, &self.plans[2], &self.plans[3]);
        let (mut best, mut bi) = (f64::MIN, 0);
        for (i, v) in r.iter().enumerate() {
            if v.re > best {
                best = v.re;
                bi = i;
            }
        }
        let (px, py) = ((bi % w) as f64, (bi / w) as f64);
        let dx = if px > w as f64 / 2.0 {
            px - w as f64
        } else {
            px
        };
        let dy = if py > h as f64 / 2.0 {
            py - h as f64
        } else {
            py
        };
        (dx, dy, best / (w * h) as f64)
    }
}

struct Ncc<'a> {
    reference: &'a [f32],
    moving: &'a [f32],
    w: usize,
    h: usize,
    points: Vec<(usize, usize)>,
}

impl Ncc<'_> {
    fn score(&self, p: &[f64]) -> f64 {
        self.correlation(p, &self.points)
    }

    /// The correlation over `points` with the moving image moved by `p`;
    /// −1 when fewer than `MIN_POINTS` land on it or either side is flat.
    fn correlation(&self, p: &[f64], points: &[(usize, usize)]) -> f64 {
        let (cx, cy) = (self.w as f64 / 2.0, self.h as f64 / 2.0);
        // The angle's sine and cosine once, not per point.
        let (sin, cos) = p[2].to_radians().sin_cos();
        let (mut n, mut sa, mut sb, mut saa, mut sbb, mut sab) = (0.0, 0.0, 0.0, 0.0, 0.0, 0.0);
        for &(x, y) in points {
            let q = rotate_shift(sin, cos, p[0], p[1], (x as f64, y as f64), cx, cy);
            let Some(b) = bilinear(self.moving, self.w, self.h, q.0, q.1) else {
                continue;
            };
            let a = self.reference[y * self.w + x] as f64;
            n += 1.0;
            sa += a;
            sb += b;
            saa += a * a;
            sbb += b * b;
            sab += a * b;
        }
        if n < MIN_POINTS as f64 {
            return -1.0;
        }
        let cov = sab - sa * sb / n;
        let va = saa - sa * sa / n;
        let vb = sbb - sb * sb / n;
        if va <= 0.0 || vb <= 0.0 {
            -1.0
        } else {
            cov / (va * vb).sqrt()
        }
    }

    /// The lowest correlation over a `REGIONS` × `REGIONS` division of the
    /// points' extent. A capture that matches well as a whole can still
    /// fail in one part (a lid or lashes over the top in a partial blink,
    /// glare): the whole-image score averages that away, this does not.
    fn worst_region(&self, p: &[f64]) -> f64 {
        let (Some(x0), Some(x1)) = (
            self.points.iter().map(|q| q.0).min(),
            self.points.iter().map(|q| q.0).max(),
        ) else {
            return -1.0;
        };
        let y0 = self.points.iter().map(|q| q.1).min().unwrap_or(0);
        let y1 = self.points.iter().map(|q| q.1).max().unwrap_or(0);
        let cell =
            |v: usize, lo: usize, hi: usize| ((v - lo) * REGIONS / (hi - lo + 1)).min(REGIONS - 1);
        let mut regions = vec![Vec::new(); REGIONS * REGIONS];
        for &(x, y) in &self.points {
            regions[cell(y, y0, y1) * REGIONS + cell(x, x0, x1)].push((x, y));
        }
        // A region too small to correlate (an image of a few dozen pixels)
        // says nothing; without any, the whole-image score stands.
        regions
            .iter()
            .filter(|pts| pts.len() >= MIN_POINTS)
            .map(|pts| self.correlation(p, pts))
            .reduce(f64::min)
            .unwrap_or_else(|| self.score(p))
    }
}

/// Fewest points a correlation is taken over.
const MIN_POINTS: usize = 100;

/// Regions per side for [`Registration::worst_region`].
pub(crate) const REGIONS: usize = 4;

impl CostFunction for Ncc<'_> {
    type Param = Vec<f64>;
    type Output = f64;
    fn cost(&self, p: &Vec<f64>) -> Result<f64, argmin::core::Error> {
        Ok(-self.score(p))
    }
}

/// Block average by an integer factor (the remainder rows and columns are dropped).
fn downsample(img: &[f32], w: usize, h: usize, f: usize) -> Vec<f32> {
    let (ws, hs) = (w / f, h / f);
    let mut out = vec![0.0f32; ws * hs];
    for y in 0..hs * f {
        for x in 0..ws * f {
            out[(y / f) * ws + x / f] += img[y * w + x];
        }
    }
    let n = (f * f) as f32;
    out.iter_mut().for_each(|v| *v /= n);
    out
}

/// Separable Gaussian blur (σ in pixels, edges clamped).
pub(crate) fn blur(img: &[f32], w: usize, h: usize, sigma: f64) -> Vec<f32> {
    let r = (3.0 * sigma).ceil() as isize;
    let k: Vec<f64> = (-r..=r)
        .map(|i| (-(i * i) as f64 / (2.0 * sigma * sigma)).exp())
        .collect();
    let ks: f64 = k.iter().sum();
    let pass = |src: &[f32], horizontal: bool| -> Vec<f32> {
        let mut out = vec![0.0f32; w * h];
        let (n, stride) = if horizontal { (w, 1) } else { (h, w) };
        for y in 0..h {
            for x in 0..w {
                let i = if horizontal { x } else { y };
                let base = y * w + x;
                let mut acc = 0.0;
                if i as isize >= r && i as isize + r < n as isize {
                    // Away from the edges no index needs clamping.
                    let start = base - r as usize * stride;
                    for (j, kv) in k.iter().enumerate() {
                        acc += kv * src[start + j * stride] as f64;
                    }
                } else {
                    for (j, kv) in k.iter().enumerate() {
                        let o = j as isize - r;
                        let (xx, yy) = if horizontal {
                            ((x as isize + o).clamp(0, w as isize - 1) as usize, y)
                        } else {
                            (x, (y as isize + o).clamp(0, h as isize - 1) as usize)
                        };
                        acc += kv * src[yy * w + xx] as f64;
                    }
                }
                out[base] = (acc / ks) as f32;
            }
        }
        out
    };
    pass(&pass(img, true), false)
}

/// Registers `moving` to `reference` (both one band of a capture, same size).
/// Rotations up to `max_angle_deg` are searched. Both images are smoothed
/// (Gaussian, σ = 1 px) first: with noisy images, bilinear interpolation
/// would otherwise favour whole-pixel shifts, where it averages no noise away.
pub fn register(
    reference: &[f32],
    moving: &[f32],
    w: usize,
    h: usize,
    max_angle_deg: f64,
) -> Registration {
    let (reference, moving) = (
        &blur(reference, w, h, 1.0)[..],
        &blur(moving, w, h, 1.0)[..],
    );
    // Coarse: phase correlation of the moving image rotated back by each
    // angle. Large images are block-averaged to about 256 px first: the
    // coarse estimate only has to land within the fine search's reach.
    let f = w.max(h).div_ceil(256).max(1);
    let (rs, ms, ws, hs) = if f > 1 {
        (
            downsample(reference, w, h, f),
            downsample(moving, w, h, f),
            w / f,
            h / f,
        )
    } else {
        (reference.to_vec(), moving.to_vec(), w, h)
    };
    let (cxs, cys) = (ws as f64 / 2.0, hs as f64 / 2.0);
    let refd: Vec<f64> = rs.iter().map(|v| *v as f64).collect();
    let steps = (max_angle_deg / 0.5).ceil() as i32;
    let correlator = PhaseCorrelator::new(&refd, ws, hs);
    let mut coarse = (0.0, 0.0, 0.0, f64::MIN);
    for k in -steps..=steps {
        let ang = k as f64 * 0.5;
        let (s, c) = ang.to_radians().sin_cos();
        let unrot: Vec<f64> = (0..ws * hs)
            .map(|i| {
                let (u, v) = ((i % ws) as f64 - cxs, (i / ws) as f64 - cys);
                bilinear(&ms, ws, hs, cxs + c * u - s * v, cys + s * u + c * v).unwrap_or(0.0)
            })
            .collect();
        let (dx, dy, peak) = correlator.shift(&unrot);
        if peak > coarse.3 {
            coarse = (dx * f as f64, dy * f as f64, ang, peak);
        }
    }
    // Fine: maximise the correlation over the central 70 % of the image, on
    // a grid of pixels thinned so that it holds at most about 64 000 (far
    // more than the three parameters need; small images use every pixel).
    let margin = (0.15 * w.min(h) as f64) as usize;
    let inner = ((w - 2 * margin) * (h - 2 * margin)) as f64;
    let stride = ((inner / 65_536.0).sqrt().ceil() as usize).max(1);
    let grid = |s: usize| -> Vec<(usize, usize)> {
        (margin..h - margin)
            .step_by(s)
            .flat_map(|y| (margin..w - margin).step_by(s).map(move |x| (x, y)))
            .collect()
    };
    let coarse_points = grid(2 * stride);
    let full = grid(stride);
    // The translation found on the un-rotated image is that of the rotated frame.
    let mut best = vec![coarse.0, coarse.1, coarse.2];
    // Two passes: a sparse grid from the coarse estimate, then the finer
    // grid from a small simplex around the first optimum.
    for (pts, step) in [
        (coarse_points, (0.7 * f as f64, 0.4)),
        (full.clone(), (0.1, 0.05)),
    ] {
        let ncc = Ncc {
            reference,
            moving,
            w,
            h,
            points: pts,
        };
        let s0 = best.clone();
        let simplex = vec![
            s0.clone(),
            vec![s0[0] + step.0, s0[1], s0[2]],
            vec![s0[0], s0[1] + step.0, s0[2]],
            vec![s0[0], s0[1], s0[2] + step.1],
        ];
        if let Some(b) = NelderMead::new(simplex)
            .with_sd_tolerance(1e-10)
            .ok()
            .and_then(|s| {
                Executor::new(ncc, s)
                    .configure(|st| st.max_iters(800))
                    .run()
                    .ok()
            })
            .and_then(|r| r.state().get_best_param().cloned())
        {
            best = b;
        }
    }
    let ncc = Ncc {
        reference,
        moving,
        w,
        h,
        points: full,
    };
    Registration {
        dx: best[0],
        dy: best[1],
        angle_deg: best[2],
        score: ncc.score(&best),
        worst_region: ncc.worst_region(&best),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The blur with every index clamped, as it was written before the
    /// interior was given a path without clamping.
    fn blur_clamped(img: &[f32], w: usize, h: usize, sigma: f64) -> Vec<f32> {
        let r = (3.0 * sigma).ceil() as isize;
        let k: Vec<f64> = (-r..=r)
            .map(|i| (-(i * i) as f64 / (2.0 * sigma * sigma)).exp())
            .collect();
        let ks: f64 = k.iter().sum();
        let pass = |src: &[f32], horizontal: bool| -> Vec<f32> {
            let mut out = vec![0.0f32; w * h];
            for y in 0..h {
                for x in 0..w {
                    let mut acc = 0.0;
                    for (j, kv) in k.iter().enumerate() {
                        let o = j as isize - r;
                        let (xx, yy) = if horizontal {
                            ((x as isize + o).clamp(0, w as isize - 1) as usize, y)
                        } else {
                            (x, (y as isize + o).clamp(0, h as isize - 1) as usize)
                        };
                        acc += kv * src[yy * w + xx] as f64;
                    }
                    out[y * w + x] = (acc / ks) as f32;
                }
            }
            out
        };
        pass(&pass(img, true), false)
    }

    #[test]
    fn the_blur_gives_the_same_bits_as_clamping_everywhere() {
        let (w, h) = (37, 23);
        let img: Vec<f32> = (0..w * h)
            .map(|i| ((i * 7919) % 1013) as f32 * 0.37 + (i % 5) as f32)
            .collect();
        for sigma in [0.6, 1.0, 2.5] {
            let (a, b) = (blur(&img, w, h, sigma), blur_clamped(&img, w, h, sigma));
            assert!(
                a.iter().zip(&b).all(|(x, y)| x.to_bits() == y.to_bits()),
                "σ {sigma}"
            );
        }
    }

    #[test]
    fn phase_correlation_finds_a_whole_pixel_shift() {
        let (w, h) = (64, 48);
        let at = |x: f64, y: f64| (0.3 * x).sin() + (0.21 * y).cos() + 0.5 * (0.07 * x * y).sin();
        let reference: Vec<f64> = (0..w * h)
            .map(|i| at((i % w) as f64, (i / w) as f64))
            .collect();
        // The moving image shows the reference's (x − 5, y + 3) at (x, y).
        let moving: Vec<f64> = (0..w * h)
            .map(|i| at((i % w) as f64 - 5.0, (i / w) as f64 + 3.0))
            .collect();
        let pc = PhaseCorrelator::new(&reference, w, h);
        let (dx, dy, peak) = pc.shift(&moving);
        assert_eq!((dx as i32, dy as i32), (5, -3), "peak {peak}");
    }
}
