//! Durations as people write them in protocols: `90s`, `5min`, `1h30min`,
//! `2.5min`. A bare number is refused, because "5" could mean seconds or
//! minutes and a wrong guess would silently shift every epoch.

use super::ValueError;

/// Parses a duration into seconds. Parts go from larger to smaller units
/// (`1h30min`, not `30min1h`); each unit at most once.
pub(crate) fn parse_seconds(text: &str) -> Result<f64, ValueError> {
    let t = text.trim();
    if t.is_empty() {
        return Err(ValueError("the duration is empty".into()));
    }
    if t.parse::<f64>().is_ok() {
        return Err(ValueError(format!("`{t}` has no unit")));
    }
    const UNITS: [(&str, f64); 3] = [("h", 3600.0), ("min", 60.0), ("s", 1.0)];
    let mut rest = t;
    let mut total = 0.0;
    let mut last_rank: Option<usize> = None;
    while !rest.is_empty() {
        let num_len = rest
            .find(|c: char| !(c.is_ascii_digit() || c == '.'))
            .unwrap_or(rest.len());
        if num_len == 0 {
            return Err(ValueError(format!("`{t}` is not a duration")));
        }
        let value: f64 = rest[..num_len]
            .parse()
            .map_err(|_| ValueError(format!("`{}` is not a number", &rest[..num_len])))?;
        rest = &rest[num_len..];
        let Some((rank, (unit, factor))) = UNITS.iter().enumerate().find(|(_, (u, _))| {
            rest.starts_with(u) && !rest[u.len()..].starts_with(|c: char| c.is_ascii_alphabetic())
        }) else {
            let unit: String = rest
                .chars()
                .take_while(|c| c.is_ascii_alphabetic())
                .collect();
            return Err(ValueError(if unit.is_empty() {
                format!("`{t}` has a number without a unit")
            } else {
                format!("unknown unit `{unit}` in `{t}`")
            }));
        };
        if last_rank.is_some_and(|r| rank <= r) {
            return Err(ValueError(format!(
                "`{t}`: write the parts from hours down to seconds, each once"
            )));
        }
        last_rank = Some(rank);
        total += value * factor;
        rest = &rest[unit.len()..];
    }
    Ok(total)
}

/// Formats seconds compactly, the inverse of [`parse_seconds`] for whole seconds.
pub(crate) fn format_seconds(secs: f64) -> String {
    let neg = secs < 0.0;
    let mut s = secs.abs().round() as u64;
    let h = s / 3600;
    s %= 3600;
    let m = s / 60;
    s %= 60;
    let mut out = String::new();
    if neg {
        out.push('-');
    }
    if h > 0 {
        out.push_str(&format!("{h}h"));
    }
    if m > 0 {
        out.push_str(&format!("{m}min"));
    }
    if s > 0 || (h == 0 && m == 0) {
        out.push_str(&format!("{s}s"));
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn parses_the_written_forms() {
        assert_eq!(parse_seconds("90s"), Ok(90.0));
        assert_eq!(parse_seconds("5min"), Ok(300.0));
        assert_eq!(parse_seconds("1h30min"), Ok(5400.0));
        assert_eq!(parse_seconds("1h"), Ok(3600.0));
        assert_eq!(parse_seconds("2.5min"), Ok(150.0));
        assert_eq!(parse_seconds("1h2min3s"), Ok(3723.0));
        assert_eq!(parse_seconds("0s"), Ok(0.0));
    }

    #[test]
    fn refuses_ambiguous_or_malformed_forms() {
        assert_eq!(
            parse_seconds("5"),
            Err(ValueError("`5` has no unit".to_string()))
        );
        assert_eq!(
            parse_seconds("5 minutes"),
            Err(ValueError(
                "`5 minutes` has a number without a unit".to_string()
            ))
        );
        assert_eq!(
            parse_seconds("5m"),
            Err(ValueError("unknown unit `m` in `5m`".to_string()))
        );
        assert_eq!(
            parse_seconds("30min1h"),
            Err(ValueError(
                "`30min1h`: write the parts from hours down to seconds, each once".to_string()
            ))
        );
        assert_eq!(
            parse_seconds("min"),
            Err(ValueError("`min` is not a duration".to_string()))
        );
        assert_eq!(
            parse_seconds(""),
            Err(ValueError("the duration is empty".to_string()))
        );
        assert!(parse_seconds("-5min").is_err());
        assert!(parse_seconds("1.2.3s").is_err());
    }

    #[test]
    fn formats_round_trip() {
        for s in ["90s", "5min", "1h30min", "1h", "0s", "1h2min3s"] {
            assert_eq!(
                format_seconds(parse_seconds(s).unwrap()),
                s.replace("90s", "1min30s")
            );
        }
    }
}
