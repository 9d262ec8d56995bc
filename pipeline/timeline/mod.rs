//! Time within a session: where each gas epoch actually began, which epoch
//! each capture falls into, and the reference SpO2 at each capture.

pub mod assign;
pub mod reference;

pub mod show;
