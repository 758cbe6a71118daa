//! Writing report files so that a reader never sees half of one: everything
//! goes to a temporary file in the same directory, which is renamed over the
//! destination only once it is complete and flushed.
//!
//! Temporaries in flight are kept in one registry, so an interrupt can remove
//! them. Creating a temporary and renaming it into place both happen while
//! the registry is locked, and the interrupt path takes that lock and never
//! gives it back: after it has cleaned up, no new temporary can appear and no
//! half-finished rename can race with the exit.
//!
//! A destination that already exists and is not a regular file (a terminal,
//! `/dev/stdout`, a pipe, `/dev/full`) cannot be renamed over; it is written
//! directly, and a write error there is reported like any other.

use crate::error::{Error, Result};
use std::fs::File;
use std::io::{BufWriter, Write};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::{Mutex, MutexGuard};

pub struct AtomicFile {
    dest: PathBuf,
    /// None when writing straight to a non-regular destination.
    tmp: Option<PathBuf>,
    out: Option<BufWriter<File>>,
}

/// The directory a destination lives in ("." for a bare file name).
fn parent_dir(dest: &Path) -> PathBuf {
    match dest.parent() {
        Some(d) if !d.as_os_str().is_empty() => d.to_path_buf(),
        _ => PathBuf::from("."),
    }
}

/// How a destination will be written, or why it cannot be.
enum Target {
    /// Through a temporary in this directory, renamed into place.
    Replace(PathBuf),
    /// Directly: it exists and is a device or a pipe.
    Direct,
}

fn target(dest: &Path) -> Result<Target> {
    if dest.as_os_str().is_empty() {
        return Err(Error::usage("an output path is empty"));
    }
    match std::fs::metadata(dest) {
        Ok(m) if m.is_dir() => {
            return Err(Error::output(
                dest,
                "cannot write a report: it is a directory",
            ))
        }
        Ok(m) if !m.is_file() => return Ok(Target::Direct),
        _ => {}
    }
    let dir = parent_dir(dest);
    if !dir.is_dir() {
        return Err(Error::output(
            dest,
            "cannot write: the directory does not exist",
        ));
    }
    Ok(Target::Replace(dir))
}

static COUNTER: AtomicUsize = AtomicUsize::new(0);

impl AtomicFile {
    pub fn create(dest: &Path) -> Result<AtomicFile> {
        let dir = match target(dest)? {
            Target::Direct => {
                let f = std::fs::OpenOptions::new()
                    .write(true)
                    .open(dest)
                    .map_err(|e| Error::output(dest, format!("cannot write: {e}")))?;
                return Ok(AtomicFile {
                    dest: dest.to_path_buf(),
                    tmp: None,
                    out: Some(BufWriter::with_capacity(1 << 20, f)),
                });
            }
            Target::Replace(dir) => dir,
        };
        let name = dest
            .file_name()
            .map(|n| n.to_string_lossy().into_owned())
            .unwrap_or_else(|| "report".into());
        let tmp = dir.join(format!(
            ".{name}.klgauge-{}-{}.tmp",
            std::process::id(),
            COUNTER.fetch_add(1, Ordering::Relaxed)
        ));
        // Created and registered under the lock: an interrupt either sees it
        // registered or runs before it exists.
        let f = {
            let mut temps = temps();
            let f = std::fs::OpenOptions::new()
                .write(true)
                .create_new(true)
                .open(&tmp)
                .map_err(|e| Error::output(dest, format!("cannot write: {e}")))?;
            temps.push(tmp.clone());
            f
        };
        Ok(AtomicFile {
            dest: dest.to_path_buf(),
            tmp: Some(tmp),
            out: Some(BufWriter::with_capacity(1 << 20, f)),
        })
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

    /// Flushes, syncs and renames into place. On any failure the temporary
    /// is removed and the destination is left as it was.
    pub fn commit(mut self) -> Result<()> {
        let w = self.out.take().expect("open");
        let result = self.finish(w);
        if result.is_err() {
            self.discard();
        }
        result
    }

    fn finish(&mut self, w: BufWriter<File>) -> Result<()> {
        let f = w
            .into_inner()
            .map_err(|e| Error::output(&self.dest, format!("write failed: {}", e.error())))?;
        let Some(tmp) = self.tmp.clone() else {
            return Ok(());
        };
        f.sync_all()
            .map_err(|e| Error::output(&self.dest, format!("write failed: {e}")))?;
        drop(f);
        let mut temps = temps();
        std::fs::rename(&tmp, &self.dest)
            .map_err(|e| Error::output(&self.dest, format!("cannot move into place: {e}")))?;
        temps.retain(|x| *x != tmp);
        self.tmp = None;
        Ok(())
    }

    /// Removes the temporary (if any) and forgets it.
    fn discard(&mut self) {
        self.out = None;
        if let Some(tmp) = self.tmp.take() {
            let mut temps = temps();
            let _ = std::fs::remove_file(&tmp);
            temps.retain(|x| *x != tmp);
        }
    }
}

impl Drop for AtomicFile {
    fn drop(&mut self) {
        self.discard();
    }
}

/// Writes a whole file atomically from a closure.
pub fn write_atomic(
    dest: &Path,
    f: impl FnOnce(&mut dyn Write) -> std::io::Result<()>,
) -> Result<()> {
    let mut a = AtomicFile::create(dest)?;
    f(a.writer()).map_err(|e| a.write_err(e))?;
    a.commit()
}

/// Checks, before any work, that every report can be written where asked:
/// its directory exists, it is not a directory, it is not one of the inputs
/// and no two reports share a path. Catching this late would throw away a
/// long run, or leave one report written and the next one missing.
pub fn check_destinations(outputs: &[&Path], inputs: &[&Path]) -> Result<()> {
    let same = |a: &Path, b: &Path| match (std::fs::canonicalize(a), std::fs::canonicalize(b)) {
        (Ok(x), Ok(y)) => x == y,
        _ => a == b,
    };
    for (i, o) in outputs.iter().enumerate() {
        target(o)?;
        if let Some(inp) = inputs.iter().find(|p| same(o, p)) {
            return Err(Error::usage(format!(
                "{}: a report would overwrite the input {}",
                o.display(),
                inp.display()
            )));
        }
        if outputs[..i].iter().any(|p| same(o, p)) {
            return Err(Error::usage(format!(
                "{}: given for two reports",
                o.display()
            )));
        }
    }
    Ok(())
}

// Temporary files in flight, so an interrupt handler can remove them.
static TEMPS: Mutex<Vec<PathBuf>> = Mutex::new(Vec::new());

/// The registry, also after a panic elsewhere poisoned the lock.
fn temps() -> MutexGuard<'static, Vec<PathBuf>> {
    TEMPS.lock().unwrap_or_else(|e| e.into_inner())
}

/// Removes every temporary report file still in flight.
pub fn remove_temps() {
    let mut v = temps();
    for p in v.drain(..) {
        let _ = std::fs::remove_file(p);
    }
}

/// Removes every temporary and keeps the registry locked for the rest of the
/// process, so no report can be created or moved into place afterwards. For
/// the interrupt path, just before the process exits.
pub fn abandon_all() {
    let mut v = temps();
    for p in v.drain(..) {
        let _ = std::fs::remove_file(p);
    }
    std::mem::forget(v);
}

/// Number of temporaries in flight (for tests).
pub fn temps_in_flight() -> usize {
    temps().len()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn scratch(tag: &str) -> PathBuf {
        let d = std::env::temp_dir().join(format!("klgauge-output-{}-{tag}", std::process::id()));
        let _ = std::fs::remove_dir_all(&d);
        std::fs::create_dir_all(&d).unwrap();
        d
    }

    fn entries(d: &Path) -> Vec<String> {
        let mut v: Vec<String> = std::fs::read_dir(d)
            .unwrap()
            .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
            .collect();
        v.sort();
        v
    }

    #[test]
    fn a_failed_write_leaves_the_old_file_and_no_temporary() {
        let d = scratch("fail");
        let dest = d.join("r.json");
        std::fs::write(&dest, "old").unwrap();
        let e = write_atomic(&dest, |w| {
            w.write_all(b"new, but")?;
            Err(std::io::Error::other("disk on fire"))
        })
        .unwrap_err();
        assert!(e.message.contains("disk on fire"));
        assert_eq!(std::fs::read_to_string(&dest).unwrap(), "old");
        assert_eq!(entries(&d), vec!["r.json"]);
        write_atomic(&dest, |w| w.write_all(b"new")).unwrap();
        assert_eq!(std::fs::read_to_string(&dest).unwrap(), "new");
        assert_eq!(entries(&d), vec!["r.json"]);
        let _ = std::fs::remove_dir_all(&d);
    }

    #[test]
    fn a_dropped_file_removes_its_temporary() {
        let d = scratch("drop");
        let mut a = AtomicFile::create(&d.join("x.csv")).unwrap();
        a.writer().write_all(b"half").unwrap();
        assert_eq!(entries(&d).len(), 1);
        drop(a);
        assert!(entries(&d).is_empty());
        let _ = std::fs::remove_dir_all(&d);
    }

    #[test]
    fn a_failed_rename_removes_the_temporary() {
        // Renaming a file over a non-empty directory fails on every platform.
        let d = scratch("rename");
        let dest = d.join("sub");
        let mut a = AtomicFile::create(&dest).unwrap();
        std::fs::create_dir_all(dest.join("inner")).unwrap();
        a.writer().write_all(b"x").unwrap();
        assert!(a.commit().is_err());
        assert_eq!(entries(&d), vec!["sub"]);
        let _ = std::fs::remove_dir_all(&d);
    }

    #[test]
    fn destinations_are_checked_up_front() {
        let d = scratch("check");
        let input = d.join("in.safetensors");
        std::fs::write(&input, "x").unwrap();
        let ok = d.join("r.json");
        assert!(check_destinations(&[&ok], &[&input]).is_ok());
        assert!(check_destinations(&[&input], &[&input]).is_err());
        assert!(check_destinations(&[&ok, &ok], &[&input]).is_err());
        assert!(check_destinations(&[&d], &[&input]).is_err());
        assert!(check_destinations(&[&d.join("missing").join("r.json")], &[&input]).is_err());
        let _ = std::fs::remove_dir_all(&d);
    }

    #[cfg(unix)]
    #[test]
    fn dev_full_reports_the_write_error() {
        let full = Path::new("/dev/full");
        if !full.exists() {
            return;
        }
        let e = write_atomic(full, |w| w.write_all(&[b'x'; 4096])).unwrap_err();
        assert!(e.message.starts_with("/dev/full:"), "{}", e.message);
    }
}
