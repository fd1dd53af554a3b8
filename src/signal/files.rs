//! Output folder: strict file names, an overwrite guard with a manifest, a folder lock and
//! atomic writes.
//!
//! Every file is written under a unique temporary name in the same folder
//! (`.NAME.tmp-<pid>-<time>-<counter>`, created exclusively, another name tried if one
//! exists), flushed and `fsync`ed, then renamed over the final name, and the folder is
//! `fsync`ed (best effort). If anything fails, or a [`WavFile`] is dropped without
//! [`WavFile::finish`], the temporary file is removed and the final name is left as it was
//! (absent, or the previous file intact). SIGINT, SIGTERM and SIGHUP remove the temporaries
//! before the process ends (see `cleanup`).
//!
//! **Lock.** [`OutputDir::open`] takes an exclusive advisory lock (`flock`) on the folder
//! itself for as long as the `OutputDir` lives (no lock file is left behind): a second
//! railsong process writing into the same folder waits for the first to finish, so the files
//! of two runs never mix. Folders opened more than once in one process share the lock. Only
//! a lock holder writes temporaries, so the temporaries found when the lock is first taken
//! are left by a run that was killed (SIGKILL, power loss): they are removed then.
//!
//! **Manifest.** [`MANIFEST_NAME`] records what railsong wrote, one line per file:
//! `NAME SIZE INODE MTIME_NS` (`#` starts a comment). A file under a requested name is
//! railsong's only if its size, inode and modification time match a line for that name;
//! anything else (a file railsong never wrote, or one replaced or edited since) is refused
//! unless `force`. The entry is recorded *before* the rename that puts a file in place
//! (the temporary already has the size, inode and time the final file will have), next to
//! the entry of the file it replaces, and the old entry is dropped after the rename: a crash
//! or full disk at any point leaves every file railsong wrote recognised. The manifest is
//! itself replaced atomically (temporary and rename), never appended to in place. A manifest
//! that is a link (symbolic, or a hard link: more than one name for the file) or not a
//! regular file is refused. Lines of earlier versions (a name alone) are not trusted.

use std::collections::BTreeMap;
use std::fs::{self, File, OpenOptions};
use std::io::{BufWriter, Write};
use std::os::unix::fs::MetadataExt;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, Mutex, Weak};

use super::cleanup;
use super::wav_out::{WavSpec, WavWriter, WriteStats};
use super::SignalError;

/// Name of the manifest file in an output folder.
pub const MANIFEST_NAME: &str = ".railsong-written";

/// Longest accepted stem, characters.
const MAX_STEM: usize = 100;

static COUNTER: AtomicU64 = AtomicU64::new(0);

/// Extensions railsong writes into an output folder.
pub const EXTENSIONS: [&str; 5] = ["wav", "json", "csv", "svg", "html"];

/// Accept only `STEM.EXT` with a stem of 1 to 100 characters from `[A-Za-z0-9_-]` and an
/// extension from [`EXTENSIONS`]: no folders, no dots, no absolute paths, nothing hidden.
pub fn check_file_name(name: &str) -> Result<(), SignalError> {
    let ok = name.rsplit_once('.').is_some_and(|(stem, ext)| {
        EXTENSIONS.contains(&ext)
            && !stem.is_empty()
            && stem.len() <= MAX_STEM
            && stem
                .bytes()
                .all(|b| b.is_ascii_alphanumeric() || b == b'_' || b == b'-')
    });
    if ok {
        Ok(())
    } else {
        Err(SignalError::BadName {
            name: name.to_string(),
        })
    }
}

/// What identifies a file railsong wrote: its size, inode and modification time (ns).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
struct Stamp {
    size: u64,
    ino: u64,
    mtime_ns: i128,
}

impl Stamp {
    fn of(meta: &fs::Metadata) -> Stamp {
        Stamp {
            size: meta.len(),
            ino: meta.ino(),
            mtime_ns: i128::from(meta.mtime()) * 1_000_000_000 + i128::from(meta.mtime_nsec()),
        }
    }
}

/// The manifest's entries: every stamp recorded for each name.
type Entries = BTreeMap<String, Vec<Stamp>>;

fn parse_manifest(text: &str) -> Entries {
    let mut out = Entries::new();
    for line in text.lines() {
        let f: Vec<&str> = line.split_whitespace().collect();
        if f.len() != 4 || f[0].starts_with('#') || check_file_name(f[0]).is_err() {
            continue;
        }
        let (Ok(size), Ok(ino), Ok(mtime_ns)) = (f[1].parse(), f[2].parse(), f[3].parse()) else {
            continue;
        };
        out.entry(f[0].to_string()).or_default().push(Stamp {
            size,
            ino,
            mtime_ns,
        });
    }
    out
}

fn manifest_text(e: &Entries) -> String {
    let mut s = String::from("# files railsong wrote here: name size inode mtime_ns\n");
    for (name, stamps) in e {
        for st in stamps {
            s.push_str(&format!("{name} {} {} {}\n", st.size, st.ino, st.mtime_ns));
        }
    }
    s
}

fn io_at(path: &Path) -> impl FnOnce(std::io::Error) -> SignalError + '_ {
    move |source| SignalError::Io {
        path: path.to_path_buf(),
        source,
    }
}

/// Refuse a manifest that is not one plain file: a symbolic link, a folder, or a hard link
/// (a second name for a file that may live outside the folder).
fn check_manifest(manifest: &Path) -> Result<(), SignalError> {
    match fs::symlink_metadata(manifest) {
        Ok(meta) if !meta.file_type().is_file() => Err(io_at(manifest)(std::io::Error::other(
            "the manifest is not a regular file (a link or a folder?); remove it",
        ))),
        Ok(meta) if meta.nlink() > 1 => Err(io_at(manifest)(std::io::Error::other(
            "the manifest has more than one name (a hard link to a file elsewhere?); remove it",
        ))),
        _ => Ok(()),
    }
}

/// A folder lock held by this process: (device, inode) of the folder, and the lock.
type HeldLock = ((u64, u64), Weak<File>);

/// Folder locks held by this process.
static LOCKS: Mutex<Vec<HeldLock>> = Mutex::new(Vec::new());

/// Take (or share, within this process) the exclusive lock on `dir`. `on_busy` is called
/// once before waiting when another process holds it. Returns the lock and whether this
/// call took it (rather than sharing one this process already held).
///
/// While another process holds the folder this polls (every 50 ms) rather than blocking in
/// `flock`: a blocked call would hold the registry, and two threads of this process waiting
/// for one folder would then wait for each other (each `open` of the folder is a separate
/// lock to `flock`). Polling lets the second thread share what the first one took.
fn lock_folder(
    dir: &Path,
    on_busy: &mut dyn FnMut(&Path),
) -> Result<(Arc<File>, bool), SignalError> {
    let handle = File::open(dir).map_err(io_at(dir))?;
    let meta = handle.metadata().map_err(io_at(dir))?;
    let key = (meta.dev(), meta.ino());
    let mut announced = false;
    loop {
        {
            let mut locks = LOCKS.lock().unwrap_or_else(|p| p.into_inner());
            locks.retain(|(_, w)| w.strong_count() > 0);
            if let Some(held) = locks
                .iter()
                .find(|(k, _)| *k == key)
                .and_then(|(_, w)| w.upgrade())
            {
                return Ok((held, false));
            }
            match handle.try_lock() {
                Ok(()) => {
                    let lock = Arc::new(handle);
                    locks.push((key, Arc::downgrade(&lock)));
                    return Ok((lock, true));
                }
                Err(std::fs::TryLockError::WouldBlock) => {}
                // A file system without locks (some network mounts): write unlocked, as
                // before locks existed, and leave temporaries alone (they may be live).
                Err(std::fs::TryLockError::Error(e))
                    if e.kind() == std::io::ErrorKind::Unsupported
                        || e.raw_os_error() == Some(libc::ENOLCK) =>
                {
                    let lock = Arc::new(handle);
                    locks.push((key, Arc::downgrade(&lock)));
                    return Ok((lock, false));
                }
                Err(std::fs::TryLockError::Error(e)) => return Err(io_at(dir)(e)),
            }
        }
        if !announced {
            on_busy(dir);
            announced = true;
        }
        std::thread::sleep(std::time::Duration::from_millis(50));
    }
}

/// Whether `name` is a temporary of [`OutputDir`]: `.NAME.tmp-TAG` where `NAME` is a file
/// name railsong writes (or the manifest's) and `TAG` hex digits and dashes. Nothing else is
/// ever removed as stale.
fn is_temp_name(name: &str) -> bool {
    let Some((target, tag)) = name.strip_prefix('.').and_then(|n| n.rsplit_once(".tmp-")) else {
        return false;
    };
    !tag.is_empty()
        && tag.bytes().all(|b| b.is_ascii_hexdigit() || b == b'-')
        && (check_file_name(target).is_ok() || target == MANIFEST_NAME.trim_start_matches('.'))
}

/// A unique temporary path in `dir` for writing `name`, created exclusively: the process,
/// the time and a counter, and another name if that one exists (PIDs repeat in containers).
fn create_temp(dir: &Path, name: &str) -> Result<(PathBuf, File), SignalError> {
    let nanos = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map_or(0, |d| d.as_nanos() as u64);
    let mut last = None;
    for _ in 0..64 {
        let temp = dir.join(format!(
            ".{name}.tmp-{}-{nanos:x}-{}",
            std::process::id(),
            COUNTER.fetch_add(1, Ordering::Relaxed)
        ));
        match cleanup::create(&temp, || {
            OpenOptions::new().write(true).create_new(true).open(&temp)
        }) {
            Ok(f) => return Ok((temp, f)),
            Err(e) => {
                if e.kind() != std::io::ErrorKind::AlreadyExists {
                    return Err(io_at(&temp)(e));
                }
                last = Some((temp, e));
            }
        }
    }
    let (temp, e) = last.expect("the loop ran");
    Err(io_at(&temp)(e))
}

/// Remove a temporary and forget it.
fn remove_temp(temp: &Path) {
    let _ = fs::remove_file(temp);
    cleanup::unregister(temp);
}

/// An output folder with an overwrite guard, locked while this value lives.
#[derive(Debug)]
pub struct OutputDir {
    dir: PathBuf,
    force: bool,
    _lock: Arc<File>,
}

impl OutputDir {
    /// Open (creating it and its parents if needed) and lock the folder `dir`, waiting while
    /// another railsong process holds it. With `force`, files railsong did not write may be
    /// overwritten.
    pub fn open(dir: &Path, force: bool) -> Result<Self, SignalError> {
        Self::open_with(dir, force, &mut |_| {})
    }

    /// [`OutputDir::open`], calling `on_busy` with the folder before it waits for another
    /// process's lock (to say so on the terminal).
    pub fn open_with(
        dir: &Path,
        force: bool,
        on_busy: &mut dyn FnMut(&Path),
    ) -> Result<Self, SignalError> {
        fs::create_dir_all(dir).map_err(io_at(dir))?;
        let manifest = dir.join(MANIFEST_NAME);
        // Writing through a link (or into anything but a plain file) could write outside the
        // folder: refuse.
        check_manifest(&manifest)?;
        let (lock, fresh) = lock_folder(dir, on_busy)?;
        if fresh {
            // Under the lock no other run writes here: any temporary is a killed run's.
            if let Ok(rd) = fs::read_dir(dir) {
                for e in rd.flatten() {
                    let is_file = e.file_type().is_ok_and(|t| t.is_file());
                    if is_file && e.file_name().to_str().is_some_and(is_temp_name) {
                        let _ = fs::remove_file(e.path());
                    }
                }
            }
        }
        let out = OutputDir {
            dir: dir.to_path_buf(),
            force,
            _lock: lock,
        };
        out.entries()?;
        Ok(out)
    }

    /// The folder.
    pub fn path(&self) -> &Path {
        &self.dir
    }

    fn manifest(&self) -> PathBuf {
        self.dir.join(MANIFEST_NAME)
    }

    /// The manifest as it is on disk now.
    fn entries(&self) -> Result<Entries, SignalError> {
        let manifest = self.manifest();
        check_manifest(&manifest)?;
        match fs::read_to_string(&manifest) {
            Ok(text) => Ok(parse_manifest(&text)),
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => Ok(Entries::new()),
            Err(e) => Err(io_at(&manifest)(e)),
        }
    }

    /// Replace the manifest atomically with `e`.
    fn store(&self, e: &Entries) -> Result<(), SignalError> {
        let manifest = self.manifest();
        check_manifest(&manifest)?;
        let (temp, mut file) = create_temp(&self.dir, MANIFEST_NAME.trim_start_matches('.'))?;
        let r = (|| {
            file.write_all(manifest_text(e).as_bytes())
                .map_err(io_at(&temp))?;
            file.sync_all().map_err(io_at(&temp))?;
            fs::rename(&temp, &manifest).map_err(io_at(&manifest))
        })();
        remove_temp(&temp);
        r
    }

    /// Record `stamp` for `name` beside the entries it may replace (before the rename).
    fn record_pending(&self, name: &str, stamp: Stamp) -> Result<(), SignalError> {
        let mut e = self.entries()?;
        let v = e.entry(name.to_string()).or_default();
        // Keep only entries that still describe the file under the name (it stays in place
        // until the rename).
        let current = fs::symlink_metadata(self.dir.join(name))
            .ok()
            .map(|m| Stamp::of(&m));
        v.retain(|s| Some(*s) == current);
        v.push(stamp);
        self.store(&e)
    }

    /// After the rename: `stamp` is the only entry of `name`.
    fn record_done(&self, name: &str, stamp: Stamp) -> Result<(), SignalError> {
        let mut e = self.entries()?;
        e.insert(name.to_string(), vec![stamp]);
        self.store(&e)
    }

    /// Whether the file under `name` is one railsong wrote (and nobody changed since).
    pub fn wrote(&self, name: &str) -> bool {
        let Ok(meta) = fs::symlink_metadata(self.dir.join(name)) else {
            return false;
        };
        let st = Stamp::of(&meta);
        meta.file_type().is_file()
            && self
                .entries()
                .is_ok_and(|e| e.get(name).is_some_and(|v| v.contains(&st)))
    }

    /// Start writing `name` (see [`check_file_name`]) atomically. Refuses an existing file
    /// railsong did not write unless the folder was opened with `force`.
    pub fn create(&mut self, name: &str, spec: WavSpec) -> Result<WavFile, SignalError> {
        self.check_writable(name)?;
        let target = self.dir.join(name);
        let (temp, file) = create_temp(&self.dir, name)?;
        let mut out = WavFile {
            writer: None,
            temp,
            target,
            folder: OutputDir {
                dir: self.dir.clone(),
                force: self.force,
                _lock: Arc::clone(&self._lock),
            },
            name: name.to_string(),
        };
        let w = WavWriter::new(BufWriter::new(file), spec).map_err(|e| out.at(e))?;
        out.writer = Some(w);
        Ok(out)
    }

    /// Whether `name` may be written: a valid name, and not a file railsong did not write
    /// (unless the folder was opened with `force`). Lets a command refuse before it spends
    /// time rendering.
    pub fn check_writable(&self, name: &str) -> Result<(), SignalError> {
        check_file_name(name)?;
        let target = self.dir.join(name);
        if fs::symlink_metadata(&target).is_ok() && !self.force && !self.wrote(name) {
            return Err(SignalError::Foreign { path: target });
        }
        Ok(())
    }

    /// [`OutputDir::check_writable`] for every name, before any is written.
    pub fn check_all<S: AsRef<str>>(&self, names: &[S]) -> Result<(), SignalError> {
        names
            .iter()
            .try_for_each(|n| self.check_writable(n.as_ref()))
    }

    /// Write a text file (JSON, CSV, SVG, HTML) atomically, under the same guard as WAVs.
    pub fn write_text(&mut self, name: &str, text: &str) -> Result<(), SignalError> {
        self.check_writable(name)?;
        let target = self.dir.join(name);
        let (temp, mut file) = create_temp(&self.dir, name)?;
        let result = (|| -> Result<(), SignalError> {
            file.write_all(text.as_bytes()).map_err(io_at(&temp))?;
            file.sync_all().map_err(io_at(&temp))?;
            let stamp = Stamp::of(&file.metadata().map_err(io_at(&temp))?);
            drop(file);
            self.put_in_place(&temp, &target, name, stamp)
        })();
        remove_temp(&temp);
        result
    }

    /// Record, rename, settle the manifest.
    fn put_in_place(
        &self,
        temp: &Path,
        target: &Path,
        name: &str,
        stamp: Stamp,
    ) -> Result<(), SignalError> {
        self.record_pending(name, stamp)?;
        fs::rename(temp, target).map_err(io_at(target))?;
        cleanup::unregister(temp);
        if let Ok(d) = File::open(&self.dir) {
            let _ = d.sync_all();
        }
        self.record_done(name, stamp)
    }

    /// Write a whole buffer (interleaved volts) to `name` atomically.
    pub fn write(
        &mut self,
        name: &str,
        spec: WavSpec,
        samples: &[f64],
    ) -> Result<WriteStats, SignalError> {
        let mut f = self.create(name, spec)?;
        f.write(samples)?;
        f.finish()
    }
}

/// A WAV file being written atomically; see [`OutputDir::create`]. It holds the folder's
/// lock until it is finished or dropped.
pub struct WavFile {
    writer: Option<WavWriter<BufWriter<File>>>,
    temp: PathBuf,
    target: PathBuf,
    folder: OutputDir,
    name: String,
}

impl WavFile {
    /// The final path.
    pub fn path(&self) -> &Path {
        &self.target
    }

    fn at(&self, e: SignalError) -> SignalError {
        match e {
            SignalError::Stream(source) => SignalError::Io {
                path: self.target.clone(),
                source,
            },
            other => other,
        }
    }

    /// Append interleaved samples in volts. On error the file is abandoned (the temporary is
    /// removed when this value is dropped).
    pub fn write(&mut self, samples: &[f64]) -> Result<(), SignalError> {
        let r = match self.writer.as_mut() {
            Some(w) => w.write(samples),
            None => Ok(()),
        };
        r.map_err(|e| self.at(e))
    }

    /// Finish: patch the header, flush, fsync, record it in the manifest, rename over the
    /// final name.
    pub fn finish(mut self) -> Result<WriteStats, SignalError> {
        let Some(w) = self.writer.take() else {
            return Err(SignalError::BadSpec("file already finished".into()));
        };
        let (buf, stats) = w.finish().map_err(|e| self.at(e))?;
        let file = buf
            .into_inner()
            .map_err(|e| io_at(&self.temp)(e.into_error()))?;
        file.sync_all().map_err(io_at(&self.temp))?;
        let stamp = Stamp::of(&file.metadata().map_err(io_at(&self.temp))?);
        drop(file);
        self.folder
            .put_in_place(&self.temp, &self.target, &self.name, stamp)?;
        // The temporary name is gone now: nothing for Drop to remove.
        self.temp = PathBuf::new();
        Ok(stats)
    }
}

impl Drop for WavFile {
    fn drop(&mut self) {
        self.writer = None;
        if !self.temp.as_os_str().is_empty() {
            remove_temp(&self.temp);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The two states a crash or a full disk can leave around the rename that puts a file in
    /// place: the new entry recorded but the file not renamed yet, and the file renamed but
    /// its entry not settled yet. In both, every file in the folder is still railsong's.
    #[test]
    fn a_crash_around_the_rename_leaves_every_file_recognised() {
        let tmp = tempfile::tempdir().unwrap();
        let mut dir = OutputDir::open(tmp.path(), false).unwrap();
        dir.write_text("a.json", "1").unwrap();
        let (temp, mut f) = create_temp(tmp.path(), "a.json").unwrap();
        f.write_all(b"22").unwrap();
        f.sync_all().unwrap();
        let stamp = Stamp::of(&f.metadata().unwrap());
        drop(f);
        dir.record_pending("a.json", stamp).unwrap();
        // Stopped here: the old file is still recognised.
        let again = OutputDir::open(tmp.path(), false).unwrap();
        assert!(again.wrote("a.json"));
        again.check_writable("a.json").unwrap();
        // Renamed, stopped before the entry settled: the new file is recognised.
        fs::rename(&temp, tmp.path().join("a.json")).unwrap();
        remove_temp(&temp);
        assert!(again.wrote("a.json"));
        assert_eq!(fs::read_to_string(tmp.path().join("a.json")).unwrap(), "22");
        // A file changed behind railsong's back is not.
        fs::write(tmp.path().join("a.json"), "333").unwrap();
        assert!(!again.wrote("a.json"));
        assert!(again.check_writable("a.json").is_err());
    }

    #[test]
    fn only_railsong_temporaries_count_as_stale() {
        for t in [
            ".out.wav.tmp-12-0",
            ".figures.json.tmp-4d2-18c2a9f3e1b-7",
            ".railsong-written.tmp-1-2-3",
        ] {
            assert!(is_temp_name(t), "{t}");
        }
        for t in [
            "out.wav.tmp-12-0",
            ".notes.txt.tmp-1",
            ".out.wav.tmp-",
            ".out.wav.tmp-backup",
            ".my draft.wav.tmp-1",
            ".x.tmp",
        ] {
            assert!(!is_temp_name(t), "{t}");
        }
    }

    #[test]
    fn manifest_lines_round_trip_and_old_lines_are_not_trusted() {
        let mut e = Entries::new();
        e.insert(
            "x.wav".into(),
            vec![Stamp {
                size: 44,
                ino: 7,
                mtime_ns: 1_700_000_000_123_456_789,
            }],
        );
        assert_eq!(parse_manifest(&manifest_text(&e)), e);
        // A name alone (earlier versions) or a damaged line is ignored.
        assert!(parse_manifest("x.wav\nx.wav 1 2\n../y.wav 1 2 3\nz.wav a b c\n").is_empty());
    }
}
