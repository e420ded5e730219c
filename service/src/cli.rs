//! The command line. `fit` and `impedance` run the numeric core on files; `serve`, `token` and `demo`
//! belong to the service (see [`crate::server_cli`]).

use std::process::ExitCode;

pub fn main(args: Vec<String>) -> ExitCode {
    match args.first().map(String::as_str) {
        Some("serve" | "token" | "demo") => crate::server_cli::main(args),
        _ => {
            // Transient: `fit` and `impedance` land with the fitting engine.
            eprintln!(
                "usage: henrybook fit FILE... | impedance FILE | serve | token create | demo"
            );
            ExitCode::from(2)
        }
    }
}
