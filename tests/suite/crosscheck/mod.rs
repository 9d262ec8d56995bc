//! Agreement with reference software, and calibration on whole studies.

mod calibration;
mod lme4;
mod power;
