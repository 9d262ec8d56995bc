//! Declarative inputs: protocol and study files, and the small CSV files
//! they name. Everything is validated into domain types with all findings
//! collected and positioned (`file:line:column`).

pub mod contrast;
pub mod csvfile;
pub mod diag;
pub mod duration;
pub mod eye;
pub mod protocol;
pub mod read;
pub mod segments;
pub mod spectra;
pub mod spo2log;
pub mod study;
pub mod time;
pub mod vessel_model;
pub mod yaml;

/// Why one written value (a duration, a date-time) could not be read. The
/// reader places it in the file as a finding; the text says what is wrong
/// with the value as written.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("{0}")]
pub(crate) struct ValueError(pub String);
