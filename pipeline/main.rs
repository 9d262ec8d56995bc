//! The `satstep` binary: parse, run, map the outcome to an exit status.

use std::process::ExitCode;

fn main() -> ExitCode {
    // A panic is a bug: report it as an internal error (status 2), not 101.
    let outcome = std::panic::catch_unwind(|| satstep::cli::main_with_args(std::env::args_os()));
    match outcome {
        Ok(exit) => ExitCode::from(exit as u8),
        Err(_) => {
            eprintln!(
                "error: internal error (a bug in satstep); please report it with the command you ran"
            );
            ExitCode::from(2)
        }
    }
}
