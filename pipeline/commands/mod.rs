//! The verbs of the command line, one file each. A verb takes its parsed
//! arguments and a printer and returns an [`Exit`]; `main` only maps it to
//! the process status.

pub mod check;
pub mod cluster;
pub mod init;
pub mod manual;
pub mod mixed;
pub mod pool;
pub mod power;
pub mod protocol;
pub mod run;
pub mod schema;
pub mod segments;
pub mod sensitivity;
pub mod simulate;

/// Process exit status, documented in the README.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Exit {
    /// Everything worked.
    Ok = 0,
    /// A user or data problem: bad input, a failed check, or some items
    /// failed while the rest of the run finished and wrote its outputs.
    Problem = 1,
    /// A bug or an environment failure (disk full, permission denied).
    Internal = 2,
}
