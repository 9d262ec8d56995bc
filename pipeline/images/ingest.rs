//! Multi-page TIFF captures, one page per spectral band in the instrument's
//! order: 8- or 16-bit unsigned, or 32-bit float grey pages, all the same
//! size; or, with a tiled sensor layout, one such page holding every band
//! at its own rectangle. A capture that cannot be read, or does not match the instrument,
//! is an error for that capture alone ([`CaptureError`]); the study goes on.

use std::path::{Path, PathBuf};

use tiff::ColorType;

use crate::config::study::SensorLayout;
use tiff::decoder::{Decoder, DecodingResult};

/// A capture's bands as floating-point images, row-major.
#[derive(Debug, Clone, PartialEq)]
pub struct Multiband {
    pub width: usize,
    pub height: usize,
    pub bands: Vec<Vec<f32>>,
    /// Bits per sample as stored (8, 16 or 32).
    pub bit_depth: u8,
}

impl Multiband {
    pub fn at(&self, band: usize, x: usize, y: usize) -> f32 {
        self.bands[band][y * self.width + x]
    }
}

/// Why a capture (or a calibration frame) could not be used: the image
/// engine's error.
#[derive(Debug, Clone, thiserror::Error, PartialEq)]
pub enum CaptureError {
    #[error("cannot open `{path}`: {reason}")]
    Open { path: PathBuf, reason: String },
    #[error("`{path}` is not a readable TIFF (page {page}): {reason}")]
    Decode {
        path: PathBuf,
        page: usize,
        reason: String,
    },
    #[error(
        "`{path}` page {page} is {found}; expected single-channel 8-bit, 16-bit or 32-bit float grey"
    )]
    PixelType {
        path: PathBuf,
        page: usize,
        found: String,
    },
    #[error("`{path}` has {found} pages; the instrument has {expected} bands (one page per band)")]
    BandCount {
        path: PathBuf,
        found: usize,
        expected: usize,
    },
    #[error("`{path}` page {page} is {found_w}×{found_h} pixels, page 1 is {w}×{h}")]
    PageSize {
        path: PathBuf,
        page: usize,
        found_w: u32,
        found_h: u32,
        w: u32,
        h: u32,
    },
    #[error("`{path}` is {found_w}×{found_h} pixels; this eye's captures are {w}×{h}")]
    CaptureSize {
        path: PathBuf,
        found_w: usize,
        found_h: usize,
        w: usize,
        h: usize,
    },
    #[error("the calibration frames are {frame_w}×{frame_h} pixels, the capture {w}×{h}")]
    FrameSize {
        frame_w: usize,
        frame_h: usize,
        w: usize,
        h: usize,
    },
    #[error(
        "`{path}` page {page} has {count} pixels that are not numbers (NaN or infinite, {percent:.2} % of the page)"
    )]
    NotFinite {
        path: PathBuf,
        page: usize,
        count: usize,
        percent: f64,
    },
    /// A dark or flat frame could not be read.
    #[error("calibration frames: {0}")]
    Calibration(Box<CaptureError>),
    #[error(
        "`{path}` has {found} pages; with the instrument's tiled `layout` a capture is one frame holding every band"
    )]
    FrameCount { path: PathBuf, found: usize },
    #[error("`{path}`: {reason}")]
    Tiles { path: PathBuf, reason: String },
}

/// Reads a capture laid out as the instrument says: pages as
/// [`read_capture`] does, or one frame whose tiles are cut out, one per
/// band. `size` is a band's size (a tile's, for tiles).
pub fn read_laid_out(
    path: &Path,
    layout: &SensorLayout,
    bands: usize,
    size: Option<(usize, usize)>,
) -> Result<Multiband, CaptureError> {
    if *layout == SensorLayout::Pages {
        return read_capture(path, bands, size);
    }
    let frame = match read_capture(path, 1, None) {
        Err(CaptureError::BandCount { found, .. }) => {
            return Err(CaptureError::FrameCount {
                path: path.into(),
                found,
            });
        }
        other => other?,
    };
    let rects = match layout.rectangles(bands, frame.width, frame.height) {
        Some(Ok(r)) => r,
        Some(Err(reason)) => {
            return Err(CaptureError::Tiles {
                path: path.into(),
                reason,
            });
        }
        None => unreachable!("pages are read above"),
    };
    let (w, h) = (rects[0][2], rects[0][3]);
    let src = &frame.bands[0];
    let tiles = rects
        .iter()
        .map(|r| {
            let mut v = Vec::with_capacity(w * h);
            for y in r[1]..r[1] + h {
                let start = y * frame.width + r[0];
                v.extend_from_slice(&src[start..start + w]);
            }
            v
        })
        .collect();
    check_size(path, (w, h), size)?;
    Ok(Multiband {
        width: w,
        height: h,
        bands: tiles,
        bit_depth: frame.bit_depth,
    })
}

/// A capture's bands of `found` size against the eye's `expected` size.
fn check_size(
    path: &Path,
    found: (usize, usize),
    expected: Option<(usize, usize)>,
) -> Result<(), CaptureError> {
    match expected {
        Some((w, h)) if found != (w, h) => Err(CaptureError::CaptureSize {
            path: path.into(),
            found_w: found.0,
            found_h: found.1,
            w,
            h,
        }),
        _ => Ok(()),
    }
}

/// Reads a capture and checks its band count (and its size, when given).
pub fn read_capture(
    path: &Path,
    bands: usize,
    size: Option<(usize, usize)>,
) -> Result<Multiband, CaptureError> {
    let file = std::fs::File::open(path).map_err(|e| CaptureError::Open {
        path: path.into(),
        reason: e.to_string(),
    })?;
    let dec_err = |page: usize, e: tiff::TiffError| CaptureError::Decode {
        path: path.into(),
        page,
        reason: e.to_string(),
    };
    let mut dec = Decoder::new(std::io::BufReader::new(file)).map_err(|e| dec_err(1, e))?;
    let mut pages: Vec<Vec<f32>> = Vec::new();
    let (mut w0, mut h0) = (0u32, 0u32);
    let mut depth;
    loop {
        let page = pages.len() + 1;
        let (w, h) = dec.dimensions().map_err(|e| dec_err(page, e))?;
        if page == 1 {
            (w0, h0) = (w, h);
        } else if (w, h) != (w0, h0) {
            return Err(CaptureError::PageSize {
                path: path.into(),
                page,
                found_w: w,
                found_h: h,
                w: w0,
                h: h0,
            });
        }
        let ct = dec.colortype().map_err(|e| dec_err(page, e))?;
        let (data, bits) = match ct {
            ColorType::Gray(8) | ColorType::Gray(16) | ColorType::Gray(32) => match dec
                .read_image()
                .map_err(|e| dec_err(page, e))?
            {
                DecodingResult::U8(v) => (v.into_iter().map(f32::from).collect::<Vec<f32>>(), 8),
                DecodingResult::U16(v) => (v.into_iter().map(f32::from).collect(), 16),
                DecodingResult::F32(v) => (v, 32),
                other => {
                    let found = match other {
                        DecodingResult::U32(_) => "unsigned 32-bit",
                        DecodingResult::U64(_) => "unsigned 64-bit",
                        DecodingResult::F64(_) => "64-bit float",
                        DecodingResult::I8(_) => "signed 8-bit",
                        DecodingResult::I16(_) => "signed 16-bit",
                        DecodingResult::I32(_) => "signed 32-bit",
                        DecodingResult::I64(_) => "signed 64-bit",
                        _ => "of an unsupported sample type",
                    };
                    return Err(CaptureError::PixelType {
                        path: path.into(),
                        page,
                        found: found.into(),
                    });
                }
            },
            other => {
                let found = match other {
                    ColorType::RGB(b) => format!("RGB colour, {b}-bit"),
                    ColorType::RGBA(b) => format!("RGBA colour, {b}-bit"),
                    ColorType::GrayA(b) => format!("grey with alpha, {b}-bit"),
                    ColorType::Palette(b) => format!("palette colour, {b}-bit"),
                    ColorType::CMYK(b) => format!("CMYK colour, {b}-bit"),
                    ColorType::Gray(b) => format!("{b}-bit grey"),
                    _ => "of an unsupported colour type".into(),
                };
                return Err(CaptureError::PixelType {
                    path: path.into(),
                    page,
                    found,
                });
            }
        };
        if data.len() != (w as usize) * (h as usize) {
            return Err(CaptureError::Decode {
                path: path.into(),
                page,
                reason: "fewer pixels than the page's size".into(),
            });
        }
        let bad = data.iter().filter(|v| !v.is_finite()).count();
        if bad > 0 {
            return Err(CaptureError::NotFinite {
                path: path.into(),
                page,
                count: bad,
                percent: 100.0 * bad as f64 / data.len() as f64,
            });
        }
        depth = bits;
        pages.push(data);
        if !dec.more_images() {
            break;
        }
        dec.next_image().map_err(|e| dec_err(page + 1, e))?;
    }
    if pages.len() != bands {
        return Err(CaptureError::BandCount {
            path: path.into(),
            found: pages.len(),
            expected: bands,
        });
    }
    let (w, h) = (w0 as usize, h0 as usize);
    check_size(path, (w, h), size)?;
    Ok(Multiband {
        width: w,
        height: h,
        bands: pages,
        bit_depth: depth,
    })
}
