//! Temporary files removed when the process is stopped by SIGINT, SIGTERM or SIGHUP.
//!
//! Every temporary file an [`super::OutputDir`] writes is registered here while it exists.
//! The first registration installs handlers for the three signals. A handler does only what
//! is safe inside a signal handler: it writes the signal number to a pipe. A watcher thread
//! reads the pipe, removes every registered temporary, restores the default action and raises
//! the signal again, so the process ends as it would have without the handler (a shell still
//! sees "killed by SIGINT"). SIGKILL cannot be caught: the temporaries of a killed run are
//! removed by the next run that locks the folder (see [`super::OutputDir::open`]).

use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicI32, Ordering};
use std::sync::{Mutex, Once};

static LIVE: Mutex<Vec<PathBuf>> = Mutex::new(Vec::new());
static INSTALL: Once = Once::new();
static PIPE_WRITE: AtomicI32 = AtomicI32::new(-1);

/// Signals that remove the temporaries before the process ends.
const SIGNALS: [libc::c_int; 3] = [libc::SIGINT, libc::SIGTERM, libc::SIGHUP];

fn live() -> std::sync::MutexGuard<'static, Vec<PathBuf>> {
    LIVE.lock().unwrap_or_else(|p| p.into_inner())
}

/// Create the temporary `path` with `create` and remember it, both under the registry's
/// lock: the watcher (which holds that lock from the moment it starts removing until the
/// process ends) never misses a file created while it works.
pub(crate) fn create(
    path: &Path,
    create: impl FnOnce() -> std::io::Result<std::fs::File>,
) -> std::io::Result<std::fs::File> {
    INSTALL.call_once(install);
    let mut l = live();
    let f = create()?;
    l.push(path.to_path_buf());
    Ok(f)
}

/// Forget `path` (renamed into place or already removed).
pub(crate) fn unregister(path: &Path) {
    let mut l = live();
    if let Some(i) = l.iter().rposition(|p| p == path) {
        l.swap_remove(i);
    }
}

extern "C" fn on_signal(sig: libc::c_int) {
    let fd = PIPE_WRITE.load(Ordering::Relaxed);
    if fd >= 0 {
        let b = sig as u8;
        // SAFETY: write(2) is async-signal-safe; the buffer is one valid byte on the stack.
        unsafe {
            libc::write(fd, (&b as *const u8).cast(), 1);
        }
    }
}

fn install() {
    let mut fds = [0 as libc::c_int; 2];
    // SAFETY: pipe(2) fills the two-element array it is given.
    if unsafe { libc::pipe(fds.as_mut_ptr()) } != 0 {
        return;
    }
    let (read_fd, write_fd) = (fds[0], fds[1]);
    PIPE_WRITE.store(write_fd, Ordering::Relaxed);
    let spawned = std::thread::Builder::new()
        .name("railsong-cleanup".into())
        .spawn(move || watch(read_fd));
    if spawned.is_err() {
        return;
    }
    for sig in SIGNALS {
        // SAFETY: a zeroed sigaction with a plain handler, an empty mask and no flags but
        // SA_RESTART is a valid argument to sigaction(2).
        unsafe {
            let mut act: libc::sigaction = std::mem::zeroed();
            act.sa_sigaction = on_signal as *const () as libc::sighandler_t;
            libc::sigemptyset(&mut act.sa_mask);
            act.sa_flags = libc::SA_RESTART;
            libc::sigaction(sig, &act, std::ptr::null_mut());
        }
    }
}

fn watch(read_fd: libc::c_int) {
    let mut b = 0u8;
    loop {
        // SAFETY: reads one byte into a valid one-byte buffer.
        let n = unsafe { libc::read(read_fd, (&mut b as *mut u8).cast(), 1) };
        if n == 1 {
            break;
        }
        if n == 0 {
            return;
        }
    }
    // The lock is held until the process ends: no temporary is created after this point.
    let mut l = live();
    for p in l.drain(..) {
        let _ = std::fs::remove_file(p);
    }
    let sig = libc::c_int::from(b);
    // SAFETY: restoring the default action and raising the signal again ends the process
    // the way the signal would have.
    unsafe {
        libc::signal(sig, libc::SIG_DFL);
        libc::raise(sig);
    }
    // A signal whose default action does not end the process (none of the three): leave.
    drop(l);
    std::process::exit(128 + sig);
}
