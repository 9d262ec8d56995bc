//! The engines, checked against published values and richer physics.

mod images;
mod nist;
mod oximetry;
mod stats;
