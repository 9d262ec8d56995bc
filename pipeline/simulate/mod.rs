//! Synthetic studies with known truth: `satstep simulate SCENARIO --out DIR`
//! writes a study folder that `satstep run` accepts unchanged, plus a
//! `truth/` folder with the saturations that were rendered.
//!
//! A scenario names a protocol, an instrument, a cohort size and a seed.
//! Everything random is drawn from generators seeded by the master seed and
//! the item's name (subject, capture), so the same scenario gives the same
//! bytes whatever the thread count.

pub mod cohort;
pub mod course;
pub mod optics;
pub mod power;
pub mod render;
pub mod seed;

use std::fmt::Write as _;
use std::path::{Path, PathBuf};

use chrono::{DateTime, Duration, FixedOffset};
use rand::Rng;
use rand_distr::{Distribution, Normal, Uniform};
use rayon::prelude::*;

use crate::config::diag::Findings;
use crate::config::protocol::{Protocol, load_protocol};
use crate::config::read::Reader;
use crate::config::segments::{Segment, VesselKind};
use crate::config::study::BandResponse;
use crate::config::study::SensorLayout;
use crate::oximetry::bands::SampledBand;
use crate::oximetry::model::BLOOD_BACKSCATTER;
use crate::physiology::pressure_at_altitude_mmhg;
use crate::stats::summary::mean;
use crate::tables::{Table, TableError, write_bytes_atomic};
use crate::timeline::assign::CaptureStatus;
use course::SubjectPhysiology;
use optics::Optics;
use render::{Motion, Scene, VesselState};
use seed::rng_for;

/// A validated scenario.
#[derive(Debug, Clone)]
pub struct Scenario {
    pub id: String,
    pub title: String,
    pub seed: u64,
    pub protocol_file: PathBuf,
    pub protocol: Protocol,
    pub start: DateTime<FixedOffset>,
    pub subjects: usize,
    pub captures_per_epoch: usize,
    pub settling_captures: usize,
    pub altitude_m: f64,
    pub width: usize,
    pub height: usize,
    pub pixel_size_um: f64,
    pub instrument_name: String,
    /// How the captures hold the bands: pages, or one frame as a grid of tiles.
    pub sensor: SensorLayout,
    pub bands: Vec<(String, f64, f64)>,
    pub veil_max: f64,
    /// Veil added per fundus pigmentation grade above 1 (default 0): a
    /// darker fundus returns less light from behind the vessel, so that
    /// methods which do not fit the veil become biased by pigmentation.
    pub pigmentation_veil: f64,
    /// How the vessels lie in the field.
    pub layout: Layout,
    /// How the eye's optics depart from the base vessel model.
    pub optics: Optics,
    pub methods_yaml: String,
    /// The scenario's `power:` section as written, copied into the study
    /// file (it is checked there, against the study's contrasts and methods).
    pub power_yaml: Option<String>,
}

const SCENARIO_KEYS: &[&str] = &[
    "scenario",
    "title",
    "seed",
    "protocol",
    "start",
    "subjects",
    "captures_per_epoch",
    "settling_captures",
    "altitude_m",
    "image",
    "instrument",
    "veil_max",
    "pigmentation_veil",
    "layout",
    "optics",
    "power",
];

/// How the simulated vessels lie in the field (the scenario's `layout:`).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Layout {
    /// Close together, touching and running to the border (the default,
    /// which the flag rules' tests rely on).
    Crowded,
    /// Apart and clear of the border: every profile position usable.
    Clear,
    /// No vessels at all: a fundus without vessels, for testing that
    /// vessel tracing proposes nothing where there is nothing.
    Empty,
}
const OPTICS_KEYS: &[&str] = &[
    "veil_slope",
    "backscatter_scale",
    "fundus_exponent",
    "psf_px",
    "reflex",
];
const IMAGE_KEYS: &[&str] = &["width", "height", "pixel_size_um"];
const INSTRUMENT_KEYS: &[&str] = &["name", "bands", "layout"];
const BAND_KEYS: &[&str] = &["name", "centre_nm", "fwhm_nm"];

/// Reads and validates a scenario file.
pub(crate) fn load_scenario(path: &Path) -> Result<Scenario, Findings> {
    let mut findings = Findings::new();
    let Some(root) =
        crate::config::read::load_tree(path, "scenario file", "check the path", &mut findings)
    else {
        return Err(findings);
    };
    let dir = path.parent().map(Path::to_path_buf).unwrap_or_default();
    let s = {
        let mut r = Reader::new(path, &mut findings);
        read_scenario(&mut r, &root, &dir)
    };
    match s {
        Some(s) if !findings.has_errors() => Ok(s),
        _ => Err(findings),
    }
}

fn read_scenario(r: &mut Reader, node: &crate::config::yaml::Node, dir: &Path) -> Option<Scenario> {
    let m = r.map(node, "the scenario", SCENARIO_KEYS)?;
    let id = r
        .required(&m, "scenario", "the scenario")
        .and_then(|n| r.text(n, "`scenario`"));
    let title = m
        .get("title")
        .and_then(|n| r.text(n, "`title`"))
        .unwrap_or_default();
    let seed = m
        .get("seed")
        .and_then(|n| r.integer(n, "`seed`"))
        .unwrap_or(1) as u64;
    let proto_node = r.required(&m, "protocol", "the scenario")?;
    let protocol_file = dir.join(r.text(proto_node, "`protocol`")?);
    let protocol = match load_protocol(&protocol_file) {
        Ok(p) => Some(p),
        Err(f) => {
            r.findings.extend(f);
            None
        }
    };
    let start = r
        .required(&m, "start", "the scenario")
        .and_then(|n| r.time(n, "`start`"));
    let count = |r: &mut Reader, key: &str, default: i64, lo: i64, hi: i64| -> Option<usize> {
        match m.get(key) {
            None => Some(default as usize),
            Some(n) => {
                let v = r.integer(n, &format!("`{key}`"))?;
                if !(lo..=hi).contains(&v) {
                    r.error(n.mark, format!("`{key}` {v} is outside {lo}–{hi}"));
                    return None;
                }
                Some(v as usize)
            }
        }
    };
    let subjects = count(r, "subjects", 8, 1, 200);
    let cpe = count(r, "captures_per_epoch", 5, 1, 50);
    let settling = count(r, "settling_captures", 1, 0, 10);
    let altitude = m
        .get("altitude_m")
        .and_then(|n| r.number(n, "`altitude_m`"))
        .unwrap_or(0.0);
    let veil_max = m
        .get("veil_max")
        .and_then(|n| r.number(n, "`veil_max`"))
        .unwrap_or(0.6);
    let pigmentation_veil = m
        .get("pigmentation_veil")
        .and_then(|n| r.number(n, "`pigmentation_veil`"))
        .unwrap_or(0.0);
    if !(0.0..=0.2).contains(&pigmentation_veil) {
        r.error(
            m.get("pigmentation_veil")
                .map(|n| n.mark)
                .unwrap_or(m.mark()),
            "`pigmentation_veil` is the veil added per pigmentation grade above 1, in 0–0.2",
        );
    }
    let layout = match m.get("layout") {
        None => Some(Layout::Crowded),
        Some(n) => r
            .choice(n, "`layout`", &["crowded", "clear", "none"])
            .map(|t| match t.as_str() {
                "clear" => Layout::Clear,
                "none" => Layout::Empty,
                _ => Layout::Crowded,
            }),
    };
    let (mut w, mut h, mut px) = (Some(256usize), Some(256usize), Some(12.0));
    if let Some(n) = m.get("image") {
        if let Some(im) = r.map(n, "`image`", IMAGE_KEYS) {
            if let Some(x) = im.get("width") {
                w = r.integer(x, "`width`").map(|v| v.clamp(32, 4096) as usize);
            }
            if let Some(x) = im.get("height") {
                h = r.integer(x, "`height`").map(|v| v.clamp(32, 4096) as usize);
            }
            if let Some(x) = im.get("pixel_size_um") {
                px = r.number(x, "`pixel_size_um`");
            }
        }
    }
    let mut bands = Vec::new();
    let mut inst_name = "simulated camera".to_string();
    let mut sensor = SensorLayout::Pages;
    let inst = r.required(&m, "instrument", "the scenario")?;
    if let Some(im) = r.map(inst, "`instrument`", INSTRUMENT_KEYS) {
        if let Some(n) = im.get("name") {
            inst_name = r.text(n, "`name`").unwrap_or(inst_name);
        }
        if let Some(bl) = r.required(&im, "bands", "`instrument`") {
            for b in r.list(bl, "`bands`").unwrap_or_default() {
                let Some(bm) = r.map(b, "a band", BAND_KEYS) else {
                    continue;
                };
                let name = r
                    .required(&bm, "name", "a band")
                    .and_then(|n| r.text(n, "`name`"));
                let c = r
                    .required(&bm, "centre_nm", "a band")
                    .and_then(|n| r.number(n, "`centre_nm`"));
                let f = r
                    .required(&bm, "fwhm_nm", "a band")
                    .and_then(|n| r.number(n, "`fwhm_nm`"));
                if let (Some(name), Some(c), Some(f)) = (name, c, f) {
                    bands.push((name, c, f));
                }
            }
        }
        if let Some(n) = im.get("layout") {
            match crate::config::study::read_layout(r, n, bands.len()) {
                Some(SensorLayout::Tiles(_)) => {
                    r.error(n.mark, "a scenario writes tiled frames as a grid")
                        .hint("`layout: {grid: {columns: 4, rows: 2}}`: equal tiles, bands left to right, then down");
                }
                Some(l) => sensor = l,
                None => {}
            }
        }
    }
    if let (Some(Layout::Clear), Some(w), Some(h), Some(px)) = (layout, w, h, px) {
        let need = (CLEAR_MIN_SIDE_MARGINS * clear_margin_px(px)).ceil();
        if ((w.min(h)) as f64) < need {
            r.error(
                m.get("layout").map(|n| n.mark).unwrap_or(m.mark()),
                format!(
                    "`layout: clear` keeps vessels {:.0} px from the border, which leaves too little of a {w} × {h} px field to lay them in",
                    clear_margin_px(px)
                ),
            )
            .hint(format!(
                "make the image at least {need:.0} px a side at {px} µm per pixel, or use `layout: crowded`"
            ));
        }
    }
    let optics = m
        .get("optics")
        .map(|n| read_optics(r, n))
        .unwrap_or(Some(Optics::default()));
    if !(0.0..0.95).contains(&veil_max) {
        r.error(
            m.get("veil_max").map(|n| n.mark).unwrap_or(m.mark()),
            "`veil_max` must be in 0–0.95",
        );
    }
    Some(Scenario {
        id: id?,
        title,
        seed,
        protocol_file,
        protocol: protocol?,
        start: start?,
        subjects: subjects?,
        captures_per_epoch: cpe?,
        settling_captures: settling?,
        altitude_m: altitude,
        width: w?,
        height: h?,
        pixel_size_um: px?,
        instrument_name: inst_name,
        sensor,
        bands,
        veil_max,
        pigmentation_veil,
        layout: layout?,
        optics: optics?,
        methods_yaml: String::new(),
        power_yaml: m
            .get("power")
            .and_then(|_| std::fs::read_to_string(r.file).ok())
            .and_then(|t| power_section(&t)),
    })
}

/// The `optics:` section: each departure from the base model with the
/// range in which it stays physical.
fn read_optics(r: &mut Reader, node: &crate::config::yaml::Node) -> Option<Optics> {
    let m = r.map(node, "`optics`", OPTICS_KEYS)?;
    let mut o = Optics::default();
    let mut ok = true;
    for (key, lo, hi, what) in [
        ("veil_slope", -0.5, 0.5, "a change of the veil per 100 nm"),
        (
            "backscatter_scale",
            0.0,
            1.0,
            "a scale of the blood's reflectance",
        ),
        (
            "fundus_exponent",
            0.0,
            2.0,
            "an exponent of the fundus reflectance",
        ),
        ("psf_px", 0.0, 5.0, "an SD in pixels"),
        ("reflex", 0.0, 0.9, "a share of the light the axis absorbs"),
    ] {
        let Some(n) = m.get(key) else { continue };
        let Some(v) = r.number(n, &format!("`{key}`")) else {
            ok = false;
            continue;
        };
        if !(lo..=hi).contains(&v) {
            r.error(n.mark, format!("`{key}` {v} is outside {lo}–{hi} ({what})"));
            ok = false;
            continue;
        }
        match key {
            "veil_slope" => o.veil_slope = v,
            "backscatter_scale" => o.backscatter_scale = v,
            "fundus_exponent" => o.fundus_exponent = v,
            "psf_px" => o.psf_px = v,
            _ => o.reflex = v,
        }
    }
    ok.then_some(o)
}

/// The top-level `power:` section of a scenario file's text, verbatim: its
/// key line and the indented, blank or comment lines after it.
fn power_section(text: &str) -> Option<String> {
    let mut lines = text.lines().skip_while(|l| !l.starts_with("power:"));
    let first = lines.next()?;
    let mut out = format!("{first}\n");
    for l in lines {
        if l.is_empty() || l.starts_with(' ') || l.starts_with('#') {
            out.push_str(l);
            out.push('\n');
        } else {
            break;
        }
    }
    Some(out.trim_end().to_string() + "\n")
}

/// A subject as drawn from the scenario.
struct SimSubject {
    id: String,
    age: u32,
    sex: &'static str,
    pigmentation: i64,
    veil: f64,
    physiology: SubjectPhysiology,
    probe_lag_s: f64,
    start: DateTime<FixedOffset>,
    /// Actual switch times, seconds from the session start (epoch 1..).
    switches_s: Vec<f64>,
    segments: Vec<(Segment, f64, f64)>, // segment, diameter µm at start, offset points
}

fn draw_subject(sc: &Scenario, i: usize) -> SimSubject {
    let id = format!("V{:02}", i + 1);
    let mut rng = rng_for(sc.seed, &["subject", &id]);
    let u = |rng: &mut rand_chacha::ChaCha8Rng, a: f64, b: f64| {
        Uniform::new(a, b).expect("range").sample(rng)
    };
    let n = |rng: &mut rand_chacha::ChaCha8Rng, m: f64, s: f64| {
        Normal::new(m, s).expect("sd").sample(rng)
    };
    let physiology = SubjectPhysiology {
        paco2_air_mmhg: n(&mut rng, 40.0, 2.0),
        ventilatory_gain_mmhg: u(&mut rng, 2.5, 5.5),
        a_a_gradient_mmhg: u(&mut rng, 3.0, 10.0),
        time_constant_s: u(&mut rng, 70.0, 130.0),
        extraction: n(&mut rng, 0.35, 0.03),
        hb_g_per_l: n(&mut rng, 145.0, 10.0),
        arteriole_offset: u(&mut rng, 0.0, 2.0),
    };
    let p = &sc.protocol;
    let mut switches = Vec::new();
    let mut t = 0.0;
    for e in &p.epochs[..p.epochs.len() - 1] {
        t += e.duration_s;
        // Switches happen a little late or early; the recorded time is the truth.
        switches.push((t + n(&mut rng, 15.0, 12.0)).round());
        t = *switches.last().unwrap();
    }
    // Sessions on consecutive mornings and afternoons.
    let start = sc.start + Duration::minutes((i / 2) as i64 * 24 * 60 + (i % 2) as i64 * 240);
    let segments = match sc.layout {
        Layout::Clear => clear_layout(sc, &mut rng),
        Layout::Crowded => crowded_layout(sc, &mut rng),
        Layout::Empty => Vec::new(),
    };
    // Drawn in this order whatever the scenario says, so that a setting
    // changes only what it names.
    let age = u(&mut rng, 21.0, 58.0) as u32;
    let sex = if rng.random_bool(0.5) { "F" } else { "M" };
    let pigmentation: i64 = rng.random_range(1..=4);
    let mut veil = u(&mut rng, 0.0, sc.veil_max.max(1e-9));
    if sc.pigmentation_veil > 0.0 {
        veil = (veil + sc.pigmentation_veil * (pigmentation - 1) as f64).min(0.9);
    }
    SimSubject {
        age,
        sex,
        pigmentation,
        veil,
        probe_lag_s: p.reference.lag_s + n(&mut rng, 0.0, 3.0),
        physiology,
        start,
        switches_s: switches,
        segments,
        id,
    }
}

/// Clear space kept between a simulated vessel and the image border, µm:
/// the profile's half-length across the vessel (220 µm, the transmissions
/// stage's `PROFILE_HALF_LENGTH_UM`) and a little more, so that a profile
/// stays inside the image.
pub(crate) const BORDER_CLEARANCE_UM: f64 = 260.0;

/// The point `s` pixels along a vessel that leaves `from` at `angle` and
/// turns by `bend` radians over `scale` pixels.
fn arc_point(from: (f64, f64), angle: f64, bend: f64, scale: f64, s: f64) -> (f64, f64) {
    let a = angle + bend * s / scale;
    (from.0 + s * a.cos(), from.1 + s * a.sin())
}

/// The `k`-th vessel leaving the disc: arterioles and venules alternate,
/// each with a diameter drawn from its kind's range (µm).
fn main_vessel(k: usize, rng: &mut impl Rng) -> (VesselKind, &'static str, f64) {
    if k % 2 == 0 {
        (VesselKind::Arteriole, "A", rng.random_range(95.0..135.0))
    } else {
        (VesselKind::Venule, "V", rng.random_range(125.0..175.0))
    }
}

/// A vessel's own offset of SO2 from its kind's (points; arterioles vary less).
fn vessel_offset(kind: VesselKind, rng: &mut dyn rand::RngCore) -> f64 {
    let sd = if kind == VesselKind::Arteriole {
        0.8
    } else {
        1.5
    };
    Normal::new(0.0, sd).unwrap().sample(rng)
}

/// How far the `clear` layout keeps vessels from the border, px: the
/// clearance plus the largest simulated eye motion (about 6 px).
fn clear_margin_px(pixel_size_um: f64) -> f64 {
    BORDER_CLEARANCE_UM / pixel_size_um + 6.0
}

/// The smallest side, in multiples of the margin, on which the `clear`
/// layout's vessels run long enough to profile (on 256 px at 12 µm each
/// vessel keeps 40–60 % of its length).
const CLEAR_MIN_SIDE_MARGINS: f64 = 8.0;

/// The `clear` layout: three arterioles and three venules leave an optic
/// disc at the left of the field, alternating. Vessels
/// fan out far enough apart, and stop far enough from the border,
/// that their profiles meet neither a neighbour nor the edge once the eye
/// has moved by a few pixels: a clean field, as a lab would choose for a
/// validation study.
fn clear_layout(sc: &Scenario, rng: &mut impl Rng) -> Vec<(Segment, f64, f64)> {
    let (w, h) = (sc.width as f64, sc.height as f64);
    let disc = (0.10 * w, 0.5 * h);
    let scale = w.min(h);
    let margin = clear_margin_px(sc.pixel_size_um);
    let inside =
        |p: &(f64, f64)| p.0 >= margin && p.0 <= w - margin && p.1 >= margin && p.1 <= h - margin;
    let mut out = Vec::new();
    let mut arc = |kind: VesselKind,
                   id: String,
                   from: (f64, f64),
                   angle: f64,
                   bend: f64,
                   s0: f64,
                   s1: f64,
                   d: f64,
                   rng: &mut dyn rand::RngCore| {
        // Finely stepped, then cut where the vessel would come too near
        // the border, and thinned to 13 points at most.
        let fine: Vec<(f64, f64)> = (0..=96)
            .map(|k| arc_point(from, angle, bend, scale, s0 + (s1 - s0) * k as f64 / 96.0))
            .take_while(inside)
            .collect();
        let step = fine.len().div_ceil(12).max(1);
        let mut pts: Vec<(f64, f64)> = fine.iter().step_by(step).copied().collect();
        if let Some(last) = fine.last() {
            if pts.last() != Some(last) {
                pts.push(*last);
            }
        }
        let offset = vessel_offset(kind, rng);
        if pts.len() >= 2 {
            out.push((
                Segment {
                    id,
                    kind,
                    points: pts,
                    notes: String::new(),
                },
                d,
                offset,
            ));
        }
    };
    let angles = [-0.7, -0.42, -0.14, 0.14, 0.42, 0.7];
    for (k, base) in angles.iter().enumerate() {
        let (kind, prefix, d) = main_vessel(k, rng);
        let a = base + rng.random_range(-0.04..0.04);
        let bend = rng.random_range(-0.12..0.12);
        let id = format!("{prefix}{}", k / 2 + 1);
        arc(kind, id, disc, a, bend, 0.2 * scale, 0.85 * scale, d, rng);
    }
    out
}

/// The `crowded` layout: three arterioles and three venules leave an optic
/// disc at the left of the field close together, two of them branch, and
/// bends let neighbours touch and vessels run to the border, so that many
/// profile positions meet a neighbour or the edge (a field that exercises
/// the flag rules).
fn crowded_layout(sc: &Scenario, rng: &mut impl Rng) -> Vec<(Segment, f64, f64)> {
    let (w, h) = (sc.width as f64, sc.height as f64);
    let disc = (0.12 * w, 0.5 * h);
    let scale = w.min(h);
    let mut out = Vec::new();
    let mut arc = |kind: VesselKind,
                   id: String,
                   from: (f64, f64),
                   angle: f64,
                   bend: f64,
                   s0: f64,
                   s1: f64,
                   d: f64,
                   rng: &mut dyn rand::RngCore| {
        let pts: Vec<(f64, f64)> = (0..=12)
            .map(|k| arc_point(from, angle, bend, scale, s0 + (s1 - s0) * k as f64 / 12.0))
            .collect();
        let offset = vessel_offset(kind, rng);
        let seg = Segment {
            id,
            kind,
            points: pts,
            notes: String::new(),
        };
        out.push((seg, d, offset));
        let end = out.last().unwrap().0.points[6];
        (end, angle + bend * (s0 + (s1 - s0) * 0.5) / scale)
    };
    let angles = [-0.75, -0.45, -0.12, 0.15, 0.45, 0.78];
    for (k, base) in angles.iter().enumerate() {
        let (kind, prefix, d) = main_vessel(k, rng);
        let a = base + rng.random_range(-0.05..0.05);
        let bend = rng.random_range(-0.35..0.35);
        let id = format!("{prefix}{}", k / 2 + 1);
        let (mid, dir) = arc(
            kind,
            id.clone(),
            disc,
            a,
            bend,
            0.12 * scale,
            0.8 * scale,
            d,
            rng,
        );
        if k == 1 || k == 4 {
            let side = if a < 0.0 { -0.55 } else { 0.55 };
            arc(
                kind,
                format!("{id}b"),
                mid,
                dir + side,
                0.0,
                0.03 * scale,
                0.38 * scale,
                rng.random_range(70.0..95.0),
                rng,
            );
        }
    }
    out
}

/// Why a simulated study could not be written.
#[derive(Debug, thiserror::Error)]
pub enum SimulateError {
    #[error("cannot create `{}`", .path.display())]
    Create {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error("cannot copy `{}`", .path.display())]
    Copy {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error(transparent)]
    Write(#[from] TableError),
    /// Formatting text into a string (cannot fail in practice).
    #[error("cannot format a file")]
    Format(#[from] std::fmt::Error),
}

type Result<T, E = SimulateError> = std::result::Result<T, E>;

/// Writes the study. Returns the study file's path.
pub fn simulate(sc: &Scenario, out: &Path) -> Result<PathBuf> {
    std::fs::create_dir_all(out).map_err(|source| SimulateError::Create {
        path: out.to_path_buf(),
        source,
    })?;
    let p = &sc.protocol;
    let pb = pressure_at_altitude_mmhg(sc.altitude_m);
    let bands: Vec<SampledBand> = sc
        .bands
        .iter()
        .map(|(_, c, f)| {
            SampledBand::from_response(&BandResponse::Gaussian {
                centre_nm: *c,
                fwhm_nm: *f,
            })
        })
        .collect();
    let mut boff_rng = rng_for(sc.seed, &["instrument", "band offsets"]);
    let band_offsets: Vec<(f64, f64)> = (0..bands.len())
        .map(|b| {
            if b == 0 {
                (0.0, 0.0)
            } else {
                (
                    boff_rng.random_range(-0.6..0.6),
                    boff_rng.random_range(-0.6..0.6),
                )
            }
        })
        .collect();
    let subjects: Vec<SimSubject> = (0..sc.subjects).map(|i| draw_subject(sc, i)).collect();
    std::fs::copy(&sc.protocol_file, out.join("protocol.yaml")).map_err(|source| {
        SimulateError::Copy {
            path: sc.protocol_file.clone(),
            source,
        }
    })?;

    struct CapturePlan {
        subject: usize,
        name: String,
        t_s: f64,
        epoch: usize,
        steady: bool,
    }
    let mut plans = Vec::new();
    for (si, s) in subjects.iter().enumerate() {
        let mut rng = rng_for(sc.seed, &["capture times", &s.id]);
        let mut starts = vec![0.0];
        starts.extend(s.switches_s.iter().copied());
        let mut k = 0;
        for (e, ep) in p.epochs.iter().enumerate() {
            let start = starts[e];
            let end = starts.get(e + 1).copied().unwrap_or(start + ep.duration_s);
            let steady_from = start + ep.settle_s;
            let mut times: Vec<(f64, bool)> = Vec::new();
            if e > 0 {
                for j in 0..sc.settling_captures {
                    let span = (steady_from - start).max(1.0);
                    times.push((
                        start + span * (j as f64 + 0.5) / sc.settling_captures as f64 * 0.8 + 5.0,
                        false,
                    ));
                }
            }
            let span = (end - steady_from - 20.0).max(0.0);
            for j in 0..sc.captures_per_epoch {
                let t = steady_from
                    + 10.0
                    + span * (j as f64 + rng.random_range(0.2..0.8)) / sc.captures_per_epoch as f64;
                times.push((t.round(), true));
            }
            for (t, steady) in times {
                k += 1;
                plans.push(CapturePlan {
                    subject: si,
                    name: format!("c{k:03}"),
                    t_s: t.round(),
                    epoch: e,
                    steady,
                });
            }
        }
    }

    // Courses per subject.
    let courses: Vec<course::Course> = subjects
        .iter()
        .map(|s| {
            let mut bounds = vec![0.0];
            bounds.extend(s.switches_s.iter().copied());
            let fio2 = |t: f64| {
                let e = bounds.iter().rposition(|b| t >= *b).unwrap_or(0);
                p.epochs[e].gas.o2_fraction
            };
            course::simulate(&s.physiology, fio2, pb, -120.0, p.total_s() + 600.0)
        })
        .collect();

    // Render captures in parallel; each draws from its own named generator.
    struct Rendered {
        truth: Vec<(String, &'static str, f64, f64)>,
        motion: Motion,
    }
    let rendered: Vec<Result<Rendered>> = plans
        .par_iter()
        .map(|c| {
            let s = &subjects[c.subject];
            let mut rng = rng_for(sc.seed, &["capture", &s.id, &c.name]);
            let motion = if c.name == "c001" {
                Motion::default()
            } else {
                Motion {
                    dx: rng.random_range(-6.0..6.0),
                    dy: rng.random_range(-6.0..6.0),
                    angle_deg: rng.random_range(-1.0..1.0),
                }
            };
            let co = &courses[c.subject];
            let sa = co.sao2_at(c.t_s) * 100.0;
            let sv = co.svo2_at(c.t_s) * 100.0;
            let jitter = Normal::new(0.0, 0.7).unwrap();
            let mut truth = Vec::new();
            let vessels: Vec<VesselState> = s
                .segments
                .iter()
                .map(|(seg, d0, off)| {
                    let base = if seg.kind == VesselKind::Arteriole {
                        sa - s.physiology.arteriole_offset
                    } else {
                        sv
                    };
                    let so2 = (base + off + jitter.sample(&mut rng)).clamp(1.0, 100.0);
                    let d0 = *d0;
                    // The truth is the diameter halfway along: the mean
                    // over the segment, as a fit's mean over its
                    // positions sees it.
                    truth.push((
                        seg.id.clone(),
                        seg.kind.as_str(),
                        so2,
                        d0 * (1.0 - 0.5 * TAPER),
                    ));
                    let phase = seg.points[0].0 * 0.1;
                    VesselState {
                        segment: seg,
                        so2: so2 / 100.0,
                        diameter_um: Box::new(move |f: f64| d0 * (1.0 - TAPER * f)),
                        double_pass: Box::new(move |f: f64| 0.30 + 0.12 * (f * 9.0 + phase).sin()),
                    }
                })
                .collect();
            let scene = Scene {
                width: sc.width,
                height: sc.height,
                pixel_um: sc.pixel_size_um,
                bands: &bands,
                band_offsets: &band_offsets,
                pigmentation: s.pigmentation as f64,
                veil: s.veil,
                hb_g_per_l: s.physiology.hb_g_per_l,
                optics: sc.optics,
                well_electrons: 20_000.0,
                read_noise_electrons: 6.0,
            };
            let exposure = rng.random_range(0.9..1.1);
            let pages = render::render(&scene, &vessels, motion, exposure, &mut rng);
            // The camera's clock, as the capture list gives it.
            let taken = (s.start + Duration::seconds(c.t_s as i64)).naive_local();
            let path = out
                .join("subjects")
                .join(&s.id)
                .join("captures")
                .join(format!("{}.tif", c.name));
            match sc.sensor {
                SensorLayout::Grid { columns, rows } => {
                    // One frame, each band's page at its tile.
                    let fw = columns * sc.width;
                    let mut frame = vec![0u16; fw * rows * sc.height];
                    for (b, page) in pages.iter().enumerate() {
                        let (x0, y0) = ((b % columns) * sc.width, (b / columns) * sc.height);
                        for (y, row) in page.chunks(sc.width).enumerate() {
                            let start = (y0 + y) * fw + x0;
                            frame[start..start + sc.width].copy_from_slice(row);
                        }
                    }
                    let tags = render::CaptureTags {
                        taken: Some(taken),
                        pixel_um: Some(sc.pixel_size_um),
                        bands: Vec::new(),
                    };
                    render::write_tiff_at(&path, fw, rows * sc.height, &[frame], &tags)?;
                }
                _ => {
                    let tags = render::CaptureTags {
                        taken: Some(taken),
                        pixel_um: Some(sc.pixel_size_um),
                        bands: sc.bands.clone(),
                    };
                    render::write_tiff_at(&path, sc.width, sc.height, &pages, &tags)?
                }
            }
            Ok(Rendered { truth, motion })
        })
        .collect();
    let rendered: Vec<Rendered> = rendered.into_iter().collect::<Result<_>>()?;

    // Per-subject lists, logs and segment files.
    for (si, s) in subjects.iter().enumerate() {
        let dir = out.join("subjects").join(&s.id);
        let mut list = String::from("file,time\n");
        for c in plans.iter().filter(|c| c.subject == si) {
            let t = s.start + Duration::seconds(c.t_s as i64);
            writeln!(list, "captures/{}.tif,{}", c.name, t.to_rfc3339())?;
        }
        write_bytes_atomic(&dir.join("captures.csv"), list.as_bytes())?;
        write_bytes_atomic(
            &dir.join("spo2.csv"),
            spo2_log(sc, s, &courses[si]).as_bytes(),
        )?;
        let mut seg = String::from(if s.segments.is_empty() {
            "eye: OD\nsegments: []\n"
        } else {
            "eye: OD\nsegments:\n"
        });
        for (sg, _, _) in &s.segments {
            let pts: Vec<String> = sg
                .points
                .iter()
                .map(|(x, y)| format!("[{x:.1}, {y:.1}]"))
                .collect();
            writeln!(
                seg,
                "  - id: {}\n    kind: {}\n    points: [{}]",
                sg.id,
                sg.kind.as_str(),
                pts.join(", ")
            )?;
        }
        write_bytes_atomic(&dir.join("segments-OD.yaml"), seg.as_bytes())?;
    }

    write_truth(
        sc,
        &subjects,
        &plans
            .iter()
            .map(|c| (c.subject, c.name.clone(), c.t_s, c.epoch, c.steady))
            .collect::<Vec<_>>(),
        &rendered
            .iter()
            .map(|r| (r.truth.clone(), r.motion))
            .collect::<Vec<_>>(),
        &band_offsets,
        out,
    )?;
    let study = study_yaml(sc, &subjects);
    let study_path = out.join("study.yaml");
    write_bytes_atomic(&study_path, study.as_bytes())?;
    Ok(study_path)
}

/// The pulse oximeter's log: SaO2 delayed by the probe's lag, averaged over
/// 8 s, with measurement noise (SD 1 point, about ±2 at 95 %), whole-point
/// resolution and occasional dropouts.
fn spo2_log(sc: &Scenario, s: &SimSubject, co: &course::Course) -> String {
    let mut rng = rng_for(sc.seed, &["oximeter", &s.id]);
    let noise = Normal::new(0.0, 1.0).unwrap();
    let mut out = String::from("time,spo2\n");
    let mut dropout_left = 0;
    let end = sc.protocol.total_s() + 240.0;
    let mut t = -60.0;
    while t <= end {
        if dropout_left == 0 && rng.random_bool(0.004) {
            dropout_left = rng.random_range(3..15);
        }
        let ts = s.start + Duration::seconds(t as i64);
        if dropout_left > 0 {
            dropout_left -= 1;
            let _ = writeln!(out, "{},", ts.to_rfc3339());
        } else {
            let avg: f64 = (0..8)
                .map(|k| co.sao2_at(t - s.probe_lag_s - k as f64))
                .sum::<f64>()
                / 8.0;
            let v = (avg * 100.0 + noise.sample(&mut rng))
                .round()
                .clamp(50.0, 100.0);
            let _ = writeln!(out, "{},{}", ts.to_rfc3339(), v);
        }
        t += 1.0;
    }
    out
}

/// How much a simulated vessel narrows from its first point to its last,
/// as a share of its diameter there.
const TAPER: f64 = 0.12;

#[allow(clippy::type_complexity)]
fn write_truth(
    sc: &Scenario,
    subjects: &[SimSubject],
    plans: &[(usize, String, f64, usize, bool)],
    rendered: &[(Vec<(String, &'static str, f64, f64)>, Motion)],
    band_offsets: &[(f64, f64)],
    out: &Path,
) -> Result<()> {
    let dir = out.join("truth");
    let p = &sc.protocol;
    let (mut subj, mut cap, mut seg, mut kind, mut so2, mut diam, mut epoch, mut steady) = (
        vec![],
        vec![],
        vec![],
        vec![],
        vec![],
        vec![],
        vec![],
        vec![],
    );
    let (mut msub, mut mcap, mut mdx, mut mdy, mut mang) = (vec![], vec![], vec![], vec![], vec![]);
    for ((si, name, _, e, st), (truth, motion)) in plans.iter().zip(rendered) {
        for (sid, k, v, d) in truth {
            subj.push(subjects[*si].id.clone());
            cap.push(format!("captures/{name}.tif"));
            seg.push(sid.clone());
            kind.push(k.to_string());
            so2.push(*v);
            diam.push(*d);
            epoch.push(p.epochs[*e].name.clone());
            steady.push(if *st {
                CaptureStatus::Steady
            } else {
                CaptureStatus::Settling
            });
        }
        msub.push(subjects[*si].id.clone());
        mcap.push(format!("captures/{name}.tif"));
        mdx.push(motion.dx);
        mdy.push(motion.dy);
        mang.push(motion.angle_deg);
    }
    let mut t = Table::new();
    t.text("subject", &subj)
        .text("capture", &cap)
        .text("segment", &seg)
        .text("kind", &kind)
        .text("epoch", &epoch)
        .text("status", steady.iter().map(CaptureStatus::as_str))
        .real("so2", so2.iter().copied())
        .real("diameter_um", diam.iter().copied());
    t.write(&dir, "captures")?;
    let mut t = Table::new();
    t.text("subject", &msub)
        .text("capture", &mcap)
        .real("dx_px", mdx)
        .real("dy_px", mdy)
        .real("angle_deg", mang);
    t.write(&dir, "motion")?;

    // True per-subject epoch means over steady captures, per vessel kind.
    let mut rows: Vec<(String, String, String, f64)> = Vec::new();
    for s in subjects {
        for ep in &p.epochs {
            for k in ["arteriole", "venule"] {
                let v: Vec<f64> = (0..subj.len())
                    .filter(|&i| {
                        subj[i] == s.id
                            && epoch[i] == ep.name
                            && kind[i] == k
                            && steady[i] == CaptureStatus::Steady
                    })
                    .map(|i| so2[i])
                    .collect();
                if !v.is_empty() {
                    rows.push((s.id.clone(), ep.name.clone(), k.to_string(), mean(&v)));
                }
            }
        }
    }
    let mut t = Table::new();
    t.text("subject", rows.iter().map(|r| &r.0))
        .text("epoch", rows.iter().map(|r| &r.1))
        .text("kind", rows.iter().map(|r| &r.2))
        .real("so2", rows.iter().map(|r| r.3));
    t.write(&dir, "epoch_means")?;

    // True contrasts: cohort mean of the per-subject contrast.
    let mut cl = Vec::new();
    let mut ck = Vec::new();
    let mut cv = Vec::new();
    for c in &p.contrasts {
        for k in ["arteriole", "venule"] {
            let per: Vec<f64> = subjects
                .iter()
                .filter_map(|s| {
                    c.weights
                        .iter()
                        .map(|(e, w)| {
                            rows.iter()
                                .find(|r| r.0 == s.id && r.1 == p.epochs[*e].name && r.2 == k)
                                .map(|r| w * r.3)
                        })
                        .sum::<Option<f64>>()
                })
                .collect();
            if !per.is_empty() {
                cl.push(c.label.clone());
                ck.push(k.to_string());
                cv.push(mean(&per));
            }
        }
    }
    let mut t = Table::new();
    t.text("contrast", &cl)
        .text("kind", &ck)
        .real("so2_change", cv);
    t.write(&dir, "contrasts")?;

    let mut r = String::new();
    writeln!(
        r,
        "# Rendering parameters of the simulated study `{}` (seed {}).",
        sc.id, sc.seed
    )?;
    writeln!(
        r,
        "model: multi-path vessel transmission F_bs + F_1 t + F_2 t^2 with veil, band-integrated on a 1 nm grid"
    )?;
    writeln!(
        r,
        "backscatter_fraction: {BLOOD_BACKSCATTER}\ndouble_pass_fraction: 0.30 + 0.12 sin(9 f + phase) along each segment\ndiameter: d0 (1 - {TAPER} f) along each segment, its value at f = 0.5 in truth/captures.csv\nwell_electrons: 20000\nread_noise_electrons: 6"
    )?;
    let o = &sc.optics;
    writeln!(
        r,
        "optics: {{veil_slope: {}, backscatter_scale: {}, fundus_exponent: {}, psf_px: {}, reflex: {}}}",
        o.veil_slope, o.backscatter_scale, o.fundus_exponent, o.psf_px, o.reflex
    )?;
    writeln!(
        r,
        "layout: {}",
        match sc.layout {
            Layout::Clear => "clear",
            Layout::Crowded => "crowded",
            Layout::Empty => "none",
        }
    )?;
    writeln!(r, "band_offsets_px:")?;
    for ((name, _, _), (dx, dy)) in sc.bands.iter().zip(band_offsets) {
        writeln!(r, "  {name}: [{dx:.4}, {dy:.4}]")?;
    }
    writeln!(r, "subjects:")?;
    for s in subjects {
        let ph = &s.physiology;
        writeln!(
            r,
            "  {}: {{pigmentation: {}, veil: {:.4}, hb_g_per_l: {:.2}, paco2_air_mmhg: {:.2}, ventilatory_gain_mmhg: {:.3}, a_a_gradient_mmhg: {:.2}, time_constant_s: {:.1}, extraction: {:.4}, arteriole_offset: {:.3}, probe_lag_s: {:.2}}}",
            s.id,
            s.pigmentation,
            s.veil,
            ph.hb_g_per_l,
            ph.paco2_air_mmhg,
            ph.ventilatory_gain_mmhg,
            ph.a_a_gradient_mmhg,
            ph.time_constant_s,
            ph.extraction,
            ph.arteriole_offset,
            s.probe_lag_s
        )?;
    }
    write_bytes_atomic(&dir.join("rendering.yaml"), r.as_bytes())?;
    Ok(())
}

fn study_yaml(sc: &Scenario, subjects: &[SimSubject]) -> String {
    let p = &sc.protocol;
    let mut y = String::new();
    let _ = writeln!(
        y,
        "# Written by `satstep simulate` from scenario `{}`. Research use only.",
        sc.id
    );
    let _ = writeln!(y, "study: {}", sc.id);
    let _ = writeln!(y, "title: \"{}\"", sc.title.replace('"', "'"));
    let _ = writeln!(y, "protocol: protocol.yaml");
    let _ = writeln!(
        y,
        "instrument:\n  name: \"{}\"\n  pixel_size_um: {}",
        sc.instrument_name, sc.pixel_size_um
    );
    if sc.optics.psf_px > 0.0 {
        // The blur the simulator rendered, as a lab that measured its
        // camera's point-spread function would give it.
        let _ = writeln!(y, "  psf_sd_px: {}", sc.optics.psf_px);
    }
    // The simulated camera gives a white target the same signal in every
    // band, as a lab would state after calibrating with one; the gains
    // let the multiband fits weight each band by the fundus behind the
    // vessel (`weighting: fundus`, the default with gains).
    let _ = writeln!(y, "  bands:");
    for (n, c, f) in &sc.bands {
        let _ = writeln!(
            y,
            "    - {{name: {n}, centre_nm: {c}, fwhm_nm: {f}, gain: 1}}"
        );
    }
    if let SensorLayout::Grid { columns, rows } = sc.sensor {
        let _ = writeln!(
            y,
            "  layout: {{grid: {{columns: {columns}, rows: {rows}}}}}   # one frame per capture, bands left to right, then down"
        );
    }
    let _ = writeln!(y, "subjects:");
    for s in subjects {
        let _ = writeln!(
            y,
            "  - id: {}\n    age: {}\n    sex: {}\n    pigmentation: {}\n    sessions:",
            s.id, s.age, s.sex, s.pigmentation
        );
        let _ = writeln!(
            y,
            "      - id: s1\n        start: {}\n        eyes: [OD]",
            s.start.to_rfc3339()
        );
        let _ = writeln!(y, "        switches:");
        for (i, t) in s.switches_s.iter().enumerate() {
            let _ = writeln!(
                y,
                "          {}: {}",
                p.epochs[i + 1].name,
                (s.start + Duration::seconds(*t as i64)).to_rfc3339()
            );
        }
        let _ = writeln!(y, "        captures: subjects/{}/captures.csv", s.id);
        let _ = writeln!(
            y,
            "        reference: {{file: subjects/{}/spo2.csv, columns: {{time: time, spo2: spo2}}}}",
            s.id
        );
        let _ = writeln!(
            y,
            "        segments: {{OD: subjects/{}/segments-OD.yaml}}",
            s.id
        );
    }
    let names: Vec<&str> = sc.bands.iter().map(|b| b.0.as_str()).collect();
    let pick = |target: f64| {
        sc.bands
            .iter()
            .min_by(|a, b| (a.1 - target).abs().total_cmp(&(b.1 - target).abs()))
            .map(|b| b.0.clone())
            .unwrap_or_default()
    };
    let _ = writeln!(y, "methods:");
    let _ = writeln!(
        y,
        "  - method: two-band\n    sensitive: {}\n    isosbestic: {}\n    calibration: {{mode: two-point, epoch: {}, venule_so2: 60}}",
        pick(600.0),
        pick(570.0),
        p.epochs[p.baseline].name
    );
    if names.len() >= 4 {
        let _ = writeln!(
            y,
            "  - method: multiband\n    loss: huber\n    huber_scale: 1.5\n  - method: multiband-pointwise\n    loss: huber"
        );
    }
    if let Some(p) = &sc.power_yaml {
        y.push_str(p);
    }
    let _ = writeln!(y, "output: results");
    y
}
