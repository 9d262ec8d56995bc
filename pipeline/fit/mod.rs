//! Nonlinear least squares. One damped Gauss–Newton (Levenberg–Marquardt)
//! loop, [`lm::minimize`], serves every fit in the program; what differs
//! between problems is how the damped step is solved:
//!
//! - [`dense`]: small problems with a dense Jacobian, solved by QR of the
//!   augmented system (no squaring of the condition number), as the NIST
//!   StRD problems need;
//! - [`small`]: a few parameters over very many residuals (the
//!   registration's refinement over tens of thousands of pixels), solved
//!   through the N × N normal equations without storing the Jacobian;
//! - the vessel-segment fit (`oximetry::segment`) eliminates the
//!   per-position parameters through the Schur complement, so its cost
//!   grows linearly with the number of positions.
//!
//! argmin, the project's optimisation crate, has no bounded
//! Levenberg–Marquardt and no way to exploit block structure, hence this
//! small module. Every fit reports why it stopped.

pub mod dense;
pub mod lm;
pub mod small;

pub use lm::{FitReport, Linearization, Options, Problem, Termination, minimize};
