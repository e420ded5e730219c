//! `henrybook serve`, `henrybook token create`, `henrybook demo`.

use std::process::ExitCode;

// Transient: replaced by the service on the `service` branch.
pub fn main(args: Vec<String>) -> ExitCode {
    eprintln!("henrybook {}: the service is not built yet", args[0]);
    ExitCode::FAILURE
}
