//! Registration of a capture to its eye's reference capture: a rigid
//! motion (rotation about the image centre, then translation) found in two
//! steps. Phase correlation (Kuglin & Hines 1975) gives the translation to
//! the pixel over a coarse set of angles; then the normalised
//! cross-correlation over the central part of the image is maximised in
//! (dx, dy, angle) with sub-pixel, bilinear sampling, by Levenberg–Marquardt
//! steps on the equivalent least-squares problem (see [`refine`]). The
//! match score is that correlation; a capture whose score
//! is below the study's limit is flagged as not registered, never guessed.
//!
//! The motion maps reference-capture coordinates to capture coordinates:
//! `q = R(θ)(p − c) + c + (dx, dy)`, the convention of vessel-segment files.

use std::sync::Arc;

use rustfft::num_complex::Complex;
use rustfft::{Fft, FftPlanner};

use crate::fit::small::SmallProblem;
use crate::fit::{Options, minimize};

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
    Some(Tap::new(w, h, x, y)?.read(img))
}

/// Where and with what weights [`bilinear`] reads one point, so that the
/// same point can be read in several bands of one capture for the price of
/// locating it once.
#[derive(Debug, Clone, Copy)]
pub(crate) struct Tap {
    i00: usize,
    i10: usize,
    i01: usize,
    i11: usize,
    fx: f64,
    fy: f64,
}

impl Tap {
    /// `None` outside the image.
    pub(crate) fn new(w: usize, h: usize, x: f64, y: f64) -> Option<Tap> {
        if !(x >= 0.0 && y >= 0.0 && x <= (w - 1) as f64 && y <= (h - 1) as f64) {
            return None;
        }
        // Truncation is the floor here (both are at least 0), without a libm call.
        let (x0, y0) = (x as usize, y as usize);
        let (x1, y1) = ((x0 + 1).min(w - 1), (y0 + 1).min(h - 1));
        Some(Tap {
            i00: y0 * w + x0,
            i10: y0 * w + x1,
            i01: y1 * w + x0,
            i11: y1 * w + x1,
            fx: x - x0 as f64,
            fy: y - y0 as f64,
        })
    }

    /// The interpolated value in `img` (of the size the tap was made for).
    pub(crate) fn read(&self, img: &[f32]) -> f64 {
        let (fx, fy) = (self.fx, self.fy);
        let p = |i: usize| img[i] as f64;
        (p(self.i00) * (1.0 - fx) + p(self.i10) * fx) * (1.0 - fy)
            + (p(self.i01) * (1.0 - fx) + p(self.i11) * fx) * fy
    }
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

/// Bilinear sample and its gradient (of the interpolant, within the cell);
/// `None` outside.
#[inline]
fn bilinear_gradient(img: &[f32], w: usize, h: usize, x: f64, y: f64) -> Option<[f64; 3]> {
    if !(x >= 0.0 && y >= 0.0 && x < (w - 1) as f64 && y < (h - 1) as f64) {
        return None;
    }
    let (x0, y0) = (x as usize, y as usize);
    let (fx, fy) = (x - x0 as f64, y - y0 as f64);
    let i = y0 * w + x0;
    let (p00, p10) = (img[i] as f64, img[i + 1] as f64);
    let (p01, p11) = (img[i + w] as f64, img[i + w + 1] as f64);
    Some([
        (p00 * (1.0 - fx) + p10 * fx) * (1.0 - fy) + (p01 * (1.0 - fx) + p11 * fx) * fy,
        (p10 - p00) * (1.0 - fy) + (p11 - p01) * fy,
        (p01 - p00) * (1.0 - fx) + (p11 - p10) * fx,
    ])
}

/// The fine search from `start` (dx, dy, angle in degrees) over `points`:
/// minimises `Σ(g·bᵢ(p) + o − aᵢ)²` over the motion p, a gain g and an
/// offset o, where aᵢ is the reference and bᵢ(p) the moving image sampled
/// where point i lands. For a given motion the best g and o leave
/// `Σ(aᵢ − ā)²·(1 − ρ²)`, ρ the correlation, and `Σ(aᵢ − ā)²` does not
/// depend on the motion: the minimum is the maximum of the normalised
/// cross-correlation, reached by Levenberg–Marquardt steps with the
/// interpolant's gradient in a handful of passes over the points.
fn refine(
    reference: &[f32],
    moving: &[f32],
    w: usize,
    h: usize,
    points: &[(usize, usize)],
    start: [f64; 3],
) -> [f64; 3] {
    let (cx, cy) = (w as f64 / 2.0, h as f64 / 2.0);
    let rows = |x: &[f64; 5], out: &mut dyn FnMut(f64, &[f64; 5])| {
        let (sin, cos) = x[2].to_radians().sin_cos();
        let rad = std::f64::consts::PI / 180.0;
        for &(px, py) in points {
            let (u, v) = (px as f64 - cx, py as f64 - cy);
            let q = rotate_shift(sin, cos, x[0], x[1], (px as f64, py as f64), cx, cy);
            let Some([b, bx, by]) = bilinear_gradient(moving, w, h, q.0, q.1) else {
                continue;
            };
            let a = reference[py * w + px] as f64;
            // ∂q/∂angle for the angle in degrees.
            let (qa_x, qa_y) = ((-sin * u - cos * v) * rad, (cos * u - sin * v) * rad);
            let g = x[3];
            out(
                g * b + x[4] - a,
                &[g * bx, g * by, g * (bx * qa_x + by * qa_y), b, 1.0],
            );
        }
    };
    // The gain and offset start from the regression of the reference on
    // the moving image at the start. The same pass finds the largest
    // diagonal element of JᵀJ (at unit gain): the loop's first damping is
    // `tau` times it on each parameter's own scale, and summed over tens of
    // thousands of points it is huge, so `tau` is divided by it to make the
    // first damping a thousandth of each parameter's curvature, as on a
    // unit-scaled problem.
    let (mut n, mut sa, mut sb, mut sbb, mut sab) = (0.0f64, 0.0, 0.0, 0.0, 0.0);
    let mut diagonal = [0.0f64; 5];
    rows(&[start[0], start[1], start[2], 1.0, 0.0], &mut |r, j| {
        let (b, a) = (j[3], j[3] - r);
        n += 1.0;
        sa += a;
        sb += b;
        sbb += b * b;
        sab += a * b;
        for (d, v) in diagonal.iter_mut().zip(j) {
            *d += v * v;
        }
    });
    let vb = sbb - sb * sb / n.max(1.0);
    let gain = if vb > 0.0 {
        (sab - sa * sb / n) / vb
    } else {
        1.0
    };
    let offset = (sa - gain * sb) / n.max(1.0);
    let model = |x: &[f64; 5], out: &mut dyn FnMut(f64, &[f64; 5])| {
        rows(x, out);
        true
    };
    let inf = f64::INFINITY;
    let problem = SmallProblem::new(&model, [-inf; 5], [inf; 5]);
    let x0 = [start[0], start[1], start[2], gain, offset];
    let largest = diagonal.into_iter().fold(0.0, f64::max);
    let rep = minimize(
        &problem,
        &x0,
        &Options {
            max_iterations: 100,
            ftol: 1e-10,
            xtol: 1e-8,
            gtol: 1e-8,
            tau: 1e-3 / largest.max(1.0),
        },
    );
    if rep.cost.is_finite() {
        [rep.x[0], rep.x[1], rep.x[2]]
    } else {
        start
    }
}

/// Fewest points a correlation is taken over.
const MIN_POINTS: usize = 100;

/// Regions per side for [`Registration::worst_region`].
pub(crate) const REGIONS: usize = 4;

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
    let ru = r as usize;
    // One pixel near an edge, its indices clamped.
    let clamped = |src: &[f32], x: usize, y: usize, horizontal: bool| -> f64 {
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
        acc
    };
    // Away from the edges a whole row is accumulated tap by tap: each
    // pixel still sums its taps in the same order (same bits as one pixel
    // at a time), but the pixels of a row no longer wait on each other's
    // additions.
    let mut acc = vec![0.0f64; w];
    let mut horizontal = vec![0.0f32; w * h];
    for y in 0..h {
        let row = &img[y * w..(y + 1) * w];
        let out = &mut horizontal[y * w..(y + 1) * w];
        if w > 2 * ru {
            let inner = w - 2 * ru;
            acc[..inner].fill(0.0);
            for (j, kv) in k.iter().enumerate() {
                for (a, v) in acc[..inner].iter_mut().zip(&row[j..j + inner]) {
                    *a += kv * *v as f64;
                }
            }
            for (o, a) in out[ru..ru + inner].iter_mut().zip(&acc[..inner]) {
                *o = (a / ks) as f32;
            }
        }
        for x in (0..w).filter(|x| *x < ru || *x + ru >= w) {
            out[x] = (clamped(img, x, y, true) / ks) as f32;
        }
    }
    let mut out = vec![0.0f32; w * h];
    for y in 0..h {
        if y >= ru && y + ru < h {
            acc.fill(0.0);
            for (j, kv) in k.iter().enumerate() {
                let src = &horizontal[(y - ru + j) * w..(y - ru + j + 1) * w];
                for (a, v) in acc.iter_mut().zip(src) {
                    *a += kv * *v as f64;
                }
            }
            for (o, a) in out[y * w..(y + 1) * w].iter_mut().zip(&acc) {
                *o = (a / ks) as f32;
            }
        } else {
            for x in 0..w {
                out[y * w + x] = (clamped(&horizontal, x, y, false) / ks) as f32;
            }
        }
    }
    out
}

/// Registers `moving` to `reference` (both one band of a capture, same size).
/// Rotations up to `max_angle_deg` are searched. For many captures against
/// one reference, prepare it once with [`RegistrationTarget::new`].
pub fn register(
    reference: &[f32],
    moving: &[f32],
    w: usize,
    h: usize,
    max_angle_deg: f64,
) -> Registration {
    RegistrationTarget::new(reference, w, h).register(moving, max_angle_deg)
}

/// A reference image made ready for registering captures to it: smoothed,
/// block-averaged for the coarse search and transformed for phase
/// correlation once, however many captures an eye has.
pub struct RegistrationTarget {
    w: usize,
    h: usize,
    /// The reference smoothed (Gaussian, σ = 1 px). Both images are
    /// smoothed: with noisy images, bilinear interpolation would otherwise
    /// favour whole-pixel shifts, where it averages no noise away.
    smoothed: Vec<f32>,
    /// Block-averaging factor of the coarse search.
    factor: usize,
    correlator: PhaseCorrelator,
}

impl RegistrationTarget {
    pub fn new(reference: &[f32], w: usize, h: usize) -> Self {
        let smoothed = blur(reference, w, h, 1.0);
        // Large images are block-averaged to about 256 px for the coarse
        // search: its estimate only has to land within the fine search's reach.
        let factor = w.max(h).div_ceil(256).max(1);
        let coarse = if factor > 1 {
            downsample(&smoothed, w, h, factor)
        } else {
            smoothed.clone()
        };
        let refd: Vec<f64> = coarse.iter().map(|v| *v as f64).collect();
        let correlator = PhaseCorrelator::new(&refd, w / factor, h / factor);
        RegistrationTarget {
            w,
            h,
            smoothed,
            factor,
            correlator,
        }
    }

    /// Registers `moving` (same size as the reference) to the reference.
    pub fn register(&self, moving: &[f32], max_angle_deg: f64) -> Registration {
        let (w, h, f) = (self.w, self.h, self.factor);
        let reference = &self.smoothed[..];
        let moving = &blur(moving, w, h, 1.0)[..];
        // Coarse: phase correlation of the moving image rotated back by
        // each angle.
        let (ms, ws, hs) = if f > 1 {
            (downsample(moving, w, h, f), w / f, h / f)
        } else {
            (moving.to_vec(), w, h)
        };
        let (cxs, cys) = (ws as f64 / 2.0, hs as f64 / 2.0);
        let steps = (max_angle_deg / 0.5).ceil() as i32;
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
            let (dx, dy, peak) = self.correlator.shift(&unrot);
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
        let mut best = [coarse.0, coarse.1, coarse.2];
        // Two passes: the sparse grid from the coarse estimate, then the
        // finer grid from the first optimum.
        for pts in [&coarse_points, &full] {
            best = refine(reference, moving, w, h, pts, best);
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
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The blur one pixel at a time with every index clamped, as it was
    /// first written: the reference for the faster version's bits.
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
        // Sizes with an interior and one (6 × 5 at σ 2.5) without.
        for (w, h) in [(37, 23), (6, 5)] {
            let img: Vec<f32> = (0..w * h)
                .map(|i| ((i * 7919) % 1013) as f32 * 0.37 + (i % 5) as f32)
                .collect();
            for sigma in [0.6, 1.0, 2.5] {
                let (a, b) = (blur(&img, w, h, sigma), blur_clamped(&img, w, h, sigma));
                assert!(
                    a.iter().zip(&b).all(|(x, y)| x.to_bits() == y.to_bits()),
                    "{w} × {h}, σ {sigma}"
                );
            }
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
