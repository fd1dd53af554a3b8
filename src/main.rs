//! The `railsong` command line: parse flags, load and validate the patch, run, print.
//! Everything of substance lives in the library; this file only wires it to the terminal.

mod cli;

use std::process::ExitCode;

fn main() -> ExitCode {
    match cli::run() {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("railsong: {}", e.message);
            ExitCode::from(e.code)
        }
    }
}
