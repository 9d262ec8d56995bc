//! The report's figures, each drawn by one function that is generic over
//! the plotters backend and called twice (SVG text and PNG file). Inputs
//! are plain series prepared by [`super::data`], so this file only draws.

use std::path::{Path, PathBuf};

use anyhow::{Result, anyhow};
use plotters::coord::Shift;
use plotters::prelude::*;

use super::data::*;
use super::style::*;
use crate::config::study::ReportSettings;
use crate::oximetry::sensitivity::Weights;
use crate::tables::{create_folder, write_bytes_atomic};

type DrawResult = std::result::Result<(), Box<dyn std::error::Error>>;

/// A drawn figure: its name, caption, SVG text, and the files written.
pub struct Figure {
    pub name: &'static str,
    pub caption: String,
    pub svg: String,
    pub files: Vec<PathBuf>,
    /// A data-quality figure (the report's data-quality section), not a result.
    pub quality: bool,
}

/// Print size of the PNG files: width in mm and resolution in dpi.
#[derive(Clone, Copy)]
pub struct Print {
    pub width_mm: f64,
    pub dpi: u32,
}

impl Default for Print {
    /// The `report:` section's defaults.
    fn default() -> Self {
        Print::of(&ReportSettings::default())
    }
}

impl Print {
    pub fn of(r: &ReportSettings) -> Self {
        Print {
            width_mm: r.figure_width_mm,
            dpi: r.dpi,
        }
    }
}

/// Draws with `draw` to SVG, writes `<name>.svg`, and rasterises that SVG
/// to `<name>.png` at the print size, so that both files are one drawing.
fn render(
    dir: &Path,
    name: &'static str,
    caption: String,
    size: (u32, u32),
    print: Print,
    draw: &dyn Fn(&DrawingArea<SVGBackend, Shift>) -> DrawResult,
) -> Result<Figure> {
    init();
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, size).into_drawing_area();
        root.fill(&WHITE)
            .map_err(|e| anyhow!("drawing `{name}`: {e}"))?;
        draw(&root).map_err(|e| anyhow!("drawing `{name}`: {e}"))?;
        root.present()
            .map_err(|e| anyhow!("drawing `{name}`: {e}"))?;
    }
    let svg_path = dir.join(format!("{name}.svg"));
    write_bytes_atomic(&svg_path, svg.as_bytes())?;
    let png_path = dir.join(format!("{name}.png"));
    let png = rasterise(&svg, print)
        .map_err(|e| anyhow!("rendering `{}` as PNG: {e}", png_path.display()))?;
    write_bytes_atomic(&png_path, &png)?;
    Ok(Figure {
        name,
        caption,
        svg,
        files: vec![svg_path, png_path],
        quality: false,
    })
}

/// An SVG drawing as PNG at `print`'s width and resolution, white behind,
/// with the resolution stated in the file (the pHYs chunk) so that page
/// layout programs place it at its print size. Text is set in the embedded
/// font alone, so the pixels do not depend on the machine's fonts.
pub(crate) fn rasterise(svg: &str, print: Print) -> std::result::Result<Vec<u8>, String> {
    use resvg::{tiny_skia, usvg};
    let mut opt = usvg::Options::default();
    opt.fontdb_mut().load_font_data(FONT.to_vec());
    opt.fontdb_mut().set_sans_serif_family("DejaVu Sans");
    opt.font_family = "DejaVu Sans".into();
    let tree = usvg::Tree::from_str(svg, &opt).map_err(|e| e.to_string())?;
    let size = tree.size();
    let width = (print.width_mm / 25.4 * f64::from(print.dpi)).round() as u32;
    let scale = width as f32 / size.width();
    let height = (size.height() * scale).round().max(1.0) as u32;
    let mut pixmap = tiny_skia::Pixmap::new(width, height).ok_or("the figure has no area")?;
    pixmap.fill(tiny_skia::Color::WHITE);
    resvg::render(
        &tree,
        tiny_skia::Transform::from_scale(scale, scale),
        &mut pixmap.as_mut(),
    );
    // Opaque on white, so the premultiplied pixels are the colours.
    let rgb: Vec<u8> = pixmap
        .data()
        .chunks_exact(4)
        .flat_map(|p| [p[0], p[1], p[2]])
        .collect();
    let mut out = Vec::new();
    {
        let mut enc = png::Encoder::new(&mut out, width, height);
        enc.set_color(png::ColorType::Rgb);
        enc.set_depth(png::BitDepth::Eight);
        let per_metre = (f64::from(print.dpi) / 0.0254).round() as u32;
        enc.set_pixel_dims(Some(png::PixelDimensions {
            xppu: per_metre,
            yppu: per_metre,
            unit: png::Unit::Meter,
        }));
        let mut w = enc.write_header().map_err(|e| e.to_string())?;
        w.write_image_data(&rgb).map_err(|e| e.to_string())?;
    }
    Ok(out)
}

pub fn all(dir: &Path, d: &ReportData, settings: &ReportSettings) -> Result<Vec<Figure>> {
    create_folder(dir)?;
    let print = Print::of(settings);
    let mut out = Vec::new();
    out.push(render(dir, "time_course", format!("SO2 of arterioles and venules over the session, per subject (`{}`): capture means (filled: steady captures; open: settling captures, left out of the statistics), the reference SpO2 as the black line; epochs shaded by inspired O2 (darker = less O2; the settle window at the start of each epoch lighter) and named at the top", d.primary), grid_size(d.courses.len(), 300, 250), print, &|r| draw_courses(r, d))?);
    if !d.vessels.is_empty() {
        out.push(render(dir, "vessel_courses", format!("SO2 of every vessel segment across the epochs, per subject (`{}`): one line per segment through its mean over the steady captures of each epoch; a segment with no value in an epoch has a gap there", d.primary), grid_size(d.vessels.len(), 300, 250), print, &|r| draw_vessels(r, d))?);
    }
    out.push(render(dir, "epoch_change", format!("Change of SO2 from `{}` per epoch (`{}`): each subject's mean (small points) and the mixed-model estimate with its {:.0} % confidence interval", d.baseline, d.primary, d.confidence * 100.0), (980, 476), print, &|r| draw_epoch_change(r, d))?);
    let n = d.agreement.len().max(1) as u32;
    out.push(render(dir, "retinal_vs_reference", "Capture-mean arteriolar SO2 against the reference SpO2, per method: identity (dashed) and the fitted line of SO2 on SpO2 (subject random intercepts)".to_string(), (340 * n + 40, 416), print, &|r| draw_scatter(r, d))?);
    out.push(render(dir, "bland_altman", "Difference between arteriolar SO2 and reference SpO2 against their mean, per method: bias (solid) and repeated-measures 95 % limits of agreement (dashed; Bland & Altman 2007)".to_string(), (340 * n + 40, 416), print, &|r| draw_bland_altman(r, d))?);
    if !d.agreement_groups.is_empty() {
        let n = d.agreement_groups.len() as u32;
        let attribute = &d.agreement_groups[0].attribute;
        out.push(render(dir, "agreement_by_group", format!("Difference between arteriolar SO2 and reference SpO2 within each {attribute} group, per method: bias (point) and repeated-measures 95 % limits of agreement (bar); the number of subjects under each group"), (340 * n + 40, 416), print, &|r| draw_group_agreement(r, &d.agreement_groups))?);
    }
    if let Some(a) = &d.along {
        out.push(render(dir, "along_segment", format!("SO2 along segment {} ({}, subject {}, capture {}): per-position estimates of the two-band ODR and of the multiband model fitted position by position (lines break where flagged positions are left out), and the joint segment fit (line, ± 1 SE band)", a.segment, a.kind, a.subject, a.capture), (900, 420), print, &|r| draw_along(r, a))?);
    }
    if let Some(s) = &d.sensitivity {
        out.push(render(dir, "sensitivity", format!("SO2 error of `{}` for a 1 % transmission error in each band alone and in all bands independently, against the veil k (SO2 {:.0} %, {:.0} µm, linearised); left, the fits' own weights refitted at each veil; right, the veil-free band combination held, which shows the veil's effect alone", s.method, s.so2 * 100.0, s.diameter_um), (1200, 540), print, &|r| draw_sensitivity(r, s))?);
    }
    if !d.residuals.is_empty() {
        let n = d.residuals.len() as u32;
        let mut f = render(dir, "band_residuals", "How well the vessel model describes the spectra: each joint multiband fit's mean residual per band (model − measured, % of the transmission; grey: adequate fits, orange: misfits on their own or with the other fits of their eye), the mean over all fits (black bar) and a single fit's misfit threshold of ±1.5 % (dashed)".to_string(), (560 * n + 40, 450), print, &|r| draw_residuals(r, &d.residuals))?;
        f.quality = true;
        out.push(f);
    }
    if !d.registration.is_empty() {
        let mut f = render(dir, "registration", "Registration of each capture to its eye's reference capture over the session, per subject: the shift found in x and y (pixels, left axis) and the rotation (degrees, scaled onto the same axis as marked); a capture that could not be registered is marked by a cross on the time axis".to_string(), grid_size(d.registration.len(), 300, 230), print, &|r| draw_registration(r, &d.registration))?;
        f.quality = true;
        out.push(f);
    }
    Ok(out)
}

fn draw_residuals<DB: DrawingBackend>(
    root: &DrawingArea<DB, Shift>,
    panels: &[ResidualPanel],
) -> DrawResult
where
    DB::ErrorType: 'static,
{
    let (top, body) = root.split_vertically(66);
    let (heading, key) = top.split_vertically(30);
    heading.draw_text(
        "Band residuals of the joint multiband fits",
        &title(17),
        (12, 8),
    )?;
    legend_row(
        &key,
        &[
            ("adequate fit", RGBColor(150, 150, 150), Mark::Dot),
            ("misfit", PALETTE[1], Mark::Dot),
            ("mean over fits", BLACK, Mark::Line),
            ("misfit threshold", INK, Mark::Dash),
        ],
        12,
    )?;
    let limit = crate::oximetry::segment::MISFIT_MIN_RESIDUAL * 100.0;
    let areas = body.split_evenly((1, panels.len().max(1)));
    for (p, area) in panels.iter().zip(areas) {
        let all = p.bands.iter().flat_map(|b| b.1.iter().chain(&b.2));
        let span = all.fold(2.0 * limit, |m, v| m.max(v.abs())).min(25.0) * 1.1;
        let n = p.bands.len();
        let mut ch = ChartBuilder::on(&area)
            .caption(
                format!(
                    "{}: {} of {} fits misfit ({:.1} %)",
                    p.method,
                    p.misfits,
                    p.fits,
                    100.0 * p.misfits as f64 / p.fits.max(1) as f64
                ),
                label(14),
            )
            .margin(10)
            .x_label_area_size(36)
            .y_label_area_size(52)
            .build_cartesian_2d(-0.5..(n as f64 - 0.5), -span..span)?;
        let names: Vec<String> = p.bands.iter().map(|b| b.0.clone()).collect();
        ch.configure_mesh()
            .light_line_style(TRANSPARENT)
            .bold_line_style(GRID)
            .x_labels(n)
            .x_label_formatter(&|v| {
                let i = v.round();
                if (v - i).abs() < 1e-6 && i >= 0.0 && (i as usize) < names.len() {
                    names[i as usize].clone()
                } else {
                    String::new()
                }
            })
            .y_desc("mean residual (% of T)")
            .label_style(label(11))
            .axis_desc_style(label(12))
            .draw()?;
        for s in [-limit, limit] {
            ch.draw_series(DashedLineSeries::new(
                [(-0.5, s), (n as f64 - 0.5, s)],
                6,
                4,
                INK.stroke_width(1),
            ))?;
        }
        for (i, (_, ok, bad)) in p.bands.iter().enumerate() {
            // Fits spread across the band's slot by their order, so that
            // thousands of points stay visible as a cloud.
            let spread =
                |k: usize, len: usize| i as f64 - 0.3 + 0.6 * (k as f64 + 0.5) / len.max(1) as f64;
            let clip = |v: f64| v.clamp(-span, span);
            ch.draw_series(ok.iter().enumerate().map(|(k, v)| {
                Circle::new(
                    (spread(k, ok.len()), clip(*v)),
                    1,
                    RGBColor(150, 150, 150).filled(),
                )
            }))?;
            ch.draw_series(bad.iter().enumerate().map(|(k, v)| {
                Circle::new((spread(k, bad.len()), clip(*v)), 2, PALETTE[1].filled())
            }))?;
            let all: Vec<f64> = ok.iter().chain(bad).copied().collect();
            if !all.is_empty() {
                let m = all.iter().sum::<f64>() / all.len() as f64;
                ch.draw_series(std::iter::once(PathElement::new(
                    vec![(i as f64 - 0.35, clip(m)), (i as f64 + 0.35, clip(m))],
                    BLACK.stroke_width(3),
                )))?;
            }
        }
    }
    Ok(())
}

/// The sensitivity figure alone, for `satstep sensitivity`.
pub fn sensitivity(dir: &Path, s: &SensitivityCurves, print: Print) -> Result<Figure> {
    create_folder(dir)?;
    render(
        dir,
        "sensitivity",
        String::new(),
        (1200, 540),
        print,
        &|r| draw_sensitivity(r, s),
    )
}

fn range(values: impl Iterator<Item = f64>, pad: f64) -> (f64, f64) {
    let (mut lo, mut hi) = (f64::INFINITY, f64::NEG_INFINITY);
    for v in values.filter(|v| v.is_finite()) {
        lo = lo.min(v);
        hi = hi.max(v);
    }
    if !lo.is_finite() {
        return (0.0, 1.0);
    }
    let span = (hi - lo).max(1.0);
    (lo - pad * span, hi + pad * span)
}

/// A figure of one panel per subject: the heading and legend in a strip
/// at the top, and the body split into a grid of up to four columns.
fn subject_panels<DB: DrawingBackend>(
    root: &DrawingArea<DB, Shift>,
    heading: &str,
    legend: &[(&str, RGBColor, Mark)],
    legend_x: i32,
    n: usize,
) -> Result<Vec<DrawingArea<DB, Shift>>, Box<dyn std::error::Error>>
where
    DB::ErrorType: 'static,
{
    let (top, body) = root.split_vertically(40);
    top.draw_text(heading, &title(18), (12, 10))?;
    legend_row(&top, legend, legend_x)?;
    let cols = n.clamp(1, 4);
    let rows = n.div_ceil(cols).max(1);
    Ok(body.split_evenly((rows, cols)))
}

/// Pixel size of a figure of `n` subject panels of `w` × `h`.
fn grid_size(n: usize, w: u32, h: u32) -> (u32, u32) {
    let cols = n.clamp(1, 4) as u32;
    let rows = n.div_ceil(cols as usize).max(1) as u32;
    (w * cols + 40, h * rows + 80)
}

fn draw_courses<DB: DrawingBackend>(root: &DrawingArea<DB, Shift>, d: &ReportData) -> DrawResult
where
    DB::ErrorType: 'static,
{
    let panels = subject_panels(
        root,
        &format!("SO2 over the session ({})", d.primary),
        &[
            ("arterioles", ARTERIOLE, Mark::Dot),
            ("venules", VENULE, Mark::Dot),
            ("settling captures", INK, Mark::Ring),
            ("reference SpO2", REFERENCE, Mark::Line),
        ],
        380,
        d.courses.len(),
    )?;
    let (ylo, yhi) = range(
        d.courses.iter().flat_map(|c| {
            c.arterioles
                .iter()
                .chain(&c.venules)
                .map(|p| p.1)
                .chain(c.spo2.iter().map(|p| p.1))
        }),
        0.05,
    );
    for (c, area) in d.courses.iter().zip(panels) {
        let xmax = c.spans.iter().map(|s| s.end_min).fold(1.0, f64::max);
        let mut ch = ChartBuilder::on(&area)
            .caption(&c.subject, title(14))
            .margin(6)
            .x_label_area_size(30)
            .y_label_area_size(40)
            .build_cartesian_2d(0.0..xmax, ylo..yhi.min(105.0))?;
        ch.configure_mesh()
            .light_line_style(TRANSPARENT)
            .bold_line_style(GRID)
            .x_label_formatter(&|v| format!("{v:.0}"))
            .y_label_formatter(&|v| format!("{v:.0}"))
            .x_desc("time (min)")
            .y_desc("SO2 (%)")
            .label_style(label(11))
            .axis_desc_style(label(12))
            .draw()?;
        for s in &c.spans {
            let depth = ((0.21 - s.o2_fraction) / 0.12).clamp(-0.5, 1.0);
            let shade = if depth > 0.0 {
                RGBColor(120, 120, 140).mix(0.08 + 0.22 * depth)
            } else {
                RGBColor(0, 158, 115).mix(0.06 - 0.1 * depth)
            };
            ch.draw_series([Rectangle::new(
                [(s.settle_min, ylo), (s.end_min, yhi)],
                shade.filled(),
            )])?;
            ch.draw_series([Rectangle::new(
                [(s.start_min, ylo), (s.settle_min, yhi)],
                shade.mix(0.5).filled(),
            )])?;
            // The epoch's name at the top of its band.
            ch.draw_series([Text::new(
                s.epoch.clone(),
                (s.start_min + 0.3, yhi.min(105.0) - 0.02 * (yhi - ylo)),
                label(10),
            )])?;
        }
        ch.draw_series(LineSeries::new(
            c.spo2.iter().copied(),
            REFERENCE.stroke_width(1),
        ))?;
        for (pts, col) in [(&c.arterioles, ARTERIOLE), (&c.venules, VENULE)] {
            ch.draw_series(pts.iter().map(|p| {
                Circle::new(
                    (p.0, p.1),
                    3,
                    if p.2 {
                        col.filled()
                    } else {
                        col.stroke_width(1)
                    },
                )
            }))?;
        }
    }
    Ok(())
}

/// How a legend entry is drawn.
#[derive(Clone, Copy)]
enum Mark {
    Dot,
    Ring,
    Line,
    Dash,
}

/// Draws the legend in a strip along the top of `root` and returns the
/// area below it, where the panels go.
fn under_legend<DB: DrawingBackend>(
    root: &DrawingArea<DB, Shift>,
    items: &[(&str, RGBColor, Mark)],
) -> std::result::Result<DrawingArea<DB, Shift>, Box<dyn std::error::Error>>
where
    DB::ErrorType: 'static,
{
    let (top, body) = root.split_vertically(36);
    legend_row(&top, items, 40)?;
    Ok(body)
}

/// A row of legend entries drawn in a header strip.
fn legend_row<DB: DrawingBackend>(
    area: &DrawingArea<DB, Shift>,
    items: &[(&str, RGBColor, Mark)],
    x0: i32,
) -> DrawResult
where
    DB::ErrorType: 'static,
{
    let mut x = x0;
    for (text, col, mark) in items {
        match mark {
            Mark::Line => area.draw(&PathElement::new(
                vec![(x, 20), (x + 18, 20)],
                col.stroke_width(2),
            ))?,
            Mark::Dot => area.draw(&Circle::new((x + 9, 20), 4, col.filled()))?,
            Mark::Ring => area.draw(&Circle::new((x + 9, 20), 4, col.stroke_width(1)))?,
            Mark::Dash => area.draw(&plotters::element::DashedPathElement::new(
                vec![(x, 20), (x + 18, 20)],
                5,
                3,
                col.stroke_width(1),
            ))?,
        }
        area.draw_text(text, &label(13), (x + 24, 13))?;
        x += 34 + 8 * text.len() as i32;
    }
    Ok(())
}

fn draw_epoch_change<DB: DrawingBackend>(
    root: &DrawingArea<DB, Shift>,
    d: &ReportData,
) -> DrawResult
where
    DB::ErrorType: 'static,
{
    let body = under_legend(
        root,
        &[
            ("arterioles, each subject's mean", ARTERIOLE, Mark::Dot),
            ("venules, each subject's mean", VENULE, Mark::Dot),
            ("mixed-model estimate and its interval", BLACK, Mark::Line),
        ],
    )?;
    let panels = body.split_evenly((1, 2));
    let n = d.epochs_after.len().max(1);
    for ((kind, col), area) in [("arteriole", ARTERIOLE), ("venule", VENULE)]
        .into_iter()
        .zip(panels)
    {
        let points: Vec<&ChangePoint> = d.changes.iter().filter(|c| c.kind == kind).collect();
        let (lo, hi) = range(
            points
                .iter()
                .flat_map(|p| [p.value])
                .chain(
                    d.estimates
                        .iter()
                        .filter(|e| e.kind == kind)
                        .flat_map(|e| [e.lower, e.upper]),
                )
                .chain([0.0]),
            0.08,
        );
        let mut ch = ChartBuilder::on(&area)
            .caption(format!("{kind}s: change from {}", d.baseline), title(15))
            .margin(10)
            .x_label_area_size(34)
            .y_label_area_size(48)
            .build_cartesian_2d(-0.5..(n as f64 - 0.5), lo..hi)?;
        let names = d.epochs_after.clone();
        ch.configure_mesh()
            .light_line_style(TRANSPARENT)
            .bold_line_style(GRID)
            .y_label_formatter(&|v| format!("{v:.0}"))
            .x_labels(n)
            .x_label_formatter(&|x| {
                names
                    .get(x.round() as usize)
                    .filter(|_| (x - x.round()).abs() < 1e-6)
                    .cloned()
                    .unwrap_or_default()
            })
            .x_desc("epoch")
            .y_desc("ΔSO2 (points)")
            .label_style(label(12))
            .axis_desc_style(label(13))
            .draw()?;
        ch.draw_series(LineSeries::new(
            [(-0.5, 0.0), (n as f64 - 0.5, 0.0)],
            INK.mix(0.6).stroke_width(1),
        ))?;
        ch.draw_series(points.iter().map(|p| {
            Circle::new(
                (p.epoch as f64 - 0.15 + p.jitter, p.value),
                3,
                col.mix(0.55).filled(),
            )
        }))?;
        for e in d.estimates.iter().filter(|e| e.kind == kind) {
            let x = e.epoch as f64 + 0.18;
            ch.draw_series([PathElement::new(
                vec![(x, e.lower), (x, e.upper)],
                BLACK.stroke_width(2),
            )])?;
            ch.draw_series([
                PathElement::new(
                    vec![(x - 0.06, e.lower), (x + 0.06, e.lower)],
                    BLACK.stroke_width(2),
                ),
                PathElement::new(
                    vec![(x - 0.06, e.upper), (x + 0.06, e.upper)],
                    BLACK.stroke_width(2),
                ),
            ])?;
            ch.draw_series([Rectangle::new(
                [
                    (x - 0.05, e.estimate - (hi - lo) * 0.008),
                    (x + 0.05, e.estimate + (hi - lo) * 0.008),
                ],
                BLACK.filled(),
            )])?;
        }
    }
    Ok(())
}

fn draw_scatter<DB: DrawingBackend>(root: &DrawingArea<DB, Shift>, d: &ReportData) -> DrawResult
where
    DB::ErrorType: 'static,
{
    let body = under_legend(
        root,
        &[
            ("capture means, one colour per method", INK, Mark::Dot),
            ("identity", INK, Mark::Dash),
            ("fitted line", BLACK, Mark::Line),
        ],
    )?;
    let panels = body.split_evenly((1, d.agreement.len().max(1)));
    let (lo, hi) = range(
        d.agreement.iter().flat_map(|a| a.pairs.iter().map(|p| p.0)),
        0.05,
    );
    let (ylo, yhi) = range(
        d.agreement
            .iter()
            .flat_map(|a| a.pairs.iter().map(|p| p.1))
            .chain([lo, hi]),
        0.04,
    );
    for (i, (a, area)) in d.agreement.iter().zip(panels).enumerate() {
        let head = match a.line {
            Some((_, b1)) => format!("{} (slope {b1:.2})", a.method),
            None => a.method.clone(),
        };
        let mut ch = ChartBuilder::on(&area)
            .caption(head, title(15))
            .margin(10)
            .x_label_area_size(34)
            .y_label_area_size(44)
            .build_cartesian_2d(lo..hi, ylo..yhi)?;
        ch.configure_mesh()
            .light_line_style(TRANSPARENT)
            .bold_line_style(GRID)
            .x_label_formatter(&|v| format!("{v:.0}"))
            .y_label_formatter(&|v| format!("{v:.0}"))
            .x_desc("reference SpO2 (%)")
            .y_desc("arteriolar SO2 (%)")
            .label_style(label(11))
            .axis_desc_style(label(12))
            .draw()?;
        ch.draw_series(DashedLineSeries::new(
            [(lo, lo), (hi, hi)],
            6,
            4,
            INK.stroke_width(1),
        ))?;
        ch.draw_series(
            a.pairs
                .iter()
                .map(|p| Circle::new((p.0, p.1), 2, method_colour(i).mix(0.6).filled())),
        )?;
        if let Some((b0, b1)) = a.line {
            ch.draw_series(LineSeries::new(
                [(lo, b0 + b1 * lo), (hi, b0 + b1 * hi)],
                BLACK.stroke_width(2),
            ))?;
        }
    }
    Ok(())
}

fn draw_bland_altman<DB: DrawingBackend>(
    root: &DrawingArea<DB, Shift>,
    d: &ReportData,
) -> DrawResult
where
    DB::ErrorType: 'static,
{
    let body = under_legend(
        root,
        &[
            ("capture means, one colour per method", INK, Mark::Dot),
            ("bias", BLACK, Mark::Line),
            ("95 % limits of agreement", BLACK, Mark::Dash),
        ],
    )?;
    let panels = body.split_evenly((1, d.agreement.len().max(1)));
    let (xlo, xhi) = range(
        d.agreement
            .iter()
            .flat_map(|a| a.pairs.iter().map(|p| (p.0 + p.1) / 2.0)),
        0.04,
    );
    let (ylo, yhi) = range(
        d.agreement
            .iter()
            .flat_map(|a| a.pairs.iter().map(|p| p.1 - p.0).chain([a.lower, a.upper])),
        0.08,
    );
    for (i, (a, area)) in d.agreement.iter().zip(panels).enumerate() {
        let head = format!(
            "{}: bias {:.1}, limits {:.1} to {:.1}",
            a.method, a.bias, a.lower, a.upper
        );
        let mut ch = ChartBuilder::on(&area)
            .caption(head, title(14))
            .margin(10)
            .x_label_area_size(34)
            .y_label_area_size(44)
            .build_cartesian_2d(xlo..xhi, ylo..yhi)?;
        ch.configure_mesh()
            .light_line_style(TRANSPARENT)
            .bold_line_style(GRID)
            .x_label_formatter(&|v| format!("{v:.0}"))
            .y_label_formatter(&|v| format!("{v:.0}"))
            .x_desc("mean of SO2 and SpO2 (%)")
            .y_desc("SO2 − SpO2 (points)")
            .label_style(label(11))
            .axis_desc_style(label(12))
            .draw()?;
        ch.draw_series(a.pairs.iter().map(|p| {
            Circle::new(
                ((p.0 + p.1) / 2.0, p.1 - p.0),
                2,
                method_colour(i).mix(0.6).filled(),
            )
        }))?;
        ch.draw_series(LineSeries::new(
            [(xlo, a.bias), (xhi, a.bias)],
            BLACK.stroke_width(2),
        ))?;
        for v in [a.lower, a.upper] {
            ch.draw_series(DashedLineSeries::new(
                [(xlo, v), (xhi, v)],
                6,
                4,
                BLACK.stroke_width(1),
            ))?;
        }
    }
    Ok(())
}

fn draw_group_agreement<DB: DrawingBackend>(
    root: &DrawingArea<DB, Shift>,
    panels: &[GroupAgreementPanel],
) -> DrawResult
where
    DB::ErrorType: 'static,
{
    let body = under_legend(
        root,
        &[
            ("bias", INK, Mark::Dot),
            ("95 % limits of agreement", INK, Mark::Line),
            ("no difference", BLACK, Mark::Dash),
        ],
    )?;
    let areas = body.split_evenly((1, panels.len().max(1)));
    let (ylo, yhi) = range(
        panels
            .iter()
            .flat_map(|p| p.groups.iter().flat_map(|g| [g.2, g.3, 0.0])),
        0.08,
    );
    for (i, (p, area)) in panels.iter().zip(areas).enumerate() {
        let n = p.groups.len();
        let mut ch = ChartBuilder::on(&area)
            .caption(&p.method, title(14))
            .margin(10)
            .x_label_area_size(34)
            .y_label_area_size(44)
            .build_cartesian_2d(-0.5..n as f64 - 0.5, ylo..yhi)?;
        let names: Vec<String> = p
            .groups
            .iter()
            .map(|g| format!("{} (n = {})", g.0, g.4))
            .collect();
        ch.configure_mesh()
            .light_line_style(TRANSPARENT)
            .bold_line_style(GRID)
            .x_labels(n)
            .x_label_formatter(&|v| {
                let k = v.round();
                if (v - k).abs() < 1e-6 && k >= 0.0 {
                    names.get(k as usize).cloned().unwrap_or_default()
                } else {
                    String::new()
                }
            })
            .y_label_formatter(&|v| format!("{v:.0}"))
            .x_desc(p.attribute.as_str())
            .y_desc("SO2 − SpO2 (points)")
            .label_style(label(11))
            .axis_desc_style(label(12))
            .draw()?;
        ch.draw_series(DashedLineSeries::new(
            [(-0.5, 0.0), (n as f64 - 0.5, 0.0)],
            6,
            4,
            BLACK.stroke_width(1),
        ))?;
        let colour = method_colour(i);
        for (k, g) in p.groups.iter().enumerate() {
            let x = k as f64;
            ch.draw_series(LineSeries::new(
                [(x, g.2), (x, g.3)],
                colour.stroke_width(2),
            ))?;
            for v in [g.2, g.3] {
                ch.draw_series(LineSeries::new(
                    [(x - 0.12, v), (x + 0.12, v)],
                    colour.stroke_width(2),
                ))?;
            }
            ch.draw_series([Circle::new((x, g.1), 5, colour.filled())])?;
        }
    }
    Ok(())
}

fn draw_along<DB: DrawingBackend>(root: &DrawingArea<DB, Shift>, a: &AlongSegment) -> DrawResult
where
    DB::ErrorType: 'static,
{
    let (xlo, xhi) = range(
        a.series.iter().flat_map(|s| s.points.iter().map(|p| p.0)),
        0.02,
    );
    let (ylo, yhi) = range(
        a.series
            .iter()
            .flat_map(|s| s.points.iter().map(|p| p.1))
            .chain(a.joint.iter().flat_map(|j| [j.1 - j.2, j.1 + j.2])),
        0.1,
    );
    let mut ch = ChartBuilder::on(root)
        .caption(
            format!("SO2 along segment {} ({})", a.segment, a.kind),
            title(16),
        )
        .margin(12)
        .x_label_area_size(36)
        .y_label_area_size(48)
        .build_cartesian_2d(xlo..xhi, ylo..yhi)?;
    ch.configure_mesh()
        .light_line_style(TRANSPARENT)
        .bold_line_style(GRID)
        .x_label_formatter(&|v| format!("{v:.0}"))
        .y_label_formatter(&|v| format!("{v:.0}"))
        .x_desc("distance along the segment (µm)")
        .y_desc("SO2 (%)")
        .label_style(label(12))
        .axis_desc_style(label(13))
        .draw()?;
    if let Some((label_text, v, se)) = &a.joint {
        ch.draw_series([Rectangle::new(
            [(xlo, v - se), (xhi, v + se)],
            PALETTE[2].mix(0.15).filled(),
        )])?;
        ch.draw_series(LineSeries::new(
            [(xlo, *v), (xhi, *v)],
            PALETTE[2].stroke_width(2),
        ))?
        .label(label_text.as_str())
        .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 18, y)], PALETTE[2].stroke_width(2)));
    }
    for (i, s) in a.series.iter().enumerate() {
        let c = method_colour(i);
        for run in runs(&s.points) {
            ch.draw_series(LineSeries::new(run, c.mix(0.5).stroke_width(1)))?;
        }
        ch.draw_series(s.points.iter().map(|p| Circle::new(*p, 3, c.filled())))?
            .label(s.label.as_str())
            .legend(move |(x, y)| Circle::new((x + 9, y), 4, c.filled()));
    }
    ch.configure_series_labels()
        .position(SeriesLabelPosition::UpperRight)
        .background_style(WHITE.mix(0.9))
        .border_style(INK)
        .label_font(label(12))
        .draw()?;
    Ok(())
}

fn draw_sensitivity<DB: DrawingBackend>(
    root: &DrawingArea<DB, Shift>,
    s: &SensitivityCurves,
) -> DrawResult
where
    DB::ErrorType: 'static,
{
    // Errors below 0.01 points are drawn at the floor of the log axis.
    const FLOOR: f64 = 0.01;
    let (top, body) = root.split_vertically(36);
    top.draw_text(
        &format!("SO2 error per 1 % transmission error ({})", s.method),
        &title(17),
        (12, 8),
    )?;
    let ymax = s
        .rows
        .iter()
        .flat_map(|(_, rows)| rows.iter().flat_map(|r| r.1.iter().copied().chain([r.2])))
        .fold(0.0, f64::max)
        * 1.15;
    let panels = body.split_evenly((1, s.rows.len().max(1)));
    for (i, ((weights, rows), area)) in s.rows.iter().zip(panels).enumerate() {
        let caption = match weights {
            Weights::Refitted => "weights refitted at each veil (as the fits do)",
            Weights::Held => "veil-free band combination held",
        };
        let mut ch = ChartBuilder::on(&area)
            .caption(caption, label(14))
            .margin(10)
            .x_label_area_size(40)
            .y_label_area_size(56)
            .build_cartesian_2d(0.0..0.9, (FLOOR..ymax.max(1.0)).log_scale())?;
        ch.configure_mesh()
            .light_line_style(TRANSPARENT)
            .bold_line_style(GRID)
            .x_label_formatter(&|v| format!("{v:.1}"))
            .y_label_formatter(&|v| {
                if *v < 1.0 {
                    format!("{v:.2}")
                } else {
                    format!("{v:.0}")
                }
            })
            .x_desc("veil k (fraction of the background intensity)")
            .y_desc("SO2 error (points)")
            .label_style(label(12))
            .axis_desc_style(label(13))
            .draw()?;
        for (b, name) in s.names.iter().enumerate() {
            let c = PALETTE[b % 7];
            // Bands past the palette's seven colours are dashed so that no two lines look alike.
            let style = c.stroke_width(2);
            let points: Vec<(f64, f64)> = rows.iter().map(|r| (r.0, r.1[b].max(FLOOR))).collect();
            if b < 7 {
                ch.draw_series(LineSeries::new(points, style))?
                    .label(name.as_str())
                    .legend(move |(x, y)| PathElement::new(vec![(x, y), (x + 18, y)], style));
            } else {
                ch.draw_series(DashedLineSeries::new(points, 6, 4, style))?
                    .label(name.as_str())
                    .legend(move |(x, y)| {
                        plotters::element::DashedPathElement::new(
                            vec![(x, y), (x + 18, y)],
                            5,
                            3,
                            style,
                        )
                    });
            }
        }
        ch.draw_series(LineSeries::new(
            rows.iter().map(|r| (r.0, r.2.max(FLOOR))),
            BLACK.stroke_width(3),
        ))?
        .label("all bands")
        .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 18, y)], BLACK.stroke_width(3)));
        if i == 0 {
            ch.configure_series_labels()
                .position(SeriesLabelPosition::UpperLeft)
                .background_style(WHITE.mix(0.9))
                .border_style(INK)
                .label_font(label(12))
                .draw()?;
        }
    }
    Ok(())
}

/// One curve: its label and points (subjects, power, Monte Carlo SE).
pub type Curve = (String, Vec<(f64, f64, f64)>);
/// One panel: its method and curves.
pub type Panel = (String, Vec<Curve>);

/// The figure's data: per stated contrast and kind (rows) and method
/// (columns), power against subjects, one curve per other design choice.
pub struct PowerCurves {
    pub target: f64,
    /// (row title, panels).
    pub rows: Vec<(String, Vec<Panel>)>,
}

/// The power-curve figure, for `satstep power` and the `power` stage.
pub fn power_curves(dir: &Path, c: &PowerCurves, print: Print) -> Result<Figure> {
    create_folder(dir)?;
    let cols = c.rows.iter().map(|r| r.1.len()).max().unwrap_or(1).max(1) as u32;
    let rows = c.rows.len().max(1) as u32;
    render(
        dir,
        "power_curve",
        format!(
            "Power against the number of subjects, per method, with the {:.0} % target dashed",
            c.target * 100.0
        ),
        (360 * cols + 40, 300 * rows + 40),
        print,
        &|r| draw_power(r, c),
    )
}

fn draw_power<DB: DrawingBackend>(root: &DrawingArea<DB, Shift>, c: &PowerCurves) -> DrawResult
where
    DB::ErrorType: 'static,
{
    let (top, body) = root.split_vertically(36);
    top.draw_text(
        &format!(
            "Power against subjects (dashed: the {:.0} % target; bars: ± 2 Monte Carlo SE)",
            c.target * 100.0
        ),
        &title(17),
        (12, 8),
    )?;
    let cols = c.rows.iter().map(|r| r.1.len()).max().unwrap_or(1).max(1);
    let xmax = c
        .rows
        .iter()
        .flat_map(|r| {
            r.1.iter()
                .flat_map(|p| p.1.iter().flat_map(|cv| cv.1.iter()))
        })
        .map(|p| p.0)
        .fold(2.0, f64::max);
    let xmin = c
        .rows
        .iter()
        .flat_map(|r| {
            r.1.iter()
                .flat_map(|p| p.1.iter().flat_map(|cv| cv.1.iter()))
        })
        .map(|p| p.0)
        .fold(xmax, f64::min);
    let areas = body.split_evenly((c.rows.len().max(1), cols));
    for (ri, (row_title, panels)) in c.rows.iter().enumerate() {
        for (pi, (method, curves)) in panels.iter().enumerate() {
            let area = &areas[ri * cols + pi];
            let mut ch = ChartBuilder::on(area)
                .caption(format!("{method}: {row_title}"), label(13))
                .margin(8)
                .x_label_area_size(36)
                .y_label_area_size(44)
                .build_cartesian_2d((xmin - 1.0)..(xmax + 1.0), 0.0..1.0)?;
            ch.configure_mesh()
                .light_line_style(TRANSPARENT)
                .bold_line_style(GRID)
                .x_desc("subjects")
                .y_desc("power")
                .y_label_formatter(&|v| format!("{:.0} %", v * 100.0))
                .x_label_formatter(&|v| format!("{v:.0}"))
                .label_style(label(11))
                .axis_desc_style(label(12))
                .draw()?;
            ch.draw_series(DashedLineSeries::new(
                [(xmin - 1.0, c.target), (xmax + 1.0, c.target)],
                6,
                4,
                INK.stroke_width(1),
            ))?;
            for (k, (name, points)) in curves.iter().enumerate() {
                let colour = method_colour(k);
                let style = colour.stroke_width(2);
                ch.draw_series(LineSeries::new(points.iter().map(|p| (p.0, p.1)), style))?
                    .label(name.as_str())
                    .legend(move |(x, y)| PathElement::new(vec![(x, y), (x + 18, y)], style));
                ch.draw_series(points.iter().map(|p| {
                    PathElement::new(
                        vec![
                            (p.0, (p.1 - 2.0 * p.2).max(0.0)),
                            (p.0, (p.1 + 2.0 * p.2).min(1.0)),
                        ],
                        colour.stroke_width(1),
                    )
                }))?;
                ch.draw_series(
                    points
                        .iter()
                        .map(|p| Circle::new((p.0, p.1), 3, colour.filled())),
                )?;
            }
            if pi == 0 && ri == 0 {
                ch.configure_series_labels()
                    .position(SeriesLabelPosition::LowerRight)
                    .background_style(WHITE.mix(0.9))
                    .border_style(INK)
                    .label_font(label(11))
                    .draw()?;
            }
        }
    }
    Ok(())
}

/// Splits a series where consecutive x values are further apart than 1.5
/// times the usual step, so that a line does not bridge left-out points.
fn runs(points: &[(f64, f64)]) -> Vec<Vec<(f64, f64)>> {
    let mut steps: Vec<f64> = points.windows(2).map(|w| w[1].0 - w[0].0).collect();
    steps.sort_by(f64::total_cmp);
    let usual = steps.get(steps.len() / 2).copied().unwrap_or(f64::INFINITY);
    let mut out: Vec<Vec<(f64, f64)>> = Vec::new();
    for (i, p) in points.iter().enumerate() {
        if i == 0 || p.0 - points[i - 1].0 > 1.5 * usual {
            out.push(Vec::new());
        }
        if let Some(last) = out.last_mut() {
            last.push(*p);
        }
    }
    out
}

fn draw_vessels<DB: DrawingBackend>(root: &DrawingArea<DB, Shift>, d: &ReportData) -> DrawResult
where
    DB::ErrorType: 'static,
{
    let panels = subject_panels(
        root,
        &format!("SO2 per vessel segment across the epochs ({})", d.primary),
        &[
            ("arteriolar segments", ARTERIOLE, Mark::Line),
            ("venular segments", VENULE, Mark::Line),
        ],
        560,
        d.vessels.len(),
    )?;
    let (ylo, yhi) = range(
        d.vessels
            .iter()
            .flat_map(|p| p.lines.iter().flat_map(|l| l.2.iter().flatten().copied())),
        0.05,
    );
    for (p, area) in d.vessels.iter().zip(panels) {
        let n = p.epochs.len().max(1);
        let mut ch = ChartBuilder::on(&area)
            .caption(&p.subject, title(14))
            .margin(6)
            .x_label_area_size(30)
            .y_label_area_size(40)
            .build_cartesian_2d(-0.3..(n as f64 - 0.7), ylo..yhi.min(105.0))?;
        let names = p.epochs.clone();
        ch.configure_mesh()
            .light_line_style(TRANSPARENT)
            .bold_line_style(GRID)
            .x_labels(n)
            .x_label_formatter(&|x| {
                names
                    .get(x.round() as usize)
                    .filter(|_| (x - x.round()).abs() < 1e-6)
                    .cloned()
                    .unwrap_or_default()
            })
            .y_label_formatter(&|v| format!("{v:.0}"))
            .y_desc("SO2 (%)")
            .label_style(label(11))
            .axis_desc_style(label(12))
            .draw()?;
        for (kind, _, values) in &p.lines {
            let col = if *kind == crate::config::segments::VesselKind::Arteriole {
                ARTERIOLE
            } else {
                VENULE
            };
            // Consecutive epochs with a value are joined; a missing epoch breaks the line.
            let mut run: Vec<(f64, f64)> = Vec::new();
            for (i, v) in values.iter().enumerate() {
                match v {
                    Some(v) => run.push((i as f64, *v)),
                    None => {
                        ch.draw_series(LineSeries::new(
                            run.drain(..),
                            col.mix(0.7).stroke_width(1),
                        ))?;
                    }
                }
            }
            ch.draw_series(LineSeries::new(run, col.mix(0.7).stroke_width(1)))?;
            ch.draw_series(
                values
                    .iter()
                    .enumerate()
                    .filter_map(|(i, v)| v.map(|v| Circle::new((i as f64, v), 2, col.filled()))),
            )?;
        }
    }
    Ok(())
}

fn draw_registration<DB: DrawingBackend>(
    root: &DrawingArea<DB, Shift>,
    panels: &[RegistrationPanel],
) -> DrawResult
where
    DB::ErrorType: 'static,
{
    let areas = subject_panels(
        root,
        "Registration over the session",
        &[
            ("shift x (px)", PALETTE[0], Mark::Line),
            ("shift y (px)", PALETTE[5], Mark::Line),
            ("rotation (° × 10)", PALETTE[2], Mark::Line),
        ],
        340,
        panels.len(),
    )?;
    // Rotations are small: tenths of a degree drawn on the pixel axis.
    const ROTATION_SCALE: f64 = 10.0;
    let (ylo, yhi) = range(
        panels.iter().flat_map(|p| {
            p.points
                .iter()
                .flat_map(|q| [q.1, q.2, q.3 * ROTATION_SCALE])
        }),
        0.08,
    );
    for (p, area) in panels.iter().zip(areas) {
        let xmax = p
            .points
            .iter()
            .map(|q| q.0)
            .chain(p.failed.iter().copied())
            .fold(1.0, f64::max);
        let mut ch = ChartBuilder::on(&area)
            .caption(&p.subject, title(14))
            .margin(6)
            .x_label_area_size(30)
            .y_label_area_size(40)
            .build_cartesian_2d(0.0..xmax * 1.02, ylo..yhi)?;
        ch.configure_mesh()
            .light_line_style(TRANSPARENT)
            .bold_line_style(GRID)
            .x_label_formatter(&|v| format!("{v:.0}"))
            .y_label_formatter(&|v| format!("{v:.1}"))
            .x_desc("time (min)")
            .y_desc("shift (px)")
            .label_style(label(11))
            .axis_desc_style(label(12))
            .draw()?;
        for (k, col) in [PALETTE[0], PALETTE[5], PALETTE[2]].into_iter().enumerate() {
            let pts: Vec<(f64, f64)> = p
                .points
                .iter()
                .map(|q| (q.0, [q.1, q.2, q.3 * ROTATION_SCALE][k]))
                .collect();
            ch.draw_series(LineSeries::new(pts.clone(), col.stroke_width(1)))?;
            ch.draw_series(pts.iter().map(|q| Circle::new(*q, 2, col.filled())))?;
        }
        ch.draw_series(
            p.failed
                .iter()
                .map(|t| Cross::new((*t, ylo + 0.04 * (yhi - ylo)), 5, BLACK.stroke_width(2))),
        )?;
    }
    Ok(())
}
