//! `satstep init DIR`: a study skeleton from a folder of captures, so that
//! a study does not start from an empty file. Each folder directly under
//! the captures folder is a subject; its TIFF files (at any depth) are its
//! captures, with their times from the files' `DateTime` tag or from their
//! names (a pattern), and their eye from a path part or name part `OD` or
//! `OS`; a CSV file in the subject's folder with a time column and an SpO2
//! column is its reference log. A subject's captures split into sessions
//! where more than `--session-gap` passes between two of them.
//!
//! Written: `study.yaml` (instrument, subjects with their sessions,
//! methods, each part commented), `protocol.yaml` (a ready protocol or a
//! template) and one capture list per session. The segment files it names
//! are written by `satstep segments propose`. Nothing is overwritten
//! without `--force`.

use std::fmt::Write as _;
use std::path::{Path, PathBuf};

use anyhow::{Context, Result};
use chrono::{DateTime, FixedOffset, NaiveDateTime, TimeZone};

use super::Exit;
use crate::config::eye::Eye;
use crate::console::Printer;
use crate::tables::write_bytes_atomic;

/// The protocols that come with satstep, by name.
pub const READY_PROTOCOLS: [(&str, &str); 4] = [
    (
        "step-down-hypoxia",
        include_str!("../../protocols/step-down-hypoxia.yaml"),
    ),
    (
        "alternating-low-oxygen",
        include_str!("../../protocols/alternating-low-oxygen.yaml"),
    ),
    ("hyperoxia", include_str!("../../protocols/hyperoxia.yaml")),
    (
        "simulated-altitude",
        include_str!("../../protocols/simulated-altitude.yaml"),
    ),
];

/// A protocol to start from when none is chosen: every key a protocol
/// takes, commented.
const PROTOCOL_TEMPLATE: &str = "\
# A protocol template written by `satstep init`: replace the epochs with
# your own (`satstep protocol show protocol.yaml` prints the timeline).
# Breathing challenges need medical supervision, ethics approval, continuous
# monitoring and stopping rules set by the study's physician.
name: my-protocol
description: Room air, then one step of reduced inspired oxygen.
epochs:
  - name: air
    gas: air              # or {o2_fraction: 0.15}, or {altitude_m: 3000}
    duration: 10min
    settle: 3min          # captures in the first 3 min are not steady
  - name: low
    gas: {o2_fraction: 0.15}
    duration: 12min
    settle: 5min
baseline: air
contrasts:
  - low - air
reference:
  probe_site: finger
  lag: 25s                # how far the oximeter lags the eye
  window: 10s             # reference SpO2 averaged over this window
  stability_limit: 3      # SpO2 range (points) above which a capture's reference is unstable
";

/// Where capture times come from.
#[derive(Debug, Clone, PartialEq)]
pub enum TimeSource {
    /// The TIFF `DateTime` tag (local camera time).
    Metadata,
    /// The file name without its extension, read with this chrono pattern.
    Name(String),
}

#[derive(Debug, Clone)]
pub struct InitArgs {
    pub dir: PathBuf,
    /// The folder of subject folders (default: `dir`).
    pub captures: Option<PathBuf>,
    /// A ready protocol's name or a protocol file; a template when absent.
    pub protocol: Option<String>,
    /// An instrument file (`name`, `pixel_size_um`, `bands`, …).
    pub instrument: Option<PathBuf>,
    pub time: TimeSource,
    /// The camera clock's offset from UTC, e.g. `+01:00`.
    pub utc_offset: FixedOffset,
    /// The eye of captures whose path names none.
    pub eye: Eye,
    pub session_gap_s: f64,
    pub force: bool,
}

struct Found {
    /// Relative to the subject's folder.
    rel: String,
    time: DateTime<FixedOffset>,
    eye: Eye,
}

struct SubjectFound {
    id: String,
    sessions: Vec<Vec<Found>>,
    log: Option<(String, String, String)>,
}

pub fn init(args: &InitArgs, printer: &Printer) -> Result<Exit> {
    let dir = &args.dir;
    let study_file = dir.join("study.yaml");
    if study_file.exists() && !args.force {
        printer.error(format!(
            "`{}` exists; it is kept (`--force` replaces it and the files `init` writes beside it)",
            study_file.display()
        ));
        return Ok(Exit::Problem);
    }
    let root = args.captures.clone().unwrap_or_else(|| dir.clone());
    let protocol_text = match &args.protocol {
        None => PROTOCOL_TEMPLATE.to_string(),
        Some(p) => match READY_PROTOCOLS.iter().find(|(n, _)| n == p) {
            Some((_, t)) => t.to_string(),
            None if Path::new(p).is_file() => std::fs::read_to_string(p)
                .with_context(|| format!("cannot read the protocol `{p}`"))?,
            None => {
                let names: Vec<&str> = READY_PROTOCOLS.iter().map(|(n, _)| *n).collect();
                printer.error(format!(
                    "`--protocol {p}` is neither a ready protocol ({}) nor a file",
                    names.join(", ")
                ));
                return Ok(Exit::Problem);
            }
        },
    };
    let instrument = match &args.instrument {
        None => None,
        Some(p) => match super::sensitivity::load_instrument(p) {
            Ok(i) => Some((
                i,
                std::fs::read_to_string(p)
                    .with_context(|| format!("cannot read `{}`", p.display()))?,
            )),
            Err(f) => {
                printer.findings(&f);
                printer.error(format!(
                    "the instrument file `{}` is not valid; nothing was written",
                    p.display()
                ));
                return Ok(Exit::Problem);
            }
        },
    };
    let mut subjects = Vec::new();
    let mut problems = Vec::new();
    let mut first_tags = None;
    let mut entries: Vec<PathBuf> = std::fs::read_dir(&root)
        .with_context(|| format!("cannot read the captures folder `{}`", root.display()))?
        .filter_map(|e| e.ok().map(|e| e.path()))
        .filter(|p| p.is_dir())
        .collect();
    entries.sort();
    for sdir in entries {
        let mut tiffs = Vec::new();
        collect_tiffs(&sdir, &mut tiffs);
        tiffs.sort();
        if tiffs.is_empty() {
            continue;
        }
        let id = sdir
            .file_name()
            .map(|n| n.to_string_lossy().to_string())
            .unwrap_or_default();
        let mut found = Vec::new();
        for t in &tiffs {
            let rel = t
                .strip_prefix(&sdir)
                .unwrap_or(t)
                .to_string_lossy()
                .replace('\\', "/");
            if first_tags.is_none() {
                first_tags = camera_tags(t).map(|c| (c, t.clone()));
            }
            match capture_time(t, &args.time, args.utc_offset) {
                Ok(time) => found.push(Found {
                    eye: eye_of(Path::new(&rel)).unwrap_or(args.eye),
                    rel,
                    time,
                }),
                Err(why) => problems.push(format!("`{}`: {why}", t.display())),
            }
        }
        found.sort_by(|a, b| (a.time, &a.rel).cmp(&(b.time, &b.rel)));
        let mut sessions: Vec<Vec<Found>> = Vec::new();
        for f in found {
            let new = match sessions.last().and_then(|s| s.last()) {
                Some(prev) => (f.time - prev.time).num_seconds() as f64 > args.session_gap_s,
                None => true,
            };
            if new {
                sessions.push(Vec::new());
            }
            sessions.last_mut().expect("pushed").push(f);
        }
        let log = find_log(&sdir);
        subjects.push(SubjectFound { id, sessions, log });
    }
    if !problems.is_empty() {
        for p in &problems {
            printer.error(p);
        }
        printer.error(match args.time {
            TimeSource::Metadata => "capture times could not be read from the files; give `--time-from name --name-pattern PATTERN` to read them from the file names (e.g. `capture_%Y%m%d_%H%M%S`), then run `init` again; nothing was written".to_string(),
            TimeSource::Name(_) => "some file names do not match `--name-pattern` (a chrono pattern for the whole name without its extension); nothing was written".to_string(),
        });
        return Ok(Exit::Problem);
    }
    if subjects.is_empty() {
        printer.error(format!(
            "no subject folders with TIFF captures under `{}`: put each subject's captures in a folder of its own (named by the subject's id)",
            root.display()
        ));
        return Ok(Exit::Problem);
    }
    // The first epoch's settle time puts the first capture of a session in
    // steady state when the session start is taken from the captures.
    let (baseline, first_settle_s) =
        first_epoch(&protocol_text).unwrap_or_else(|| ("air".into(), 0.0));
    let mut study = String::new();
    let name = dir
        .canonicalize()
        .ok()
        .and_then(|p| p.file_name().map(|n| n.to_string_lossy().to_string()))
        .unwrap_or_else(|| "my-study".into());
    let id: String = name
        .chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() || c == '-' || c == '_' {
                c
            } else {
                '-'
            }
        })
        .collect();
    writeln!(
        study,
        "# Study skeleton written by `satstep init`. Research use only, not diagnosis.\n\
         # Check every part, then `satstep segments propose` writes each eye's\n\
         # segment file for review, and `satstep check` validates the study.\n\
         study: {id}\n\
         title: \"{name}\"\n\
         protocol: protocol.yaml"
    )?;
    // The bands the methods are written for: the instrument file's, else
    // the captures' own tags when they name every band's centre.
    let mut placeholder = false;
    let bands: Option<Vec<(String, f64)>> = match &instrument {
        Some((i, text)) => {
            writeln!(study, "instrument:")?;
            for line in text.lines() {
                if !line.trim().is_empty() {
                    writeln!(study, "  {line}")?;
                }
            }
            Some(
                i.bands
                    .iter()
                    .map(|b| (b.name.clone(), b.response.centre_nm()))
                    .collect(),
            )
        }
        None => {
            let (tags, from) = first_tags.unwrap_or_default();
            let n = tags.pages.max(1);
            let tagged = !tags.bands.is_empty() && tags.bands.iter().all(|b| b.1.is_some());
            let num = |v: Option<f64>| v.map_or("~".to_string(), |v| format!("{v}"));
            if tagged || tags.pixel_um.is_some() {
                writeln!(
                    study,
                    "# The camera, as the TIFF tags of `{}` describe it (pixel size from\n\
                     # XResolution in pixels per cm; band names from PageName, centres and\n\
                     # widths from ImageDescription): check that the pixel size is the scale\n\
                     # on the retina and the bands are the camera's. Fill in every `~`.",
                    from.strip_prefix(dir).unwrap_or(&from).display()
                )?;
            } else {
                writeln!(
                    study,
                    "# The camera: its pixel size on the retina and each band's centre and\n\
                     # width, in the order of the TIFF pages ({n} pages in the first capture).\n\
                     # Fill in every `~`; `satstep check` says where one is missing."
                )?;
            }
            writeln!(
                study,
                "instrument:\n  name: \"my camera\"\n  pixel_size_um: {}\n  # Add `gain: …` to every band (a white target's signal in it relative to\n  # the others) to weight the multiband fits' bands by the fundus (README).\n  bands:",
                tags.pixel_um
                    .map_or("~".to_string(), |v| format!("{}", (v * 1e3).round() / 1e3))
            )?;
            let mut named = Vec::new();
            for b in 0..n {
                let (name, centre, fwhm) = tags.bands.get(b).cloned().unwrap_or_default();
                let name = name
                    .filter(|_| tagged)
                    .unwrap_or_else(|| format!("band{}", b + 1));
                writeln!(
                    study,
                    "    - {{name: {name}, centre_nm: {}, fwhm_nm: {}}}",
                    num(centre.filter(|_| tagged)),
                    num(fwhm.filter(|_| tagged))
                )?;
                placeholder |= !tagged || fwhm.is_none();
                named.push((name, centre.unwrap_or(f64::NAN)));
            }
            placeholder |= tags.pixel_um.is_none();
            tagged.then_some(named)
        }
    };
    writeln!(
        study,
        "# One entry per volunteer; age, sex and pigmentation (grade 1 light to 4\n\
         # dark) are optional and feed the agreement by group.\nsubjects:"
    )?;
    let mut lists: Vec<(PathBuf, String)> = Vec::new();
    let mut summary = Vec::new();
    for s in &subjects {
        writeln!(
            study,
            "  - id: {}\n    # age: 30\n    # sex: F\n    # pigmentation: 2\n    sessions:",
            s.id
        )?;
        let sdir_rel = root
            .join(&s.id)
            .strip_prefix(dir)
            .map(Path::to_path_buf)
            .unwrap_or_else(|_| root.join(&s.id));
        let sdir_rel = sdir_rel.to_string_lossy().replace('\\', "/");
        for (k, sess) in s.sessions.iter().enumerate() {
            let sid = format!("s{}", k + 1);
            let mut eyes: Vec<Eye> = sess.iter().map(|f| f.eye).collect();
            eyes.sort();
            eyes.dedup();
            let first = sess[0].time;
            let log_start = s
                .log
                .as_ref()
                .and_then(|(f, tc, _)| log_start(&root.join(&s.id).join(f), tc));
            let mut start = first - chrono::Duration::seconds(first_settle_s as i64);
            if let Some(ls) = log_start.filter(|t| *t <= first && (first - *t).num_hours() < 2) {
                start = start.min(ls);
            }
            let start = floor_minute(start);
            let list_name = format!("captures-{sid}.csv");
            let mut list = String::from(if eyes.len() > 1 {
                "file,time,eye\n"
            } else {
                "file,time\n"
            });
            for f in sess {
                if eyes.len() > 1 {
                    writeln!(
                        list,
                        "{},{},{}",
                        csv_cell(&f.rel),
                        f.time.to_rfc3339(),
                        f.eye.as_str()
                    )?;
                } else {
                    writeln!(list, "{},{}", csv_cell(&f.rel), f.time.to_rfc3339())?;
                }
            }
            lists.push((root.join(&s.id).join(&list_name), list));
            let eye_list: Vec<&str> = eyes.iter().map(|e| e.as_str()).collect();
            writeln!(
                study,
                "      - id: {sid}\n        # When the first epoch began: taken from the captures and the log; check it.\n        start: {}\n        eyes: [{}]\n        # The recorded gas switch times, e.g. `low: 2026-03-02T08:40:12+00:00`;\n        # without them the protocol's durations from `start` are used.\n        # switches:\n        captures: {sdir_rel}/{list_name}",
                start.to_rfc3339(),
                eye_list.join(", ")
            )?;
            if let Some((f, tc, sc)) = &s.log {
                writeln!(
                    study,
                    "        reference: {{file: {sdir_rel}/{f}, columns: {{time: {tc}, spo2: {sc}}}}}"
                )?;
            } else {
                writeln!(
                    study,
                    "        # reference: {{file: SUBJECT/spo2.csv, columns: {{time: time, spo2: spo2}}}}"
                )?;
            }
            let segs: Vec<String> = eyes
                .iter()
                .map(|e| {
                    format!(
                        "{}: {sdir_rel}/segments-{sid}-{}.yaml",
                        e.as_str(),
                        e.as_str()
                    )
                })
                .collect();
            writeln!(study, "        segments: {{{}}}", segs.join(", "))?;
            summary.push(format!("{} {sid}: {} captures", s.id, sess.len()));
        }
    }
    // Methods: the multiband joint fit needs no calibration; the two-band
    // method needs its two bands and a calibration.
    let (sens, iso) = bands
        .as_ref()
        .map(|bands| {
            let near = |nm: f64| {
                bands
                    .iter()
                    .min_by(|a, b| (a.1 - nm).abs().total_cmp(&(b.1 - nm).abs()))
                    .map(|b| b.0.clone())
                    .unwrap_or_default()
            };
            (near(600.0), near(570.0))
        })
        .unwrap_or_else(|| ("SENSITIVE".into(), "ISOSBESTIC".into()));
    writeln!(
        study,
        "# The oximetry methods. `multiband` fits every band with the vessel model\n\
         # along each segment, `multiband-pointwise` at each profile position;\n\
         # `two-band` is the classical ODR method, which needs an oxygen-sensitive\n\
         # and an isosbestic band and a calibration (here: arterioles in the\n\
         # baseline epoch at the reference SpO2, venules at 60 %).\n\
         methods:\n  - method: multiband\n    loss: huber\n  - method: multiband-pointwise\n    loss: huber\n\
         {}  - method: two-band\n{}    sensitive: {sens}\n{}    isosbestic: {iso}\n{}    calibration: {{mode: two-point, epoch: {baseline}, venule_so2: 60}}\n\
         output: results",
        if bands.is_some() { "" } else { "# " },
        if bands.is_some() { "" } else { "# " },
        if bands.is_some() { "" } else { "# " },
        if bands.is_some() { "" } else { "# " },
    )?;
    std::fs::create_dir_all(dir).with_context(|| format!("cannot create `{}`", dir.display()))?;
    for (p, text) in &lists {
        write_bytes_atomic(p, text.as_bytes())?;
    }
    write_bytes_atomic(&dir.join("protocol.yaml"), protocol_text.as_bytes())?;
    write_bytes_atomic(&study_file, study.as_bytes())?;
    printer.info(format!(
        "wrote `{}` with {} subjects ({}), `protocol.yaml` ({}) and {} capture lists",
        study_file.display(),
        subjects.len(),
        summary.join("; "),
        args.protocol.as_deref().unwrap_or("a template to edit"),
        lists.len()
    ));
    if placeholder {
        printer.warn("the instrument is not complete: fill in every `~` of its pixel size and bands in the study file (or give `--instrument FILE`)");
    }
    for s in subjects.iter().filter(|s| s.log.is_none()) {
        printer.warn(format!(
            "subject `{}` has no SpO2 log (a CSV with a time and an SpO2 column in its folder): its captures will have no reference",
            s.id
        ));
    }
    printer.info(format!(
        "next: `satstep segments propose {}`, review the proposals, then `satstep check {}`",
        dir.display(),
        dir.display()
    ));
    Ok(Exit::Ok)
}

fn collect_tiffs(dir: &Path, out: &mut Vec<PathBuf>) {
    let Ok(rd) = std::fs::read_dir(dir) else {
        return;
    };
    for e in rd.flatten() {
        let p = e.path();
        if p.is_dir() {
            collect_tiffs(&p, out);
        } else if p
            .extension()
            .map(|x| {
                let x = x.to_string_lossy().to_ascii_lowercase();
                x == "tif" || x == "tiff"
            })
            .unwrap_or(false)
        {
            out.push(p);
        }
    }
}

/// What a capture's TIFF tags say about the camera.
#[derive(Debug, Default, PartialEq)]
struct CameraTags {
    pages: usize,
    /// Per page: `PageName` (285), and the centre and FWHM read from
    /// `ImageDescription` (270) ([`wavelengths`]).
    bands: Vec<(Option<String>, Option<f64>, Option<f64>)>,
    /// From `XResolution` (282) when `ResolutionUnit` (296) is centimetres
    /// (3): cameras that write inches mostly write a nominal 72 or 300 dpi
    /// of the sensor, not the scale on the retina.
    pixel_um: Option<f64>,
}

fn camera_tags(p: &Path) -> Option<CameraTags> {
    use tiff::decoder::ifd::Value;
    use tiff::tags::Tag;
    let f = std::fs::File::open(p).ok()?;
    let mut d = tiff::decoder::Decoder::new(std::io::BufReader::new(f)).ok()?;
    let mut tags = CameraTags::default();
    loop {
        let text = |d: &mut tiff::decoder::Decoder<_>, t: Tag| {
            d.get_tag_ascii_string(t)
                .ok()
                .map(|s| s.trim_end_matches('\0').trim().to_string())
                .filter(|s| !s.is_empty())
        };
        let name = text(&mut d, Tag::Unknown(crate::simulate::render::PAGE_NAME_TAG));
        let (centre, fwhm) = text(&mut d, Tag::ImageDescription)
            .map(|t| wavelengths(&t))
            .unwrap_or_default();
        tags.bands.push((name, centre, fwhm));
        if tags.pages == 0 {
            let unit = d
                .find_tag_unsigned::<u16>(Tag::ResolutionUnit)
                .ok()
                .flatten();
            if let (Some(3), Ok(Some(Value::Rational(n, den)))) =
                (unit, d.find_tag(Tag::XResolution))
            {
                let per_cm = n as f64 / den as f64;
                tags.pixel_um = (per_cm > 0.0).then(|| 1e4 / per_cm);
            }
        }
        tags.pages += 1;
        if !d.more_images() {
            break;
        }
        d.next_image().ok()?;
    }
    Some(tags)
}

/// A band's centre and FWHM in a free-text description: the numbers given
/// in nanometres (`548 nm`, `548nm`), the one beside the word `FWHM` the
/// width and the first other one the centre.
fn wavelengths(text: &str) -> (Option<f64>, Option<f64>) {
    let words: Vec<&str> = text
        .split(|c: char| c.is_whitespace() || ",;:=()".contains(c))
        .filter(|w| !w.is_empty())
        .collect();
    let mut nm: Vec<(usize, f64)> = Vec::new();
    for (i, w) in words.iter().enumerate() {
        let v = match w.strip_suffix("nm") {
            Some("") => i.checked_sub(1).and_then(|j| words[j].parse().ok()),
            Some(n) => n.parse().ok(),
            None => None,
        };
        if let Some(v) = v.filter(|v: &f64| v.is_finite() && *v > 0.0) {
            nm.push((i, v));
        }
    }
    let fwhm_at = words.iter().position(|w| w.eq_ignore_ascii_case("fwhm"));
    let fwhm = fwhm_at.and_then(|f| nm.iter().min_by_key(|(i, _)| i.abs_diff(f)).copied());
    let centre = nm.iter().find(|x| Some(**x) != fwhm).map(|x| x.1);
    (centre, fwhm.map(|x| x.1))
}

/// The capture's time: its TIFF `DateTime` tag or its name, in the camera
/// clock's offset.
fn capture_time(
    p: &Path,
    source: &TimeSource,
    offset: FixedOffset,
) -> Result<DateTime<FixedOffset>, String> {
    let naive = match source {
        TimeSource::Metadata => {
            let f = std::fs::File::open(p).map_err(|e| e.to_string())?;
            let mut d = tiff::decoder::Decoder::new(std::io::BufReader::new(f))
                .map_err(|e| format!("not a readable TIFF: {e}"))?;
            let text = d
                .get_tag_ascii_string(tiff::tags::Tag::DateTime)
                .map_err(|_| "the file has no DateTime tag".to_string())?;
            NaiveDateTime::parse_from_str(text.trim_end_matches('\0').trim(), "%Y:%m:%d %H:%M:%S")
                .map_err(|e| format!("its DateTime tag `{text}` is not `YYYY:MM:DD HH:MM:SS`: {e}"))?
        }
        TimeSource::Name(pattern) => {
            let stem = p
                .file_stem()
                .map(|s| s.to_string_lossy().to_string())
                .unwrap_or_default();
            NaiveDateTime::parse_from_str(&stem, pattern)
                .map_err(|e| format!("the name `{stem}` does not match `{pattern}`: {e}"))?
        }
    };
    offset
        .from_local_datetime(&naive)
        .single()
        .ok_or_else(|| format!("{naive} does not exist at offset {offset}"))
}

/// `OD` or `OS` as a part of the path (a folder, or a word of the name).
fn eye_of(rel: &Path) -> Option<Eye> {
    let text = rel
        .with_extension("")
        .to_string_lossy()
        .to_ascii_uppercase();
    text.split(|c: char| !c.is_ascii_alphanumeric())
        .find_map(|w| match w {
            "OD" => Some(Eye::OD),
            "OS" => Some(Eye::OS),
            _ => None,
        })
}

/// A CSV in the subject's folder with a time column and an SpO2 column:
/// (file, time column, SpO2 column).
fn find_log(sdir: &Path) -> Option<(String, String, String)> {
    let mut csvs: Vec<PathBuf> = std::fs::read_dir(sdir)
        .ok()?
        .flatten()
        .map(|e| e.path())
        .filter(|p| p.extension().is_some_and(|x| x.eq_ignore_ascii_case("csv")))
        .collect();
    csvs.sort();
    csvs.into_iter().find_map(|p| {
        let lines = first_lines(&p, 1);
        let header: Vec<&str> = lines.first()?.split(',').map(str::trim).collect();
        let tc = header
            .iter()
            .find(|h| h.to_ascii_lowercase().contains("time"))?;
        let sc = header.iter().find(|h| {
            let l = h.to_ascii_lowercase().replace(['_', '-'], "");
            l.contains("spo2")
        })?;
        Some((
            p.file_name()?.to_string_lossy().to_string(),
            tc.to_string(),
            sc.to_string(),
        ))
    })
}

/// The first `n` lines of a text file; a log's header and first sample
/// are all `init` needs, however long the log.
fn first_lines(p: &Path, n: usize) -> Vec<String> {
    use std::io::BufRead;
    std::fs::File::open(p)
        .map(|f| {
            std::io::BufReader::new(f)
                .lines()
                .take(n)
                .map_while(Result::ok)
                .collect()
        })
        .unwrap_or_default()
}

fn log_start(p: &Path, time_col: &str) -> Option<DateTime<FixedOffset>> {
    let lines = first_lines(p, 2);
    let header: Vec<&str> = lines.first()?.split(',').map(str::trim).collect();
    let i = header.iter().position(|h| *h == time_col)?;
    let first = lines.get(1)?.split(',').nth(i)?.trim().to_string();
    crate::config::time::parse_time(&first).ok()
}

fn floor_minute(t: DateTime<FixedOffset>) -> DateTime<FixedOffset> {
    use chrono::Timelike;
    t.with_second(0)
        .and_then(|t| t.with_nanosecond(0))
        .unwrap_or(t)
}

/// The protocol's first epoch: its name and settle time, s.
fn first_epoch(protocol: &str) -> Option<(String, f64)> {
    let mut findings = crate::config::diag::Findings::new();
    crate::config::protocol::parse_protocol_text(
        protocol,
        Path::new("protocol.yaml"),
        &mut findings,
    )
    .and_then(|p| p.epochs.first().map(|e| (e.name.clone(), e.settle_s)))
}

fn csv_cell(s: &str) -> String {
    if s.contains([',', '"', '\n']) {
        format!("\"{}\"", s.replace('"', "\"\""))
    } else {
        s.to_string()
    }
}

/// Parses `+01:00`, `-05:30` or `Z`.
pub fn parse_offset(s: &str) -> Result<FixedOffset, String> {
    if s == "Z" || s == "z" {
        return Ok(FixedOffset::east_opt(0).expect("zero offset"));
    }
    let (sign, rest) = match s.chars().next() {
        Some('+') => (1, &s[1..]),
        Some('-') => (-1, &s[1..]),
        _ => return Err(format!("`{s}` is not an offset like `+01:00` or `Z`")),
    };
    let (h, m) = rest
        .split_once(':')
        .ok_or_else(|| format!("`{s}` is not an offset like `+01:00`"))?;
    let (h, m): (i32, i32) = (
        h.parse().map_err(|_| format!("`{s}`: hours"))?,
        m.parse().map_err(|_| format!("`{s}`: minutes"))?,
    );
    FixedOffset::east_opt(sign * (h * 3600 + m * 60))
        .ok_or_else(|| format!("`{s}` is out of range"))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn eyes_are_read_from_folders_and_name_words() {
        assert_eq!(eye_of(Path::new("OS/c001.tif")), Some(Eye::OS));
        assert_eq!(eye_of(Path::new("day1/c001_od.tif")), Some(Eye::OD));
        assert_eq!(eye_of(Path::new("captures/c001.tif")), None);
        // A word containing the letters is not an eye.
        assert_eq!(eye_of(Path::new("goods/c001.tif")), None);
    }

    #[test]
    fn offsets_parse() {
        assert_eq!(parse_offset("+01:00").unwrap().local_minus_utc(), 3600);
        assert_eq!(parse_offset("-05:30").unwrap().local_minus_utc(), -19800);
        assert_eq!(parse_offset("Z").unwrap().local_minus_utc(), 0);
        assert!(parse_offset("1h").is_err());
    }

    #[test]
    fn every_ready_protocol_parses() {
        for (name, text) in READY_PROTOCOLS {
            assert!(first_epoch(text).is_some(), "{name}");
        }
        let (name, settle) = first_epoch(PROTOCOL_TEMPLATE).unwrap();
        assert_eq!(name, "air");
        assert!((settle - 180.0).abs() < 1e-9);
    }

    #[test]
    fn band_wavelengths_are_read_from_descriptions() {
        assert_eq!(
            wavelengths("548 nm centre, 8 nm FWHM"),
            (Some(548.0), Some(8.0))
        );
        assert_eq!(
            wavelengths("FWHM=10nm; centre=600.5nm"),
            (Some(600.5), Some(10.0))
        );
        assert_eq!(wavelengths("green 570nm"), (Some(570.0), None));
        assert_eq!(wavelengths("exposure 12 ms"), (None, None));
    }

    #[test]
    fn camera_tags_written_by_the_simulator_are_read_back() {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("c.tif");
        let tags = crate::simulate::render::CaptureTags {
            taken: None,
            pixel_um: Some(12.0),
            bands: vec![("b548".into(), 548.0, 8.0), ("b600".into(), 600.0, 10.0)],
        };
        let page = vec![1000u16; 16];
        crate::simulate::render::write_tiff_at(&p, 4, 4, &[page.clone(), page.clone()], &tags)
            .unwrap();
        let read = camera_tags(&p).unwrap();
        assert_eq!(read.pages, 2);
        assert!((read.pixel_um.unwrap() - 12.0).abs() < 1e-3);
        assert_eq!(
            read.bands,
            vec![
                (Some("b548".into()), Some(548.0), Some(8.0)),
                (Some("b600".into()), Some(600.0), Some(10.0))
            ]
        );
        // Without tags: pages counted, nothing else.
        crate::simulate::render::write_tiff(&p, 4, 4, &[page]).unwrap();
        assert_eq!(
            camera_tags(&p).unwrap(),
            CameraTags {
                pages: 1,
                bands: vec![(None, None, None)],
                pixel_um: None
            }
        );
    }
}
