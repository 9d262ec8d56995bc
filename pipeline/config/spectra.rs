//! The spectra-level input: for labs that extract vessel transmissions with
//! their own tools, a tidy table (CSV, or Parquet by a `.parquet` name)
//! replaces the images. One row per
//! capture, vessel segment, profile position and band:
//!
//! `[subject,] capture, vessel, kind, position, band, transmission[, diameter_um][, background]`
//!
//! `capture` is the capture as listed in the capture lists (with `subject`
//! when two subjects list the same name); `kind` is `arteriole` or
//! `venule`; `band` is an instrument band name; `transmission` is
//! I_vessel / I_background (positive; values above 1 are kept, as the image
//! stage keeps them); `diameter_um` is the vessel diameter at
//! that position (needed by the multiband methods; the two-band method
//! works without it); `background` is the background's level under the
//! vessel's centre in that band, in the image's units (what `weighting:
//! fundus` reads the fundus spectrum from; where the column is, every row
//! needs it). Every position needs a row for every band. Problems
//! are findings with `file:line:column` (for Parquet, the positions the same
//! table has as CSV: line = data row + 1, column = the column's number).

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use super::csvfile::read_table;
use super::diag::{Findings, Mark};
use super::segments::VesselKind;

/// One vessel position of one capture.
#[derive(Debug, Clone, PartialEq)]
pub struct SpectraPosition {
    pub vessel: String,
    pub kind: VesselKind,
    pub position: usize,
    /// In the instrument's band order.
    pub transmission: Vec<f64>,
    pub diameter_um: f64,
    /// In the instrument's band order; empty without a `background` column.
    pub background: Vec<f64>,
}

/// The table, grouped by (subject or empty, capture as listed).
#[derive(Debug, Clone, PartialEq, Default)]
pub struct SpectraTable {
    pub path: PathBuf,
    pub captures: BTreeMap<(String, String), Vec<SpectraPosition>>,
    /// Where each (subject, capture) first appears, for messages.
    pub marks: BTreeMap<(String, String), Mark>,
    /// The table has a `background` column.
    pub has_background: bool,
}

const COLUMNS: &[&str] = &[
    "subject",
    "capture",
    "vessel",
    "kind",
    "position",
    "band",
    "transmission",
    "diameter_um",
    "background",
];

/// Reads and checks the table against the instrument's band names.
pub(crate) fn read_spectra(
    path: &Path,
    bands: &[String],
    findings: &mut Findings,
) -> Option<SpectraTable> {
    let what = "the spectra table";
    let t = read_table(path, findings)?;
    for (i, h) in t.header.iter().enumerate() {
        if !COLUMNS.contains(&h.as_str()) {
            let hint = super::diag::suggest(h, COLUMNS);
            findings
                .error(
                    path,
                    Some(Mark::new(1, i + 1)),
                    format!("{what}: unknown column `{h}`"),
                )
                .hint(hint);
        }
    }
    let col = |name: &str, findings: &mut Findings| t.column(path, name, what, findings);
    let (c_cap, c_ves, c_kind, c_pos, c_band, c_t) = (
        col("capture", findings),
        col("vessel", findings),
        col("kind", findings),
        col("position", findings),
        col("band", findings),
        col("transmission", findings),
    );
    let (c_cap, c_ves, c_kind, c_pos, c_band, c_t) =
        (c_cap?, c_ves?, c_kind?, c_pos?, c_band?, c_t?);
    let c_subj = t.header.iter().position(|h| h == "subject");
    let c_d = t.header.iter().position(|h| h == "diameter_um");
    let c_bg = t.header.iter().position(|h| h == "background");
    let before = findings.error_count();
    // (subject, capture, vessel, position) → (kind, per-band T, diameter,
    // first line, per-band background).
    type Acc = (VesselKind, Vec<Option<f64>>, f64, usize, Vec<f64>);
    let mut marks: BTreeMap<(String, String), Mark> = BTreeMap::new();
    let mut acc: BTreeMap<(String, String, String, usize), Acc> = BTreeMap::new();
    for row in &t.rows {
        let get = |c: usize| row.field(c).filter(|(s, _)| !s.trim().is_empty());
        let need = |c: usize, name: &str, findings: &mut Findings| {
            let v = get(c);
            if v.is_none() {
                findings.error(
                    path,
                    Some(Mark::new(row.line, 1)),
                    format!("{what}: this line has no `{name}`"),
                );
            }
            v
        };
        let (Some(cap), Some(ves), Some(kind), Some(pos), Some(band), Some(tr)) = (
            need(c_cap, "capture", findings),
            need(c_ves, "vessel", findings),
            need(c_kind, "kind", findings),
            need(c_pos, "position", findings),
            need(c_band, "band", findings),
            need(c_t, "transmission", findings),
        ) else {
            continue;
        };
        let Some(vessel_kind) = VesselKind::from_name(kind.0.trim()) else {
            findings.error(
                path,
                Some(kind.1),
                format!(
                    "{what}: kind `{}` is not `arteriole` or `venule`",
                    kind.0.trim()
                ),
            );
            continue;
        };
        let Ok(position) = pos.0.trim().parse::<usize>() else {
            findings
                .error(
                    path,
                    Some(pos.1),
                    format!("{what}: position `{}` is not a whole number", pos.0.trim()),
                )
                .hint("positions count 0, 1, 2, … along the segment");
            continue;
        };
        let Some(b) = bands.iter().position(|n| n == band.0.trim()) else {
            let names: Vec<&str> = bands.iter().map(|s| s.as_str()).collect();
            findings
                .error(
                    path,
                    Some(band.1),
                    format!("{what}: band `{}` is not an instrument band", band.0.trim()),
                )
                .hint(super::diag::suggest(band.0.trim(), &names));
            continue;
        };
        let value = match tr.0.trim().parse::<f64>() {
            Ok(v) if v.is_finite() && v > 0.0 => v,
            _ => {
                findings
                    .error(
                        path,
                        Some(tr.1),
                        format!(
                            "{what}: transmission `{}` is not a positive number",
                            tr.0.trim()
                        ),
                    )
                    .hint("transmission is I_vessel / I_background");
                continue;
            }
        };
        let diameter = match c_d.and_then(get) {
            None => f64::NAN,
            Some((s, m)) => match s.trim().parse::<f64>() {
                Ok(v) if v > 0.0 => v,
                _ => {
                    findings.error(
                        path,
                        Some(m),
                        format!(
                            "{what}: diameter_um `{}` is not a positive number",
                            s.trim()
                        ),
                    );
                    continue;
                }
            },
        };
        let background = match c_bg.map(get) {
            None => f64::NAN,
            Some(None) => {
                findings
                    .error(
                        path,
                        Some(Mark::new(row.line, 1)),
                        format!("{what}: this line has no `background`"),
                    )
                    .hint(
                        "with a `background` column, every row needs the band's background level",
                    );
                continue;
            }
            Some(Some((s, m))) => match s.trim().parse::<f64>() {
                Ok(v) if v.is_finite() && v > 0.0 => v,
                _ => {
                    findings.error(
                        path,
                        Some(m),
                        format!("{what}: background `{}` is not a positive number", s.trim()),
                    );
                    continue;
                }
            },
        };
        let subject = c_subj
            .and_then(get)
            .map(|(s, _)| s.trim().to_string())
            .unwrap_or_default();
        marks
            .entry((subject.clone(), cap.0.trim().to_string()))
            .or_insert(cap.1);
        let e = acc
            .entry((
                subject,
                cap.0.trim().to_string(),
                ves.0.trim().to_string(),
                position,
            ))
            .or_insert_with(|| {
                (
                    vessel_kind,
                    vec![None; bands.len()],
                    diameter,
                    row.line,
                    vec![f64::NAN; bands.len()],
                )
            });
        e.4[b] = background;
        if e.0 != vessel_kind {
            findings.error(
                path,
                Some(kind.1),
                format!(
                    "{what}: vessel `{}` is `{}` here but `{}` at line {}",
                    ves.0.trim(),
                    kind.0.trim(),
                    e.0,
                    e.3
                ),
            );
        }
        if e.1[b].replace(value).is_some() {
            findings
                .error(
                    path,
                    Some(band.1),
                    format!(
                        "{what}: band `{}` is given twice for this position (first at line {})",
                        band.0.trim(),
                        e.3
                    ),
                )
                .hint("one row per capture, vessel, position and band");
        }
        if e.2.is_nan() {
            e.2 = diameter;
        }
    }
    let mut out = SpectraTable {
        path: path.to_path_buf(),
        captures: BTreeMap::new(),
        marks,
        has_background: c_bg.is_some(),
    };
    for ((subject, capture, vessel, position), (kind, t, d, line, bg)) in acc {
        let missing: Vec<&str> = t
            .iter()
            .zip(bands)
            .filter(|(v, _)| v.is_none())
            .map(|(_, n)| n.as_str())
            .collect();
        if !missing.is_empty() {
            findings.error(path, Some(Mark::new(line, 1)), format!("{what}: capture `{capture}` vessel `{vessel}` position {position} has no row for band(s) {}", missing.join(", "))).hint("every position needs a transmission in every instrument band");
            continue;
        }
        out.captures
            .entry((subject, capture))
            .or_default()
            .push(SpectraPosition {
                vessel,
                kind,
                position,
                transmission: t.into_iter().map(|v| v.expect("checked")).collect(),
                diameter_um: d,
                background: if c_bg.is_some() { bg } else { Vec::new() },
            });
    }
    (findings.error_count() == before).then_some(out)
}
