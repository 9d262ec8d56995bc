//! The look of satstep's figures: one embedded font (DejaVu Sans, under the
//! Bitstream Vera licence in `fonts/`), so text renders the same on a
//! machine without fonts; the Okabe–Ito colour-blind-safe palette; light
//! grids; a fixed set of sizes. Every figure is drawn twice from the same
//! code, to SVG (kept as text, also inlined in the HTML report) and PNG.

use std::sync::Once;

use plotters::prelude::*;

pub(crate) static FONT: &[u8] = include_bytes!("fonts/DejaVuSans.ttf");
static REGISTER: Once = Once::new();

/// The family name every text style uses.
pub(crate) const FAMILY: &str = "sans-serif";

/// Registers the embedded font; call before drawing.
pub(crate) fn init() {
    REGISTER.call_once(|| {
        plotters::style::register_font(FAMILY, FontStyle::Normal, FONT)
            .unwrap_or_else(|_| panic!("the embedded font is a valid TrueType file"));
    });
}

/// Okabe & Ito (2008), "Color Universal Design", the eight-colour set.
pub(crate) const PALETTE: [RGBColor; 8] = [
    RGBColor(0, 114, 178),   // blue
    RGBColor(230, 159, 0),   // orange
    RGBColor(0, 158, 115),   // bluish green
    RGBColor(204, 121, 167), // reddish purple
    RGBColor(86, 180, 233),  // sky blue
    RGBColor(213, 94, 0),    // vermillion
    RGBColor(240, 228, 66),  // yellow
    RGBColor(0, 0, 0),       // black
];

/// Vessel kinds keep their colours in every figure.
pub(crate) const ARTERIOLE: RGBColor = PALETTE[5];
pub(crate) const VENULE: RGBColor = PALETTE[0];
pub(crate) const REFERENCE: RGBColor = RGBColor(40, 40, 40);
pub(crate) const GRID: RGBColor = RGBColor(232, 232, 232);
pub(crate) const INK: RGBColor = RGBColor(60, 60, 60);

pub(crate) fn method_colour(i: usize) -> RGBColor {
    [
        PALETTE[0], PALETTE[5], PALETTE[2], PALETTE[3], PALETTE[1], PALETTE[4],
    ][i % 6]
}

pub fn title(size: u32) -> TextStyle<'static> {
    (FAMILY, size).into_font().color(&BLACK)
}

pub fn label(size: u32) -> TextStyle<'static> {
    (FAMILY, size).into_font().color(&INK)
}
