//! The detection log: JSON Lines, one [`FrameRecord`] per line, in
//! `logs/detections.jsonl`, rotated by size into
//! `logs/detections-YYYYMMDDTHHMMSS_nnnnnnnnnZ.jsonl` (UTC to the
//! nanosecond, so names sort by age); the newest `keep_files` files are
//! kept, the current one included, and older ones deleted.
//!
//! Durability is the point of this module. A record is *durable* once the
//! file has been synced after it; the daemon moves a frame out of the inbox
//! only then. The log is the single source of truth for that: each record
//! is appended with a ticket (the caller's note of which frame it was), and
//! [`DetectionLog::sync`] hands the tickets back as [`Settled`] — durable,
//! or lost (cut off again after a failed sync). A rotation syncs the full
//! file before renaming it, so its records become durable there and their
//! tickets come back as durable with the next sync, whatever that sync
//! does to the new file's records. After a crash the file may end in a partial line (the write
//! of a record that was never durable): [`DetectionLog::open`] cuts it off
//! and reads back, from the current file and every kept rotated one, the
//! hashes of the records of the frames still in the inbox, so such a frame
//! is archived, not logged twice. Records are written with one `write` call
//! each, so a crash leaves at most the last line partial.
//!
//! The log must still be where readers look for it. After every sync (and
//! before a rotation renames it) the path is checked to name the open file
//! (same device and inode, not unlinked): a log deleted, renamed or
//! replaced while open would otherwise take records no reader ever sees
//! while their frames are archived. When it does not, the records written
//! since the last check are cut off the old file and come back as lost
//! (their frames stay in the inbox and are logged again), and a new file is
//! started at the path.

use std::collections::HashSet;
use std::fs::{self, File, OpenOptions};
use std::io::{self, Read, Seek, SeekFrom, Write};
use std::path::{Path, PathBuf};
use std::time::SystemTime;

use super::faults::{Fault, Faults};
use crate::fileio::durable::sync_dir;
use crate::record::FrameRecord;

/// The current log file's name.
pub const CURRENT: &str = "detections.jsonl";

/// A logged frame: its name and the SHA-256 of its bytes.
pub type Key = (String, String);

/// The tickets of records whose fate is known: made durable, or cut off
/// again (never logged, as far as anyone reading the log can tell).
#[derive(Debug)]
pub struct Settled<T> {
    pub durable: Vec<T>,
    pub lost: Vec<T>,
}

impl<T> Default for Settled<T> {
    fn default() -> Self {
        Settled {
            durable: Vec::new(),
            lost: Vec::new(),
        }
    }
}

/// The open detection log. `T` is the caller's ticket for a record.
#[derive(Debug)]
pub struct DetectionLog<T> {
    dir: PathBuf,
    file: File,
    size: u64,
    rotate_bytes: u64,
    keep_files: usize,
    /// The file's length at the last successful sync.
    synced_size: u64,
    /// Tickets of the records in the current file since its last sync.
    unsynced: Vec<T>,
    /// Tickets settled (by a rotation's sync, or a failure) and not yet
    /// handed back.
    settled: Settled<T>,
    faults: Faults,
    /// Set when the file could not be put back in order (a cut after a
    /// failed write or sync failed, or a rotation stopped half-way): every
    /// later append fails, and the daemon must stop and open the log again.
    broken: Option<String>,
    /// The logs folder's device and inode as last seen, and the lock on a
    /// folder made again (or put in its place) while running: the one
    /// taken at start stays with the folder it was taken on.
    dir_id: (u64, u64),
    relocked: Option<super::files::FolderLocks>,
}

/// A folder's device and inode.
fn dir_id(dir: &Path) -> io::Result<(u64, u64)> {
    use std::os::unix::fs::MetadataExt;
    let m = fs::metadata(dir)?;
    Ok((m.dev(), m.ino()))
}

impl<T> DetectionLog<T> {
    /// Opens (or creates) the log in `dir`, cutting off a partial last
    /// line, and returns it with the keys of the records, in the current
    /// file and every kept rotated one, of the frames named in `wanted`
    /// (those waiting in the inbox).
    pub fn open(
        dir: &Path,
        rotate_bytes: u64,
        keep_files: usize,
        wanted: &HashSet<String>,
        faults: Faults,
    ) -> io::Result<(Self, HashSet<Key>)> {
        fs::create_dir_all(dir)?;
        let path = dir.join(CURRENT);
        let (file, size) = open_current(dir)?;
        let mut keys = HashSet::new();
        if !wanted.is_empty() {
            // Every kept file, not only the newest rotated one: with a
            // small `rotate_bytes` and batched syncs, a kill can leave a
            // frame whose record was made durable by a rotation several
            // files back still in the inbox (a fault probe found 22 of 40
            // frames logged twice when only two files were read).
            read_keys(&path, wanted, &mut keys)?;
            for prev in rotated(dir)? {
                read_keys(&prev, wanted, &mut keys)?;
            }
        }
        Ok((
            DetectionLog {
                dir: dir.to_path_buf(),
                file,
                size,
                rotate_bytes,
                keep_files,
                synced_size: size,
                unsynced: Vec::new(),
                settled: Settled::default(),
                faults,
                broken: None,
                dir_id: dir_id(dir)?,
                relocked: None,
            },
            keys,
        ))
    }

    /// Appends one record, not yet durable: see [`DetectionLog::append_line`].
    #[cfg(test)]
    pub fn append(&mut self, record: &FrameRecord, ticket: T) -> Result<(), (io::Error, T)> {
        match line_of(record) {
            Ok(line) => self.append_line(line, ticket),
            Err(e) => Err((e, ticket)),
        }
    }

    /// Appends one record's line (from [`line_of`]), not yet durable: its
    /// ticket comes back from a later [`DetectionLog::sync`]. Rotates first
    /// when the file is full. On failure nothing of this record is in the
    /// log, and the ticket is handed back with the error.
    pub fn append_line(&mut self, line: Vec<u8>, ticket: T) -> Result<(), (io::Error, T)> {
        if let Some(why) = &self.broken {
            return Err((io::Error::other(why.clone()), ticket));
        }
        if self.size > 0 && self.size + line.len() as u64 > self.rotate_bytes {
            if let Err(e) = self.rotate() {
                return Err((e, ticket));
            }
        }
        let written = self
            .faults
            .check(Fault::Write, &self.dir)
            .and_then(|()| self.file.write_all(&line));
        if let Err(e) = written {
            // A record written in part (disk full) is cut off again, so the
            // next one starts on a line of its own.
            if let Err(cut) = self.file.set_len(self.size) {
                self.broken = Some(format!(
                    "a write failed ({e}) and the partial record could not be cut off ({cut})"
                ));
            }
            return Err((e, ticket));
        }
        self.size += line.len() as u64;
        self.unsynced.push(ticket);
        Ok(())
    }

    /// Whether any ticket waits to be handed back by [`DetectionLog::sync`].
    pub fn has_pending(&self) -> bool {
        !self.unsynced.is_empty() || self.has_settled()
    }

    /// Whether tickets whose fate is known (a rotation made their records
    /// durable, or a failure cut them off) wait to be handed back.
    pub fn has_settled(&self) -> bool {
        !self.settled.durable.is_empty() || !self.settled.lost.is_empty()
    }

    /// Hands back the tickets whose fate is already known, without syncing.
    pub fn take_settled(&mut self) -> Settled<T> {
        std::mem::take(&mut self.settled)
    }

    /// Why the log cannot go on, if it cannot: the caller must stop and
    /// open it again (opening cuts a partial last line and syncs).
    pub fn broken(&self) -> Option<&str> {
        self.broken.as_deref()
    }

    /// Records appended since the last sync, in the current file.
    pub fn unsynced(&self) -> usize {
        self.unsynced.len()
    }

    /// Makes every record appended so far durable, and hands back every
    /// ticket whose fate is now known, with the sync's error if it failed.
    /// After a failed sync the records written since the last good one are
    /// cut off again and their tickets come back as lost: the caller must
    /// treat them as never logged.
    pub fn sync(&mut self) -> (Settled<T>, Option<io::Error>) {
        let mut error = None;
        if !self.unsynced.is_empty() {
            match self.sync_file().and_then(|()| self.check_named()) {
                Ok(()) => {
                    self.synced_size = self.size;
                    self.settled.durable.append(&mut self.unsynced);
                }
                Err(e) => {
                    self.cut_unsynced();
                    error = Some(e);
                }
            }
        }
        (std::mem::take(&mut self.settled), error)
    }

    /// The logs folder deleted (or replaced) while running: made again if
    /// gone, and locked anew if it is not the folder locked before. Said.
    fn folder_back(&mut self) {
        if let Err(e) = fs::symlink_metadata(&self.dir) {
            if e.kind() == io::ErrorKind::NotFound {
                match fs::create_dir_all(&self.dir) {
                    Ok(()) => tracing::warn!(
                        "the logs folder {} was gone: made again",
                        self.dir.display()
                    ),
                    Err(e) => {
                        tracing::error!(
                            "the logs folder {} is gone and cannot be made again: {e}",
                            self.dir.display()
                        );
                        return;
                    }
                }
            }
        }
        let Ok(id) = dir_id(&self.dir) else { return };
        if id == self.dir_id {
            return;
        }
        self.dir_id = id;
        match super::files::FolderLocks::acquire(&[("folders.logs", &self.dir)]) {
            Ok(lock) => {
                self.relocked = Some(lock);
                tracing::info!("the logs folder {} is locked anew", self.dir.display());
            }
            Err(e) => tracing::error!("{e}"),
        }
    }

    /// Checks that the log's path still names the open file; when it does
    /// not (deleted, renamed or replaced), starts a new file there and
    /// fails, so the caller cuts the records since the last check off the
    /// old one as lost.
    fn check_named(&mut self) -> io::Result<()> {
        use std::os::unix::fs::MetadataExt;
        let open = self.file.metadata()?;
        let path = self.dir.join(CURRENT);
        let named = open.nlink() > 0
            && match fs::symlink_metadata(&path) {
                Ok(m) => m.dev() == open.dev() && m.ino() == open.ino(),
                Err(e) if e.kind() == io::ErrorKind::NotFound => false,
                Err(e) => return Err(e),
            };
        if named {
            return Ok(());
        }
        // The records since the last good sync are cut off the old file
        // (still open, wherever it went) before the handle is replaced.
        self.cut_unsynced_back();
        self.folder_back();
        match open_current(&self.dir) {
            Ok((file, size)) => {
                self.file = file;
                self.size = size;
                self.synced_size = size;
                // An incident, said each time it happens (the failing sync
                // it causes is said as a run of failures).
                tracing::warn!(
                    "the detection log was deleted, renamed or replaced: {}; a new one is started there",
                    path.display()
                );
                Err(io::Error::other(format!(
                    "{} was deleted, renamed or replaced while the daemon wrote to it; \
                     a new log is started there and the records not yet durable are written again",
                    path.display()
                )))
            }
            Err(e) => {
                self.broken = Some(format!(
                    "{} was deleted, renamed or replaced while the daemon wrote to it, \
                     and a new log cannot be started there ({e})",
                    path.display()
                ));
                Err(e)
            }
        }
    }

    /// Cuts the open file back to its last good sync (the caller settles
    /// the tickets).
    fn cut_unsynced_back(&mut self) {
        let _ = self.file.set_len(self.synced_size);
        self.size = self.synced_size;
    }

    fn sync_file(&mut self) -> io::Result<()> {
        self.faults.check(Fault::Sync, &self.dir)?;
        self.file.sync_data()
    }

    /// Cuts the records since the last good sync off again; their tickets
    /// are lost.
    fn cut_unsynced(&mut self) {
        if let Err(e) = self.file.set_len(self.synced_size) {
            // The records stay in the file: a later sync would make them
            // durable although their frames were told they were lost.
            self.broken = Some(format!(
                "records that could not be synced could not be cut off ({e})"
            ));
        }
        self.size = self.synced_size;
        self.settled.lost.append(&mut self.unsynced);
    }

    /// Syncs the current file and closes it under a time-stamped name,
    /// starts a new one, and deletes the oldest files past `keep_files`.
    /// The old file's records are durable once its sync succeeded, whatever
    /// happens after.
    fn rotate(&mut self) -> io::Result<()> {
        let synced = self
            .faults
            .check(Fault::Rotate, &self.dir)
            .and_then(|()| self.file.sync_data())
            .and_then(|()| self.check_named());
        if let Err(e) = synced {
            self.cut_unsynced();
            return Err(e);
        }
        self.synced_size = self.size;
        self.settled.durable.append(&mut self.unsynced);
        // UTC to the nanosecond: names of one length, so they sort by age.
        let stamp = humantime::format_rfc3339_nanos(SystemTime::now())
            .to_string()
            .replace(['-', ':'], "")
            .replace('.', "_");
        let mut target = self.dir.join(format!("detections-{stamp}.jsonl"));
        let mut k = 1;
        while target.exists() {
            target = self.dir.join(format!("detections-{stamp}-{k}.jsonl"));
            k += 1;
        }
        fs::rename(self.dir.join(CURRENT), &target)?;
        // From here on the rotation must finish: the handle still writes
        // to the renamed file.
        let reopened = OpenOptions::new()
            .read(true)
            .append(true)
            .create(true)
            .open(self.dir.join(CURRENT))
            .and_then(|f| sync_dir(&self.dir).map(|()| f));
        match reopened {
            Ok(f) => {
                self.file = f;
                self.size = 0;
                self.synced_size = 0;
            }
            Err(e) => {
                self.broken = Some(format!(
                    "the full log was renamed to {} but a new one could not be started ({e})",
                    target.display()
                ));
                return Err(e);
            }
        }
        // Old files past `keep_files`: a failure here is tried again at the
        // next rotation.
        if let Ok(old) = rotated(&self.dir) {
            let excess = (old.len() + 1).saturating_sub(self.keep_files);
            for p in old.iter().take(excess) {
                if let Err(e) = fs::remove_file(p) {
                    tracing::warn!(file = %p.display(), "cannot delete an old detection log: {e}");
                }
            }
        }
        Ok(())
    }
}

/// A record as one line of the log, newline included.
pub fn line_of(record: &FrameRecord) -> io::Result<Vec<u8>> {
    let mut line = serde_json::to_vec(record).map_err(io::Error::other)?;
    line.push(b'\n');
    Ok(line)
}

/// The rotated log files in `dir`, oldest first.
pub fn rotated(dir: &Path) -> io::Result<Vec<PathBuf>> {
    let mut v: Vec<PathBuf> = fs::read_dir(dir)?
        .filter_map(|e| e.ok())
        .map(|e| e.path())
        .filter(|p| {
            p.file_name()
                .and_then(|n| n.to_str())
                .is_some_and(|n| n.starts_with("detections-") && n.ends_with(".jsonl"))
        })
        .collect();
    v.sort();
    Ok(v)
}

/// Opens (or creates) `dir/CURRENT` for appending, cuts a partial last
/// line, and syncs it: records a killed daemon wrote may still be only in
/// memory, and must be durable before their frames are archived as already
/// logged. Returns the file and its length.
fn open_current(dir: &Path) -> io::Result<(File, u64)> {
    let path = dir.join(CURRENT);
    let created = !path.exists();
    let mut file = OpenOptions::new()
        .read(true)
        .append(true)
        .create(true)
        .open(&path)?;
    if created {
        sync_dir(dir)?;
    }
    let size = cut_partial_line(&mut file)?;
    file.sync_data()?;
    Ok((file, size))
}

/// Truncates a file that does not end in a newline back to its last
/// newline; returns the new length.
fn cut_partial_line(file: &mut File) -> io::Result<u64> {
    let len = file.metadata()?.len();
    if len == 0 {
        return Ok(0);
    }
    let mut end = len;
    let mut buf = vec![0u8; 64 * 1024];
    loop {
        let start = end.saturating_sub(buf.len() as u64);
        let n = (end - start) as usize;
        file.seek(SeekFrom::Start(start))?;
        file.read_exact(&mut buf[..n])?;
        if end == len && buf[n - 1] == b'\n' {
            return Ok(len);
        }
        if let Some(i) = buf[..n].iter().rposition(|&b| b == b'\n') {
            let keep = start + i as u64 + 1;
            file.set_len(keep)?;
            file.sync_data()?;
            return Ok(keep);
        }
        if start == 0 {
            file.set_len(0)?;
            file.sync_data()?;
            return Ok(0);
        }
        end = start;
    }
}

/// Adds the (frame, sha256) of the records in the log file at `path` whose
/// frame is in `wanted`, reading line by line. Lines that do not parse
/// (written by another version, or damaged) are passed over.
fn read_keys(path: &Path, wanted: &HashSet<String>, keys: &mut HashSet<Key>) -> io::Result<()> {
    use std::io::BufRead;
    #[derive(serde::Deserialize)]
    struct KeyOnly {
        frame: String,
        sha256: String,
    }
    let mut reader = io::BufReader::new(File::open(path)?);
    let mut line = Vec::new();
    loop {
        line.clear();
        if reader.read_until(b'\n', &mut line)? == 0 {
            return Ok(());
        }
        if let Ok(k) = serde_json::from_slice::<KeyOnly>(&line) {
            if wanted.contains(&k.frame) {
                keys.insert((k.frame, k.sha256));
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn rec(name: &str, hash: &str) -> FrameRecord {
        FrameRecord {
            time: "2026-12-02T10:00:00.000Z".into(),
            frame: name.into(),
            sha256: hash.into(),
            width: 4,
            height: 4,
            model_version: 1,
            model_hash: "0123456789ab".into(),
            millis: 0.5,
            objects: vec![],
        }
    }

    /// Regression: a log deleted or renamed while open took every later
    /// record into a file no reader saw, while the frames were archived.
    #[test]
    fn a_log_deleted_or_renamed_while_open_loses_no_record() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join(CURRENT);
        let (mut log, _) =
            DetectionLog::<u32>::open(dir.path(), 1 << 20, 3, &HashSet::new(), Faults::none())
                .unwrap();
        log.append(&rec("a.pbm", "1"), 1).unwrap();
        let (s, e) = log.sync();
        assert!(e.is_none());
        assert_eq!(s.durable, [1]);
        for (how, ticket) in [("deleted", 2u32), ("renamed", 3)] {
            match how {
                "deleted" => fs::remove_file(&path).unwrap(),
                _ => fs::rename(&path, dir.path().join("elsewhere.jsonl")).unwrap(),
            }
            log.append(&rec("b.pbm", "2"), ticket).unwrap();
            let (s, e) = log.sync();
            // Not durable where readers look: lost, so the frame stays in
            // the inbox, and a new log is started at the path.
            assert_eq!(s.lost, [ticket], "{how}");
            assert!(s.durable.is_empty(), "{how}");
            let why = e.unwrap().to_string();
            assert!(why.contains("deleted, renamed or replaced"), "{why}");
            assert!(path.exists(), "{how}");
            assert!(log.broken().is_none());
            // Logged again, it is durable in the new file.
            log.append(&rec("b.pbm", "2"), ticket + 10).unwrap();
            let (s, e) = log.sync();
            assert!(e.is_none(), "{how}");
            assert_eq!(s.durable, [ticket + 10]);
            let text = fs::read_to_string(&path).unwrap();
            assert_eq!(text.lines().count(), 1, "{how}: {text}");
            assert!(text.contains("b.pbm"));
        }
        // The renamed file kept only what was durable in it.
        let moved = fs::read_to_string(dir.path().join("elsewhere.jsonl")).unwrap();
        assert_eq!(moved.lines().count(), 1, "{moved}");
        // A file put in its place is taken as the log (its partial last
        // line cut), and the records since the last check go there again.
        fs::remove_file(&path).unwrap();
        fs::write(&path, "{\"frame\":\"x.pbm\"}\n{\"fra").unwrap();
        log.append(&rec("c.pbm", "3"), 7).unwrap();
        let (s, _) = log.sync();
        assert_eq!(s.lost, [7]);
        assert_eq!(
            fs::read_to_string(&path).unwrap(),
            "{\"frame\":\"x.pbm\"}\n"
        );
    }

    /// Regression (a fault probe: with the smallest `log.rotate_bytes`
    /// and batched syncs, kills doubled 22 of 40 frames): a frame still in
    /// the inbox whose record is several rotated files back is found.
    #[test]
    fn keys_are_read_back_from_every_kept_file() {
        let dir = tempfile::tempdir().unwrap();
        let (mut log, _) =
            DetectionLog::open(dir.path(), 4096, 100, &HashSet::new(), Faults::none()).unwrap();
        for i in 0..100 {
            log.append(&rec(&format!("frame-{i:04}.pbm"), &format!("{i:02x}")), ())
                .unwrap();
        }
        assert!(log.sync().1.is_none());
        drop(log);
        assert!(rotated(dir.path()).unwrap().len() >= 4);
        let wanted: HashSet<String> = ["frame-0001.pbm", "frame-0050.pbm", "frame-0099.pbm"]
            .map(String::from)
            .into();
        let (_, keys) =
            DetectionLog::<()>::open(dir.path(), 4096, 100, &wanted, Faults::none()).unwrap();
        assert_eq!(keys.len(), 3, "{keys:?}");
        assert!(keys.contains(&("frame-0001.pbm".to_string(), "01".to_string())));
    }

    #[test]
    fn partial_last_line_is_cut_and_keys_read_back() {
        let dir = tempfile::tempdir().unwrap();
        let wanted: HashSet<String> = ["a.pbm", "b.pbm", "c.pbm"].map(String::from).into();
        let (mut log, keys) =
            DetectionLog::open(dir.path(), 1 << 20, 3, &wanted, Faults::none()).unwrap();
        assert!(keys.is_empty());
        log.append(&rec("a.pbm", "aa"), ()).unwrap();
        log.append(&rec("b.pbm", "bb"), ()).unwrap();
        assert!(log.sync().1.is_none());
        drop(log);
        // A crash in the middle of the third record.
        let path = dir.path().join(CURRENT);
        let mut f = OpenOptions::new().append(true).open(&path).unwrap();
        f.write_all(b"{\"time\":\"2026-12-02T10:00:01.000Z\",\"frame\":\"c.p")
            .unwrap();
        drop(f);
        let (log, keys) =
            DetectionLog::<()>::open(dir.path(), 1 << 20, 3, &wanted, Faults::none()).unwrap();
        let want: HashSet<Key> = [("a.pbm", "aa"), ("b.pbm", "bb")]
            .iter()
            .map(|(a, b)| (a.to_string(), b.to_string()))
            .collect();
        assert_eq!(keys, want);
        drop(log);
        let text = fs::read_to_string(&path).unwrap();
        assert_eq!(text.lines().count(), 2);
        assert!(text.ends_with('\n'));
    }

    #[test]
    fn rotation_keeps_the_newest_files() {
        let dir = tempfile::tempdir().unwrap();
        let (mut log, _) =
            DetectionLog::open(dir.path(), 4096, 3, &HashSet::new(), Faults::none()).unwrap();
        for i in 0..200 {
            log.append(&rec(&format!("frame-{i:04}.pbm"), "00"), i)
                .unwrap();
        }
        let (settled, err) = log.sync();
        assert!(err.is_none() && settled.lost.is_empty());
        assert_eq!(settled.durable, (0..200).collect::<Vec<_>>());
        let old = rotated(dir.path()).unwrap();
        assert_eq!(old.len(), 2, "{old:?}");
        // Every kept file is whole JSON Lines, and the newest records are
        // in the current file.
        let mut total = 0;
        for p in old.iter().chain([&dir.path().join(CURRENT)]) {
            let text = fs::read_to_string(p).unwrap();
            assert!(fs::metadata(p).unwrap().len() <= 4096);
            for line in text.lines() {
                serde_json::from_str::<FrameRecord>(line).unwrap();
                total += 1;
            }
        }
        assert!(total < 200);
        let last = fs::read_to_string(dir.path().join(CURRENT)).unwrap();
        assert!(last.lines().last().unwrap().contains("frame-0199.pbm"));
        // Keys are read back for the frames asked about only, from every
        // kept file (frame-0000's record was in a file deleted since).
        drop(log);
        let wanted: HashSet<String> = ["frame-0199.pbm", "frame-0000.pbm"]
            .map(String::from)
            .into();
        let (_, keys) =
            DetectionLog::<()>::open(dir.path(), 4096, 3, &wanted, Faults::none()).unwrap();
        assert_eq!(keys.len(), 1);
        assert!(keys.contains(&("frame-0199.pbm".to_string(), "00".to_string())));
    }

    /// Issue "Make room for the learning loop", first bug: a failed sync
    /// right after a rotation must not report the records the rotation
    /// made durable as lost (their frames would be logged a second time).
    #[test]
    fn a_failed_sync_after_a_rotation_keeps_the_rotated_records_durable() {
        let dir = tempfile::tempdir().unwrap();
        // The rotation syncs the full file (counted as the rotation); the
        // first sync asked for after it fails.
        let faults = Faults::plan(|op, n, _| op == Fault::Sync && n == 0);
        let (mut log, _) =
            DetectionLog::open(dir.path(), 4096, 5, &HashSet::new(), faults).unwrap();
        let mut i = 0;
        while rotated(dir.path()).unwrap().is_empty() {
            log.append(&rec(&format!("frame-{i:04}.pbm"), "00"), i)
                .unwrap();
            i += 1;
        }
        // The last append rotated: every record before it is in the rotated
        // file, synced; the last one is alone in the new file.
        let (settled, err) = log.sync();
        assert!(err.is_some(), "the planned failure");
        assert_eq!(settled.durable, (0..i - 1).collect::<Vec<_>>());
        assert_eq!(settled.lost, [i - 1]);
        // What the log holds agrees: the rotated file has the durable ones,
        // the current file nothing.
        let old = std::fs::read_to_string(&rotated(dir.path()).unwrap()[0]).unwrap();
        assert_eq!(old.lines().count(), i - 1);
        assert_eq!(
            std::fs::metadata(dir.path().join(CURRENT)).unwrap().len(),
            0
        );
        // A failed write and a failed rotation hand the ticket back.
        let faults = Faults::plan(|op, _, _| op == Fault::Write);
        let (mut log, _) =
            DetectionLog::open(dir.path(), 1 << 20, 5, &HashSet::new(), faults).unwrap();
        assert_eq!(log.append(&rec("x.pbm", "11"), 7).unwrap_err().1, 7);
        assert!(!log.has_pending());
    }

    #[test]
    fn a_failed_rotation_cuts_the_full_files_unsynced_records_off() {
        let dir = tempfile::tempdir().unwrap();
        let faults = Faults::plan(|op, _, _| op == Fault::Rotate);
        let (mut log, _) =
            DetectionLog::open(dir.path(), 4096, 5, &HashSet::new(), faults).unwrap();
        // Two records synced, then records until the next one needs a
        // rotation, which fails.
        for i in 0..2 {
            log.append(&rec(&format!("frame-{i:04}.pbm"), "00"), i)
                .unwrap();
        }
        let (settled, err) = log.sync();
        assert!(err.is_none() && settled.durable == [0, 1]);
        let synced = std::fs::metadata(dir.path().join(CURRENT)).unwrap().len();
        let mut i = 2;
        let failed = loop {
            match log.append(&rec(&format!("frame-{i:04}.pbm"), "00"), i) {
                Ok(()) => i += 1,
                Err((_, ticket)) => break ticket,
            }
        };
        assert_eq!(failed, i, "the record that needed the rotation comes back");
        let settled = log.take_settled();
        assert!(settled.durable.is_empty());
        assert_eq!(settled.lost, (2..i).collect::<Vec<_>>());
        // The file holds the synced records only, and nothing rotated.
        assert_eq!(
            std::fs::metadata(dir.path().join(CURRENT)).unwrap().len(),
            synced
        );
        assert!(rotated(dir.path()).unwrap().is_empty());
        assert!(log.broken().is_none());
    }
}
