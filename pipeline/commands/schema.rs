//! `satstep schema FILE`: JSON Schemas of satstep's input files (study,
//! protocol, segment file), for editors that check YAML against a schema.
//! The schemas live in `schemas/`; a test in `config` holds their keys to
//! the readers' own key lists, so they cannot drift apart.

pub const STUDY: &str = include_str!("../../schemas/study.schema.json");
pub const PROTOCOL: &str = include_str!("../../schemas/protocol.schema.json");
pub const SEGMENTS: &str = include_str!("../../schemas/segments.schema.json");

/// The schema of `file` (`study`, `protocol` or `segments`).
pub fn schema(file: &str) -> &'static str {
    match file {
        "protocol" => PROTOCOL,
        "segments" => SEGMENTS,
        _ => STUDY,
    }
}
