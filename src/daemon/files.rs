//! The daemon's own files: the state lock, the running model, and moving
//! frames to the archive or to `rejected/`.

use std::fs::{self, File, Metadata, OpenOptions};
use std::io::{self, Read, Write};
use std::os::unix::fs::MetadataExt;
use std::os::unix::io::AsRawFd;
use std::path::{Path, PathBuf};
use std::time::{Duration, SystemTime};

use crate::codec::DecodeLimits;
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

/// One version of a file: its device, inode, size and time stamp. A frame
/// is moved only if it is still the version that was read, so a file
/// replaced or rewritten under the same name meanwhile is read again rather
/// than archived without its own record.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Stamp {
    dev: u64,
    ino: u64,
    len: u64,
    mtime: (i64, i64),
}

impl Stamp {
    pub fn of(m: &Metadata) -> Stamp {
        Stamp {
            dev: m.dev(),
            ino: m.ino(),
            len: m.len(),
            mtime: (m.mtime(), m.mtime_nsec()),
        }
    }

    /// The stamp of the file at `path` now (not following links).
    pub fn now(path: &Path) -> io::Result<Stamp> {
        fs::symlink_metadata(path).map(|m| Stamp::of(&m))
    }
}

/// Reads a frame file through one open handle, so its bytes and its stamp
/// belong to the same file, refusing files larger than a frame of the
/// largest accepted size can need ([`crate::data::max_file_bytes`]) and
/// empty ones. An error carries the stamp whenever the file could be
/// opened: an empty file that is filled later is then not rejected.
pub fn read_frame(
    path: &Path,
    limits: &DecodeLimits,
) -> std::result::Result<(Vec<u8>, Stamp), (Error, Option<Stamp>)> {
    let err = |e: io::Error| Error::from(e).with_path(path);
    let file = File::open(path).map_err(|e| (err(e), None))?;
    let meta = file.metadata().map_err(|e| (err(e), None))?;
    let stamp = Stamp::of(&meta);
    let max = crate::data::max_file_bytes(limits);
    let fail = |e: Error| (e.with_path(path), Some(stamp));
    let too_big = |len: u64| {
        fail(Error::new(ErrorKind::Data(format!(
            "file is {len} bytes, over the {max} bytes a frame of at most {}x{} can need",
            limits.max_width, limits.max_height
        ))))
    };
    if meta.len() > max {
        return Err(too_big(meta.len()));
    }
    let mut bytes = Vec::with_capacity(meta.len() as usize);
    file.take(max + 1)
        .read_to_end(&mut bytes)
        .map_err(|e| fail(Error::from(e)))?;
    if bytes.len() as u64 > max {
        return Err(too_big(bytes.len() as u64));
    }
    if bytes.is_empty() {
        return Err(fail(Error::new(ErrorKind::Data("file is empty".into()))));
    }
    Ok((bytes, stamp))
}

/// Whether a daemon holds the lock on `state`, without touching the lock
/// file: `Some(pid)` when one does. A missing lock file means none.
pub fn daemon_running(state: &Path) -> Option<String> {
    let path = state.join(LOCK);
    let file = File::open(&path).ok()?;
    // SAFETY: flock on a file descriptor we own; no memory involved.
    let free = unsafe { libc::flock(file.as_raw_fd(), libc::LOCK_SH | libc::LOCK_NB) } == 0;
    if free {
        // SAFETY: as above; releases the shared lock just taken.
        unsafe { libc::flock(file.as_raw_fd(), libc::LOCK_UN) };
        return None;
    }
    Some(
        fs::read_to_string(&path)
            .unwrap_or_default()
            .trim()
            .to_string(),
    )
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
/// `NAME.reason.txt` beside it (whole or not at all).
pub fn reject(src: &Path, rejected: &Path, reason: &str) -> io::Result<PathBuf> {
    let target = move_into(src, rejected)?;
    let name = target
        .file_name()
        .and_then(|n| n.to_str())
        .unwrap_or("frame");
    let text = format!("{}\n{reason}\n", crate::record::rfc3339(SystemTime::now()));
    write_atomic(
        &rejected.join(format!("{name}.reason.txt")),
        text.as_bytes(),
    )?;
    Ok(target)
}

/// Deletes archived frames older than `keep_days`, then the oldest while
/// the archive holds more than `keep_bytes`. Age is counted from when a
/// frame was archived (its status-change time, which the move sets), not
/// from the camera's time stamp. Returns how many files were deleted. Only
/// plain files directly in `archive` are touched.
pub fn prune_archive(archive: &Path, keep: Retention, now: SystemTime) -> io::Result<usize> {
    let mut files: Vec<(SystemTime, u64, PathBuf)> = Vec::new();
    for e in fs::read_dir(archive)? {
        let Ok(e) = e else { continue };
        let Ok(m) = e.metadata() else { continue };
        if m.is_file() {
            let archived = SystemTime::UNIX_EPOCH
                + Duration::new(
                    m.ctime().max(0) as u64,
                    m.ctime_nsec().clamp(0, 999_999_999) as u32,
                );
            files.push((archived, m.len(), e.path()));
        }
    }
    let doomed = to_prune(files, keep, now);
    for p in &doomed {
        fs::remove_file(p)?;
    }
    Ok(doomed.len())
}

/// Which of `(archived at, bytes, path)` the retention rule deletes: those
/// archived before `now - keep_days`, then the oldest while the rest hold
/// more than `keep_bytes`.
pub fn to_prune(
    mut files: Vec<(SystemTime, u64, PathBuf)>,
    keep: Retention,
    now: SystemTime,
) -> Vec<PathBuf> {
    files.sort();
    let mut total: u64 = files.iter().map(|f| f.1).sum();
    let cutoff = (keep.keep_days > 0)
        .then(|| now.checked_sub(Duration::from_secs(keep.keep_days * 86_400)))
        .flatten();
    let mut out = Vec::new();
    for (archived, size, path) in files {
        let too_old = cutoff.is_some_and(|c| archived < c);
        let too_big = keep.keep_bytes > 0 && total > keep.keep_bytes;
        if !(too_old || too_big) {
            break;
        }
        total -= size;
        out.push(path);
    }
    out
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
    fn stamps_tell_versions_apart() {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("f.pbm");
        fs::write(&p, "P1 1 1 0").unwrap();
        let (bytes, stamp) = read_frame(&p, &DecodeLimits::default()).unwrap();
        assert_eq!(bytes, b"P1 1 1 0");
        assert_eq!(Stamp::now(&p).unwrap(), stamp);
        // Replaced by rename under the same name: another inode.
        fs::write(d.path().join("g"), "P1 1 1 1").unwrap();
        fs::rename(d.path().join("g"), &p).unwrap();
        assert_ne!(Stamp::now(&p).unwrap(), stamp);
        // An empty file: an error, but with its stamp, so filling it later
        // shows as a change.
        let e_path = d.path().join("e.pbm");
        fs::write(&e_path, "").unwrap();
        let (e, stamp) = read_frame(&e_path, &DecodeLimits::default()).unwrap_err();
        assert!(
            e.to_string().contains("empty") && e.to_string().contains("e.pbm"),
            "{e}"
        );
        fs::write(&e_path, "P1 1 1 0").unwrap();
        assert!(stamp.is_some());
        assert_ne!(Stamp::now(&e_path).ok(), stamp);
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
        let now = SystemTime::now();
        let day = Duration::from_secs(86_400);
        let files = vec![
            (now - day * 40, 10, PathBuf::from("old.pbm")),
            (now - day * 5, 10, PathBuf::from("mid.pbm")),
            (now - day, 10, PathBuf::from("new.pbm")),
        ];
        let keep = Retention {
            keep_days: 30,
            keep_bytes: 15,
        };
        assert_eq!(
            to_prune(files.clone(), keep, now),
            [PathBuf::from("old.pbm"), PathBuf::from("mid.pbm")]
        );
        let by_age = Retention {
            keep_days: 30,
            keep_bytes: 0,
        };
        assert_eq!(
            to_prune(files.clone(), by_age, now),
            [PathBuf::from("old.pbm")]
        );
        let keep_all = Retention {
            keep_days: 0,
            keep_bytes: 0,
        };
        assert!(to_prune(files, keep_all, now).is_empty());
        // On disk: a just-archived frame is young whatever its time stamp.
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("camera-old.pbm");
        fs::write(&p, b"x").unwrap();
        File::options()
            .write(true)
            .open(&p)
            .unwrap()
            .set_modified(now - day * 400)
            .unwrap();
        assert_eq!(prune_archive(d.path(), by_age, now).unwrap(), 0);
        assert!(p.exists());
    }

    #[test]
    fn checking_the_lock_leaves_it_alone() {
        let d = tempfile::tempdir().unwrap();
        assert_eq!(daemon_running(d.path()), None);
        assert!(
            !d.path().join(LOCK).exists(),
            "checking created the lock file"
        );
        let lock = StateLock::acquire(d.path()).unwrap();
        assert_eq!(
            daemon_running(d.path()),
            Some(std::process::id().to_string())
        );
        drop(lock);
        assert_eq!(daemon_running(d.path()), None);
    }
}
