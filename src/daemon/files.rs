//! The daemon's own files: the state lock, the running model, and moving
//! frames to the archive or to `rejected/`.

use std::fs::{self, File, OpenOptions};
use std::io::{self, Write};
use std::os::unix::io::AsRawFd;
use std::path::{Path, PathBuf};
use std::time::{Duration, SystemTime};

use crate::config::Retention;
use crate::error::{Error, ErrorKind, Result};

/// The lock file's name in the state folder.
pub const LOCK: &str = "treeline.lock";
/// The running model's file name in the state folder.
pub const MODEL: &str = "model.json";

/// Holds an exclusive `flock` on `state/treeline.lock` while alive, so a
/// second daemon on the same folders stops with a clear message. The lock
/// goes with the process, so a crash never leaves a stale lock behind.
#[derive(Debug)]
pub struct StateLock {
    _file: File,
}

impl StateLock {
    pub fn acquire(state: &Path) -> Result<StateLock> {
        let path = state.join(LOCK);
        let mut file = OpenOptions::new()
            .read(true)
            .write(true)
            .create(true)
            .truncate(false)
            .open(&path)
            .map_err(|e| Error::from(e).with_path(&path))?;
        // SAFETY: flock on a file descriptor we own; no memory involved.
        let rc = unsafe { libc::flock(file.as_raw_fd(), libc::LOCK_EX | libc::LOCK_NB) };
        if rc != 0 {
            let holder = fs::read_to_string(&path).unwrap_or_default();
            return Err(Error::new(ErrorKind::Data(format!(
                "another treeline daemon (process {}) is running on these folders; \
                 stop it first, or give this one its own state folder",
                holder.trim()
            )))
            .with_path(&path));
        }
        let _ = file.set_len(0);
        let _ = write!(file, "{}", std::process::id());
        Ok(StateLock { _file: file })
    }
}

/// Writes `bytes` to `path` so that a crash leaves either the old file or
/// the new one: a synced temporary file renamed over it, then the folder
/// synced.
pub fn write_atomic(path: &Path, bytes: &[u8]) -> io::Result<()> {
    let dir = path.parent().unwrap_or(Path::new("."));
    let tmp = dir.join(format!(
        ".{}.tmp",
        path.file_name().and_then(|n| n.to_str()).unwrap_or("file")
    ));
    {
        let mut f = File::create(&tmp)?;
        f.write_all(bytes)?;
        f.sync_all()?;
    }
    fs::rename(&tmp, path)?;
    File::open(dir)?.sync_all()
}

/// A free name in `dir` for `name`: `name` itself, else `stem-2.ext`,
/// `stem-3.ext`, ...
fn free_name(dir: &Path, name: &str) -> PathBuf {
    let first = dir.join(name);
    if fs::symlink_metadata(&first).is_err() {
        return first;
    }
    let (stem, ext) = match name.rsplit_once('.') {
        Some((s, e)) if !s.is_empty() => (s, format!(".{e}")),
        _ => (name, String::new()),
    };
    (2u64..)
        .map(|k| dir.join(format!("{stem}-{k}{ext}")))
        .find(|p| fs::symlink_metadata(p).is_err())
        .expect("some name is free")
}

/// Moves `src` into `dir` under a free name and returns where it went.
/// Across filesystems it copies, syncs, then removes the original, so the
/// frame exists somewhere at every moment.
pub fn move_into(src: &Path, dir: &Path) -> io::Result<PathBuf> {
    let name = src
        .file_name()
        .and_then(|n| n.to_str())
        .ok_or_else(|| io::Error::other("file name is not UTF-8"))?;
    let target = free_name(dir, name);
    match fs::rename(src, &target) {
        Ok(()) => Ok(target),
        Err(e) if e.raw_os_error() == Some(libc::EXDEV) => {
            fs::copy(src, &target)?;
            File::open(&target)?.sync_all()?;
            fs::remove_file(src)?;
            Ok(target)
        }
        Err(e) => Err(e),
    }
}

/// Moves a frame that cannot be read into `rejected` and writes
/// `NAME.reason.txt` beside it.
pub fn reject(src: &Path, rejected: &Path, reason: &str) -> io::Result<PathBuf> {
    let target = move_into(src, rejected)?;
    let name = target
        .file_name()
        .and_then(|n| n.to_str())
        .unwrap_or("frame");
    let text = format!("{}\n{reason}\n", crate::record::rfc3339(SystemTime::now()));
    fs::write(rejected.join(format!("{name}.reason.txt")), text)?;
    Ok(target)
}

/// Deletes archived frames older than `keep_days` (by time stamp), then the
/// oldest while the archive holds more than `keep_bytes`. Returns how many
/// files were deleted. Only plain files directly in `archive` are touched.
pub fn prune_archive(archive: &Path, keep: Retention, now: SystemTime) -> io::Result<usize> {
    let mut files: Vec<(SystemTime, u64, PathBuf)> = Vec::new();
    for e in fs::read_dir(archive)? {
        let Ok(e) = e else { continue };
        let Ok(m) = e.metadata() else { continue };
        if m.is_file() {
            files.push((m.modified().unwrap_or(now), m.len(), e.path()));
        }
    }
    files.sort();
    let mut total: u64 = files.iter().map(|f| f.1).sum();
    let cutoff = (keep.keep_days > 0)
        .then(|| now.checked_sub(Duration::from_secs(keep.keep_days * 86_400)))
        .flatten();
    let mut deleted = 0;
    for (modified, size, path) in files {
        let too_old = cutoff.is_some_and(|c| modified < c);
        let too_big = keep.keep_bytes > 0 && total > keep.keep_bytes;
        if !(too_old || too_big) {
            break;
        }
        fs::remove_file(&path)?;
        total -= size;
        deleted += 1;
    }
    Ok(deleted)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn moves_never_overwrite() {
        let d = tempfile::tempdir().unwrap();
        let (inbox, archive) = (d.path().join("in"), d.path().join("ar"));
        fs::create_dir_all(&inbox).unwrap();
        fs::create_dir_all(&archive).unwrap();
        for k in 0..3 {
            fs::write(inbox.join("a.pbm"), format!("{k}")).unwrap();
            move_into(&inbox.join("a.pbm"), &archive).unwrap();
        }
        let mut names: Vec<_> = fs::read_dir(&archive)
            .unwrap()
            .map(|e| e.unwrap().file_name().into_string().unwrap())
            .collect();
        names.sort();
        assert_eq!(names, ["a-2.pbm", "a-3.pbm", "a.pbm"]);
        assert_eq!(fs::read_to_string(archive.join("a.pbm")).unwrap(), "0");
    }

    #[test]
    fn rejected_frames_keep_their_reason() {
        let d = tempfile::tempdir().unwrap();
        fs::write(d.path().join("x.pbm"), "junk").unwrap();
        let rej = d.path().join("rejected");
        fs::create_dir_all(&rej).unwrap();
        reject(&d.path().join("x.pbm"), &rej, "not a PBM or PNG file").unwrap();
        assert!(rej.join("x.pbm").exists());
        let why = fs::read_to_string(rej.join("x.pbm.reason.txt")).unwrap();
        assert!(why.contains("not a PBM or PNG file"), "{why}");
    }

    #[test]
    fn retention_by_age_then_size() {
        let d = tempfile::tempdir().unwrap();
        let now = SystemTime::now();
        let day = Duration::from_secs(86_400);
        for (name, age_days, len) in [
            ("old.pbm", 40u32, 10usize),
            ("mid.pbm", 5, 10),
            ("new.pbm", 1, 10),
        ] {
            let p = d.path().join(name);
            fs::write(&p, vec![b'x'; len]).unwrap();
            File::options()
                .write(true)
                .open(&p)
                .unwrap()
                .set_modified(now - day * age_days)
                .unwrap();
        }
        let keep = Retention {
            keep_days: 30,
            keep_bytes: 15,
        };
        assert_eq!(prune_archive(d.path(), keep, now).unwrap(), 2);
        assert!(d.path().join("new.pbm").exists());
        assert!(!d.path().join("mid.pbm").exists());
        let keep_all = Retention {
            keep_days: 0,
            keep_bytes: 0,
        };
        assert_eq!(prune_archive(d.path(), keep_all, now).unwrap(), 0);
    }
}
