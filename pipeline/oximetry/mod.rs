//! Optics of blood in retinal vessels: hemoglobin absorption spectra and the
//! spectral bands of an instrument. The fits built on these follow in this
//! folder, one file per method.

pub mod bands;
pub mod hemoglobin;
