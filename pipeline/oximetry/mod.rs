//! The oximetry engine: hemoglobin spectra, band responses, the vessel
//! transmission model family and the methods that turn band transmissions
//! into SO2, one file per method:
//!
//! - [`odr`]: `two-band`, optical density ratio with calibration;
//! - [`segment`]: `multiband`, the joint fit along a segment (Schur complement);
//! - [`pointwise`]: `multiband-pointwise`, the same model at each position;
//! - [`sensitivity`]: error propagation from band transmissions to SO2.

pub mod bands;
pub mod fundus;
pub mod hemoglobin;
pub mod model;
pub mod odr;
pub mod pointwise;
pub mod segment;
pub mod sensitivity;
