//! Protocol files: the ordered gas epochs of a breathing challenge, the
//! default contrasts between epochs and the reference-oximeter settings.
//!
//! ```yaml
//! name: step-down-hypoxia
//! description: Room air, two hypoxic steps, recovery on air.
//! epochs:
//!   - name: air
//!     gas: air                 # or {o2_fraction: 0.15} or {altitude_m: 3000}
//!     duration: 10min
//!     settle: 3min
//! baseline: air                # default: the first epoch
//! contrasts: ["low-15 - air"]  # linear combinations of epoch means
//! reference: {probe_site: finger, lag: 25s, window: 10s, stability_limit: 3}
//! ```

use std::path::Path;

use super::contrast::{ContrastError, parse_terms};
use super::diag::{Findings, Mark};
use super::duration::format_seconds;
use super::read::Reader;
use super::yaml::Node;
use crate::physiology::{AIR_O2_FRACTION, equivalent_altitude_m, equivalent_o2_fraction};

/// How the epoch's gas was written.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum GasSpec {
    Air,
    O2Fraction(f64),
    AltitudeM(f64),
}

#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Gas {
    pub written: GasSpec,
    /// Inspired O2 fraction at sea level (for an altitude: the equivalent one).
    pub o2_fraction: f64,
    /// Altitude giving the same inspired PO2 breathing air; `None` when hyperoxic.
    pub equivalent_altitude_m: Option<f64>,
}

impl Gas {
    pub fn describe(&self) -> String {
        match self.written {
            GasSpec::Air => "air (O2 0.21)".to_string(),
            GasSpec::O2Fraction(f) => format!("O2 {f:.3}"),
            GasSpec::AltitudeM(h) => {
                format!("air at {h:.0} m (O2 {:.3} equivalent)", self.o2_fraction)
            }
        }
    }
}

#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Epoch {
    pub name: String,
    pub gas: Gas,
    pub duration_s: f64,
    pub settle_s: f64,
}

/// A linear combination of epoch means, e.g. `low-15 - air`.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Contrast {
    pub label: String,
    /// (epoch index, weight); weights sum to zero.
    pub weights: Vec<(usize, f64)>,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum ProbeSite {
    Finger,
    Ear,
    Forehead,
    Toe,
}

impl ProbeSite {
    pub const NAMES: [&'static str; 4] = ["finger", "ear", "forehead", "toe"];

    fn from_name(s: &str) -> Option<Self> {
        Some(match s {
            "finger" => ProbeSite::Finger,
            "ear" => ProbeSite::Ear,
            "forehead" => ProbeSite::Forehead,
            "toe" => ProbeSite::Toe,
            _ => return None,
        })
    }
}

/// How the reference SpO2 is read for a capture.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct ReferenceSettings {
    pub probe_site: ProbeSite,
    /// The oximeter shows a change this long after the blood has it; the
    /// value for a capture at `t` is read around `t + lag`.
    pub lag_s: f64,
    /// Width of the window (centred on `t + lag`) whose median is taken.
    pub window_s: f64,
    /// Largest SpO2 range (points) within the window still called stable.
    pub stability_limit: f64,
}

impl Default for ReferenceSettings {
    fn default() -> Self {
        ReferenceSettings {
            probe_site: ProbeSite::Finger,
            lag_s: 0.0,
            window_s: 10.0,
            stability_limit: 3.0,
        }
    }
}

#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Protocol {
    pub name: String,
    pub description: String,
    pub epochs: Vec<Epoch>,
    pub baseline: usize,
    pub contrasts: Vec<Contrast>,
    pub reference: ReferenceSettings,
}

impl Protocol {
    pub fn epoch_index(&self, name: &str) -> Option<usize> {
        self.epochs.iter().position(|e| e.name == name)
    }

    /// Planned start of each epoch, seconds from the protocol start.
    pub fn planned_starts(&self) -> Vec<f64> {
        let mut t = 0.0;
        self.epochs
            .iter()
            .map(|e| {
                let s = t;
                t += e.duration_s;
                s
            })
            .collect()
    }

    pub fn total_s(&self) -> f64 {
        self.epochs.iter().map(|e| e.duration_s).sum()
    }
}

pub(crate) const PROTOCOL_KEYS: &[&str] = &[
    "name",
    "description",
    "epochs",
    "baseline",
    "contrasts",
    "reference",
];
pub(crate) const EPOCH_KEYS: &[&str] = &["name", "gas", "duration", "settle", "note"];
pub(crate) const GAS_KEYS: &[&str] = &["o2_fraction", "altitude_m"];
/// Longest reference lag or window accepted (10 min): longer is a typo or
/// a unit mistake, not an oximeter (a common-practice bound, no source).
const MAX_REFERENCE_SPAN_S: f64 = 600.0;

pub(crate) const REFERENCE_KEYS: &[&str] = &["probe_site", "lag", "window", "stability_limit"];

/// Reads and validates a protocol file. All findings are returned together.
pub fn load_protocol(path: &Path) -> Result<Protocol, Findings> {
    let mut findings = Findings::new();
    let Some(root) = super::read::load_tree(path, "protocol file", "check the path", &mut findings)
    else {
        return Err(findings);
    };
    let p = {
        let mut r = Reader::new(path, &mut findings);
        read_protocol(&mut r, &root)
    };
    match p {
        Some(p) if !findings.has_errors() => Ok(p),
        _ => Err(findings),
    }
}

/// Reads a protocol from its text (`file` names it in findings).
pub(crate) fn parse_protocol_text(
    text: &str,
    file: &Path,
    findings: &mut Findings,
) -> Option<Protocol> {
    let root = match super::yaml::parse(file, text) {
        Ok(n) => n,
        Err(fs) => {
            for f in fs {
                findings.error(&f.file, f.mark, f.message);
            }
            return None;
        }
    };
    let mut r = Reader::new(file, findings);
    read_protocol(&mut r, &root).filter(|_| !r.findings.has_errors())
}

/// Reads a protocol from a YAML node (a protocol file's root, or a study
/// file's inline `protocol:`).
pub(crate) fn read_protocol(r: &mut Reader, node: &Node) -> Option<Protocol> {
    let m = r.map(node, "the protocol", PROTOCOL_KEYS)?;
    let name = m.get("name").and_then(|n| r.name(n, "`name`"));
    if m.get("name").is_none() {
        r.required(&m, "name", "the protocol");
    }
    let description = m
        .get("description")
        .and_then(|n| r.text(n, "`description`"))
        .unwrap_or_default();

    let mut epochs: Vec<Epoch> = Vec::new();
    let mut names_seen: Vec<(String, Mark)> = Vec::new();
    let mut epochs_ok = true;
    match m.get("epochs") {
        None => {
            r.error(m.mark(), "the protocol has no epochs")
                .hint("add `epochs:` with at least one `- name: …` entry");
            epochs_ok = false;
        }
        Some(list_node) => {
            if let Some(items) = r.list(list_node, "`epochs`") {
                if items.is_empty() {
                    r.error(list_node.mark, "the protocol has no epochs")
                        .hint("add at least one `- name: …` entry");
                    epochs_ok = false;
                }
                for item in items {
                    // Names are collected even from epochs with other
                    // mistakes, so duplicates and contrasts are still checked.
                    let name_node = item.get("name");
                    if let Some(nn) = name_node {
                        if let Some(name) = nn.as_scalar() {
                            if let Some((_, first)) = names_seen.iter().find(|(x, _)| x == name) {
                                let msg = format!(
                                    "epoch name `{name}` is used twice (first at line {})",
                                    first.line
                                );
                                r.error(nn.mark, msg).hint("give every epoch its own name, e.g. `air-2` for a second air epoch");
                            }
                            names_seen.push((name.to_string(), nn.mark));
                        }
                    }
                    match read_epoch(r, item) {
                        Some(e) => epochs.push(e),
                        None => epochs_ok = false,
                    }
                }
            } else {
                epochs_ok = false;
            }
        }
    }
    let names: Vec<&str> = names_seen.iter().map(|(n, _)| n.as_str()).collect();

    let baseline = match m.get("baseline") {
        None => Some(0),
        Some(n) => {
            let b = r.text(n, "`baseline`");
            b.and_then(|b| match names.iter().position(|x| *x == b) {
                Some(i) => Some(i),
                None => {
                    let hint = super::diag::suggest(&b, &names);
                    r.error(
                        n.mark,
                        format!("baseline `{b}` is not an epoch of this protocol"),
                    )
                    .hint(hint);
                    None
                }
            })
        }
    };

    let mut contrasts = Vec::new();
    if let Some(cn) = m.get("contrasts") {
        if let Some(items) = r.list(cn, "`contrasts`") {
            for item in items {
                let Some(text) = r.text(item, "a contrast") else {
                    continue;
                };
                match parse_contrast(&text, &names) {
                    Ok(c) => contrasts.push(c),
                    Err(ContrastError::Unknown(e)) => {
                        let hint = super::diag::suggest(&e, &names);
                        r.error(
                            item.mark,
                            format!("contrast `{text}` names `{e}`, which is not an epoch"),
                        )
                        .hint(hint);
                    }
                    Err(ContrastError::Syntax(msg)) => {
                        r.error(item.mark, format!("contrast `{text}`: {msg}"))
                            .hint("write contrasts like `low-15 - air` or `0.5*low-15 + 0.5*low-12 - air`, with spaces around + and -");
                    }
                }
            }
        }
    }

    let reference = match m.get("reference") {
        None => Some(ReferenceSettings::default()),
        Some(n) => read_reference(r, n),
    };

    if !epochs_ok || epochs.is_empty() {
        return None;
    }
    Some(Protocol {
        name: name?,
        description,
        epochs,
        baseline: baseline?,
        contrasts,
        reference: reference?,
    })
}

fn read_epoch(r: &mut Reader, node: &Node) -> Option<Epoch> {
    let m = r.map(node, "an epoch", EPOCH_KEYS)?;
    let name = r
        .required(&m, "name", "an epoch")
        .and_then(|n| r.name(n, "an epoch's `name`"));
    if let Some(n) = &name {
        if n.trim().is_empty() || n.contains(char::is_whitespace) {
            r.error(
                m.get("name").expect("present").mark,
                format!("epoch name `{n}` must be one word without spaces"),
            )
            .hint("use letters, digits, `-` and `_`, e.g. `low-15`");
        }
    }
    let gas = r
        .required(&m, "gas", "an epoch")
        .and_then(|n| read_gas(r, n));
    let dur_node = r.required(&m, "duration", "an epoch");
    let duration = dur_node.and_then(|n| r.duration(n, "`duration`"));
    if let (Some(d), Some(n)) = (duration, dur_node) {
        if d <= 0.0 {
            r.error(n.mark, "`duration` must be longer than zero")
                .hint("write the epoch's length, e.g. `10min`");
        }
    }
    let settle_node = m.get("settle");
    let settle = match settle_node {
        None => Some(0.0),
        Some(n) => r.duration(n, "`settle`"),
    };
    if let (Some(s), Some(d), Some(n)) = (settle, duration, settle_node) {
        if d > 0.0 && s >= d {
            r.error(
                n.mark,
                format!(
                    "`settle` ({}) must be shorter than the epoch's `duration` ({})",
                    super::duration::format_seconds(s),
                    super::duration::format_seconds(d)
                ),
            )
            .hint("no capture of this epoch would count; shorten `settle` or lengthen `duration`");
        }
    }
    let duration = duration.filter(|d| *d > 0.0)?;
    Some(Epoch {
        name: name?,
        gas: gas?,
        duration_s: duration,
        settle_s: settle?.min(duration),
    })
}

fn read_gas(r: &mut Reader, node: &Node) -> Option<Gas> {
    if node.as_scalar() == Some("air") {
        return Some(Gas {
            written: GasSpec::Air,
            o2_fraction: AIR_O2_FRACTION,
            equivalent_altitude_m: Some(0.0),
        });
    }
    if node.as_scalar().is_some() {
        r.error(
            node.mark,
            format!(
                "gas `{}` is not understood",
                node.as_scalar().unwrap_or_default()
            ),
        )
        .hint("write `gas: air`, `gas: {o2_fraction: 0.15}` or `gas: {altitude_m: 3000}`");
        return None;
    }
    let m = r.map(node, "`gas`", GAS_KEYS)?;
    match (m.get("o2_fraction"), m.get("altitude_m")) {
        (Some(f), None) => {
            let v = r.number(f, "`o2_fraction`")?;
            if !(0.05..=1.0).contains(&v) {
                r.error(f.mark, format!("`o2_fraction` {v} is outside 0.05–1.0"))
                    .hint("write the inspired O2 as a fraction, e.g. `0.15` for 15 %");
                return None;
            }
            Some(Gas {
                written: GasSpec::O2Fraction(v),
                o2_fraction: v,
                equivalent_altitude_m: equivalent_altitude_m(v),
            })
        }
        (None, Some(h)) => {
            let v = r.number(h, "`altitude_m`")?;
            if !(0.0..=11_000.0).contains(&v) {
                r.error(h.mark, format!("`altitude_m` {v} is outside 0–11000 m, where the ISO 2533 troposphere formula holds"));
                return None;
            }
            let f = equivalent_o2_fraction(v);
            if f < 0.05 {
                r.error(
                    h.mark,
                    format!("`altitude_m` {v} is equivalent to O2 {f:.3}, below 0.05"),
                );
                return None;
            }
            Some(Gas {
                written: GasSpec::AltitudeM(v),
                o2_fraction: f,
                equivalent_altitude_m: Some(v),
            })
        }
        (Some(_), Some(h)) => {
            r.error(
                h.mark,
                "give either `o2_fraction` or `altitude_m`, not both",
            );
            None
        }
        (None, None) => {
            r.error(node.mark, "`gas` needs `o2_fraction` or `altitude_m`");
            None
        }
    }
}

fn read_reference(r: &mut Reader, node: &Node) -> Option<ReferenceSettings> {
    let m = r.map(node, "`reference`", REFERENCE_KEYS)?;
    let d = ReferenceSettings::default();
    let site = match m.get("probe_site") {
        None => Some(d.probe_site),
        Some(n) => r
            .choice(n, "`probe_site`", &ProbeSite::NAMES)
            .and_then(|s| ProbeSite::from_name(&s)),
    };
    let lag = match m.get("lag") {
        None => Some(d.lag_s),
        Some(n) => match r.duration(n, "`lag`") {
            Some(l) if l > MAX_REFERENCE_SPAN_S => {
                r.error(
                    n.mark,
                    format!(
                        "`lag` of {} is longer than {}: no pulse oximeter lags the blood by that much",
                        format_seconds(l),
                        format_seconds(MAX_REFERENCE_SPAN_S)
                    ),
                )
                .hint("finger probes lag by about 20–60 s, ear probes less");
                None
            }
            l => l,
        },
    };
    let window = match m.get("window") {
        None => Some(d.window_s),
        Some(n) => {
            let w = r.duration(n, "`window`");
            if w == Some(0.0) {
                r.error(n.mark, "`window` must be longer than zero")
                    .hint("the oximeter logs once a second; `10s` is common");
                None
            } else if let Some(w) = w.filter(|w| *w > MAX_REFERENCE_SPAN_S) {
                r.error(
                    n.mark,
                    format!(
                        "`window` of {} is longer than {}: the median would mix epochs",
                        format_seconds(w),
                        format_seconds(MAX_REFERENCE_SPAN_S)
                    ),
                )
                .hint("the oximeter logs once a second; `10s` is common");
                None
            } else {
                w
            }
        }
    };
    let limit = match m.get("stability_limit") {
        None => Some(d.stability_limit),
        Some(n) => {
            let v = r.number(n, "`stability_limit`");
            if v.is_some_and(|v| v < 0.0) {
                r.error(n.mark, "`stability_limit` must not be negative");
                None
            } else {
                v
            }
        }
    };
    Some(ReferenceSettings {
        probe_site: site?,
        lag_s: lag?,
        window_s: window?,
        stability_limit: limit?,
    })
}

/// Parses `a - b`, `0.5*a + 0.5*b - c` (see [`super::contrast`]) over the
/// epochs; weights must sum to zero so that the contrast compares epochs
/// rather than measuring a level.
pub(crate) fn parse_contrast(text: &str, epochs: &[&str]) -> Result<Contrast, ContrastError> {
    let mut weights: Vec<(usize, f64)> = Vec::new();
    for (name, w) in parse_terms(text)? {
        let idx = epochs
            .iter()
            .position(|e| *e == name)
            .ok_or(ContrastError::Unknown(name))?;
        weights.push((idx, w));
    }
    weights.retain(|(_, w)| *w != 0.0);
    let sum: f64 = weights.iter().map(|(_, w)| w).sum();
    if weights.is_empty() || sum.abs() > 1e-9 {
        return Err(ContrastError::Syntax(format!(
            "its weights add up to {sum}, not 0"
        )));
    }
    Ok(Contrast {
        label: text.split_whitespace().collect::<Vec<_>>().join(" "),
        weights,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn contrasts_parse_into_weights() {
        let e = ["air", "low-15", "low-12"];
        let c = parse_contrast("low-15 - air", &e).unwrap();
        assert_eq!(c.weights, vec![(1, 1.0), (0, -1.0)]);
        let c = parse_contrast("0.5*low-15 + 0.5*low-12 - air", &e).unwrap();
        assert_eq!(c.weights, vec![(1, 0.5), (2, 0.5), (0, -1.0)]);
        assert_eq!(
            parse_contrast("low-15 - hyper", &e),
            Err(ContrastError::Unknown("hyper".into()))
        );
        assert!(matches!(
            parse_contrast("low-15", &e),
            Err(ContrastError::Syntax(_))
        ));
        assert!(matches!(
            parse_contrast("low-15 -", &e),
            Err(ContrastError::Syntax(_))
        ));
        assert!(matches!(
            parse_contrast("low-15 air", &e),
            Err(ContrastError::Syntax(_))
        ));
    }
}
