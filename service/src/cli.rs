//! The command line: `henrybook fit`, `henrybook impedance`.

use std::process::ExitCode;

pub fn main(args: Vec<String>) -> ExitCode {
    eprintln!("henrybook: commands not built yet ({args:?})");
    ExitCode::FAILURE
}
