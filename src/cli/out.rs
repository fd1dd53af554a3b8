//! Standard output that never panics: `say!` and `say_raw!` in place of `println!` and
//! `print!`.
//!
//! `println!` panics when stdout is a closed pipe (`railsong parts | head -c1`). Here a
//! closed pipe ends printing quietly: later text is dropped, the command still writes all its
//! files, and the exit code is 0 (the reader chose to stop reading). Any other write error
//! (a full disk behind a redirection) also stops printing, and is reported once the command
//! has finished (exit 1).

use std::io::Write;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Mutex;

static CLOSED: AtomicBool = AtomicBool::new(false);
static FAILED: Mutex<Option<String>> = Mutex::new(None);

/// Write `args` (and a newline when `newline`) to stdout, unless it has failed before.
pub(crate) fn write(args: std::fmt::Arguments, newline: bool) {
    if CLOSED.load(Ordering::Relaxed) {
        return;
    }
    let mut o = std::io::stdout().lock();
    let r = o
        .write_fmt(args)
        .and_then(|()| if newline { o.write_all(b"\n") } else { Ok(()) });
    if let Err(e) = r {
        CLOSED.store(true, Ordering::Relaxed);
        if e.kind() != std::io::ErrorKind::BrokenPipe {
            let mut f = FAILED.lock().unwrap_or_else(|p| p.into_inner());
            f.get_or_insert_with(|| format!("writing to standard output failed: {e}"));
        }
    }
}

/// Flush stdout at the end; the error of a failed write other than a closed pipe, if any.
pub(crate) fn finish() -> Option<String> {
    if !CLOSED.load(Ordering::Relaxed) {
        if let Err(e) = std::io::stdout().lock().flush() {
            if e.kind() != std::io::ErrorKind::BrokenPipe {
                return Some(format!("writing to standard output failed: {e}"));
            }
        }
    }
    FAILED.lock().unwrap_or_else(|p| p.into_inner()).take()
}

/// `println!` that never panics (see the module).
macro_rules! say {
    () => {
        crate::cli::out::write(format_args!(""), true)
    };
    ($($arg:tt)*) => {
        crate::cli::out::write(format_args!($($arg)*), true)
    };
}

/// `print!` that never panics (see the module).
macro_rules! say_raw {
    ($($arg:tt)*) => {
        crate::cli::out::write(format_args!($($arg)*), false)
    };
}
