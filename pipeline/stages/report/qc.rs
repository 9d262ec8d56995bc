//! Quality-control sheets: where the vessels were sampled, capture by
//! capture. One sheet per eye (`qc/<subject>_<session>_<eye>.png`): the
//! eye's reference capture large, with every segment drawn and named, then
//! one thumbnail per capture with the segments as registration placed them.
//! `qc.html` gathers the sheets with the key and, per eye, why any capture
//! or segment has no value.
//!
//! The palette is by kind and flag only: a segment is drawn in its kind's
//! colour where the primary method has an SO2 for it in that capture, and
//! dashed white where it has none; flagged profile positions are marked in
//! the flag's colour. Saturation itself is never painted on the fundus.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use anyhow::{Result, anyhow};
use plotters::prelude::*;

use super::Inputs;
use super::style::{ARTERIOLE, VENULE, init, label, title};
use super::tables::html_escape;
use crate::config::segments::{Segment, VesselKind};
use crate::config::study::Study;
use crate::images::ingest::read_laid_out;
use crate::images::profile::{Flag, arc_lengths, locate};
use crate::images::register::Registration;
use crate::stages::fits::FitRow;
use crate::stages::transmissions::{PositionRow, capture_files, width_band};
use crate::tables::{create_folder, write_bytes_atomic};

/// Side of the reference capture's view, px.
const LARGE: u32 = 620;
/// Side of a thumbnail, px.
const THUMB: u32 = 196;
const GAP: u32 = 10;
/// Caption lines under a thumbnail.
const CAPTION: u32 = 46;
const COLUMNS: u32 = 6;
const SHEET_WIDTH: u32 = COLUMNS * (THUMB + GAP) + GAP;

/// A segment with no value in a capture.
const NO_VALUE: RGBColor = RGBColor(255, 255, 255);
/// Border of a capture that could not be used.
const FAILED: RGBColor = RGBColor(213, 94, 0);

/// The colour that marks a flagged position.
fn flag_colour(f: &Flag) -> RGBColor {
    match f {
        Flag::NearSegment => RGBColor(240, 228, 66),
        Flag::OffImage => RGBColor(86, 180, 233),
        Flag::LowContrast => RGBColor(204, 121, 167),
        Flag::PoorFit => RGBColor(0, 158, 115),
        Flag::OddWidth => RGBColor(0, 114, 178),
    }
}

const FLAGS: [Flag; 5] = [
    Flag::NearSegment,
    Flag::OffImage,
    Flag::LowContrast,
    Flag::PoorFit,
    Flag::OddWidth,
];

/// One eye of one session: its captures (indices in the epoch table, the
/// reference first) and its segments.
struct Eye<'a> {
    name: String,
    captures: Vec<usize>,
    segments: &'a [Segment],
}

/// Writes the sheets and `qc.html` under `dir` (the report folder), with
/// segments coloured by the values of the `primary` method; returns the
/// files written. A study analysed from a spectra table has no images
/// and gets none.
pub(crate) fn write(
    dir: &Path,
    q: &Inputs,
    primary: &str,
    positions: &dyn Fn(usize) -> Vec<PositionRow>,
) -> Result<Vec<PathBuf>> {
    let s = q.study;
    if s.spectra_file.is_some() {
        return Ok(Vec::new());
    }
    init();
    let sheets = dir.join("qc");
    create_folder(&sheets)?;
    let files = capture_files(s, q.epochs);
    let wb = width_band(s);
    let mut eyes: Vec<Eye> = Vec::new();
    for subj in &s.subjects {
        for sess in &subj.sessions {
            for (eye, segs) in &sess.vessels {
                let captures: Vec<usize> = q
                    .epochs
                    .captures
                    .iter()
                    .enumerate()
                    .filter(|(_, r)| {
                        r.subject == subj.id && r.session == sess.id && r.eye == eye.as_str()
                    })
                    .map(|(i, _)| i)
                    .collect();
                if !captures.is_empty() {
                    eyes.push(Eye {
                        name: format!("{}_{}_{}", subj.id, sess.id, eye.as_str()),
                        captures,
                        segments: segs,
                    });
                }
            }
        }
    }
    // Segment values of the primary method, per capture.
    let mut values: BTreeMap<(usize, &str), &FitRow> = BTreeMap::new();
    for r in q.fits.iter().filter(|r| r.method == primary) {
        values.insert((r.capture_index, r.segment.as_str()), r);
    }
    let mut written = Vec::new();
    let mut html = String::new();
    for eye in &eyes {
        let path = sheets.join(format!("{}.png", eye.name));
        let png = sheet(eye, q, &files, wb, &values, positions).map_err(|e| {
            anyhow!(
                "drawing the quality-control sheet `{}`: {e}",
                path.display()
            )
        })?;
        write_bytes_atomic(&path, &png)?;
        written.push(path);
        html.push_str(&eye_section(eye, q, primary, &values));
    }
    let page = dir.join("qc.html");
    write_bytes_atomic(&page, page_html(s, primary, &html).as_bytes())?;
    written.push(page);
    Ok(written)
}

/// The band as 8-bit grey at `side` × `side` (letterboxed), stretched
/// between its 1st and 99th percentiles so that vessels show on any
/// exposure.
fn grey(img: &[f32], w: usize, h: usize, side: u32) -> (Vec<u8>, f64) {
    // Two order statistics; selection, not a sort, so that a large
    // capture costs linear time.
    let mut values: Vec<f32> = img.iter().copied().filter(|v| v.is_finite()).collect();
    let mut pick = |q: f64| {
        if values.is_empty() {
            return 0.0;
        }
        let k = ((values.len() - 1) as f64 * q) as usize;
        *values.select_nth_unstable_by(k, f32::total_cmp).1 as f64
    };
    let (lo, hi) = (pick(0.01), pick(0.99));
    let span = (hi - lo).max(1e-9);
    let scale = side as f64 / w.max(h) as f64;
    let n = side as usize;
    let mut out = vec![0u8; n * n];
    for oy in 0..n {
        for ox in 0..n {
            // The source pixels under this output pixel, averaged.
            let (x0, x1) = (ox as f64 / scale, (ox + 1) as f64 / scale);
            let (y0, y1) = (oy as f64 / scale, (oy + 1) as f64 / scale);
            let (mut sum, mut count) = (0.0, 0usize);
            let ys = y0.floor() as usize..(y1.ceil() as usize).max(y0.floor() as usize + 1);
            for y in ys.filter(|y| *y < h) {
                let xs = x0.floor() as usize..(x1.ceil() as usize).max(x0.floor() as usize + 1);
                for x in xs.filter(|x| *x < w) {
                    let v = img[y * w + x];
                    if v.is_finite() {
                        sum += v as f64;
                        count += 1;
                    }
                }
            }
            out[oy * n + ox] = if count == 0 {
                40
            } else {
                (((sum / count as f64 - lo) / span).clamp(0.0, 1.0) * 255.0) as u8
            };
        }
    }
    (out, scale)
}

/// Copies a grey view into the sheet's RGB buffer at (x0, y0).
fn blit(buf: &mut [u8], sheet_w: u32, view: &[u8], side: u32, x0: u32, y0: u32) {
    for y in 0..side {
        for x in 0..side {
            let g = view[(y * side + x) as usize];
            let o = (((y0 + y) * sheet_w + x0 + x) * 3) as usize;
            buf[o..o + 3].copy_from_slice(&[g, g, g]);
        }
    }
}

fn sheet(
    eye: &Eye,
    q: &Inputs,
    files: &[PathBuf],
    wb: usize,
    values: &BTreeMap<(usize, &str), &FitRow>,
    positions: &dyn Fn(usize) -> Vec<PositionRow>,
) -> std::result::Result<Vec<u8>, Box<dyn std::error::Error>> {
    let nb = q.study.instrument.bands.len();
    let rows = (eye.captures.len() as u32).div_ceil(COLUMNS);
    let top = 40 + LARGE + 2 * GAP;
    let (w, h) = (SHEET_WIDTH, top + rows * (THUMB + CAPTION + GAP) + GAP);
    let mut buf = vec![255u8; (w * h * 3) as usize];
    // The views first, drawn straight into the buffer; marks on top after.
    let mut placed = Vec::new();
    let mut band: Option<(Vec<f32>, usize, usize)> = None;
    for (k, &i) in std::iter::once(&eye.captures[0])
        .chain(eye.captures.iter())
        .enumerate()
    {
        let (side, x0, y0) = if k == 0 {
            (LARGE, GAP, 40)
        } else {
            let j = k as u32 - 1;
            (
                THUMB,
                GAP + (j % COLUMNS) * (THUMB + GAP),
                top + (j / COLUMNS) * (THUMB + CAPTION + GAP),
            )
        };
        // The reference capture is drawn twice (large, then as the first
        // thumbnail) but read once.
        if k != 1 {
            band = read_laid_out(&files[i], &q.study.instrument.layout, nb, None)
                .ok()
                .map(|mut m| (m.bands.swap_remove(wb), m.width, m.height));
        }
        let scale = band.as_ref().map(|(b, bw, bh)| {
            let (view, scale) = grey(b, *bw, *bh, side);
            blit(&mut buf, w, &view, side, x0, y0);
            (scale, *bw as f64 / 2.0, *bh as f64 / 2.0)
        });
        placed.push((k, i, side, x0, y0, scale));
    }
    {
        let root = BitMapBackend::with_buffer(&mut buf, (w, h)).into_drawing_area();
        let c0 = &q.epochs.captures[eye.captures[0]];
        root.draw_text(
            &format!(
                "{} {} {}: reference capture `{}` ({} of the band used for registration)",
                c0.subject, c0.session, c0.eye, c0.capture, q.study.instrument.bands[wb].name
            ),
            &title(17),
            (GAP as i32, 12),
        )?;
        key(&root, (GAP + LARGE + 24) as i32, 60)?;
        for (k, i, side, x0, y0, scale) in placed {
            let st = &q.images.status[i];
            let row = &q.epochs.captures[i];
            let reg = if k == 0 || i == eye.captures[0] {
                Some(Registration::IDENTITY)
            } else {
                st.registration.filter(|_| !st.status.failed())
            };
            let (x0, y0) = (x0 as i32, y0 as i32);
            if let (Some((sc, cx, cy)), Some(reg)) = (scale, &reg) {
                let to_view = |p: (f64, f64)| (x0 + (p.0 * sc) as i32, y0 + (p.1 * sc) as i32);
                let pos = if k == 0 { Vec::new() } else { positions(i) };
                for seg in eye.segments {
                    let line: Vec<(f64, f64)> =
                        seg.points.iter().map(|p| reg.apply(*p, cx, cy)).collect();
                    let has_value = k == 0
                        || values
                            .get(&(i, seg.id.as_str()))
                            .is_some_and(|r| r.so2.is_some());
                    let colour = if seg.kind == VesselKind::Arteriole {
                        ARTERIOLE
                    } else {
                        VENULE
                    };
                    let width = if k == 0 { 3 } else { 2 };
                    let bounds = (0.0, 0.0, 2.0 * cx, 2.0 * cy);
                    for piece in clip(&line, bounds) {
                        let pts: Vec<(i32, i32)> = piece.iter().map(|p| to_view(*p)).collect();
                        if has_value {
                            root.draw(&PathElement::new(pts, colour.stroke_width(width)))?;
                        } else {
                            root.draw(&plotters::element::DashedPathElement::new(
                                pts,
                                4,
                                3,
                                NO_VALUE.stroke_width(width),
                            ))?;
                        }
                    }
                    if line.len() >= 2 {
                        let cum = arc_lengths(&line);
                        for p in pos
                            .iter()
                            .filter(|p| p.segment == seg.id && !p.flags.is_empty())
                        {
                            let (c, _) = locate(&line, &cum, p.along_px);
                            if !(c.0 >= 0.0 && c.1 >= 0.0 && c.0 <= 2.0 * cx && c.1 <= 2.0 * cy) {
                                continue;
                            }
                            root.draw(&Circle::new(
                                to_view(c),
                                2,
                                flag_colour(&p.flags[0]).filled(),
                            ))?;
                        }
                    }
                    if let Some(mid) = (k == 0).then(|| line[line.len() / 2]).map(to_view) {
                        root.draw_text(
                            &seg.id,
                            &("sans-serif", 14).into_font().color(&WHITE),
                            (mid.0 + 5, mid.1 - 16),
                        )?;
                    }
                }
            }
            let edge = if st.status.failed() {
                FAILED
            } else {
                RGBColor(160, 160, 160)
            };
            let side = side as i32;
            root.draw(&Rectangle::new(
                [(x0 - 1, y0 - 1), (x0 + side, y0 + side)],
                edge.stroke_width(if st.status.failed() { 3 } else { 1 }),
            ))?;
            if k == 0 {
                continue;
            }
            let with_value = eye
                .segments
                .iter()
                .filter(|s| {
                    values
                        .get(&(i, s.id.as_str()))
                        .is_some_and(|r| r.so2.is_some())
                })
                .count();
            let line1 = format!(
                "{} · {} · {}",
                row.capture,
                row.epoch.as_deref().unwrap_or("–"),
                row.status
            );
            let line2 = if st.status.failed() {
                format!("{}", st.status)
            } else if !row.status.analysed() {
                "not analysed".to_string()
            } else {
                format!("SO2 in {with_value} of {} segments", eye.segments.len())
            };
            root.draw_text(&line1, &label(12), (x0, y0 + side + 4))?;
            root.draw_text(
                &line2,
                &label(12).color(if st.status.failed() { &FAILED } else { &BLACK }),
                (x0, y0 + side + 20),
            )?;
        }
        root.present()?;
    }
    rgb_png(&buf, w, h)
}

/// An RGB buffer as PNG bytes.
fn rgb_png(buf: &[u8], w: u32, h: u32) -> std::result::Result<Vec<u8>, Box<dyn std::error::Error>> {
    let mut out = Vec::new();
    {
        let mut enc = png::Encoder::new(&mut out, w, h);
        enc.set_color(png::ColorType::Rgb);
        enc.set_depth(png::BitDepth::Eight);
        let mut wr = enc.write_header()?;
        wr.write_image_data(buf)?;
    }
    Ok(out)
}

/// A proposed segment as its overlay draws it.
pub(crate) struct ProposedLine<'a> {
    pub id: &'a str,
    pub kind: VesselKind,
    pub points: &'a [(f64, f64)],
    /// The kind is unsure (drawn dashed).
    pub unsure: bool,
}

/// Side of a proposal overlay's view, px.
const OVERLAY: u32 = 760;

/// A proposal's review image (PNG bytes): the band it was traced in, grey,
/// with every proposed segment drawn in its kind's colour (dashed where
/// the kind is unsure) and named, a caption and a key. Saturation is never
/// painted on the fundus.
pub(crate) fn proposal_overlay(
    band: &[f32],
    bw: usize,
    bh: usize,
    caption: &str,
    lines: &[ProposedLine],
) -> std::result::Result<Vec<u8>, Box<dyn std::error::Error>> {
    init();
    let (w, h) = (OVERLAY + 2 * GAP + 230, OVERLAY + 40 + GAP);
    let mut buf = vec![255u8; (w * h * 3) as usize];
    let (view, scale) = grey(band, bw, bh, OVERLAY);
    blit(&mut buf, w, &view, OVERLAY, GAP, 40);
    {
        let root = BitMapBackend::with_buffer(&mut buf, (w, h)).into_drawing_area();
        root.draw_text(caption, &title(17), (GAP as i32, 12))?;
        let to_view =
            |p: (f64, f64)| (GAP as i32 + (p.0 * scale) as i32, 40 + (p.1 * scale) as i32);
        let bounds = (0.0, 0.0, bw as f64, bh as f64);
        // A line, dashed where the kind is unsure.
        let stroke = |pts: Vec<(i32, i32)>, colour: RGBColor, dashed: bool| {
            let style = colour.stroke_width(3);
            if dashed {
                root.draw(&plotters::element::DashedPathElement::new(pts, 6, 4, style))
            } else {
                root.draw(&PathElement::new(pts, style))
            }
        };
        for l in lines {
            let colour = if l.kind == VesselKind::Arteriole {
                ARTERIOLE
            } else {
                VENULE
            };
            for piece in clip(l.points, bounds) {
                let pts: Vec<(i32, i32)> = piece.iter().map(|p| to_view(*p)).collect();
                stroke(pts, colour, l.unsure)?;
            }
            let mid = to_view(l.points[l.points.len() / 2]);
            root.draw_text(
                l.id,
                &(super::style::FAMILY, 15).into_font().color(&WHITE),
                (mid.0 + 6, mid.1 - 18),
            )?;
        }
        let (kx, ky) = ((GAP + OVERLAY + 18) as i32, 60);
        let rows: [(&str, RGBColor, bool); 3] = [
            ("arteriole", ARTERIOLE, false),
            ("venule", VENULE, false),
            ("kind unsure", RGBColor(120, 120, 120), true),
        ];
        for (k, (text, colour, dashed)) in rows.into_iter().enumerate() {
            let y = ky + 24 * k as i32;
            stroke(vec![(kx, y), (kx + 30, y)], colour, dashed)?;
            root.draw_text(text, &label(14), (kx + 38, y - 8))?;
        }
        root.present()?;
    }
    rgb_png(&buf, w, h)
}

/// The parts of a polyline inside the rectangle (x0, y0, x1, y1), each
/// piece cut at the edge (Liang and Barsky's clipping of each line piece).
fn clip(line: &[(f64, f64)], (x0, y0, x1, y1): (f64, f64, f64, f64)) -> Vec<Vec<(f64, f64)>> {
    let mut out: Vec<Vec<(f64, f64)>> = Vec::new();
    let mut open = false;
    for w in line.windows(2) {
        let (a, b) = (w[0], w[1]);
        let (dx, dy) = (b.0 - a.0, b.1 - a.1);
        let (mut t0, mut t1) = (0.0f64, 1.0f64);
        let mut keep = true;
        for (p, q) in [
            (-dx, a.0 - x0),
            (dx, x1 - a.0),
            (-dy, a.1 - y0),
            (dy, y1 - a.1),
        ] {
            if p == 0.0 {
                keep &= q >= 0.0;
            } else if p < 0.0 {
                t0 = t0.max(q / p);
            } else {
                t1 = t1.min(q / p);
            }
        }
        if !keep || t0 > t1 {
            open = false;
            continue;
        }
        let at = |t: f64| (a.0 + t * dx, a.1 + t * dy);
        if !open || t0 > 0.0 {
            out.push(vec![at(t0)]);
        }
        if let Some(last) = out.last_mut() {
            last.push(at(t1));
        }
        open = t1 >= 1.0;
    }
    out
}

/// The key beside the reference view.
fn key<DB: DrawingBackend>(
    root: &DrawingArea<DB, plotters::coord::Shift>,
    x: i32,
    y: i32,
) -> std::result::Result<(), Box<dyn std::error::Error>>
where
    DB::ErrorType: 'static,
{
    let mut y = y;
    root.draw_text("Key", &title(15), (x, y))?;
    y += 26;
    let line = |root: &DrawingArea<DB, _>,
                y: i32,
                c: RGBColor,
                dashed: bool,
                text: &str|
     -> std::result::Result<(), Box<dyn std::error::Error>> {
        if dashed {
            root.draw(&Rectangle::new(
                [(x - 2, y - 4), (x + 30, y + 6)],
                RGBColor(90, 90, 90).filled(),
            ))?;
            root.draw(&plotters::element::DashedPathElement::new(
                vec![(x, y), (x + 28, y)],
                4,
                3,
                c.stroke_width(2),
            ))?;
        } else {
            root.draw(&PathElement::new(
                vec![(x, y), (x + 28, y)],
                c.stroke_width(3),
            ))?;
        }
        root.draw_text(text, &label(13), (x + 38, y - 7))?;
        Ok(())
    };
    line(
        root,
        y,
        ARTERIOLE,
        false,
        "arteriole, with an SO2 in this capture",
    )?;
    y += 22;
    line(
        root,
        y,
        VENULE,
        false,
        "venule, with an SO2 in this capture",
    )?;
    y += 22;
    line(
        root,
        y,
        NO_VALUE,
        true,
        "segment with no SO2 in this capture",
    )?;
    y += 30;
    root.draw_text("Profile positions left out:", &label(13), (x, y - 7))?;
    y += 20;
    for f in FLAGS {
        root.draw(&Circle::new((x + 14, y), 4, flag_colour(&f).filled()))?;
        root.draw_text(f.as_str(), &label(13), (x + 38, y - 7))?;
        y += 20;
    }
    y += 10;
    root.draw(&Rectangle::new(
        [(x, y - 6), (x + 28, y + 6)],
        FAILED.stroke_width(3),
    ))?;
    root.draw_text(
        "capture not used (reason below it)",
        &label(13),
        (x + 38, y - 7),
    )?;
    y += 30;
    for t in [
        "Thumbnails: every listed capture of the eye, in time order,",
        "with its epoch, status and how many segments have an SO2.",
        "Segments are placed by the capture's registration.",
    ] {
        root.draw_text(t, &label(12), (x, y))?;
        y += 18;
    }
    Ok(())
}

/// One eye's part of `qc.html`: its sheet and the reasons values are missing.
fn eye_section(
    eye: &Eye,
    q: &Inputs,
    primary: &str,
    values: &BTreeMap<(usize, &str), &FitRow>,
) -> String {
    let mut h = format!(
        "<h2 id=\"{0}\">{0}</h2>\n<p><img src=\"qc/{0}.png\" alt=\"quality-control sheet of {0}\" style=\"max-width:100%\"></p>\n",
        html_escape(&eye.name)
    );
    let mut reasons: BTreeMap<String, usize> = BTreeMap::new();
    let mut unused = Vec::new();
    for &i in &eye.captures {
        let st = &q.images.status[i];
        let row = &q.epochs.captures[i];
        if st.status.failed() {
            unused.push(format!(
                "<li><code>{}</code>: {} ({})</li>",
                html_escape(&row.capture),
                html_escape(&st.status.to_string()),
                html_escape(st.message.as_deref().unwrap_or(""))
            ));
            continue;
        }
        for s in eye.segments {
            if let Some(r) = values.get(&(i, s.id.as_str())).filter(|r| r.so2.is_none()) {
                *reasons.entry(r.termination.code().to_string()).or_default() += 1;
            }
        }
    }
    if !unused.is_empty() {
        h.push_str(&format!(
            "<p>Captures not used:</p><ul>{}</ul>\n",
            unused.join("")
        ));
    }
    if reasons.is_empty() {
        h.push_str(&format!(
            "<p>Every segment of every used capture has an SO2 from <code>{}</code>.</p>\n",
            html_escape(primary)
        ));
    } else {
        let list: Vec<String> = reasons
            .iter()
            .map(|(k, n)| format!("<code>{}</code>: {n}", html_escape(k)))
            .collect();
        h.push_str(&format!(
            "<p>Segment fits of <code>{}</code> without an SO2, by reason (the <code>termination</code> code of <code>fits/so2</code>): {}.</p>\n",
            html_escape(primary),
            list.join(", ")
        ));
    }
    h
}

fn page_html(s: &Study, primary: &str, body: &str) -> String {
    format!(
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n<title>Quality control: {}</title>\n<style>body{{font-family:'DejaVu Sans',Verdana,sans-serif;max-width:1300px;margin:2em auto;padding:0 1em;color:#222}}h2{{color:#0072b2;margin-top:2em}}</style>\n</head>\n<body>\n<h1>Quality control: {}</h1>\n<p>One sheet per eye: where each segment was sampled in each capture, which profile positions were left out and why, and which captures could not be used. Segments are coloured by kind where <code>{}</code> has an SO2 for them in that capture. <a href=\"report.html\">Back to the report</a>.</p>\n{body}</body>\n</html>\n",
        html_escape(&s.title),
        html_escape(&s.title),
        html_escape(primary)
    )
}

#[cfg(test)]
mod tests {
    use super::clip;

    #[test]
    fn a_polyline_is_cut_at_the_rectangle() {
        let r = (0.0, 0.0, 10.0, 10.0);
        // Inside: one piece, unchanged.
        assert_eq!(
            clip(&[(1.0, 1.0), (5.0, 5.0), (9.0, 1.0)], r),
            vec![vec![(1.0, 1.0), (5.0, 5.0), (9.0, 1.0)]]
        );
        // Leaving at the top and coming back: two pieces, cut at y = 0.
        let pieces = clip(&[(2.0, 4.0), (2.0, -4.0), (6.0, -4.0), (6.0, 4.0)], r);
        assert_eq!(
            pieces,
            vec![vec![(2.0, 4.0), (2.0, 0.0)], vec![(6.0, 0.0), (6.0, 4.0)]]
        );
        // Wholly outside: nothing.
        assert!(clip(&[(-5.0, -5.0), (-1.0, -9.0)], r).is_empty());
    }
}
