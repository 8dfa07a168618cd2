//! The daemon's own files: the state lock, the running model, reading a
//! frame, moving it to `rejected/` with its reason, and archive retention.
//! The durable operations underneath are [`crate::fileio::durable`]'s.

use std::fs::{self, File, OpenOptions};
use std::io::{self, Write};
use std::os::unix::fs::MetadataExt;
use std::os::unix::io::AsRawFd;
use std::path::{Path, PathBuf};
use std::time::{Duration, SystemTime};

use crate::config::Retention;
use crate::error::{Error, Result};
pub use crate::fileio::durable::{move_into, write_atomic, FileBytes, Stamp};

/// The lock file's name in the state folder.
pub const LOCK: &str = "burlwatch.lock";
/// The running model's file name in the state folder.
pub const MODEL: &str = "model.json";

/// Holds an exclusive `flock` on `state/burlwatch.lock` while alive, so a
/// second daemon on the same folders stops with a clear message. The lock
/// goes with the process, so a crash never leaves a stale lock behind.
#[derive(Debug)]
pub struct StateLock {
    _file: File,
}

/// What a command that holds the state lock writes after its process id
/// (a daemon writes its id alone).
pub const COMMAND_MARK: &str = "command";

impl StateLock {
    /// The lock for a daemon.
    pub fn acquire(state: &Path) -> Result<StateLock> {
        StateLock::acquire_as(state, None)
    }

    /// The lock for a command that works on the state folder while no
    /// daemon runs (`retrain`, `changeover`, `models use`): the lock file
    /// says so, so another command waits rather than asking a daemon.
    pub fn acquire_for_command(state: &Path) -> Result<StateLock> {
        StateLock::acquire_as(state, Some(COMMAND_MARK))
    }

    fn acquire_as(state: &Path, mark: Option<&str>) -> Result<StateLock> {
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
            let holder = holder.trim();
            let msg = match holder.strip_suffix(COMMAND_MARK) {
                Some(pid) => format!(
                    "a burlwatch command (process {}) is working on these folders; \
                     try again when it ends",
                    pid.trim()
                ),
                None => format!(
                    "another burlwatch daemon (process {holder}) is running on these folders; \
                     stop it first, or give this one its own state folder"
                ),
            };
            return Err(Error::daemon(msg).with_path(&path));
        }
        let _ = file.set_len(0);
        match mark {
            Some(m) => {
                let _ = write!(file, "{} {m}", std::process::id());
            }
            None => {
                let _ = write!(file, "{}", std::process::id());
            }
        }
        Ok(StateLock { _file: file })
    }
}

/// Exclusive `flock`s on the folders a daemon must have to itself (the
/// inbox, the corrections folder, the logs folder), held while alive. The
/// state lock alone let two daemons with different state folders share an
/// inbox and log every frame twice. The folders themselves are locked (a
/// directory can be), so nothing is written into them; a folder named
/// twice is locked once.
#[derive(Debug)]
pub struct FolderLocks {
    _dirs: Vec<File>,
}

impl FolderLocks {
    /// Locks each `(configuration key, folder)`; the error names the key,
    /// the folder and what to do.
    pub fn acquire(folders: &[(&str, &Path)]) -> Result<FolderLocks> {
        use std::os::unix::fs::MetadataExt;
        let mut dirs: Vec<File> = Vec::new();
        let mut seen = Vec::new();
        for (key, path) in folders {
            let dir = File::open(path).map_err(|e| Error::from(e).with_path(path))?;
            let m = dir.metadata().map_err(|e| Error::from(e).with_path(path))?;
            if seen.contains(&(m.dev(), m.ino())) {
                continue;
            }
            seen.push((m.dev(), m.ino()));
            // SAFETY: flock on a file descriptor we own; no memory involved.
            let rc = unsafe { libc::flock(dir.as_raw_fd(), libc::LOCK_EX | libc::LOCK_NB) };
            if rc != 0 {
                return Err(Error::daemon(format!(
                    "{key} is in use by another burlwatch daemon (one with another state \
                     folder); two daemons on one folder would handle every file twice: give \
                     each daemon its own inbox, corrections and logs folders"
                ))
                .with_path(path));
            }
            dirs.push(dir);
        }
        Ok(FolderLocks { _dirs: dirs })
    }
}

/// Whether a daemon holds the folder lock of `path` (see [`FolderLocks`]).
pub fn folder_in_use(path: &Path) -> bool {
    let Ok(dir) = File::open(path) else {
        return false;
    };
    // SAFETY: flock on a file descriptor we own; no memory involved.
    let free = unsafe { libc::flock(dir.as_raw_fd(), libc::LOCK_SH | libc::LOCK_NB) } == 0;
    if free {
        // SAFETY: as above; releases the shared lock just taken.
        unsafe { libc::flock(dir.as_raw_fd(), libc::LOCK_UN) };
    }
    !free
}

/// Reads a frame file, bounded, with the stamp of the version read; a
/// symbolic link is refused, never followed.
pub use crate::fileio::data::read_frame_file_in_place as read_frame;

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

/// Moves a frame that cannot be read into `rejected` and writes
/// `NAME.reason.txt` beside it (whole or not at all).
pub fn reject(src: &Path, rejected: &Path, reason: &str) -> io::Result<PathBuf> {
    // Short enough that its reason file's name fits too.
    let target = crate::fileio::durable::move_into_max(
        src,
        rejected,
        crate::fileio::durable::NAME_MAX - ".reason.txt".len(),
    )?;
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
