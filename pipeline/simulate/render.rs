//! Rendering of multiband fundus captures with known vessel saturation.
//!
//! Each pixel averages 3×3 sub-pixel samples of the vessel transmission.
//! Per band: a background reflectance that falls towards short wavelengths
//! with fundus pigmentation, a smooth spatial texture, vignetting, and over
//! each vessel the band-integrated multi-path transmission
//! `T = F_bs + F_1·t + F_2·t²`, `t = exp(−mu_a·L)` with `L` the chord through
//! the cylindrical vessel (F_bs + F_1 + F_2 = 1, so `T = 1` at the edge),
//! then the veil `(1 − k)·T + k`. The band average is weighted by the
//! band response and the background reflectance on a 1 nm grid. Photon
//! (Poisson, normal approximation at these counts) and read noise at the
//! sensor's well depth, eye motion (translation and rotation) between
//! captures and a small fixed offset per band.

use rand::Rng;
use rand_distr::{Distribution, Normal};

use super::optics::{BandOptics, Optics, blur};
use crate::config::segments::{Segment, VesselKind};
use crate::oximetry::bands::SampledBand;

/// A vessel's centre line moved into one capture and band, with its diameters.
type MovedVessel = (Vec<(f64, f64)>, Vec<f64>);

/// Rigid motion of a capture relative to the eye's reference capture:
/// rotation by `angle_deg` about the image centre, then translation.
#[derive(Debug, Clone, Copy, Default, serde::Serialize)]
pub struct Motion {
    pub dx: f64,
    pub dy: f64,
    pub angle_deg: f64,
}

impl Motion {
    /// Reference-capture coordinates → this capture's coordinates.
    pub fn apply(&self, p: (f64, f64), cx: f64, cy: f64) -> (f64, f64) {
        crate::images::register::rigid(self.dx, self.dy, self.angle_deg, p, cx, cy)
    }
}

/// One vessel segment as rendered in one capture.
pub struct VesselState<'a> {
    pub segment: &'a Segment,
    pub so2: f64,
    /// Diameter along the segment (µm) as a function of the fraction 0–1 of its length.
    pub diameter_um: Box<dyn Fn(f64) -> f64 + Sync + 'a>,
    /// Double-pass fraction F_2 along the segment.
    pub double_pass: Box<dyn Fn(f64) -> f64 + Sync + 'a>,
}

pub struct Scene<'a> {
    pub width: usize,
    pub height: usize,
    pub pixel_um: f64,
    pub bands: &'a [SampledBand],
    /// Per-band offset (dx, dy) in pixels, the instrument's misregistration.
    pub band_offsets: &'a [(f64, f64)],
    pub pigmentation: f64,
    pub veil: f64,
    pub hb_g_per_l: f64,
    /// Departures from the base model (all at rest for the base model).
    pub optics: Optics,
    pub well_electrons: f64,
    pub read_noise_electrons: f64,
}

/// Background fundus reflectance at `nm`: rises towards red, lowered at
/// short wavelengths by melanin (grade 1 light to 4 dark). An invented but
/// smooth spectrum with the trade's usual shape.
pub fn background_reflectance(nm: f64, pigmentation: f64) -> f64 {
    let base = 0.04 + 0.18 / (1.0 + (-(nm - 590.0) / 18.0).exp());
    base * (-(0.25 * pigmentation) * (550.0 / nm).powi(4)).exp()
}

/// A band's transmission terms `(c0, c1)` ([`BandOptics::terms`]) on a
/// chord grid of 1 µm.
pub(crate) struct ChordTable {
    pub t1: Vec<f64>,
    pub t2: Vec<f64>,
}

impl ChordTable {
    pub fn new(band: &BandOptics, optics: &Optics, so2: f64, hb: f64, max_um: usize) -> Self {
        let (t1, t2) = (0..=max_um + 1)
            .map(|i| band.terms(optics, so2, hb, i as f64))
            .unzip();
        ChordTable { t1, t2 }
    }

    fn at(&self, l_um: f64) -> (f64, f64) {
        let i = (l_um.floor() as usize).min(self.t1.len() - 2);
        let w = l_um - i as f64;
        (
            self.t1[i] * (1.0 - w) + self.t1[i + 1] * w,
            self.t2[i] * (1.0 - w) + self.t2[i + 1] * w,
        )
    }
}

/// Nearest point of a polyline: (distance px, fraction of length 0–1).
fn nearest_on(points: &[(f64, f64)], p: (f64, f64), cum: &[f64]) -> (f64, f64) {
    let total = *cum.last().unwrap_or(&1.0);
    let mut best = (f64::INFINITY, 0.0);
    for (i, w) in points.windows(2).enumerate() {
        let (a, b) = (w[0], w[1]);
        let (vx, vy) = (b.0 - a.0, b.1 - a.1);
        let len2 = vx * vx + vy * vy;
        let u = if len2 > 0.0 {
            (((p.0 - a.0) * vx + (p.1 - a.1) * vy) / len2).clamp(0.0, 1.0)
        } else {
            0.0
        };
        let (qx, qy) = (a.0 + u * vx, a.1 + u * vy);
        let d = ((p.0 - qx).powi(2) + (p.1 - qy).powi(2)).sqrt();
        if d < best.0 {
            best = (d, (cum[i] + u * len2.sqrt()) / total);
        }
    }
    best
}

/// Renders one capture: one 16-bit image per band, row-major.
pub fn render(
    scene: &Scene,
    vessels: &[VesselState],
    motion: Motion,
    exposure: f64,
    rng: &mut impl Rng,
) -> Vec<Vec<u16>> {
    let (w, h) = (scene.width, scene.height);
    let (cx, cy) = (w as f64 / 2.0, h as f64 / 2.0);
    let normal = Normal::new(0.0, 1.0).expect("unit normal");
    let max_d = 220usize;
    let mut out = Vec::with_capacity(scene.bands.len());
    let optics = &scene.optics;
    for band in scene.bands.iter() {
        // The fundus behind the vessel weights each band's spectrum.
        let bo = BandOptics::new(
            band,
            optics,
            |l| background_reflectance(l, scene.pigmentation),
            |l| background_reflectance(l, scene.pigmentation),
        );
        let refl = band.average(|l| background_reflectance(l, scene.pigmentation));
        let tables: Vec<ChordTable> = vessels
            .iter()
            .map(|v| ChordTable::new(&bo, optics, v.so2, scene.hb_g_per_l, max_d))
            .collect();
        let b = out.len();
        // Vessel polylines in this capture and band.
        let (ox, oy) = scene.band_offsets[b];
        let moved: Vec<MovedVessel> = vessels
            .iter()
            .map(|v| {
                let pts: Vec<(f64, f64)> = v
                    .segment
                    .points
                    .iter()
                    .map(|p| {
                        let q = motion.apply(*p, cx, cy);
                        (q.0 + ox, q.1 + oy)
                    })
                    .collect();
                let mut cum = vec![0.0];
                for s in pts.windows(2) {
                    cum.push(
                        cum.last().unwrap()
                            + ((s[1].0 - s[0].0).powi(2) + (s[1].1 - s[0].1).powi(2)).sqrt(),
                    );
                }
                (pts, cum)
            })
            .collect();
        let mut trans = vec![1.0f64; w * h];
        for (vi, v) in vessels.iter().enumerate() {
            let (pts, cum) = &moved[vi];
            let r_max = (v.diameter_um)(0.5)
                .max((v.diameter_um)(0.0))
                .max((v.diameter_um)(1.0))
                / scene.pixel_um
                / 2.0
                + 2.0;
            let (x0, x1) = pts
                .iter()
                .fold((f64::MAX, f64::MIN), |a, p| (a.0.min(p.0), a.1.max(p.0)));
            let (y0, y1) = pts
                .iter()
                .fold((f64::MAX, f64::MIN), |a, p| (a.0.min(p.1), a.1.max(p.1)));
            let xs = ((x0 - r_max).floor().max(0.0) as usize)
                ..((x1 + r_max).ceil().min(w as f64 - 1.0).max(0.0) as usize + 1);
            let ys = ((y0 - r_max).floor().max(0.0) as usize)
                ..((y1 + r_max).ceil().min(h as f64 - 1.0).max(0.0) as usize + 1);
            // Each pixel averages 3×3 sub-pixel samples, so that vessel
            // edges are not stair-stepped on the pixel grid.
            const SUB: [f64; 3] = [-1.0 / 3.0, 0.0, 1.0 / 3.0];
            for y in ys.clone() {
                for x in xs.clone() {
                    // Away from the edge one sample is exact enough.
                    let (d_c, f_c) = nearest_on(pts, (x as f64, y as f64), cum);
                    let edge =
                        ((v.diameter_um)(f_c) / 2.0 - d_c * scene.pixel_um).abs() / scene.pixel_um;
                    let subs: &[f64] = if edge > 1.0 { &[0.0] } else { &SUB };
                    let mut acc = 0.0;
                    let mut inside = false;
                    for &oy in subs {
                        for &ox in subs {
                            let (d_px, frac) = nearest_on(pts, (x as f64 + ox, y as f64 + oy), cum);
                            // Segments end at branch points: no vessel beyond the ends.
                            let radius_um = (v.diameter_um)(frac) / 2.0;
                            let d_um = d_px * scene.pixel_um;
                            if d_um >= radius_um {
                                acc += 1.0;
                                continue;
                            }
                            inside = true;
                            let chord = 2.0 * (radius_um * radius_um - d_um * d_um).sqrt();
                            let (e1, e2) = tables[vi].at(chord.min(max_d as f64));
                            let f2 = (v.double_pass)(frac);
                            let t = e1 + f2 * e2;
                            // A central reflex gives back part of the light
                            // the axis of an arteriole absorbs.
                            acc += if optics.reflex > 0.0
                                && v.segment.kind == VesselKind::Arteriole
                                && d_um < radius_um / 3.0
                            {
                                t + optics.reflex * (1.0 - t)
                            } else {
                                t
                            };
                        }
                    }
                    if inside {
                        trans[y * w + x] *= acc / (subs.len() * subs.len()) as f64;
                    }
                }
            }
        }
        let veil = bo.veil(optics, scene.veil);
        let mut light = Vec::with_capacity(w * h);
        for y in 0..h {
            for x in 0..w {
                let (u, v) = ((x as f64 - cx) / cx, (y as f64 - cy) / cy);
                let vign = 1.0 - 0.35 * (u * u + v * v);
                let texture = 1.0 + 0.04 * ((x as f64 * 0.031).sin() * (y as f64 * 0.027).cos());
                let t_obs = (1.0 - veil) * trans[y * w + x] + veil;
                let signal = exposure * refl / 0.22 * vign * texture;
                light.push(signal * t_obs);
            }
        }
        // The eye's and camera's optics blur the light before the sensor
        // counts it.
        blur(&mut light, w, h, optics.psf_px);
        let mut img = Vec::with_capacity(w * h);
        let dn_per_e = 65535.0 / scene.well_electrons;
        for y in 0..h {
            for x in 0..w {
                let electrons = (light[y * w + x] * scene.well_electrons * 0.8).max(0.0);
                let noisy = electrons
                    + electrons.sqrt() * normal.sample(rng)
                    + scene.read_noise_electrons * normal.sample(rng);
                img.push((noisy * dn_per_e).round().clamp(0.0, 65535.0) as u16);
            }
        }
        out.push(img);
    }
    out
}

/// TIFF 6.0's `PageName` tag.
pub const PAGE_NAME_TAG: u16 = 285;

/// Writes the bands of one capture as a multi-page 16-bit TIFF, in band order.
pub fn write_tiff(
    path: &std::path::Path,
    width: usize,
    height: usize,
    pages: &[Vec<u16>],
) -> Result<(), crate::tables::TableError> {
    write_tiff_at(path, width, height, pages, &CaptureTags::default())
}

/// What a camera records beside the pixels, as TIFF 6.0 tags.
#[derive(Debug, Clone, Default)]
pub struct CaptureTags {
    /// The capture's date and time, in every page's `DateTime` tag (306:
    /// `YYYY:MM:DD HH:MM:SS`, local time of the camera, no zone).
    pub taken: Option<chrono::NaiveDateTime>,
    /// The pixel size on the retina, µm: `XResolution`/`YResolution` (282,
    /// 283) in pixels per centimetre with `ResolutionUnit` (296) 3.
    pub pixel_um: Option<f64>,
    /// Per page, its band's name in `PageName` (285) and its centre and
    /// width in `ImageDescription` (270) as `<centre> nm centre, <fwhm> nm
    /// FWHM`; none for a frame that holds every band.
    pub bands: Vec<(String, f64, f64)>,
}

/// [`write_tiff`] with the tags a camera writes ([`CaptureTags`]).
pub fn write_tiff_at(
    path: &std::path::Path,
    width: usize,
    height: usize,
    pages: &[Vec<u16>],
    tags: &CaptureTags,
) -> Result<(), crate::tables::TableError> {
    let stamp = tags
        .taken
        .map(|t| t.format("%Y:%m:%d %H:%M:%S").to_string());
    crate::tables::write_atomic(path, |f| {
        let mut enc = tiff::encoder::TiffEncoder::new(std::io::BufWriter::new(f))?;
        for (i, p) in pages.iter().enumerate() {
            let mut image =
                enc.new_image::<tiff::encoder::colortype::Gray16>(width as u32, height as u32)?;
            if let Some(s) = &stamp {
                image
                    .encoder()
                    .write_tag(tiff::tags::Tag::DateTime, s.as_str())?;
            }
            if let Some(um) = tags.pixel_um {
                // Pixels per centimetre, to 1/1000 of a pixel.
                let per_cm = tiff::encoder::Rational {
                    n: (1e7 / um).round() as u32,
                    d: 1000,
                };
                image.resolution(tiff::tags::ResolutionUnit::Centimeter, per_cm);
            }
            if let Some((name, centre, fwhm)) = tags.bands.get(i) {
                image
                    .encoder()
                    .write_tag(tiff::tags::Tag::Unknown(PAGE_NAME_TAG), name.as_str())?;
                image.encoder().write_tag(
                    tiff::tags::Tag::ImageDescription,
                    format!("{centre} nm centre, {fwhm} nm FWHM").as_str(),
                )?;
            }
            image.write_data(p)?;
        }
        Ok(())
    })
}
