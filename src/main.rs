//! The `railsong` command line: parse flags, load and validate the patch, run, print.
//! Everything of substance lives in the library; this file only wires it to the terminal.

mod cli;

use std::process::ExitCode;

fn main() -> ExitCode {
    let result = cli::run();
    let stdout_error = cli::out::finish();
    let failure = match (result, stdout_error) {
        (Err(e), _) => e,
        (Ok(()), Some(message)) => cli::Failure {
            code: cli::EXIT_FAILURE,
            message,
        },
        (Ok(()), None) => return ExitCode::SUCCESS,
    };
    // One line, whatever the input held: control characters (newlines, terminal escape
    // codes) from a patch or a file name are shown escaped. A closed stderr is ignored.
    let line: String = failure
        .message
        .chars()
        .flat_map(|c| {
            let esc: Vec<char> = if c.is_control() {
                c.escape_default().collect()
            } else {
                vec![c]
            };
            esc
        })
        .collect();
    use std::io::Write;
    let _ = writeln!(std::io::stderr(), "railsong: {line}");
    ExitCode::from(failure.code)
}
