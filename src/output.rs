//! Writing report files so that a reader never sees half of one: everything
//! goes to a temporary file in the same directory, which is renamed over the
//! destination only once it is complete and flushed.

use crate::error::{Error, Result};
use std::fs::File;
use std::io::{BufWriter, Write};
use std::path::{Path, PathBuf};

pub struct AtomicFile {
    dest: PathBuf,
    tmp: PathBuf,
    out: Option<BufWriter<File>>,
}

impl AtomicFile {
    pub fn create(dest: &Path) -> Result<AtomicFile> {
        let dir = match dest.parent() {
            Some(d) if !d.as_os_str().is_empty() => d.to_path_buf(),
            _ => PathBuf::from("."),
        };
        if !dir.is_dir() {
            return Err(Error::output(dest, "cannot write: the directory does not exist"));
        }
        let name = dest.file_name().map(|n| n.to_string_lossy().into_owned()).unwrap_or_else(|| "report".into());
        let tmp = dir.join(format!(".{name}.klgauge-{}.tmp", std::process::id()));
        let f = File::create(&tmp).map_err(|e| Error::output(dest, format!("cannot write: {e}")))?;
        crate::output::register_temp(&tmp);
        Ok(AtomicFile { dest: dest.to_path_buf(), tmp, out: Some(BufWriter::with_capacity(1 << 20, f)) })
    }

    pub fn writer(&mut self) -> &mut BufWriter<File> {
        self.out.as_mut().expect("open")
    }

    pub fn path(&self) -> &Path {
        &self.dest
    }

    pub fn write_err(&self, e: std::io::Error) -> Error {
        Error::output(&self.dest, format!("write failed: {e}"))
    }

    /// Flushes, syncs and renames into place.
    pub fn commit(mut self) -> Result<()> {
        let w = self.out.take().expect("open");
        let f = w.into_inner().map_err(|e| Error::output(&self.dest, format!("write failed: {}", e.error())))?;
        f.sync_all().map_err(|e| Error::output(&self.dest, format!("write failed: {e}")))?;
        drop(f);
        std::fs::rename(&self.tmp, &self.dest).map_err(|e| Error::output(&self.dest, format!("cannot move into place: {e}")))?;
        unregister_temp(&self.tmp);
        Ok(())
    }
}

impl Drop for AtomicFile {
    fn drop(&mut self) {
        if self.out.is_some() {
            self.out = None;
            let _ = std::fs::remove_file(&self.tmp);
            unregister_temp(&self.tmp);
        }
    }
}

/// Writes a whole file atomically from a closure.
pub fn write_atomic(dest: &Path, f: impl FnOnce(&mut dyn Write) -> std::io::Result<()>) -> Result<()> {
    let mut a = AtomicFile::create(dest)?;
    f(a.writer()).map_err(|e| a.write_err(e))?;
    a.commit()
}

// Temporary files in flight, so an interrupt handler can remove them.
static TEMPS: std::sync::Mutex<Vec<PathBuf>> = std::sync::Mutex::new(Vec::new());

fn register_temp(p: &Path) {
    if let Ok(mut v) = TEMPS.lock() {
        v.push(p.to_path_buf());
    }
}

fn unregister_temp(p: &Path) {
    if let Ok(mut v) = TEMPS.lock() {
        v.retain(|x| x != p);
    }
}

/// Removes every temporary report file still in flight (for signal handlers).
pub fn remove_temps() {
    if let Ok(v) = TEMPS.lock() {
        for p in v.iter() {
            let _ = std::fs::remove_file(p);
        }
    }
}
