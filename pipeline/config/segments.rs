//! Vessel-segment files, one per eye: polylines in the eye's reference
//! capture's pixel coordinates, each a stretch of one vessel between branch
//! points.
//!
//! ```yaml
//! eye: OD
//! segments:
//!   - id: A1
//!     kind: arteriole          # or venule
//!     points: [[412.0, 300.5], [455.0, 310.0], [497.5, 331.0]]
//!     notes: superior temporal, first order
//! ```
//!
//! `satstep segments propose` writes the same format, each segment with a
//! `proposed: {kind_confidence, diameter_um, odr}` entry that the
//! reviewer deletes once the segment is checked; a file that still holds
//! such entries gets a warning when the study is read.

use std::path::Path;

use super::diag::Findings;
use super::eye::Eye;
use super::read::Reader;

#[derive(
    Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord, serde::Serialize, serde::Deserialize,
)]
#[serde(rename_all = "kebab-case")]
pub enum VesselKind {
    Arteriole,
    Venule,
}

impl std::fmt::Display for VesselKind {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(self.as_str())
    }
}

impl VesselKind {
    pub const NAMES: [&'static str; 2] = ["arteriole", "venule"];
    pub fn as_str(&self) -> &'static str {
        match self {
            VesselKind::Arteriole => "arteriole",
            VesselKind::Venule => "venule",
        }
    }
    pub fn from_name(s: &str) -> Option<Self> {
        match s {
            "arteriole" => Some(VesselKind::Arteriole),
            "venule" => Some(VesselKind::Venule),
            _ => None,
        }
    }
}

#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Segment {
    pub id: String,
    pub kind: VesselKind,
    /// (x, y) in pixels, x to the right, y down.
    pub points: Vec<(f64, f64)>,
    pub notes: String,
}

pub(crate) const FILE_KEYS: &[&str] = &["eye", "segments"];

/// How far outside the image (as a share of its width or height) a point
/// may lie: eye motion moves vessels by a few per cent, no more.
const MARGIN: f64 = 0.5;
pub(crate) const SEGMENT_KEYS: &[&str] = &["id", "kind", "points", "notes", "proposed"];
/// What `satstep segments propose` says of a segment it proposed.
pub const PROPOSED_KEYS: &[&str] = &["kind_confidence", "diameter_um", "odr"];

/// Reads a segment file for `eye`; findings go to `findings`. With the
/// size of the eye's captures (px), a segment that reaches far outside them
/// is an error: it cannot be a vessel of these images, and profiling it
/// would sample millions of positions off the image.
pub(crate) fn load_segments(
    path: &Path,
    eye: Eye,
    image: Option<(f64, f64)>,
    findings: &mut Findings,
) -> Option<Vec<Segment>> {
    let root = super::read::load_tree(
        path,
        "segment file",
        "check the path in the study file",
        findings,
    )?;
    let before = findings.error_count();
    let mut r = Reader::new(path, findings);
    let m = r.map(&root, "a segment file", FILE_KEYS)?;
    if let Some(n) = m.get("eye") {
        if let Some(e) = r.choice(n, "`eye`", &Eye::NAMES) {
            if e != eye.as_str() {
                r.error(
                    n.mark,
                    format!(
                        "this file is for eye `{e}` but the study names it for `{}`",
                        eye.as_str()
                    ),
                );
            }
        }
    }
    let mut out: Vec<Segment> = Vec::new();
    let mut unreviewed: Vec<(String, super::diag::Mark)> = Vec::new();
    let list = r.required(&m, "segments", "a segment file")?;
    for item in r.list(list, "`segments`")? {
        let Some(sm) = r.map(item, "a segment", SEGMENT_KEYS) else {
            continue;
        };
        let id = r
            .required(&sm, "id", "a segment")
            .and_then(|n| r.name(n, "`id`"));
        let kind = r
            .required(&sm, "kind", "a segment")
            .and_then(|n| r.choice(n, "vessel `kind`", &VesselKind::NAMES))
            .and_then(|k| VesselKind::from_name(&k));
        let notes = sm
            .get("notes")
            .and_then(|n| r.text(n, "`notes`"))
            .unwrap_or_default();
        let mut points = Vec::new();
        if let Some(pn) = r.required(&sm, "points", "a segment") {
            for p in r.list(pn, "`points`").unwrap_or_default() {
                let xy = r.list(p, "a point `[x, y]`").unwrap_or_default();
                if xy.len() != 2 {
                    r.error(p.mark, "a point is `[x, y]` in pixels");
                    continue;
                }
                if let (Some(x), Some(y)) = (r.number(&xy[0], "x"), r.number(&xy[1], "y")) {
                    points.push((x, y));
                }
            }
            if points.len() < 2 {
                r.error(pn.mark, "a segment needs at least two points");
            } else if let Some(((x, y), (w, h))) = image.and_then(|(w, h)| {
                points
                    .iter()
                    .find(|(x, y)| {
                        !(-w * MARGIN..=w * (1.0 + MARGIN)).contains(x)
                            || !(-h * MARGIN..=h * (1.0 + MARGIN)).contains(y)
                    })
                    .map(|p| (*p, (w, h)))
            }) {
                r.error(
                    pn.mark,
                    format!(
                        "the segment reaches ({x}, {y}), far outside the captures ({w} × {h} px)"
                    ),
                )
                .hint(
                    "points are pixel coordinates (x right, y down) in the eye's reference capture",
                );
            } else if points.windows(2).all(|w| w[0] == w[1]) {
                r.error(
                    pn.mark,
                    "the segment has no length: all its points are the same",
                )
                .hint("give points along the vessel, at least a few pixels apart");
            }
        }
        if let Some(pn) = sm.get("proposed") {
            if let Some(pm) = r.map(pn, "`proposed`", PROPOSED_KEYS) {
                for k in PROPOSED_KEYS {
                    if let Some(v) = pm.get(k) {
                        r.number(v, k);
                    }
                }
            }
            unreviewed.push((id.clone().unwrap_or_default(), pn.mark));
        }
        if let (Some(id), Some(kind)) = (id, kind) {
            if out.iter().any(|s| s.id == id) {
                r.error(
                    item.mark,
                    format!("segment id `{id}` is used twice in this file"),
                );
            }
            out.push(Segment {
                id,
                kind,
                points,
                notes,
            });
        }
    }
    if let Some((_, mark)) = unreviewed.first() {
        let ids: Vec<&str> = unreviewed.iter().map(|(id, _)| id.as_str()).collect();
        findings
            .warning(
                path,
                Some(*mark),
                format!(
                    "{} of {} segments are proposals not yet reviewed ({}): their centre lines and kinds were found by `satstep segments propose`",
                    ids.len(),
                    out.len(),
                    ids.join(", ")
                ),
            )
            .hint("check each on the proposal's overlay image, correct what is wrong, and delete its `proposed:` line");
    }
    if out.is_empty() && findings.error_count() == before {
        findings
            .warning(
                path,
                Some(list.mark),
                "the segment file lists no segments: this eye gives no values",
            )
            .hint("add the eye's vessel segments, or leave the file out of the study");
    }
    (findings.error_count() == before).then_some(out)
}
