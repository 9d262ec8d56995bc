//! From captures to images the analysis can trust: reading multiband TIFF
//! captures with checks against the instrument ([`ingest`]), and
//! registering a capture to its eye's reference capture ([`register`]).
//! Profile analysis along vessel segments follows in this folder.

pub mod correct;
pub mod ingest;
pub mod profile;
pub mod register;
pub mod shape;
pub mod vessels;
