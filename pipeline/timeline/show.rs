//! The timeline of a protocol as text, for the console and the report.

use crate::config::duration::format_seconds;
use crate::config::protocol::{GasSpec, ProbeSite, Protocol};

/// The timeline as text: one line per epoch with cumulative times.
pub(crate) fn render_timeline(p: &Protocol) -> String {
    let mut out = format!("protocol `{}`", p.name);
    if !p.description.is_empty() {
        out.push_str(&format!(": {}", p.description));
    }
    out.push('\n');
    let header = [
        "#",
        "epoch",
        "from",
        "steady from",
        "to",
        "duration",
        "gas",
        "O2",
        "equivalent altitude",
    ];
    let mut rows: Vec<Vec<String>> = vec![header.iter().map(|s| s.to_string()).collect()];
    for (i, (e, start)) in p.epochs.iter().zip(p.planned_starts()).enumerate() {
        rows.push(vec![
            (i + 1).to_string(),
            e.name.clone(),
            format_seconds(start),
            format_seconds(start + e.settle_s),
            format_seconds(start + e.duration_s),
            format_seconds(e.duration_s),
            match e.gas.written {
                GasSpec::Air => "air".into(),
                GasSpec::O2Fraction(_) => "O2 mixture".into(),
                GasSpec::AltitudeM(h) => format!("air at {h:.0} m"),
            },
            format!("{:.3}", e.gas.o2_fraction),
            match e.gas.equivalent_altitude_m {
                Some(h) => format!("{:.0} m", h),
                None => "none (hyperoxic)".into(),
            },
        ]);
    }
    let widths: Vec<usize> = (0..header.len())
        .map(|c| rows.iter().map(|r| r[c].chars().count()).max().unwrap_or(0))
        .collect();
    for r in &rows {
        let line: Vec<String> = r
            .iter()
            .zip(&widths)
            .map(|(s, w)| format!("{s:<w$}"))
            .collect();
        out.push_str(&format!("  {}\n", line.join("  ").trim_end()));
    }
    out.push_str(&format!(
        "total {}; baseline `{}`\n",
        format_seconds(p.total_s()),
        p.epochs[p.baseline].name
    ));
    if !p.contrasts.is_empty() {
        out.push_str(&format!(
            "contrasts: {}\n",
            p.contrasts
                .iter()
                .map(|c| c.label.as_str())
                .collect::<Vec<_>>()
                .join("; ")
        ));
    }
    let r = &p.reference;
    out.push_str(&format!(
        "reference SpO2: {} probe, lag {}, median over {}, unstable above a range of {} points\n",
        probe_site_name(r.probe_site),
        format_seconds(r.lag_s),
        format_seconds(r.window_s),
        r.stability_limit
    ));
    out
}

fn probe_site_name(s: ProbeSite) -> &'static str {
    use ProbeSite::*;
    match s {
        Finger => "finger",
        Ear => "ear",
        Forehead => "forehead",
        Toe => "toe",
    }
}
