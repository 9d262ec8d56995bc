//! Corrections applied to every capture before registration and profiles:
//! the dark frame and flat field of each band, then band-to-band alignment
//! to the registration band (offsets from the instrument file, or
//! estimated per capture: phase correlation, then sub-pixel normalised
//! cross-correlation, as for capture registration).
//!
//! Dark and flat are multi-page TIFFs (one page per band) of the captures'
//! size. A corrected value is `(raw − dark) · g / (flat − dark)` with `g`
//! the band's mean of `flat − dark`, so that intensities keep their scale
//! (common practice; no published source needed). Transmission is a ratio
//! of nearby intensities, so a flat field matters little for it, but a dark
//! offset biases it directly.

use super::ingest::{CaptureError, Multiband, read_laid_out};
use super::register::{RegistrationTarget, bilinear};
use crate::config::study::{Instrument, SensorLayout};

pub struct Corrections {
    dark: Option<Multiband>,
    flat: Option<Multiband>,
    offsets: Vec<Option<(f64, f64)>>,
    estimate: bool,
    reference_band: usize,
    /// How the instrument's files hold the bands.
    pub layout: SensorLayout,
}

impl Corrections {
    /// No corrections at all.
    pub fn none(bands: usize) -> Self {
        Corrections {
            dark: None,
            flat: None,
            offsets: vec![None; bands],
            estimate: false,
            reference_band: 0,
            layout: SensorLayout::Pages,
        }
    }

    /// Reads the instrument's calibration frames; `reference_band` is the registration band.
    pub fn load(inst: &Instrument, reference_band: usize) -> Result<Self, CaptureError> {
        let nb = inst.bands.len();
        let dark = inst
            .dark
            .as_deref()
            .map(|p| read_laid_out(p, &inst.layout, nb, None))
            .transpose()?;
        let size = dark.as_ref().map(|d| (d.width, d.height));
        let flat = inst
            .flat
            .as_deref()
            .map(|p| read_laid_out(p, &inst.layout, nb, size))
            .transpose()?;
        Ok(Corrections {
            dark,
            flat,
            offsets: inst.bands.iter().map(|b| b.offset_px).collect(),
            estimate: inst.estimate_band_offsets,
            reference_band,
            layout: inst.layout.clone(),
        })
    }

    /// Corrects `img` in place; returns the band offsets used (px).
    pub fn apply(&self, img: &mut Multiband) -> Result<Vec<(f64, f64)>, CaptureError> {
        let (w, h) = (img.width, img.height);
        for frame in [&self.dark, &self.flat].into_iter().flatten() {
            if (frame.width, frame.height) != (w, h) {
                return Err(CaptureError::FrameSize {
                    frame_w: frame.width,
                    frame_h: frame.height,
                    w,
                    h,
                });
            }
        }
        for b in 0..img.bands.len() {
            let band = &mut img.bands[b];
            match (&self.dark, &self.flat) {
                (Some(d), None) => band
                    .iter_mut()
                    .zip(&d.bands[b])
                    .for_each(|(v, dv)| *v -= dv),
                (dark, Some(f)) => {
                    let zero = vec![0.0f32; w * h];
                    let d = dark.as_ref().map(|d| &d.bands[b]).unwrap_or(&zero);
                    let gain = f.bands[b]
                        .iter()
                        .zip(d)
                        .map(|(f, d)| (f - d) as f64)
                        .sum::<f64>()
                        / (w * h) as f64;
                    for ((v, fv), dv) in band.iter_mut().zip(&f.bands[b]).zip(d) {
                        let s = fv - dv;
                        // A dead flat-field pixel gives no information: zero, which profiles flag.
                        *v = if s > 0.0 {
                            ((*v - dv) as f64 * gain / s as f64) as f32
                        } else {
                            0.0
                        };
                    }
                }
                (None, None) => {}
            }
        }
        // The reference band made ready once for all the others.
        let reference = self
            .estimate
            .then(|| RegistrationTarget::new(&img.bands[self.reference_band], w, h));
        let mut used = Vec::with_capacity(img.bands.len());
        for b in 0..img.bands.len() {
            let offset = match (self.offsets[b], &reference) {
                (Some(o), _) => o,
                (None, Some(target)) if b != self.reference_band => {
                    // The capture registration without rotation search: whole-pixel
                    // phase correlation, then sub-pixel normalised cross-correlation
                    // (insensitive to the bands' different contrast).
                    let reg = target.register(&img.bands[b], 0.0);
                    (reg.dx, reg.dy)
                }
                _ => (0.0, 0.0),
            };
            if offset != (0.0, 0.0) {
                img.bands[b] = shift(&img.bands[b], w, h, offset);
            }
            used.push(offset);
        }
        Ok(used)
    }
}

/// The band resampled so that its content lines up with the registration
/// band: out(x, y) = in(x + dx, y + dy), bilinear, edges clamped.
fn shift(band: &[f32], w: usize, h: usize, (dx, dy): (f64, f64)) -> Vec<f32> {
    let (xm, ym) = ((w - 1) as f64, (h - 1) as f64);
    (0..w * h)
        .map(|i| {
            let (x, y) = ((i % w) as f64 + dx, (i / w) as f64 + dy);
            bilinear(band, w, h, x.clamp(0.0, xm), y.clamp(0.0, ym)).unwrap_or(0.0) as f32
        })
        .collect()
}
