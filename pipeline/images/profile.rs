//! Profiles across a vessel segment: at regular spacing along the
//! segment's polyline (in the capture's coordinates), intensities are
//! sampled along the normal (bilinear, 0.5 px steps). A straight background
//! is fitted to the two outer parts of the profile; the profile divided by
//! it is fitted with the transmission profile of an absorbing cylinder,
//! `1 − A·(1 − e^(−κ√(1 − u²)))/(1 − e^(−κ))`, `u = (s − c)/r`, 1 beyond
//! |u| = 1 (centre c, half-width r, depth A, absorption strength κ).
//! The band chosen for widths gives c and r; every band's transmission is
//! then the normalised intensity on the centre line, `T = I_vessel /
//! I_background`, averaged over a window of ±0.2 r (at least ±0.5 px).
//! Where a central light reflex brightens the axis, the shape is fitted
//! without it and T is read at the darkest points beside it (a little high,
//! as the chord is shorter there: about +5 % at strong absorption).
//! With the instrument's point-spread function (`psf_sd_px`), the shape is
//! fitted through the blur, with a reflex term, instead ([`super::shape`]).
//!
//! Flags (kept with the row, never dropped): `off-image` (the profile
//! leaves the image), `low-contrast` (depth below the limit in the width
//! band), `poor-fit` (RMS residual of the normalised profile above the
//! limit, or the shape fit ended on a limit of its search box in depth,
//! centre or radius: see [`at_limit`]), `near-segment` (another segment passes within the profile's
//! vessel part plus a margin), `odd-width` (the fitted diameter is less
//! than 2/3 or more than 3/2 of the median over the segment's unflagged
//! positions in the same capture: see [`flag_odd_widths`]).

use nalgebra::{Matrix3, Vector3};

use super::ingest::Multiband;
use super::register::Tap;
use super::shape::{Blur, Free, at_limit, fit_blurred, fit_shape, fit_shape_masked};

#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct ProfileSettings {
    /// Distance between profiles along the segment, px.
    pub spacing_px: f64,
    /// Profile half-length, px.
    pub half_length_px: f64,
    /// Profiles closer than this to either end of the segment are not taken, px.
    pub end_margin_px: f64,
    pub min_contrast: f64,
    pub max_rms: f64,
    pub neighbour_margin_px: f64,
    /// SD of the optics' Gaussian point-spread function, px; 0 for none
    /// (the profiles are then fitted sharp, see [`super::shape`]).
    pub psf_sd_px: f64,
}

impl Default for ProfileSettings {
    fn default() -> Self {
        ProfileSettings {
            spacing_px: 2.0,
            half_length_px: 16.0,
            end_margin_px: 4.0,
            min_contrast: 0.03,
            max_rms: 0.035,
            neighbour_margin_px: 2.0,
            psf_sd_px: 0.0,
        }
    }
}

/// Why a profile position is not used, as the positions table writes it.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Flag {
    OffImage,
    LowContrast,
    PoorFit,
    NearSegment,
    OddWidth,
}

impl Flag {
    /// Flags as one cell: `;`-separated, empty for none.
    pub fn join(flags: &[Flag]) -> String {
        flags
            .iter()
            .map(|f| f.as_str())
            .collect::<Vec<_>>()
            .join(";")
    }

    pub fn as_str(&self) -> &'static str {
        match self {
            Flag::OffImage => "off-image",
            Flag::LowContrast => "low-contrast",
            Flag::PoorFit => "poor-fit",
            Flag::NearSegment => "near-segment",
            Flag::OddWidth => "odd-width",
        }
    }
}

#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct ProfileResult {
    pub position: usize,
    /// Distance along the segment from its first point, px.
    pub along_px: f64,
    pub x: f64,
    pub y: f64,
    pub diameter_px: f64,
    /// Per band.
    pub transmission: Vec<f64>,
    pub background: Vec<f64>,
    pub rms: f64,
    pub flags: Vec<Flag>,
    /// A central light reflex was found (T read beside it; with a blur,
    /// on the centre line with the reflex's light in it).
    pub reflex: bool,
}

/// The darkest normalised value on each side of the axis within half a
/// radius, as offsets from the centre: (x_left, x_right).
fn flank_minima(s: &[f64], p: &[f64], c: f64, r: f64) -> Option<(f64, f64, f64, f64)> {
    let side = |sign: f64| {
        s.iter()
            .zip(p)
            .filter(|(x, _)| (0.05..=0.5).contains(&(sign * (**x - c) / r)))
            .map(|(x, v)| (*x, *v))
            .min_by(|a, b| a.1.total_cmp(&b.1))
    };
    let (l, rr) = (side(-1.0)?, side(1.0)?);
    Some((l.0, l.1, rr.0, rr.1))
}

/// The profile's own first guess of (A, c, r, κ): its darkest point, and
/// the width where it is darker than half that depth.
fn first_guess(s: &[f64], p: &[f64], half: f64) -> [f64; 4] {
    let imin = (0..p.len())
        .min_by(|i, j| p[*i].total_cmp(&p[*j]))
        .unwrap_or(0);
    let depth = (1.0 - p[imin]).max(0.01);
    let inside = p.iter().filter(|v| **v < 1.0 - depth / 2.0).count() as f64 * 0.5;
    [
        depth,
        s[imin].clamp(-half / 2.0, half / 2.0),
        (inside * 0.65).clamp(1.5, half * 0.8),
        1.0,
    ]
}

/// With a blur, a fitted reflex share above this (and significant, see
/// [`REFLEX_F`]) is reported as a reflex; below, it is noise on a plain
/// vessel.
const MIN_REFLEX_SHARE: f64 = 0.05;

/// What pixel integration and bilinear sampling add to the optics'
/// blur, px² (see `analyse_segment`).
const SAMPLING_VARIANCE_PX2: f64 = 1.0 / 6.0;

/// The F statistic a reflex share must reach to be taken (about p < 1e-5
/// for one and 60 degrees of freedom).
const REFLEX_F: f64 = 25.0;

/// A central light reflex: a bright bump on the axis between two darker
/// flanks, the centre (|u| < 0.1 of the radius) brighter than the darkest
/// point on each side by more than 0.02 of the background. Without a reflex
/// the centre is the darkest part of a vessel's profile. Returns the span
/// between the flank minima.
fn find_reflex(s: &[f64], p: &[f64], c: f64, r: f64) -> Option<(f64, f64)> {
    let (xl, l, xr, rr) = flank_minima(s, p, c, r)?;
    let centre: Vec<f64> = s
        .iter()
        .zip(p)
        .filter(|(x, _)| (**x - c).abs() / r < 0.1)
        .map(|(_, t)| *t)
        .collect();
    if centre.is_empty() {
        return None;
    }
    let m = centre.iter().sum::<f64>() / centre.len() as f64;
    (m - l > 0.02 && m - rr > 0.02).then_some((xl, xr))
}

/// Quadratic background through the outer parts of the profile
/// (|s − c| > edge) that `keep` does not exclude (all, if empty), as
/// `[b0, b1, b2]`: vignetting curves the background measurably over a
/// profile's length. With fewer than four samples on a side (a neighbour
/// keeps the rest out) but two or more, a straight line, still
/// interpolated across the vessel: its curvature over the gap is a few
/// tenths of a percent. `None` with fewer.
fn background(s: &[f64], v: &[f64], c: f64, edge: f64, keep: &[bool]) -> Option<[f64; 3]> {
    // Least squares through the normal equations, accumulated in place:
    // three well-scaled unknowns (s is at most a few tens of pixels).
    let (mut gram, mut rhs) = (Matrix3::<f64>::zeros(), Vector3::<f64>::zeros());
    let (mut n, mut left) = (0, 0);
    for (i, (x, y)) in s.iter().zip(v).enumerate() {
        if (*x - c).abs() <= edge || keep.get(i) == Some(&false) {
            continue;
        }
        n += 1;
        if *x < c {
            left += 1;
        }
        let m = Vector3::new(1.0, *x, x * x);
        gram += m * m.transpose();
        rhs += m * *y;
    }
    let fewest = left.min(n - left);
    if fewest >= 4 && n >= 8 {
        let sol = gram.lu().solve(&rhs)?;
        return Some([sol[0], sol[1], sol[2]]);
    }
    if fewest < 2 {
        return None;
    }
    let line = gram.fixed_view::<2, 2>(0, 0).into_owned();
    let sol = line.lu().solve(&rhs.fixed_rows::<2>(0).into_owned())?;
    Some([sol[0], sol[1], 0.0])
}

fn eval_bg(b: &[f64; 3], x: f64) -> f64 {
    b[0] + b[1] * x + b[2] * x * x
}

fn distance_to(points: &[(f64, f64)], p: (f64, f64)) -> f64 {
    points
        .windows(2)
        .map(|w| {
            let (a, b) = (w[0], w[1]);
            let (vx, vy) = (b.0 - a.0, b.1 - a.1);
            let l2 = vx * vx + vy * vy;
            let u = if l2 > 0.0 {
                (((p.0 - a.0) * vx + (p.1 - a.1) * vy) / l2).clamp(0.0, 1.0)
            } else {
                0.0
            };
            ((p.0 - a.0 - u * vx).powi(2) + (p.1 - a.1 - u * vy).powi(2)).sqrt()
        })
        .fold(f64::INFINITY, f64::min)
}

/// A point or a direction in the image, px.
type Point = (f64, f64);

/// The profile across `line` at `along` pixels down it (`cum` its
/// [`arc_lengths`]): the centre, the unit normal, and the image points at
/// the offsets `s` along the normal (`None` where one is off the image).
fn profile_taps(
    img: &Multiband,
    line: &[(f64, f64)],
    cum: &[f64],
    along: f64,
    s: &[f64],
) -> (Point, Point, Option<Vec<Tap>>) {
    let (centre, (tx, ty)) = locate(line, cum, along);
    let normal = (-ty, tx);
    let taps = s
        .iter()
        .map(|d| {
            Tap::new(
                img.width,
                img.height,
                centre.0 + d * normal.0,
                centre.1 + d * normal.1,
            )
        })
        .collect();
    (centre, normal, taps)
}

/// A profile's sample offsets along its normal, px: every half pixel
/// from −`half` to `half`.
fn profile_offsets(half: f64) -> Vec<f64> {
    (0..=(4.0 * half) as usize)
        .map(|i| -half + 0.5 * i as f64)
        .collect()
}

/// Cumulative length of a polyline at each of its points, from 0.
pub(crate) fn arc_lengths(line: &[(f64, f64)]) -> Vec<f64> {
    let mut cum = vec![0.0];
    for w in line.windows(2) {
        let last = cum[cum.len() - 1];
        cum.push(last + ((w[1].0 - w[0].0).powi(2) + (w[1].1 - w[0].1).powi(2)).sqrt());
    }
    cum
}

/// The point `along` pixels down a polyline of at least two points, and
/// the unit tangent there; `cum` is [`arc_lengths`] of the line.
pub(crate) fn locate(line: &[(f64, f64)], cum: &[f64], along: f64) -> ((f64, f64), (f64, f64)) {
    let seg = cum
        .partition_point(|c| *c <= along)
        .clamp(1, line.len() - 1);
    let (a, b) = (line[seg - 1], line[seg]);
    let len = cum[seg] - cum[seg - 1];
    let f = if len > 0.0 {
        (along - cum[seg - 1]) / len
    } else {
        0.0
    };
    (
        (a.0 + f * (b.0 - a.0), a.1 + f * (b.1 - a.1)),
        ((b.0 - a.0) / len.max(1e-12), (b.1 - a.1) / len.max(1e-12)),
    )
}

/// Another segment of the same capture, as a profile meets it: its line
/// (in the capture's coordinates) and its radius, px.
#[derive(Debug, Clone, PartialEq)]
pub struct Neighbour {
    pub line: Vec<(f64, f64)>,
    /// NaN where not known: the neighbour then only flags the positions it
    /// passes through ([`Flag::NearSegment`]); with a radius, its samples
    /// are also kept out of the background.
    pub radius_px: f64,
}

impl Neighbour {
    /// The other lines of `lines` than the `k`-th, with their radii
    /// (`radii[j]` for line `j`; NaN for all when `radii` is empty).
    pub fn all_but(lines: &[Vec<(f64, f64)>], radii: &[f64], k: usize) -> Vec<Neighbour> {
        lines
            .iter()
            .enumerate()
            .filter(|(j, _)| *j != k)
            .map(|(j, l)| Neighbour {
                line: l.clone(),
                radius_px: radii.get(j).copied().unwrap_or(f64::NAN),
            })
            .collect()
    }
}

/// Every fourth profile position of each line is analysed, without keeping
/// neighbours out of the background, for the lines' radii (px): the median
/// half-diameter over the usable positions, NaN with none. What
/// [`analyse_segment`] then keeps out of each other's background.
pub fn vessel_radii(
    img: &Multiband,
    lines: &[Vec<(f64, f64)>],
    width_band: usize,
    st: &ProfileSettings,
) -> Vec<f64> {
    let sparse = ProfileSettings {
        spacing_px: 4.0 * st.spacing_px,
        ..*st
    };
    (0..lines.len())
        .map(|k| {
            let others = Neighbour::all_but(lines, &[], k);
            let half: Vec<f64> = analyse_segment(img, &lines[k], &others, width_band, &sparse)
                .into_iter()
                .filter(|r| r.flags.is_empty())
                .map(|r| r.diameter_px / 2.0)
                .collect();
            median(half)
        })
        .collect()
}

/// Analyses one segment (its polyline already in this capture's
/// coordinates) against the capture's other segments.
pub fn analyse_segment(
    img: &Multiband,
    line: &[(f64, f64)],
    others: &[Neighbour],
    width_band: usize,
    st: &ProfileSettings,
) -> Vec<ProfileResult> {
    let cum = arc_lengths(line);
    let total = *cum.last().unwrap_or(&0.0);
    let half = st.half_length_px;
    let s = profile_offsets(half);
    // The profile is blurred by more than the optics: each pixel
    // integrates its area (a box, variance 1/12 px²) and the profile is
    // read between pixels by bilinear interpolation (on average another
    // 1/12 px²).
    let blur = Blur::new(
        if st.psf_sd_px > 0.0 {
            (st.psf_sd_px.powi(2) + SAMPLING_VARIANCE_PX2).sqrt()
        } else {
            0.0
        },
        0.5,
    );
    let blur_sd = st.psf_sd_px.max(0.0);
    let mut out = Vec::new();
    let mut along = st.end_margin_px;
    let mut k = 0;
    while along <= total - st.end_margin_px {
        let mut flags = Vec::new();
        // The profile's points are located once and read in every band.
        let (centre, normal, taps) = profile_taps(img, line, &cum, along, &s);
        // Samples on a neighbouring vessel are not background: its dark
        // band would bend the quadratic background and raise it under this
        // vessel (on simulated studies, T read up to 9 % low and SO2 about
        // 3 points low).
        let keep: Vec<bool> = s
            .iter()
            .map(|d| {
                let p = (centre.0 + d * normal.0, centre.1 + d * normal.1);
                others.iter().all(|o| {
                    !(o.radius_px >= 0.0)
                        || distance_to(&o.line, p)
                            > o.radius_px + st.neighbour_margin_px + 2.0 * blur_sd
                })
            })
            .collect();
        let trimmed = keep.contains(&false);
        // The profile over its background; on the neighbour, the
        // background itself (1), so that the first guess does not take
        // the neighbour for the vessel. The shape fits leave those
        // samples out (`keep`).
        let normalise = |v: &[f64], bq: &[f64; 3]| -> Vec<f64> {
            s.iter()
                .zip(v)
                .zip(&keep)
                .map(|((x, v), k)| if *k { v / eval_bg(bq, *x) } else { 1.0 })
                .collect()
        };
        let sample = |band: usize| -> Option<Vec<f64>> {
            let taps = taps.as_ref()?;
            Some(taps.iter().map(|t| t.read(&img.bands[band])).collect())
        };
        let Some(wv) = sample(width_band) else {
            flags.push(Flag::OffImage);
            out.push(ProfileResult {
                position: k,
                along_px: along,
                x: centre.0,
                y: centre.1,
                diameter_px: f64::NAN,
                transmission: vec![f64::NAN; img.bands.len()],
                background: vec![f64::NAN; img.bands.len()],
                rms: f64::NAN,
                flags,
                reflex: false,
            });
            k += 1;
            along += st.spacing_px;
            continue;
        };
        // Width band: background from the outer 40 %, fit, then refit the
        // background outside the fitted vessel and fit again.
        // (Beside a near neighbour the outer 40 % can hold too little of
        // the background on one side; the level of what is left then
        // serves until the first fit has placed the vessel.)
        let mut bg = background(&s, &wv, 0.0, 0.6 * half, &keep).or_else(|| {
            let outer: Vec<f64> = s
                .iter()
                .zip(&wv)
                .zip(&keep)
                .filter(|((x, _), k)| x.abs() > 0.6 * half && **k)
                .map(|((_, v), _)| *v)
                .collect();
            (outer.len() >= 4).then(|| [median(outer), 0.0, 0.0])
        });
        let mut q = [0.3, 0.0, half / 3.0, 1.0];
        let mut rms = f64::NAN;
        // A central light reflex (a bright stripe on the vessel's axis)
        // would pull the shape fit and raise the centre-line T: once a first
        // fit has placed the vessel, a reflex is looked for in the width band;
        // if found, the shape is refitted without it and T is read at the
        // darkest points beside it.
        let mut reflex: Option<(f64, f64)> = None;
        // With a blur: the blurred model's fit, (A, c, r, κ, ρ).
        let mut blurred_fit: Option<[f64; 5]> = None;
        let mut blurred_reflex = false;
        let mut fits = 0;
        while let Some(blur) = &blur {
            fits += 1;
            let Some(bq) = bg.filter(|_| fits <= 2) else {
                break;
            };
            let p = normalise(&wv, &bq);
            let start = match blurred_fit {
                Some(q5) => q5,
                None => {
                    let q0 = first_guess(&s, &p, half);
                    [q0[0], q0[1], q0[2], q0[3], 0.0]
                }
            };
            // A reflex is taken only where it explains the profile: the
            // extra sum of squares its share removes, against the residual
            // variance with it, beyond an F of [`REFLEX_F`] (1 and n − 5
            // degrees of freedom). Otherwise the share is noise, or the
            // cylinder's shape missing the vessel's, and would report a
            // reflex that is not there.
            let (plain, r0) = fit_blurred(&s, &p, start, Free::Shape, half, blur, &keep);
            let (with, r1) = fit_blurred(
                &s,
                &p,
                [plain[0], plain[1], plain[2], plain[3], 0.2],
                Free::All,
                half,
                blur,
                &keep,
            );
            let n = keep.iter().filter(|k| **k).count() as f64;
            let f = (r0 * r0 - r1 * r1) * n / (r1 * r1 * n / (n - 5.0)).max(1e-300);
            blurred_reflex = with[4] > MIN_REFLEX_SHARE && f > REFLEX_F;
            let (fq, r) = if blurred_reflex {
                (with, r1)
            } else {
                (plain, r0)
            };
            blurred_fit = Some(fq);
            q = [fq[0], fq[1], fq[2], fq[3]];
            rms = r;
            bg = background(&s, &wv, q[1], q[2] + 2.0 + 2.0 * blur_sd, &keep).or(bg);
        }
        while blur.is_none() && (fits < 2 || (reflex.is_some() && fits < 3)) {
            fits += 1;
            let Some(bq) = bg else { break };
            let p = normalise(&wv, &bq);
            if fits == 2 {
                reflex = find_reflex(&s, &p, q[1], q[2]);
            }
            if reflex.is_some() {
                let (fq, r) = fit_shape_masked(&s, &p, q, None, half, reflex, &keep);
                q = fq;
                rms = r;
                bg = background(&s, &wv, q[1], q[2] + 2.0, &keep).or(bg);
                continue;
            }
            // The first fit starts from the profile's own depth and width.
            if fits == 1 {
                q = first_guess(&s, &p, half);
            }
            let (fq, r) = fit_shape_masked(&s, &p, q, None, half, None, &keep);
            q = fq;
            rms = r;
            bg = background(&s, &wv, q[1], q[2] + 2.0, &keep).or(bg);
        }
        let Some(_) = bg else {
            // Too little background left beside a neighbour is the
            // neighbour's doing.
            flags.push(if trimmed {
                Flag::NearSegment
            } else {
                Flag::PoorFit
            });
            out.push(ProfileResult {
                position: k,
                along_px: along,
                x: centre.0,
                y: centre.1,
                diameter_px: f64::NAN,
                transmission: vec![f64::NAN; img.bands.len()],
                background: vec![f64::NAN; img.bands.len()],
                rms,
                flags,
                reflex: false,
            });
            k += 1;
            along += st.spacing_px;
            continue;
        };
        let (c, r) = (q[1], q[2]);
        let mut trans = Vec::with_capacity(img.bands.len());
        let mut backs = Vec::with_capacity(img.bands.len());
        for band in 0..img.bands.len() {
            let v = if band == width_band {
                Some(wv.clone())
            } else {
                sample(band)
            };
            let Some(v) = v else {
                trans.push(f64::NAN);
                backs.push(f64::NAN);
                continue;
            };
            let Some(bq) = background(&s, &v, c, r + 2.0 + 2.0 * blur_sd, &keep) else {
                trans.push(f64::NAN);
                backs.push(f64::NAN);
                continue;
            };
            let p = normalise(&v, &bq);
            // T is the normalised intensity at the centre line: the mean
            // over a small central window (the fitted shape finds the centre
            // and width; at strong absorption its depth overshoots the data).
            let win = (0.2 * r).max(0.5);
            let central: Vec<f64> = match reflex {
                // Beside a reflex: the samples at the two flank minima.
                Some((xl, xr)) => s
                    .iter()
                    .zip(&p)
                    .filter(|(x, _)| (**x - xl).abs() < 0.26 || (**x - xr).abs() < 0.26)
                    .map(|(_, v)| *v)
                    .collect(),
                // On the centre line. Through a blur, too: the blur and a
                // reflex cannot be read around there, and what they add on
                // the centre line has nearly the form of a veil (module
                // docs), which the multiband fits' veil takes up.
                None => s
                    .iter()
                    .zip(&p)
                    .filter(|(x, _)| (**x - c).abs() <= win)
                    .map(|(_, v)| *v)
                    .collect(),
            };
            let t = if central.is_empty() {
                let (fq, _) = if band == width_band {
                    (q, rms)
                } else {
                    fit_shape_masked(&s, &p, [q[0], c, r, q[3]], Some((c, r)), half, None, &keep)
                };
                1.0 - fq[0]
            } else {
                central.iter().sum::<f64>() / central.len() as f64
            };
            trans.push(t);
            backs.push(eval_bg(&bq, c));
        }
        if q[0] < st.min_contrast {
            flags.push(Flag::LowContrast);
        }
        // Poor fit: residuals well above the noise seen in the background
        // parts of the same profile, neighbours left out (beyond `max_rms` +
        // 3 × that noise).
        let noise = {
            let pts: Vec<f64> = s
                .iter()
                .zip(normalise(&wv, &bg.expect("fitted")))
                .zip(&keep)
                .filter(|((x, _), k)| (**x - c).abs() > r + 2.0 && **k)
                .map(|((_, v), _)| v - 1.0)
                .collect();
            (pts.iter().map(|e| e * e).sum::<f64>() / pts.len().max(1) as f64).sqrt()
        };
        // A background extrapolated to zero or below under the vessel makes
        // the ratio meaningless, however well the shape fitted.
        let bad_ratio = trans.iter().any(|t| !t.is_finite() || *t <= 0.0);
        if !(rms <= st.max_rms + 3.0 * noise) || bad_ratio || at_limit(&q, half) {
            flags.push(Flag::PoorFit);
        }
        if bad_ratio && trimmed && !flags.contains(&Flag::NearSegment) {
            flags.push(Flag::NearSegment);
        }
        let here = (centre.0 + c * normal.0, centre.1 + c * normal.1);
        if !flags.contains(&Flag::NearSegment)
            && others
                .iter()
                .any(|o| distance_to(&o.line, here) < r + st.neighbour_margin_px + 1.0)
        {
            flags.push(Flag::NearSegment);
        }
        out.push(ProfileResult {
            position: k,
            along_px: along,
            x: here.0,
            y: here.1,
            diameter_px: 2.0 * r,
            transmission: trans,
            background: backs,
            rms,
            flags,
            reflex: reflex.is_some() || blurred_reflex,
        });
        k += 1;
        along += st.spacing_px;
    }
    flag_odd_widths(&mut out);
    if blur.is_some() {
        spread_reflex(&mut out);
    }
    out
}

/// A reflex belongs to the vessel, not to one profile: where at least
/// [`REFLEX_SEGMENT_SHARE`] of a segment's usable positions show one by the
/// test of `analyse_segment` (a share above [`MIN_REFLEX_SHARE`] at an F
/// above [`REFLEX_F`]), every usable position of the segment is marked.
/// Through a blur that test misses the reflex on many profiles of a vessel
/// that carries it (about 40 % of arteriolar ones at σ = 1.5 px), while it
/// never fired on a vessel without one. Only the mark changes: the other
/// positions keep the fit without the reflex term, and T is read on the
/// centre line either way, the reflex's light in it.
fn spread_reflex(out: &mut [ProfileResult]) {
    let usable = out.iter().filter(|p| p.flags.is_empty()).count();
    let shown = out
        .iter()
        .filter(|p| p.flags.is_empty() && p.reflex)
        .count();
    if usable == 0 || (shown as f64) < REFLEX_SEGMENT_SHARE * usable as f64 {
        return;
    }
    for p in out.iter_mut().filter(|p| p.flags.is_empty()) {
        p.reflex = true;
    }
}

/// The share of a segment's usable positions with a reflex shown above
/// which the whole segment is marked (`spread_reflex`).
const REFLEX_SEGMENT_SHARE: f64 = 0.25;

/// The point-spread SDs (px, the optics' part) at which [`blur_evidence`]
/// weighs a segment's profiles.
pub const BLUR_GRID_PX: [f64; 7] = [0.0, 0.5, 1.0, 1.5, 2.0, 2.5, 3.0];

/// The Gaussian blur that best describes each of a segment's profiles at
/// `positions` (distances along the line, px): the blurred vessel model
/// (its reflex term free, so that a reflex is not taken for a blur) is
/// fitted at each SD of [`BLUR_GRID_PX`], and the SD of least residual is
/// refined by [`estimate_blur`]. Profiles that cannot be read or placed
/// are passed over. For a study run without `psf_sd_px`, so that a blur it
/// does not know of is found. Each profile is read, its background fitted
/// and the sharp cylinder placed as in [`analyse_segment`]'s first pass;
/// the background is then refitted outside the widest blur weighed.
pub fn blur_evidence(
    img: &Multiband,
    line: &[(f64, f64)],
    positions: &[f64],
    width_band: usize,
    st: &ProfileSettings,
) -> Vec<f64> {
    let cum = arc_lengths(line);
    let half = st.half_length_px;
    let s = profile_offsets(half);
    let blurs: Vec<Blur> = BLUR_GRID_PX
        .iter()
        .filter_map(|sd| Blur::new((sd * sd + SAMPLING_VARIANCE_PX2).sqrt(), 0.5))
        .collect();
    let mut best = Vec::new();
    for &along in positions {
        let (_, _, taps) = profile_taps(img, line, &cum, along, &s);
        let Some(wv): Option<Vec<f64>> =
            taps.map(|t| t.iter().map(|t| t.read(&img.bands[width_band])).collect())
        else {
            continue;
        };
        let ratio = |bq: &[f64; 3]| -> Vec<f64> {
            s.iter()
                .zip(&wv)
                .map(|(x, v)| v / eval_bg(bq, *x))
                .collect()
        };
        let Some(bq) = background(&s, &wv, 0.0, 0.6 * half, &[]) else {
            continue;
        };
        let p = ratio(&bq);
        let (q, _) = fit_shape(&s, &p, first_guess(&s, &p, half), None, half);
        let edge = q[2] + 2.0 + 2.0 * BLUR_GRID_PX[BLUR_GRID_PX.len() - 1];
        let Some(bq) = background(&s, &wv, q[1], edge, &[]) else {
            continue;
        };
        if q[0] < st.min_contrast || at_limit(&q, half) {
            continue;
        }
        let p = ratio(&bq);
        let fits: Vec<f64> = blurs
            .iter()
            .map(|b| {
                let (_, r) = fit_blurred(
                    &s,
                    &p,
                    [q[0], q[1], q[2], q[3], 0.0],
                    Free::All,
                    half,
                    b,
                    &[],
                );
                r * r * s.len() as f64
            })
            .collect();
        best.extend(estimate_blur(&fits));
    }
    best
}

/// The point-spread SD (px) that best describes a profile whose residual
/// sums of squares at the SDs of [`BLUR_GRID_PX`] are `rss`: the grid's
/// minimum refined by a parabola through it and its neighbours. `None`
/// where some fit failed.
pub fn estimate_blur(rss: &[f64]) -> Option<f64> {
    if rss.len() != BLUR_GRID_PX.len() || !rss.iter().all(|v| v.is_finite() && *v > 0.0) {
        return None;
    }
    let i = (0..rss.len()).min_by(|a, b| rss[*a].total_cmp(&rss[*b]))?;
    if i == 0 || i + 1 == rss.len() {
        return Some(BLUR_GRID_PX[i]);
    }
    let (a, b, c) = (rss[i - 1], rss[i], rss[i + 1]);
    let h = BLUR_GRID_PX[1] - BLUR_GRID_PX[0];
    let curvature = a - 2.0 * b + c;
    let shift = if curvature > 0.0 {
        0.5 * (a - c) / curvature
    } else {
        0.0
    };
    Some(BLUR_GRID_PX[i] + shift.clamp(-0.5, 0.5) * h)
}

/// A vessel's width changes slowly along a segment; a profile whose
/// fitted width is far from the rest has met something else: a vessel
/// not drawn as a segment beside it or across it (which `near-segment`
/// cannot know of), the vessel's rounded end, or a branch. Such positions
/// (below 2/3 or above 3/2 of the median of the unflagged ones, with at
/// least [`MIN_FOR_WIDTH_MEDIAN`] of them) are flagged `odd-width`.
fn flag_odd_widths(out: &mut [ProfileResult]) {
    let widths: Vec<f64> = out
        .iter()
        .filter(|p| p.flags.is_empty() && p.diameter_px.is_finite())
        .map(|p| p.diameter_px)
        .collect();
    if widths.len() < MIN_FOR_WIDTH_MEDIAN {
        return;
    }
    let median = median(widths);
    for p in out.iter_mut().filter(|p| p.flags.is_empty()) {
        let ratio = p.diameter_px / median;
        // NaN ratios fall outside too.
        if !(2.0 / 3.0..=1.5).contains(&ratio) {
            p.flags.push(Flag::OddWidth);
        }
    }
}

/// Fewer unflagged positions than this give no median width to judge by.
const MIN_FOR_WIDTH_MEDIAN: usize = 5;

/// The median of the finite values (NaN when there are none).
pub(crate) fn median(mut v: Vec<f64>) -> f64 {
    v.retain(|x| x.is_finite());
    if v.is_empty() {
        return f64::NAN;
    }
    let k = v.len() / 2;
    *v.select_nth_unstable_by(k, f64::total_cmp).1
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_blur_is_read_between_the_grid_points() {
        // A parabola in the SD with its minimum at 1.3 px is found there;
        // at the grid's ends the end is taken; a failed fit gives nothing.
        let rss: Vec<f64> = BLUR_GRID_PX
            .iter()
            .map(|sd| 2.0 + (sd - 1.3f64).powi(2))
            .collect();
        assert!((estimate_blur(&rss).unwrap() - 1.3).abs() < 1e-12);
        let rising: Vec<f64> = BLUR_GRID_PX.iter().map(|sd| 1.0 + sd).collect();
        assert_eq!(estimate_blur(&rising), Some(0.0));
        let mut failed = rss.clone();
        failed[3] = f64::NAN;
        assert_eq!(estimate_blur(&failed), None);
        assert_eq!(estimate_blur(&rss[1..]), None);
    }
}
