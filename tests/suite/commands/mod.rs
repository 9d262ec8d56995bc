//! The program as a user runs it.

mod cli;
mod hostile;
mod power;
mod scaffold;
mod scale;
