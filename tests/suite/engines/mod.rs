//! The engines, checked against published values and richer physics.

mod extensions;
mod images;
mod nist;
mod oximetry;
mod stats;
