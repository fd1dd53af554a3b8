//! Output folder: strict file names, an overwrite guard with a manifest, and atomic writes.
//!
//! Every file is written under a unique temporary name in the same folder
//! (`.NAME.tmp-<pid>-<counter>`, created exclusively), flushed and `fsync`ed, then renamed
//! over the final name, and the folder is `fsync`ed (best effort). If anything fails, or a
//! [`WavFile`] is dropped without [`WavFile::finish`], the temporary file is removed and the
//! final name is left as it was (absent, or the previous file intact).
//!
//! The manifest [`MANIFEST_NAME`] lists, one per line, the files railsong wrote in the folder.
//! A file that exists under a requested name but is not listed is refused unless `force`.

use std::collections::BTreeSet;
use std::fs::{self, File, OpenOptions};
use std::io::{BufWriter, Write};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};

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

/// Record `name` in the folder's manifest.
fn append_manifest(manifest: &Path, name: &str) -> Result<(), SignalError> {
    let mut m = OpenOptions::new()
        .create(true)
        .append(true)
        .open(manifest)
        .map_err(io_at(manifest))?;
    m.write_all(format!("{name}\n").as_bytes())
        .map_err(io_at(manifest))
}

/// An output folder with an overwrite guard.
#[derive(Debug)]
pub struct OutputDir {
    dir: PathBuf,
    force: bool,
    written: BTreeSet<String>,
}

fn io_at(path: &Path) -> impl FnOnce(std::io::Error) -> SignalError + '_ {
    move |source| SignalError::Io {
        path: path.to_path_buf(),
        source,
    }
}

impl OutputDir {
    /// Open (creating it and its parents if needed) the folder `dir`. With `force`, files
    /// railsong did not write may be overwritten.
    pub fn open(dir: &Path, force: bool) -> Result<Self, SignalError> {
        fs::create_dir_all(dir).map_err(io_at(dir))?;
        let manifest = dir.join(MANIFEST_NAME);
        // Appending through a symbolic link (or into anything but a plain file) could write
        // outside the folder: refuse.
        if let Ok(meta) = fs::symlink_metadata(&manifest) {
            if !meta.file_type().is_file() {
                return Err(io_at(&manifest)(std::io::Error::other(
                    "the manifest is not a regular file (a link or a folder?); remove it",
                )));
            }
        }
        let written = match fs::read_to_string(&manifest) {
            Ok(text) => text
                .lines()
                .map(str::trim)
                .filter(|l| check_file_name(l).is_ok())
                .map(str::to_string)
                .collect(),
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => BTreeSet::new(),
            Err(e) => return Err(io_at(&manifest)(e)),
        };
        Ok(OutputDir {
            dir: dir.to_path_buf(),
            force,
            written,
        })
    }

    /// The folder.
    pub fn path(&self) -> &Path {
        &self.dir
    }

    /// Whether railsong's manifest lists `name`.
    pub fn wrote(&self, name: &str) -> bool {
        self.written.contains(name)
    }

    /// Start writing `name` (see [`check_file_name`]) atomically. Refuses an existing file
    /// railsong did not write unless the folder was opened with `force`.
    pub fn create(&mut self, name: &str, spec: WavSpec) -> Result<WavFile, SignalError> {
        self.check_writable(name)?;
        let target = self.dir.join(name);
        let temp = self.temp_path(name);
        let file = OpenOptions::new()
            .write(true)
            .create_new(true)
            .open(&temp)
            .map_err(io_at(&temp))?;
        let mut out = WavFile {
            writer: None,
            temp,
            target,
            record: (!self.written.contains(name))
                .then(|| (self.dir.join(MANIFEST_NAME), name.to_string())),
        };
        let w = WavWriter::new(BufWriter::new(file), spec).map_err(|e| out.at(e))?;
        out.writer = Some(w);
        self.written.insert(name.to_string());
        Ok(out)
    }

    /// Whether `name` may be written: a valid name, and not a file railsong did not write
    /// (unless the folder was opened with `force`). Lets a command refuse before it spends
    /// time rendering.
    pub fn check_writable(&self, name: &str) -> Result<(), SignalError> {
        check_file_name(name)?;
        let target = self.dir.join(name);
        if fs::symlink_metadata(&target).is_ok()
            && !self.force
            && !self.written.contains(name)
            && !self.listed_now(name)
        {
            return Err(SignalError::Foreign { path: target });
        }
        Ok(())
    }

    /// A unique temporary name in the folder for writing `name` (this process, a counter).
    fn temp_path(&self, name: &str) -> PathBuf {
        self.dir.join(format!(
            ".{name}.tmp-{}-{}",
            std::process::id(),
            COUNTER.fetch_add(1, Ordering::Relaxed)
        ))
    }

    /// Whether the manifest on disk lists `name` now: another railsong process rendering into
    /// the same folder may have written the file since this folder was opened.
    fn listed_now(&self, name: &str) -> bool {
        let manifest = self.dir.join(MANIFEST_NAME);
        let is_file = fs::symlink_metadata(&manifest).is_ok_and(|m| m.file_type().is_file());
        is_file
            && fs::read_to_string(&manifest)
                .is_ok_and(|text| text.lines().any(|l| l.trim() == name))
    }

    /// Write a text file (JSON, CSV, SVG, HTML) atomically, under the same guard as WAVs.
    pub fn write_text(&mut self, name: &str, text: &str) -> Result<(), SignalError> {
        self.check_writable(name)?;
        let target = self.dir.join(name);
        let temp = self.temp_path(name);
        let result = (|| -> Result<(), SignalError> {
            let mut file = OpenOptions::new()
                .write(true)
                .create_new(true)
                .open(&temp)
                .map_err(io_at(&temp))?;
            file.write_all(text.as_bytes()).map_err(io_at(&temp))?;
            file.sync_all().map_err(io_at(&temp))?;
            drop(file);
            fs::rename(&temp, &target).map_err(io_at(&target))
        })();
        if result.is_err() {
            let _ = fs::remove_file(&temp);
            return result;
        }
        if self.written.insert(name.to_string()) {
            append_manifest(&self.dir.join(MANIFEST_NAME), name)?;
        }
        Ok(())
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

/// A WAV file being written atomically; see [`OutputDir::create`].
pub struct WavFile {
    writer: Option<WavWriter<BufWriter<File>>>,
    temp: PathBuf,
    target: PathBuf,
    /// Manifest path and name to append on success (`None`: already listed).
    record: Option<(PathBuf, String)>,
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

    /// Finish: patch the header, flush, fsync, rename over the final name, record it in the
    /// manifest.
    pub fn finish(mut self) -> Result<WriteStats, SignalError> {
        let Some(w) = self.writer.take() else {
            return Err(SignalError::BadSpec("file already finished".into()));
        };
        let (buf, stats) = w.finish().map_err(|e| self.at(e))?;
        let file = buf
            .into_inner()
            .map_err(|e| io_at(&self.temp)(e.into_error()))?;
        file.sync_all().map_err(io_at(&self.temp))?;
        drop(file);
        fs::rename(&self.temp, &self.target).map_err(io_at(&self.target))?;
        // The temporary name is gone now: nothing for Drop to remove.
        self.temp = PathBuf::new();
        if let Some(dir) = self.target.parent() {
            if let Ok(d) = File::open(dir) {
                let _ = d.sync_all();
            }
        }
        if let Some((manifest, name)) = self.record.take() {
            append_manifest(&manifest, &name)?;
        }
        Ok(stats)
    }
}

impl Drop for WavFile {
    fn drop(&mut self) {
        self.writer = None;
        if !self.temp.as_os_str().is_empty() {
            let _ = fs::remove_file(&self.temp);
        }
    }
}
