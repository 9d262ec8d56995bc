//! Declarative inputs: protocol and study files, and the small CSV files
//! they name. Everything is validated into domain types with all findings
//! collected and positioned (`file:line:column`).

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
pub mod yaml;
