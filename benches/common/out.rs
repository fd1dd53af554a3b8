//! What the bench programs share.

/// A line on standard output; a closed pipe (the output cut short by `head`) ends the bench
/// quietly instead of a panic.
macro_rules! out {
    ($($t:tt)*) => {{
        use std::io::Write as _;
        if writeln!(std::io::stdout(), $($t)*).is_err() {
            std::process::exit(0);
        }
    }};
}
