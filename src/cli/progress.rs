//! Progress of long runs on stderr. On a terminal: a bar (indicatif). Otherwise (stderr piped
//! to a log): once a run has taken more than [`QUIET_FOR`], one line every [`EVERY`] with
//! done/total, elapsed time and the estimated time left. `--quiet` silences both.
//!
//! Workers only add to an atomic counter (no lock in their loop); a separate thread reads it
//! and draws the bar or prints the lines.

use std::io::{IsTerminal, Write};
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::Arc;
use std::thread::JoinHandle;
use std::time::{Duration, Instant};

/// No line before a run has lasted this long.
pub(crate) const QUIET_FOR: Duration = Duration::from_secs(2);
/// Time between two lines.
pub(crate) const EVERY: Duration = Duration::from_secs(3);

static QUIET: AtomicBool = AtomicBool::new(false);

/// Silence all progress output (`--quiet`).
pub(crate) fn set_quiet(q: bool) {
    QUIET.store(q, Ordering::Relaxed);
}

/// Whether `--quiet` was given.
pub(crate) fn quiet() -> bool {
    QUIET.load(Ordering::Relaxed)
}

/// A duration as people read it: `850 ms`, `12.3 s`, `4 min 05 s`, `1 h 02 min`.
pub(crate) fn human(d: Duration) -> String {
    let s = d.as_secs_f64();
    if s < 1.0 {
        format!("{:.0} ms", s * 1e3)
    } else if s < 60.0 {
        format!("{s:.1} s")
    } else if s < 3600.0 {
        let m = (s / 60.0).floor();
        format!("{m:.0} min {:02.0} s", (s - 60.0 * m).floor())
    } else {
        let h = (s / 3600.0).floor();
        format!("{h:.0} h {:02.0} min", ((s - 3600.0 * h) / 60.0).floor())
    }
}

/// The progress line: `railsong: WHAT DONE/TOTAL UNIT, ELAPSED elapsed, ETA LEFT`.
pub(crate) fn line(what: &str, unit: &str, done: u64, total: u64, elapsed: Duration) -> String {
    let eta = if done == 0 || done > total {
        "unknown".to_string()
    } else {
        let left = elapsed.as_secs_f64() * (total - done) as f64 / done as f64;
        human(Duration::from_secs_f64(left))
    };
    format!(
        "railsong: {what} {done}/{total} {unit}, {} elapsed, ETA {eta}",
        human(elapsed)
    )
}

enum Show {
    None,
    /// A bar, and the thread that copies the counter into it (workers never touch the bar).
    Bar(
        indicatif::ProgressBar,
        Arc<AtomicBool>,
        Option<JoinHandle<()>>,
    ),
    Lines {
        stop: Arc<AtomicBool>,
        thread: Option<JoinHandle<()>>,
    },
}

/// Progress of one run of `total` units.
pub(crate) struct Progress {
    done: Arc<AtomicU64>,
    total: u64,
    show: Show,
}

impl Progress {
    /// Progress of `total` units (`what`: "rendering", "sweep"; `unit`: "points", "s").
    /// `bar`: draw a bar when stderr is a terminal (lines are printed whenever it is not).
    pub(crate) fn new(total: u64, what: &str, unit: &str, bar: bool) -> Progress {
        let done = Arc::new(AtomicU64::new(0));
        let show = if quiet() {
            Show::None
        } else if std::io::stderr().is_terminal() {
            if bar {
                let b = indicatif::ProgressBar::new(total);
                b.set_style(
                    indicatif::ProgressStyle::with_template(&format!(
                        "{what} {{bar:40}} {{pos}}/{{len}} {unit} {{eta}}"
                    ))
                    .unwrap_or_else(|_| indicatif::ProgressStyle::default_bar()),
                );
                let stop = Arc::new(AtomicBool::new(false));
                let (d, st, bar) = (done.clone(), stop.clone(), b.clone());
                let thread = std::thread::Builder::new()
                    .name("progress".into())
                    .spawn(move || {
                        while !st.load(Ordering::Relaxed) {
                            bar.set_position(d.load(Ordering::Relaxed));
                            std::thread::sleep(Duration::from_millis(100));
                        }
                    })
                    .ok();
                Show::Bar(b, stop, thread)
            } else {
                Show::None
            }
        } else {
            let stop = Arc::new(AtomicBool::new(false));
            let (d, s) = (done.clone(), stop.clone());
            let (what, unit) = (what.to_string(), unit.to_string());
            let thread = std::thread::Builder::new()
                .name("progress".into())
                .spawn(move || {
                    let start = Instant::now();
                    let mut last: Option<Instant> = None;
                    while !s.load(Ordering::Relaxed) {
                        std::thread::sleep(Duration::from_millis(100));
                        let now = Instant::now();
                        if now - start < QUIET_FOR || last.is_some_and(|l| now - l < EVERY) {
                            continue;
                        }
                        if s.load(Ordering::Relaxed) {
                            break;
                        }
                        let l = line(&what, &unit, d.load(Ordering::Relaxed), total, now - start);
                        // A closed stderr must not stop the run.
                        let _ = writeln!(std::io::stderr(), "{l}");
                        last = Some(now);
                    }
                })
                .ok();
            Show::Lines { stop, thread }
        };
        Progress { done, total, show }
    }

    /// Add `n` units done (lock-free).
    pub(crate) fn inc(&self, n: u64) {
        self.done.fetch_add(n, Ordering::Relaxed);
    }

    /// Set the fraction done (0..=1).
    pub(crate) fn set_fraction(&self, x: f64) {
        let d = (x.clamp(0.0, 1.0) * self.total as f64) as u64;
        self.done.store(d, Ordering::Relaxed);
    }

    /// End: clear the bar, stop the printer.
    pub(crate) fn finish(mut self) {
        self.stop();
    }

    fn stop(&mut self) {
        match &mut self.show {
            Show::Bar(b, stop, thread) => {
                stop.store(true, Ordering::Relaxed);
                if let Some(t) = thread.take() {
                    let _ = t.join();
                }
                b.finish_and_clear();
            }
            Show::Lines { stop, thread } => {
                stop.store(true, Ordering::Relaxed);
                if let Some(t) = thread.take() {
                    let _ = t.join();
                }
            }
            Show::None => {}
        }
    }
}

impl Drop for Progress {
    fn drop(&mut self) {
        self.stop();
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_line_says_done_total_elapsed_and_eta() {
        // 5 of 20 in 10 s: 15 left at 2 s each, 30 s (a proportional estimate).
        let l = line("sweep", "points", 5, 20, Duration::from_secs(10));
        assert_eq!(l, "railsong: sweep 5/20 points, 10.0 s elapsed, ETA 30.0 s");
        let l = line("rendering", "s", 0, 120, Duration::from_millis(2500));
        assert!(l.ends_with("2.5 s elapsed, ETA unknown"), "{l}");
        assert_eq!(human(Duration::from_secs(245)), "4 min 05 s");
        assert_eq!(human(Duration::from_secs(3720)), "1 h 02 min");
    }
}
