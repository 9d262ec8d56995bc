//! Reference SpO2 for each capture, from the pulse oximeter's log.
//!
//! The value for a capture at `t` is the median of the samples in the
//! window of width `window` centred on `t + lag` (the probe shows a change
//! `lag` after the blood has it). Empty cells, non-finite values and values
//! outside 1–100 are dropouts and are skipped. When the range of the
//! samples in the window exceeds the stability limit the value is kept and
//! flagged `unstable`.

use crate::config::protocol::ReferenceSettings;
pub use crate::config::spo2log::SpO2Log;

#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum ReferenceStatus {
    Ok,
    Unstable,
    /// No valid sample in the window (or no log for the session).
    Missing,
}

impl ReferenceStatus {
    pub fn as_str(&self) -> &'static str {
        match self {
            ReferenceStatus::Ok => "ok",
            ReferenceStatus::Unstable => "unstable",
            ReferenceStatus::Missing => "missing",
        }
    }
}

#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) struct CaptureReference {
    pub spo2: Option<f64>,
    pub samples: usize,
    pub range: Option<f64>,
    pub status: ReferenceStatus,
}

/// The reference value for a capture at `t_s` seconds from the session start.
pub(crate) fn reference_at(
    log: &SpO2Log,
    t_s: f64,
    settings: &ReferenceSettings,
) -> CaptureReference {
    let centre = t_s + settings.lag_s;
    let (lo, hi) = (
        centre - settings.window_s / 2.0,
        centre + settings.window_s / 2.0,
    );
    let from = log.samples.partition_point(|(t, _)| *t < lo);
    let to = log.samples.partition_point(|(t, _)| *t <= hi);
    let mut vals: Vec<f64> = log.samples[from..to].iter().map(|(_, v)| *v).collect();
    if vals.is_empty() {
        return CaptureReference {
            spo2: None,
            samples: 0,
            range: None,
            status: ReferenceStatus::Missing,
        };
    }
    vals.sort_by(f64::total_cmp);
    let n = vals.len();
    let median = if n % 2 == 1 {
        vals[n / 2]
    } else {
        0.5 * (vals[n / 2 - 1] + vals[n / 2])
    };
    let range = vals[n - 1] - vals[0];
    let status = if range > settings.stability_limit {
        ReferenceStatus::Unstable
    } else {
        ReferenceStatus::Ok
    };
    CaptureReference {
        spo2: Some(median),
        samples: n,
        range: Some(range),
        status,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn settings(lag: f64, window: f64) -> ReferenceSettings {
        ReferenceSettings {
            lag_s: lag,
            window_s: window,
            stability_limit: 3.0,
            ..Default::default()
        }
    }

    #[test]
    fn median_over_the_lagged_window() {
        let log = SpO2Log {
            samples: (0..100)
                .map(|t| (t as f64, if t < 50 { 98.0 } else { 90.0 }))
                .collect(),
            dropouts: 0,
        };
        // Capture at 30 s, lag 20 s: window 45..55 s straddles the drop.
        let r = reference_at(&log, 30.0, &settings(20.0, 10.0));
        assert_eq!(r.samples, 11);
        assert_eq!(r.spo2, Some(90.0));
        assert_eq!(r.status, ReferenceStatus::Unstable);
        // Without the lag the window is on the plateau.
        let r = reference_at(&log, 30.0, &settings(0.0, 10.0));
        assert_eq!((r.spo2, r.status), (Some(98.0), ReferenceStatus::Ok));
        let r = reference_at(&log, 500.0, &settings(0.0, 10.0));
        assert_eq!(r.status, ReferenceStatus::Missing);
    }

    #[test]
    fn even_count_median_is_the_mean_of_the_middle_two() {
        let log = SpO2Log {
            samples: vec![(0.0, 95.0), (1.0, 97.0), (2.0, 96.0), (3.0, 94.0)],
            dropouts: 0,
        };
        let r = reference_at(&log, 1.5, &settings(0.0, 4.0));
        assert_eq!(r.spo2, Some(95.5));
    }
}
