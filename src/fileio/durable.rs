//! Durable file operations: what the library and the daemon write must
//! survive a crash whole or not at all, and what they read must be bounded.
//!
//! - [`write_atomic`]: a synced temporary sibling renamed over the target,
//!   then the folder synced. A reader sees the old file or the new one.
//! - [`move_into`]: moves a file into a folder under a free name, never
//!   overwriting; across filesystems it copies, syncs, then removes.
//! - [`read_bounded`]: reads a file through one open handle, refusing more
//!   than a given number of bytes even while the file grows, and returns
//!   the [`Stamp`] of the version it read.
//!
//! Nothing here knows what the files mean.

use std::fs::{self, File, Metadata};
use std::io::{self, Read, Write};
use std::os::unix::fs::MetadataExt;
use std::path::{Path, PathBuf};

use crate::error::{Error, ErrorKind};

/// One version of a file: its device, inode, size and time stamp. The
/// daemon moves a frame only if it is still the version that was read, so
/// a file replaced or rewritten under the same name meanwhile is read
/// again rather than archived without its own record.
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

/// A file's bytes and the stamp of the version they came from.
#[derive(Debug)]
pub struct FileBytes {
    pub bytes: Vec<u8>,
    pub stamp: Stamp,
}

/// A failed [`read_bounded`]: the error (naming the file), with the stamp
/// whenever the file could be opened, so an empty file that is filled
/// later shows as changed.
pub type ReadFailure = (Error, Option<Stamp>);

/// Reads the file at `path` through one open handle, so its bytes and its
/// stamp belong to the same file. Refuses empty files and files over
/// `max` bytes, counting what is read rather than trusting the size seen
/// at open (the file may grow meanwhile). `what_fits` (called only when
/// the file is too big) says in the message
/// what the limit is for ("a frame of at most 8192x8192").
pub fn read_bounded(
    path: &Path,
    max: u64,
    what_fits: &dyn Fn() -> String,
) -> std::result::Result<FileBytes, ReadFailure> {
    read_bounded_with(path, max, what_fits, true)
}

/// [`read_bounded`] of a file the daemon found in one of its folders: a
/// symbolic link (one put in place of the file after it was listed) is
/// refused, never followed, so no file elsewhere on the box is read, moved
/// or quoted in a reason.
pub fn read_bounded_in_place(
    path: &Path,
    max: u64,
    what_fits: &dyn Fn() -> String,
) -> std::result::Result<FileBytes, ReadFailure> {
    read_bounded_with(path, max, what_fits, false)
}

fn read_bounded_with(
    path: &Path,
    max: u64,
    what_fits: &dyn Fn() -> String,
    follow: bool,
) -> std::result::Result<FileBytes, ReadFailure> {
    use std::os::unix::fs::{FileTypeExt, OpenOptionsExt};
    let err = |e: io::Error| Error::from(e).with_path(path);
    // Without blocking: a FIFO put where a frame was would otherwise hold
    // the reader in open() until something writes to it, which may be
    // never. What was opened is checked to be a plain file before a read.
    let nofollow = if follow { 0 } else { libc::O_NOFOLLOW };
    let file = fs::OpenOptions::new()
        .read(true)
        .custom_flags(libc::O_NONBLOCK | libc::O_NOCTTY | nofollow)
        .open(path)
        .map_err(|e| {
            if !follow && e.raw_os_error() == Some(libc::ELOOP) {
                let stamp = fs::symlink_metadata(path).ok().map(|m| Stamp::of(&m));
                return (
                    Error::new(ErrorKind::Data(
                        "is a symbolic link, not a plain file: not followed".into(),
                    ))
                    .with_path(path),
                    stamp,
                );
            }
            (err(e), None)
        })?;
    let meta = file.metadata().map_err(|e| (err(e), None))?;
    let stamp = Stamp::of(&meta);
    let fail = |e: Error| (e.with_path(path), Some(stamp));
    let too_big = |len: u64| {
        fail(Error::new(ErrorKind::Data(format!(
            "file is {len} bytes, over the {max} bytes {} can need",
            what_fits()
        ))))
    };
    let ft = meta.file_type();
    if !ft.is_file() {
        let what = if ft.is_dir() {
            "a folder"
        } else if ft.is_fifo() {
            "a FIFO (named pipe)"
        } else if ft.is_socket() {
            "a socket"
        } else if ft.is_char_device() || ft.is_block_device() {
            "a device"
        } else {
            "not a plain file"
        };
        return Err(fail(Error::new(ErrorKind::Data(format!(
            "is {what}, not a plain file: not read"
        )))));
    }
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
    Ok(FileBytes { bytes, stamp })
}

/// Writes `bytes` to `path` so that a crash leaves either the old file or
/// the new one: a synced temporary sibling (`.NAME.tmp`) renamed over it,
/// then the folder synced. Creates the folder if missing; removes the
/// temporary file again when the write fails.
pub fn write_atomic(path: &Path, bytes: &[u8]) -> io::Result<()> {
    write_atomic_with(path, &mut |f| f.write_all(bytes))
}

/// [`write_atomic`] with the content written by `fill` (through a buffer),
/// for files too large to hold in memory at once.
pub fn write_atomic_with(
    path: &Path,
    fill: &mut dyn FnMut(&mut dyn Write) -> io::Result<()>,
) -> io::Result<()> {
    write_atomic_paced(path, u64::MAX, fill)
}

/// [`write_atomic_with`], syncing the data every `sync_every` bytes as it
/// goes: a large file written next to a log that syncs often (the
/// detection log) never leaves more than that much for the log's next
/// sync to wait behind.
pub fn write_atomic_paced(
    path: &Path,
    sync_every: u64,
    fill: &mut dyn FnMut(&mut dyn Write) -> io::Result<()>,
) -> io::Result<()> {
    struct Paced<'a> {
        file: &'a mut dyn Write,
        sync: &'a mut dyn FnMut() -> io::Result<()>,
        since: u64,
        every: u64,
    }
    impl Write for Paced<'_> {
        fn write(&mut self, b: &[u8]) -> io::Result<usize> {
            let n = self.file.write(b)?;
            self.since += n as u64;
            if self.since >= self.every {
                self.file.flush()?;
                (self.sync)()?;
                self.since = 0;
            }
            Ok(n)
        }
        fn flush(&mut self) -> io::Result<()> {
            self.file.flush()
        }
    }
    let name = path
        .file_name()
        .ok_or_else(|| io::Error::other("not a file path"))?;
    let dir = match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p,
        _ => Path::new("."),
    };
    fs::create_dir_all(dir)?;
    let tmp = dir.join(format!(".{}.tmp", name.to_string_lossy()));
    let written = (|| {
        let file = File::create(&tmp)?;
        let syncer = file.try_clone()?;
        let mut sync = || syncer.sync_data();
        let mut w = io::BufWriter::with_capacity(1 << 16, file);
        let mut paced = Paced {
            file: &mut w,
            sync: &mut sync,
            since: 0,
            every: sync_every.max(1 << 16),
        };
        fill(&mut paced)?;
        let f = w.into_inner().map_err(|e| e.into_error())?;
        f.sync_all()?;
        fs::rename(&tmp, path)
    })();
    if let Err(e) = written {
        let _ = fs::remove_file(&tmp);
        return Err(e);
    }
    sync_dir(dir)
}

/// Syncs a folder, so a file created or renamed in it survives a crash.
pub fn sync_dir(dir: &Path) -> io::Result<()> {
    File::open(dir)?.sync_all()
}

/// The longest file name most Linux filesystems take, in bytes.
pub const NAME_MAX: usize = 255;

/// `name` shortened (at a character boundary, keeping its ending) so that
/// with `suffix` put before the ending it is at most `max` bytes.
fn fitted(name: &str, suffix: &str, max: usize) -> String {
    let (stem, ext) = match name.rsplit_once('.') {
        Some((s, e)) if !s.is_empty() => (s, format!(".{e}")),
        _ => (name, String::new()),
    };
    let room = max.saturating_sub(suffix.len() + ext.len());
    let mut cut = stem.len().min(room);
    while !stem.is_char_boundary(cut) {
        cut -= 1;
    }
    format!("{}{suffix}{ext}", &stem[..cut])
}

/// The names `move_into` tries in `dir`, in order: the name itself (or
/// shortened to `max` bytes), then `STEM-2.EXT`, `STEM-3.EXT`...
fn candidates<'a>(dir: &'a Path, name: &'a str, max: usize) -> impl Iterator<Item = PathBuf> + 'a {
    (1u64..).map(move |k| {
        let suffix = if k == 1 {
            String::new()
        } else {
            format!("-{k}")
        };
        dir.join(fitted(name, &suffix, max))
    })
}

/// Whether two files hold the same bytes.
fn same_bytes(a: &Path, b: &Path) -> bool {
    match (fs::symlink_metadata(a), fs::symlink_metadata(b)) {
        (Ok(ma), Ok(mb)) if ma.is_file() && mb.is_file() && ma.len() == mb.len() => {
            matches!((fs::read(a), fs::read(b)), (Ok(x), Ok(y)) if x == y)
        }
        _ => false,
    }
}

/// Moves `src` into `dir` under a free name and returns where it went.
/// The name is kept when free, else `STEM-2.EXT`, `STEM-3.EXT`...,
/// shortened where needed to fit [`NAME_MAX`] bytes.
///
/// Across filesystems (a rename cannot) it copies to a hidden temporary
/// name in `dir`, syncs, links it under the free name (never over another
/// file), syncs the folder and only then deletes the original: a crash
/// leaves the file whole in one place or both, never a partial file under
/// a real name. A copy already there from an earlier try interrupted
/// before the delete (same name, same bytes) is taken as the move, not
/// copied again; a copy whose original cannot be deleted is removed again,
/// so failed tries never pile copies up.
pub fn move_into(src: &Path, dir: &Path) -> io::Result<PathBuf> {
    move_into_max(src, dir, NAME_MAX)
}

/// [`move_into`] with names of at most `max` bytes (so that a companion
/// file, `NAME.reason.txt`, fits too).
pub fn move_into_max(src: &Path, dir: &Path, max: usize) -> io::Result<PathBuf> {
    let name = src
        .file_name()
        .and_then(|n| n.to_str())
        .ok_or_else(|| io::Error::other("file name is not UTF-8"))?;
    let free = || {
        candidates(dir, name, max)
            .find(|p| fs::symlink_metadata(p).is_err())
            .expect("some name is free")
    };
    let target = free();
    match fs::rename(src, &target) {
        Ok(()) => Ok(target),
        Err(e) if e.raw_os_error() == Some(libc::EXDEV) => copy_across(src, dir, name, max),
        Err(e) => Err(e),
    }
}

/// The cross-filesystem half of [`move_into_max`].
fn copy_across(src: &Path, dir: &Path, name: &str, max: usize) -> io::Result<PathBuf> {
    // An earlier try that copied but was stopped before the delete.
    for p in candidates(dir, name, max) {
        if fs::symlink_metadata(&p).is_err() {
            break;
        }
        if same_bytes(src, &p) {
            fs::remove_file(src)?;
            return Ok(p);
        }
    }
    let tmp = dir.join(fitted(&format!(".{name}"), ".part", max));
    let copied = fs::copy(src, &tmp).and_then(|_| File::open(&tmp)?.sync_all());
    if let Err(e) = copied {
        let _ = fs::remove_file(&tmp);
        return Err(e);
    }
    let target = loop {
        let target = candidates(dir, name, max)
            .find(|p| fs::symlink_metadata(p).is_err())
            .expect("some name is free");
        match fs::hard_link(&tmp, &target) {
            Ok(()) => break target,
            Err(e) if e.kind() == io::ErrorKind::AlreadyExists => continue,
            Err(e) => {
                let _ = fs::remove_file(&tmp);
                return Err(e);
            }
        }
    };
    let _ = fs::remove_file(&tmp);
    sync_dir(dir)?;
    if let Err(e) = fs::remove_file(src) {
        // The original stays: take the copy back, so the next try does
        // not leave another.
        let _ = fs::remove_file(&target);
        return Err(e);
    }
    Ok(target)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Regression: a FIFO renamed in place of a queued frame blocked a
    /// worker in open() forever.
    #[test]
    fn a_fifo_or_a_folder_is_refused_without_blocking() {
        let d = tempfile::tempdir().unwrap();
        let fifo = d.path().join("frame.pbm");
        let c = std::ffi::CString::new(fifo.as_os_str().as_encoded_bytes()).unwrap();
        // SAFETY: mkfifo with a valid NUL-terminated path.
        assert_eq!(unsafe { libc::mkfifo(c.as_ptr(), 0o600) }, 0);
        // Nothing writes to it: a blocking open would never return.
        let (e, stamp) = read_bounded(&fifo, 100, &|| "a frame".into()).unwrap_err();
        assert!(e.to_string().contains("FIFO"), "{e}");
        assert!(e.to_string().contains("frame.pbm"), "{e}");
        assert!(stamp.is_some());
        let (e, _) = read_bounded(d.path(), 100, &|| "a frame".into()).unwrap_err();
        assert!(e.to_string().contains("a folder"), "{e}");
    }

    /// Regression (a fault probe: a 255-byte name could not take a `-2`
    /// suffix and stayed in the inbox forever).
    #[test]
    fn a_name_too_long_for_a_suffix_is_shortened() {
        let d = tempfile::tempdir().unwrap();
        let (inbox, archive) = (d.path().join("in"), d.path().join("ar"));
        fs::create_dir_all(&inbox).unwrap();
        fs::create_dir_all(&archive).unwrap();
        // 251 bytes of stem, some of them two-byte characters, and ".pbm".
        let name = format!("{}{}.pbm", "é".repeat(100), "x".repeat(51));
        assert_eq!(name.len(), 255);
        let mut went = Vec::new();
        for k in 0..3 {
            fs::write(inbox.join(&name), format!("{k}")).unwrap();
            went.push(move_into(&inbox.join(&name), &archive).unwrap());
        }
        let names: Vec<String> = went
            .iter()
            .map(|p| p.file_name().unwrap().to_str().unwrap().to_string())
            .collect();
        assert_eq!(names[0], name);
        assert!(
            names[1].ends_with("-2.pbm") && names[2].ends_with("-3.pbm"),
            "{names:?}"
        );
        assert!(names.iter().all(|n| n.len() <= NAME_MAX));
        for (k, p) in went.iter().enumerate() {
            assert_eq!(fs::read_to_string(p).unwrap(), k.to_string());
        }
        // With room kept for a companion file's ending.
        fs::write(inbox.join(&name), "x").unwrap();
        let p = move_into_max(&inbox.join(&name), &archive, NAME_MAX - 11).unwrap();
        assert!(p.file_name().unwrap().len() <= NAME_MAX - 11);
    }

    /// The copy a move across filesystems makes: whole under its name, no
    /// temporary left, the original gone; a copy an interrupted earlier
    /// try left is taken as the move rather than copied again (a fault
    /// probe found a second copy, `-2`, after a kill between copy and
    /// delete). Called directly, as a rename within one filesystem never
    /// needs it.
    #[test]
    fn a_copy_across_filesystems_is_whole_and_never_doubled() {
        let d = tempfile::tempdir().unwrap();
        let (inbox, archive) = (d.path().join("in"), d.path().join("ar"));
        fs::create_dir_all(&inbox).unwrap();
        fs::create_dir_all(&archive).unwrap();
        fs::write(inbox.join("a.pbm"), "frame a").unwrap();
        let p = copy_across(&inbox.join("a.pbm"), &archive, "a.pbm", NAME_MAX).unwrap();
        assert_eq!(p, archive.join("a.pbm"));
        assert_eq!(fs::read_to_string(&p).unwrap(), "frame a");
        assert!(!inbox.join("a.pbm").exists());
        // A kill after the copy, before the delete: the frame is in both.
        fs::write(inbox.join("a.pbm"), "frame a").unwrap();
        let p = copy_across(&inbox.join("a.pbm"), &archive, "a.pbm", NAME_MAX).unwrap();
        assert_eq!(p, archive.join("a.pbm"));
        assert!(!inbox.join("a.pbm").exists());
        // Another frame of that name is a new file.
        fs::write(inbox.join("a.pbm"), "frame a, later").unwrap();
        let p = copy_across(&inbox.join("a.pbm"), &archive, "a.pbm", NAME_MAX).unwrap();
        assert_eq!(p, archive.join("a-2.pbm"));
        let mut names: Vec<_> = fs::read_dir(&archive)
            .unwrap()
            .map(|e| e.unwrap().file_name().into_string().unwrap())
            .collect();
        names.sort();
        assert_eq!(names, ["a-2.pbm", "a.pbm"]);
    }

    /// A real move across filesystems (the temporary folder and
    /// `/dev/shm`, where they differ).
    #[test]
    fn a_move_across_filesystems_copies_then_deletes() {
        let here = tempfile::tempdir().unwrap();
        let Ok(there) = tempfile::tempdir_in("/dev/shm") else {
            eprintln!("skipped: no /dev/shm to move across to");
            return;
        };
        let dev = |p: &Path| fs::metadata(p).unwrap().dev();
        if dev(here.path()) == dev(there.path()) {
            eprintln!("skipped: /dev/shm is on the temporary folder's filesystem");
            return;
        }
        fs::write(here.path().join("b.pbm"), "frame b").unwrap();
        let p = move_into(&here.path().join("b.pbm"), there.path()).unwrap();
        assert_eq!(fs::read_to_string(&p).unwrap(), "frame b");
        assert!(!here.path().join("b.pbm").exists());
        assert_eq!(fs::read_dir(there.path()).unwrap().count(), 1);
    }

    /// A symbolic link put where a file was is refused by the daemon's
    /// reader (never followed), and read through by the commands' reader.
    #[test]
    fn the_daemon_never_follows_a_symbolic_link() {
        let d = tempfile::tempdir().unwrap();
        std::fs::write(d.path().join("secret"), "P1 1 1 1").unwrap();
        let link = d.path().join("frame.pbm");
        std::os::unix::fs::symlink(d.path().join("secret"), &link).unwrap();
        let (e, stamp) = read_bounded_in_place(&link, 100, &|| "a frame".into()).unwrap_err();
        assert!(e.to_string().contains("symbolic link"), "{e}");
        assert!(stamp.is_some());
        assert!(read_bounded(&link, 100, &|| "a frame".into()).is_ok());
    }

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
        let read = read_bounded(&p, 100, &|| "a frame".into()).unwrap();
        assert_eq!(read.bytes, b"P1 1 1 0");
        assert_eq!(Stamp::now(&p).unwrap(), read.stamp);
        // Replaced by rename under the same name: another inode.
        fs::write(d.path().join("g"), "P1 1 1 1").unwrap();
        fs::rename(d.path().join("g"), &p).unwrap();
        assert_ne!(Stamp::now(&p).unwrap(), read.stamp);
        // An empty file: an error, but with its stamp, so filling it later
        // shows as a change.
        let e_path = d.path().join("e.pbm");
        fs::write(&e_path, "").unwrap();
        let (e, stamp) = read_bounded(&e_path, 100, &|| "a frame".into()).unwrap_err();
        assert!(
            e.to_string().contains("empty") && e.to_string().contains("e.pbm"),
            "{e}"
        );
        fs::write(&e_path, "P1 1 1 0").unwrap();
        assert!(stamp.is_some());
        assert_ne!(Stamp::now(&e_path).ok(), stamp);
    }

    #[test]
    fn reads_stop_at_the_bound() {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("big.pbm");
        fs::write(&p, vec![b'1'; 101]).unwrap();
        let (e, _) = read_bounded(&p, 100, &|| "a frame of at most 10x10".into()).unwrap_err();
        let msg = e.to_string();
        assert!(
            msg.contains("big.pbm") && msg.contains("101 bytes") && msg.contains("10x10"),
            "{msg}"
        );
        assert!(read_bounded(d.path(), 100, &|| "a frame".into()).is_err());
    }

    #[test]
    fn atomic_writes_replace_whole_files_and_leave_no_temporary() {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("sub").join("model.json");
        write_atomic(&p, b"one").unwrap();
        write_atomic(&p, b"two").unwrap();
        assert_eq!(fs::read(&p).unwrap(), b"two");
        let names: Vec<_> = fs::read_dir(p.parent().unwrap())
            .unwrap()
            .map(|e| e.unwrap().file_name())
            .collect();
        assert_eq!(names, ["model.json"]);
        // A target that is a folder fails, and the temporary file goes.
        let dir_target = d.path().join("taken");
        fs::create_dir_all(dir_target.join("x")).unwrap();
        assert!(write_atomic(&dir_target, b"x").is_err());
        assert!(!d.path().join(".taken.tmp").exists());
    }
}
