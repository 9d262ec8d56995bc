//! Capture-to-epoch assignment.
//!
//! Each epoch starts at its recorded switch time when one is given, else
//! where the previous epoch's planned duration ends. Intervals are
//! half-open: a capture exactly at a switch belongs to the new epoch, and a
//! capture exactly at the end of a settle window counts as steady. Captures
//! in a settle window or outside every epoch are kept with their status.

use crate::config::protocol::Protocol;
use crate::config::study::Session;
use crate::config::time::seconds_between;

/// Where one epoch lies in one session, seconds from the session start.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct EpochSpan {
    pub epoch: usize,
    pub start_s: f64,
    pub settle_end_s: f64,
    pub end_s: f64,
    /// True when the start is a recorded switch, false when planned.
    pub recorded: bool,
}

/// A capture's place in the protocol, as the epochs table writes it.
#[derive(
    Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord, serde::Serialize, serde::Deserialize,
)]
#[serde(rename_all = "kebab-case")]
pub enum CaptureStatus {
    /// In an epoch, after its settle window: used for analysis.
    Steady,
    /// In an epoch's settle window, while blood gases still change.
    Settling,
    /// Before the first epoch or after the last.
    Outside,
    /// Left out by the study file's `exclusions` (never given by [`assign`]).
    Excluded,
}

impl CaptureStatus {
    /// Analysed by the transmissions stage: steady, or settling (kept for the
    /// time course, left out of the steady-state statistics).
    pub fn analysed(&self) -> bool {
        matches!(self, CaptureStatus::Steady | CaptureStatus::Settling)
    }

    pub fn as_str(&self) -> &'static str {
        match self {
            CaptureStatus::Steady => "steady",
            CaptureStatus::Settling => "settling",
            CaptureStatus::Outside => "outside",
            CaptureStatus::Excluded => "excluded",
        }
    }
}

impl std::fmt::Display for CaptureStatus {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(self.as_str())
    }
}

/// The epochs of `protocol` as they happened in `session`.
pub(crate) fn session_spans(protocol: &Protocol, session: &Session) -> Vec<EpochSpan> {
    let mut starts: Vec<(f64, bool)> = Vec::with_capacity(protocol.epochs.len());
    let mut t = 0.0;
    for (i, e) in protocol.epochs.iter().enumerate() {
        let recorded = session
            .switches
            .iter()
            .find(|(j, _)| *j == i)
            .map(|(_, at)| seconds_between(&session.start, at));
        let s = match recorded {
            Some(r) => (r, true),
            None => (t, false),
        };
        starts.push(s);
        t = s.0 + e.duration_s;
    }
    let last_end = t;
    protocol
        .epochs
        .iter()
        .enumerate()
        .map(|(i, e)| {
            let (start, recorded) = starts[i];
            let end = starts.get(i + 1).map(|s| s.0).unwrap_or(last_end);
            EpochSpan {
                epoch: i,
                start_s: start,
                settle_end_s: (start + e.settle_s).min(end),
                end_s: end,
                recorded,
            }
        })
        .collect()
}

/// The epoch (if any) and status of a capture taken `t_s` seconds after the session start.
pub(crate) fn assign(spans: &[EpochSpan], t_s: f64) -> (Option<usize>, CaptureStatus) {
    for s in spans {
        if t_s >= s.start_s && t_s < s.end_s {
            let status = if t_s < s.settle_end_s {
                CaptureStatus::Settling
            } else {
                CaptureStatus::Steady
            };
            return (Some(s.epoch), status);
        }
    }
    (None, CaptureStatus::Outside)
}

#[cfg(test)]
// Values here are exact by construction (sums of binary fractions, integers).
#[allow(clippy::float_cmp)]
mod tests {
    use super::*;
    use crate::config::protocol::{Epoch, Gas, GasSpec, ReferenceSettings};
    use crate::config::time::parse_time;
    use std::collections::BTreeMap;

    fn protocol() -> Protocol {
        let gas = Gas {
            written: GasSpec::Air,
            o2_fraction: 0.21,
            equivalent_altitude_m: Some(0.0),
        };
        let ep = |n: &str, d: f64, s: f64| Epoch {
            name: n.into(),
            gas: gas.clone(),
            duration_s: d,
            settle_s: s,
        };
        Protocol {
            name: "p".into(),
            description: String::new(),
            epochs: vec![
                ep("air", 600.0, 120.0),
                ep("low", 600.0, 180.0),
                ep("air-2", 300.0, 60.0),
            ],
            baseline: 0,
            contrasts: vec![],
            reference: ReferenceSettings::default(),
        }
    }

    fn session(switches: Vec<(usize, &str)>) -> Session {
        Session {
            id: "1".into(),
            start: parse_time("2026-03-04T09:00:00+01:00").unwrap(),
            eyes: vec![crate::config::study::Eye::OD],
            switches: switches
                .into_iter()
                .map(|(i, t)| (i, parse_time(t).unwrap()))
                .collect(),
            captures: vec![],
            reference: None,
            segments: BTreeMap::new(),
            spo2: None,
            vessels: BTreeMap::new(),
        }
    }

    #[test]
    fn planned_spans_follow_durations() {
        let s = session_spans(&protocol(), &session(vec![]));
        assert_eq!(
            s.iter()
                .map(|x| (x.start_s, x.settle_end_s, x.end_s))
                .collect::<Vec<_>>(),
            vec![
                (0.0, 120.0, 600.0),
                (600.0, 780.0, 1200.0),
                (1200.0, 1260.0, 1500.0)
            ]
        );
    }

    #[test]
    fn recorded_switch_overrides_and_shifts_later_epochs() {
        // The switch to `low` happened 40 s late, written in UTC.
        let s = session_spans(&protocol(), &session(vec![(1, "2026-03-04T08:10:40Z")]));
        assert_eq!(s[0].end_s, 640.0);
        assert_eq!(
            (s[1].start_s, s[1].settle_end_s, s[1].end_s),
            (640.0, 820.0, 1240.0)
        );
        assert!(s[1].recorded && !s[2].recorded);
        assert_eq!(s[2].start_s, 1240.0);
    }

    #[test]
    fn boundaries_are_half_open() {
        let s = session_spans(&protocol(), &session(vec![]));
        assert_eq!(assign(&s, 599.999), (Some(0), CaptureStatus::Steady));
        assert_eq!(
            assign(&s, 600.0),
            (Some(1), CaptureStatus::Settling),
            "exactly at a switch: the new epoch"
        );
        assert_eq!(assign(&s, 779.9), (Some(1), CaptureStatus::Settling));
        assert_eq!(
            assign(&s, 780.0),
            (Some(1), CaptureStatus::Steady),
            "exactly at the end of the settle window"
        );
        assert_eq!(assign(&s, -1.0), (None, CaptureStatus::Outside));
        assert_eq!(assign(&s, 1500.0), (None, CaptureStatus::Outside));
        assert_eq!(assign(&s, 0.0), (Some(0), CaptureStatus::Settling));
    }

    #[test]
    fn offsets_do_not_matter_only_instants() {
        let sess = session(vec![]);
        // 09:10:00+01:00 is 03:10:00-05:00: exactly the switch to `low`.
        let t = seconds_between(
            &sess.start,
            &parse_time("2026-03-04T03:10:00-05:00").unwrap(),
        );
        assert_eq!(
            assign(&session_spans(&protocol(), &sess), t),
            (Some(1), CaptureStatus::Settling)
        );
    }
}
