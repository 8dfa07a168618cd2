//! Intake: a watched folder (the inbox now; the corrections folder next),
//! which files in it are wanted, and when one is complete.
//!
//! An `Intake` owns everything about one folder: its watcher, whose
//! callback only forwards events into a bounded channel (a full channel
//! means lost events, and so a listing), the settle tracker, the queue of
//! ready files and the set of files queued or in flight, so a file is
//! never handed out twice at once. The main loop asks it for ready files
//! and tells it when one is finished.
//!
//! File events are unreliable (queues overflow, some writers never close,
//! some filesystems send nothing), so the inbox is also listed: at start,
//! periodically, and after any watcher error. A file becomes *ready* when
//! an event says its writer is done (close after write, or a rename into
//! the inbox), or, for a file no event announced, when a listing finds its
//! size and time stamp unchanged for the settle time. A file that events
//! announced as being written waits for its close event; only if that
//! never comes does it fall back to a long settle time.
//!
//! [`Settle`] is pure: the caller passes the time in, so tests need no
//! sleeping.

use std::collections::{HashMap, HashSet, VecDeque};
use std::fs;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant, SystemTime};

use crossbeam_channel::{bounded, Receiver, RecvError, Sender};
use notify::{EventKind, RecursiveMode, Watcher};
use tracing::{debug, error, info, warn};

use crate::error::{Error, Result};

/// Name endings of files being written by common tools: never frames.
const TEMP_SUFFIXES: &[&str] = &[".tmp", ".part", ".partial", ".swp", "~"];

/// Whether a file name in the inbox can be a frame: not hidden, not a
/// temporary file, and ending in one of `formats` (lower-case, no dot).
pub fn is_frame_name(name: &str, formats: &[String]) -> bool {
    if name.starts_with('.') || name.is_empty() {
        return false;
    }
    let lower = name.to_ascii_lowercase();
    if TEMP_SUFFIXES.iter().any(|s| lower.ends_with(s)) {
        return false;
    }
    match lower.rsplit_once('.') {
        Some((stem, ext)) => !stem.is_empty() && formats.iter().any(|f| f == ext),
        None => false,
    }
}

/// A frame file found by listing the inbox.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Listed {
    pub path: PathBuf,
    pub size: u64,
    pub modified: SystemTime,
}

/// Whether an entry named like a frame is taken: anything but a symbolic
/// link (never followed). A FIFO, socket, device or folder so named is
/// taken too, so the worker's read refuses it (without blocking) and it is
/// rejected with its reason rather than left in the folder unexplained.
fn takeable(ft: fs::FileType) -> bool {
    !ft.is_symlink()
}

/// The frame files directly in `dir` (symbolic links are
/// passed over), oldest first (then by name).
pub fn list(dir: &Path, formats: &[String]) -> std::io::Result<Vec<Listed>> {
    Ok(list_with_strays(dir, formats)?.0)
}

/// [`list`], and the entries whose names are not UTF-8 text (no record
/// can name them: they are left alone, and said).
pub fn list_with_strays(
    dir: &Path,
    formats: &[String],
) -> std::io::Result<(Vec<Listed>, Vec<PathBuf>)> {
    let mut out = Vec::new();
    let mut strays = Vec::new();
    for entry in fs::read_dir(dir)? {
        let Ok(entry) = entry else { continue };
        let name = entry.file_name();
        let Some(name) = name.to_str() else {
            strays.push(entry.path());
            continue;
        };
        if !is_frame_name(name, formats) {
            continue;
        }
        // `DirEntry::metadata` does not follow symbolic links.
        let Ok(meta) = entry.metadata() else { continue };
        if !takeable(meta.file_type()) {
            continue;
        }
        out.push(Listed {
            path: entry.path(),
            size: meta.len(),
            modified: meta.modified().unwrap_or(SystemTime::UNIX_EPOCH),
        });
    }
    out.sort_by(|a, b| a.modified.cmp(&b.modified).then(a.path.cmp(&b.path)));
    Ok((out, strays))
}

/// A file's size and time stamp, as last seen.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
struct Seen {
    size: u64,
    modified: SystemTime,
    /// When it was first seen with this size and stamp.
    since: Instant,
    /// An event announced it as being written: wait for its close event.
    announced: bool,
}

/// Tracks files that are not known to be complete yet.
#[derive(Debug)]
pub struct Settle {
    settle: Duration,
    /// How long an announced file may stay unchanged without its close
    /// event before it is taken anyway.
    announced_settle: Duration,
    files: HashMap<PathBuf, Seen>,
}

impl Settle {
    pub fn new(settle: Duration) -> Settle {
        Settle {
            settle,
            announced_settle: settle.max(Duration::from_secs(60)),
            files: HashMap::new(),
        }
    }

    /// An event says `path` is being written.
    pub fn announce(&mut self, path: &Path, now: Instant) {
        self.files
            .entry(path.to_path_buf())
            .and_modify(|s| {
                s.since = now;
                s.announced = true;
            })
            .or_insert(Seen {
                size: u64::MAX,
                modified: SystemTime::UNIX_EPOCH,
                since: now,
                announced: true,
            });
    }

    /// Events may have been lost: no file waits for a close event any more.
    pub fn forget_announcements(&mut self) {
        for s in self.files.values_mut() {
            s.announced = false;
        }
    }

    /// `path` is done (or gone): stop tracking it.
    pub fn remove(&mut self, path: &Path) {
        self.files.remove(path);
    }

    /// A listing saw `file`: returns true when it is ready to be read.
    pub fn observe(&mut self, file: &Listed, now: Instant) -> bool {
        let seen = self.files.entry(file.path.clone()).or_insert(Seen {
            size: file.size,
            modified: file.modified,
            since: now,
            announced: false,
        });
        if seen.size != file.size || seen.modified != file.modified {
            seen.size = file.size;
            seen.modified = file.modified;
            seen.since = now;
            return false;
        }
        let wait = if seen.announced {
            self.announced_settle
        } else {
            self.settle
        };
        if now.duration_since(seen.since) >= wait {
            self.files.remove(&file.path);
            return true;
        }
        false
    }

    /// The files being tracked.
    pub fn paths(&self) -> Vec<PathBuf> {
        self.files.keys().cloned().collect()
    }

    /// Drops files a listing no longer found.
    pub fn retain_listed(&mut self, listed: &[Listed]) {
        let keep: std::collections::HashSet<&Path> =
            listed.iter().map(|l| l.path.as_path()).collect();
        self.files.retain(|p, _| keep.contains(p.as_path()));
    }

    pub fn is_empty(&self) -> bool {
        self.files.is_empty()
    }

    /// Files settling now.
    pub fn len(&self) -> usize {
        self.files.len()
    }
}

/// The longest a file left in place waits before it is tried again.
pub const MAX_BACKOFF: Duration = Duration::from_secs(300);

/// A file left in place: how often, until when it is not taken, and the
/// size and time stamp it had (a change ends the wait).
#[derive(Clone, Copy, Debug)]
struct Backoff {
    tries: u32,
    until: Instant,
    stamp: (u64, SystemTime),
}

fn stamp_of(path: &Path) -> Option<(u64, SystemTime)> {
    let m = fs::symlink_metadata(path).ok()?;
    Some((m.len(), m.modified().unwrap_or(SystemTime::UNIX_EPOCH)))
}

/// Whether `path` names a wanted file directly in `dir`.
fn wanted(dir: &Path, formats: &[String], path: &Path) -> bool {
    path.parent() == Some(dir)
        && path
            .file_name()
            .and_then(|n| n.to_str())
            .is_some_and(|n| is_frame_name(n, formats))
}

/// A file event from the watcher, or the watcher's channel closing.
pub(super) type WatchEvent = std::result::Result<notify::Result<notify::Event>, RecvError>;

/// Events waiting between the watcher and the main loop, at most; more
/// means a listing.
const EVENT_QUEUE: usize = 4096;

/// One watched folder and the files found in it.
pub(super) struct Intake {
    /// What the folder is, for messages ("inbox").
    what: &'static str,
    dir: PathBuf,
    formats: Vec<String>,
    settle: Settle,
    ready: VecDeque<PathBuf>,
    /// Files queued or in flight: never handed out twice at once.
    known: HashSet<PathBuf>,
    /// Files finished but left in place (their move or reject failed):
    /// not taken again before their time, which doubles with each try.
    backoff: HashMap<PathBuf, Backoff>,
    /// Names that are not UTF-8 text, said once each while they stay.
    strays: HashSet<PathBuf>,
    rescan_every: Duration,
    next_rescan: Instant,
    /// Set by the watcher's callback when its channel was full.
    overflow: Arc<AtomicBool>,
    events: Receiver<notify::Result<notify::Event>>,
    _watcher: Option<notify::RecommendedWatcher>,
    /// The watcher's channel, kept to watch the folder again when it is
    /// replaced (`None`: file events are off).
    tx: Option<Sender<notify::Result<notify::Event>>>,
    /// File events arrive (false: off, or the watcher stopped).
    events_on: bool,
    /// The folder's device and inode as watched, and whether it is gone;
    /// checked every [`FOLDER_CHECK`].
    folder: Option<(u64, u64)>,
    gone: bool,
    next_folder_check: Instant,
    /// With a configuration key: the folder is locked (`files::FolderLocks`)
    /// and a folder made again is locked anew; `foreign` when another
    /// daemon holds the new one, whose files are then left alone.
    lock_key: Option<&'static str>,
    relock: Option<super::files::FolderLocks>,
    foreign: bool,
}

/// How often an intake checks that its folder is still the one it watches.
const FOLDER_CHECK: Duration = Duration::from_millis(500);

/// A watcher of `dir` sending to `tx`, setting `flag` when the channel is
/// full.
fn watcher_of(
    dir: &Path,
    tx: Sender<notify::Result<notify::Event>>,
    flag: Arc<AtomicBool>,
) -> notify::Result<notify::RecommendedWatcher> {
    let mut w = notify::recommended_watcher(move |ev| {
        if tx.try_send(ev).is_err() {
            flag.store(true, Ordering::Relaxed);
        }
    })?;
    w.watch(dir, RecursiveMode::NonRecursive)?;
    Ok(w)
}

fn folder_id(dir: &Path) -> Option<(u64, u64)> {
    use std::os::unix::fs::MetadataExt;
    fs::metadata(dir).ok().map(|m| (m.dev(), m.ino()))
}

impl Intake {
    /// Starts watching `dir` (an absolute path) for files ending in one of
    /// `formats`; with `use_events` false, files are found by listing alone.
    /// The first listing is due at once.
    pub fn open(
        what: &'static str,
        dir: &Path,
        formats: Vec<String>,
        settle: Duration,
        rescan_every: Duration,
        use_events: bool,
        now: Instant,
    ) -> Result<Intake> {
        let (tx, rx) = bounded::<notify::Result<notify::Event>>(EVENT_QUEUE);
        let overflow = Arc::new(AtomicBool::new(false));
        let flag = overflow.clone();
        let cannot = |e: notify::Error| {
            Error::daemon(format!("cannot watch the {what}: {e}")).with_path(dir)
        };
        let (watcher, events, tx) = if use_events {
            let w = watcher_of(dir, tx.clone(), flag).map_err(cannot)?;
            (Some(w), rx, Some(tx))
        } else {
            info!("file events are off: the {what} is found by listing alone");
            (None, crossbeam_channel::never(), None)
        };
        Ok(Intake {
            what,
            dir: dir.to_path_buf(),
            formats,
            settle: Settle::new(settle),
            ready: VecDeque::new(),
            known: HashSet::new(),
            backoff: HashMap::new(),
            strays: HashSet::new(),
            rescan_every,
            next_rescan: now,
            overflow,
            events,
            events_on: watcher.is_some(),
            _watcher: watcher,
            tx,
            folder: folder_id(dir),
            gone: false,
            next_folder_check: now + FOLDER_CHECK,
            lock_key: None,
            relock: None,
            foreign: false,
        })
    }

    /// The folder is locked by this daemon under configuration `key`: a
    /// folder made again in its place is locked anew.
    pub fn keep_locked(&mut self, key: &'static str) {
        self.lock_key = Some(key);
    }

    /// Checks that the folder is still the one watched. A folder deleted is
    /// said once; one made again (or replaced by another) is watched anew,
    /// said, and listed at once, so its files are not left to the next
    /// listing (a fault probe found them waiting up to a listing period,
    /// without a word).
    fn check_folder(&mut self, now: Instant) {
        if now < self.next_folder_check {
            return;
        }
        self.next_folder_check = now + FOLDER_CHECK;
        let Some(id) = folder_id(&self.dir) else {
            if !self.gone {
                warn!(
                    folder = %self.dir.display(),
                    "the {} is gone; its files are taken again once it is back", self.what
                );
                self.gone = true;
            }
            return;
        };
        if !self.gone && self.folder == Some(id) {
            return;
        }
        self.folder = Some(id);
        self.gone = false;
        self.settle.forget_announcements();
        self.next_rescan = now;
        if let Some(key) = self.lock_key {
            match super::files::FolderLocks::acquire(&[(key, &self.dir)]) {
                Ok(l) => {
                    self.relock = Some(l);
                    self.foreign = false;
                }
                Err(e) => {
                    error!("{e}; its files are left alone");
                    self.relock = None;
                    self.foreign = true;
                }
            }
        }
        let Some(tx) = &self.tx else {
            info!(folder = %self.dir.display(), "the {} is there again", self.what);
            return;
        };
        self._watcher = None;
        match watcher_of(&self.dir, tx.clone(), self.overflow.clone()) {
            Ok(w) => {
                self._watcher = Some(w);
                self.events_on = true;
                warn!(folder = %self.dir.display(), "the {} was made again or replaced; watching it anew", self.what);
            }
            Err(e) => {
                self.events_on = false;
                warn!(
                    folder = %self.dir.display(),
                    "the {} was made again or replaced and cannot be watched ({e}); it is found by listing alone", self.what
                );
            }
        }
    }

    /// Files found and not handed out yet: ready, or settling.
    pub fn waiting(&self) -> usize {
        self.ready.len() + self.settle.len()
    }

    /// Whether file events still arrive (listing goes on either way).
    pub fn events_on(&self) -> bool {
        self.events_on
    }

    /// The watcher's events, for the main loop's `select!`.
    pub fn events(&self) -> &Receiver<notify::Result<notify::Event>> {
        &self.events
    }

    /// Takes a reload's new file endings and listing period; a shorter
    /// period takes effect from now, not from the last listing's deadline.
    pub fn configure(&mut self, formats: Vec<String>, rescan_every: Duration, now: Instant) {
        self.formats = formats;
        self.rescan_every = rescan_every;
        self.next_rescan = self.next_rescan.min(now + rescan_every);
    }

    /// The names of the wanted files in the folder now (for the detection
    /// log's read-back at start).
    pub fn names(&self) -> std::io::Result<HashSet<String>> {
        Ok(list(&self.dir, &self.formats)?
            .iter()
            .filter_map(|l| l.path.file_name()?.to_str().map(String::from))
            .collect())
    }

    /// The next file ready to be read, oldest first.
    pub fn next_ready(&mut self) -> Option<PathBuf> {
        self.ready.pop_front()
    }

    /// A file handed out is finished: moved, or left in place for a later
    /// try. A file left in place is not taken again before its backoff has
    /// passed: the listing period, doubled with each try that left it, up
    /// to [`MAX_BACKOFF`], so a frame that cannot be moved (a full disk, a
    /// folder it may not leave) is tried, and said, ever more rarely rather
    /// than every listing. A file changed since is taken at once.
    pub fn finished(&mut self, path: &Path, now: Instant) {
        self.known.remove(path);
        match stamp_of(path) {
            Some(stamp) => {
                let tries = self.backoff.get(path).map_or(0, |b| b.tries) + 1;
                let wait = self
                    .rescan_every
                    .saturating_mul(1 << (tries - 1).min(16))
                    .min(MAX_BACKOFF);
                self.backoff.insert(
                    path.to_path_buf(),
                    Backoff {
                        tries,
                        until: now + wait,
                        stamp,
                    },
                );
            }
            None => {
                self.backoff.remove(path);
            }
        }
    }

    /// Whether `path` waits out a backoff now (dropped once it has passed,
    /// or the file changed).
    fn backing_off(&mut self, path: &Path, now: Instant) -> bool {
        let Some(b) = self.backoff.get(path) else {
            return false;
        };
        if now < b.until && stamp_of(path) == Some(b.stamp) {
            return true;
        }
        if stamp_of(path).is_none_or(|s| s != b.stamp) {
            self.backoff.remove(path);
        }
        false
    }

    /// Lists the folder if the watcher lost events or the period is up.
    pub fn poll(&mut self, now: Instant) {
        let lost = self.overflow.swap(false, Ordering::Relaxed);
        if lost {
            // Close events may be among those lost.
            self.settle.forget_announcements();
        }
        if now >= self.next_rescan || lost {
            self.rescan(now);
            self.next_rescan = now + self.rescan_every;
        }
    }

    /// The folder watched.
    pub fn dir(&self) -> &Path {
        &self.dir
    }

    /// Stats the files that are settling; those unchanged long enough
    /// become ready, oldest first.
    pub fn tick(&mut self, now: Instant) {
        self.check_folder(now);
        let mut done: Vec<Listed> = Vec::new();
        for path in self.settle.paths() {
            match fs::symlink_metadata(&path) {
                Ok(m) if takeable(m.file_type()) => {
                    let l = Listed {
                        path,
                        size: m.len(),
                        modified: m.modified().unwrap_or(SystemTime::UNIX_EPOCH),
                    };
                    if self.settle.observe(&l, now) {
                        done.push(l);
                    }
                }
                _ => self.settle.remove(&path),
            }
        }
        done.sort_by(|a, b| a.modified.cmp(&b.modified).then(a.path.cmp(&b.path)));
        for l in done {
            self.make_ready(l.path, now);
        }
    }

    /// Handles what the watcher sent; a watcher error or a closed channel
    /// means listing (alone, from then on, for a closed channel).
    pub fn on_watch(&mut self, ev: WatchEvent, now: Instant) {
        match ev {
            Ok(Ok(ev)) => self.on_event(ev, now),
            Ok(Err(e)) => {
                warn!("file watcher: {e}; listing the {} again", self.what);
                self.settle.forget_announcements();
                self.next_rescan = now;
            }
            Err(_) => {
                warn!(
                    "the file watcher stopped; the {} is found by listing alone",
                    self.what
                );
                self.events = crossbeam_channel::never();
                self.events_on = false;
                self.settle.forget_announcements();
                self.next_rescan = now;
            }
        }
    }

    /// Queues `path` if it is [`takeable`], not queued or in flight, and not
    /// waiting out a backoff.
    fn make_ready(&mut self, path: PathBuf, now: Instant) {
        self.settle.remove(&path);
        if self.foreign || self.backing_off(&path, now) {
            return;
        }
        let plain = fs::symlink_metadata(&path).is_ok_and(|m| takeable(m.file_type()));
        if plain && self.known.insert(path.clone()) {
            self.ready.push_back(path);
        }
    }

    fn on_event(&mut self, ev: notify::Event, now: Instant) {
        use notify::event::{AccessKind, AccessMode, CreateKind, ModifyKind, RenameMode};
        if ev.need_rescan() {
            debug!("file events were lost; listing the {} again", self.what);
            self.settle.forget_announcements();
            self.next_rescan = now;
            return;
        }
        // Events name paths under the watched folder as given to `watch`,
        // so they compare equal to paths built from the absolute folder.
        let (dir, formats) = (&self.dir, &self.formats);
        let target = |i: usize| ev.paths.get(i).filter(|p| wanted(dir, formats, p)).cloned();
        match ev.kind {
            EventKind::Access(AccessKind::Close(AccessMode::Write))
            | EventKind::Modify(ModifyKind::Name(RenameMode::To)) => {
                if let Some(p) = target(0) {
                    self.make_ready(p, now);
                }
            }
            EventKind::Modify(ModifyKind::Name(RenameMode::Both)) => {
                if let Some(p) = ev.paths.first() {
                    self.settle.remove(p);
                }
                if let Some(p) = target(1) {
                    self.make_ready(p, now);
                }
            }
            EventKind::Modify(ModifyKind::Name(RenameMode::From)) | EventKind::Remove(_) => {
                for p in &ev.paths {
                    self.settle.remove(p);
                }
            }
            EventKind::Create(CreateKind::File | CreateKind::Any) | EventKind::Modify(_) => {
                if let Some(p) = target(0) {
                    if !self.known.contains(&p) {
                        self.created(p, now);
                    }
                }
            }
            _ => {}
        }
    }

    /// An event says `path` appeared or changed. A plain file with one link
    /// may be being written: it waits for its close event (or for the long
    /// settle time). Anything else has no writer to wait for: a hard link
    /// made into the folder (more than one link), or a FIFO, socket, device
    /// or folder so named; it settles like a file a listing found.
    fn created(&mut self, path: PathBuf, now: Instant) {
        use std::os::unix::fs::MetadataExt;
        let Ok(m) = fs::symlink_metadata(&path) else {
            return;
        };
        if m.file_type().is_file() && m.nlink() == 1 {
            self.settle.announce(&path, now);
            return;
        }
        if !takeable(m.file_type()) {
            return;
        }
        let listed = Listed {
            path,
            size: m.len(),
            modified: m.modified().unwrap_or(SystemTime::UNIX_EPOCH),
        };
        if self.settle.observe(&listed, now) {
            self.make_ready(listed.path, now);
        }
    }

    /// Lists the folder: every wanted file not queued or in flight is
    /// observed by the settle tracker (a file first seen now is ready only
    /// with a settle time of zero); the ready ones are queued oldest first.
    fn rescan(&mut self, now: Instant) {
        match list_with_strays(&self.dir, &self.formats) {
            Ok((listed, strays)) => {
                for p in &strays {
                    if !self.strays.contains(p) {
                        warn!(
                            "a file in the {} whose name is not UTF-8 text is left alone (no record could name it); rename it: {:?}",
                            self.what,
                            p.as_os_str()
                        );
                    }
                }
                self.strays = strays.into_iter().collect();
                self.settle.retain_listed(&listed);
                let done: Vec<PathBuf> = listed
                    .iter()
                    .filter(|l| !self.known.contains(&l.path) && self.settle.observe(l, now))
                    .map(|l| l.path.clone())
                    .collect();
                for p in done {
                    self.make_ready(p, now);
                }
            }
            Err(e) => warn!(folder = %self.dir.display(), "cannot list the {}: {e}", self.what),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn formats() -> Vec<String> {
        vec!["pbm".into(), "png".into()]
    }

    #[test]
    fn frame_names() {
        let f = formats();
        for ok in ["a.pbm", "loom-0001.PNG", "x.y.pbm"] {
            assert!(is_frame_name(ok, &f), "{ok}");
        }
        for bad in [
            ".a.pbm",
            "a.pbm.tmp",
            "a.pbm.part",
            "a.pbm~",
            "a.txt",
            "pbm",
            ".pbm",
            "a.jpg",
            "",
        ] {
            assert!(!is_frame_name(bad, &f), "{bad}");
        }
        assert!(!is_frame_name("a.png", &["pbm".to_string()]));
    }

    #[test]
    fn unannounced_files_settle_after_the_settle_time() {
        let t0 = Instant::now();
        let ms = Duration::from_millis;
        let mut s = Settle::new(ms(500));
        let mut f = Listed {
            path: "in/a.pbm".into(),
            size: 10,
            modified: SystemTime::UNIX_EPOCH,
        };
        assert!(!s.observe(&f, t0));
        assert!(!s.observe(&f, t0 + ms(499)));
        // It grew: the clock starts again.
        f.size = 20;
        assert!(!s.observe(&f, t0 + ms(600)));
        assert!(!s.observe(&f, t0 + ms(1000)));
        assert!(s.observe(&f, t0 + ms(1100)));
        assert!(s.is_empty());
    }

    #[test]
    fn announced_files_wait_for_their_close_event() {
        let t0 = Instant::now();
        let ms = Duration::from_millis;
        let mut s = Settle::new(ms(500));
        let f = Listed {
            path: "in/a.pbm".into(),
            size: 10,
            modified: SystemTime::UNIX_EPOCH,
        };
        s.announce(&f.path, t0);
        assert!(!s.observe(&f, t0 + ms(10)));
        assert!(!s.observe(&f, t0 + ms(5000)));
        // The close event never came: a minute without change is enough.
        assert!(s.observe(&f, t0 + ms(61_000)));
        // After lost events, plain settling applies.
        s.announce(&f.path, t0);
        s.forget_announcements();
        assert!(!s.observe(&f, t0 + ms(100)));
        assert!(s.observe(&f, t0 + ms(700)));
    }

    /// A folder named like a frame is taken (the worker refuses it with
    /// its reason); symbolic links, hidden and other names are not.
    #[test]
    fn listing_skips_links_hidden_and_other_names() {
        let dir = tempfile::tempdir().unwrap();
        let d = dir.path();
        fs::write(d.join("b.pbm"), b"P1 1 1 0").unwrap();
        fs::write(d.join("a.png"), b"x").unwrap();
        fs::write(d.join(".hidden.pbm"), b"x").unwrap();
        fs::write(d.join("c.pbm.tmp"), b"x").unwrap();
        fs::create_dir(d.join("sub.pbm")).unwrap();
        std::os::unix::fs::symlink(d.join("b.pbm"), d.join("link.pbm")).unwrap();
        let names: Vec<String> = list(d, &formats())
            .unwrap()
            .iter()
            .map(|l| l.path.file_name().unwrap().to_string_lossy().into_owned())
            .collect();
        let mut sorted = names.clone();
        sorted.sort();
        assert_eq!(sorted, ["a.png", "b.pbm", "sub.pbm"]);
    }

    fn intake(dir: &Path) -> Intake {
        Intake::open(
            "inbox",
            dir,
            formats(),
            Duration::from_millis(100),
            Duration::from_secs(3600),
            false,
            Instant::now(),
        )
        .unwrap()
    }

    #[test]
    fn lost_events_ask_for_a_listing_and_end_waits_for_close_events() {
        let d = tempfile::tempdir().unwrap();
        let mut i = intake(d.path());
        let t0 = Instant::now();
        i.next_rescan = t0 + Duration::from_secs(3600);
        let path = d.path().join("a.pbm");
        i.settle.announce(&path, t0);
        let ev = notify::Event::new(EventKind::Other).set_flag(notify::event::Flag::Rescan);
        i.on_watch(Ok(Ok(ev)), t0);
        assert!(i.next_rescan <= t0);
        // The announced file now settles like any other.
        let l = Listed {
            path,
            size: 1,
            modified: SystemTime::UNIX_EPOCH,
        };
        assert!(!i.settle.observe(&l, t0));
        assert!(i.settle.observe(&l, t0 + Duration::from_millis(150)));
    }

    #[test]
    fn events_outside_the_folder_or_for_other_files_are_ignored() {
        use notify::event::{AccessKind, AccessMode};
        let d = tempfile::tempdir().unwrap();
        let mut i = intake(d.path());
        let now = Instant::now();
        let other = d.path().join("elsewhere");
        for p in [
            other.join("a.pbm"),
            d.path().join(".a.pbm"),
            d.path().join("a.txt"),
        ] {
            std::fs::create_dir_all(p.parent().unwrap()).unwrap();
            std::fs::write(&p, "P1 1 1 0").unwrap();
            let ev = notify::Event::new(EventKind::Access(AccessKind::Close(AccessMode::Write)))
                .add_path(p);
            i.on_watch(Ok(Ok(ev)), now);
        }
        // A close event for a frame name whose file is gone is ignored too.
        let ev = notify::Event::new(EventKind::Access(AccessKind::Close(AccessMode::Write)))
            .add_path(d.path().join("b.pbm"));
        i.on_watch(Ok(Ok(ev)), now);
        assert!(i.ready.is_empty() && i.known.is_empty() && i.settle.is_empty());
        // A real one is queued once, however often it is announced.
        let p = d.path().join("c.pbm");
        std::fs::write(&p, "P1 1 1 0").unwrap();
        for _ in 0..2 {
            let ev = notify::Event::new(EventKind::Access(AccessKind::Close(AccessMode::Write)))
                .add_path(p.clone());
            i.on_watch(Ok(Ok(ev)), now);
        }
        assert_eq!(i.next_ready(), Some(p.clone()));
        assert_eq!(i.next_ready(), None);
        i.finished(&p, now);
        assert!(i.known.is_empty());
    }

    /// Regression (a fault probe: a hard link made into the inbox waited
    /// 60 s for a close event that never comes; a FIFO so named was never
    /// taken): only a plain file with one link waits for its close event;
    /// the others settle as a listing's files do.
    #[test]
    fn a_hard_link_or_a_fifo_does_not_wait_for_a_close_event() {
        use notify::event::CreateKind;
        let d = tempfile::tempdir().unwrap();
        let mut i = intake(d.path());
        let t0 = Instant::now();
        let outside = d.path().join("outside");
        std::fs::write(&outside, "P1 1 1 0").unwrap();
        let linked = d.path().join("linked.pbm");
        std::fs::hard_link(&outside, &linked).unwrap();
        let written = d.path().join("written.pbm");
        std::fs::write(&written, "P1 1 1 0").unwrap();
        let fifo = d.path().join("pipe.pbm");
        let c = std::ffi::CString::new(fifo.as_os_str().as_encoded_bytes()).unwrap();
        // SAFETY: mkfifo with a valid NUL-terminated path.
        assert_eq!(unsafe { libc::mkfifo(c.as_ptr(), 0o600) }, 0);
        for p in [&linked, &written, &fifo] {
            let ev = notify::Event::new(EventKind::Create(CreateKind::File)).add_path(p.clone());
            i.on_watch(Ok(Ok(ev)), t0);
        }
        // Past the settle time (100 ms), well before the minute an
        // announced file may wait: the link and the FIFO are ready, the
        // file being written still waits for its close event.
        i.tick(t0 + Duration::from_millis(200));
        let mut ready = Vec::new();
        while let Some(p) = i.next_ready() {
            ready.push(p);
        }
        ready.sort();
        assert_eq!(ready, [linked, fifo]);
        assert_eq!(i.waiting(), 1);
    }

    /// Regression (a fault probe: a frame that could not be moved was
    /// tried, and an error said, every listing): each try that leaves a
    /// file in place doubles its wait; a change ends it.
    #[test]
    fn a_file_left_in_place_is_tried_again_ever_more_rarely() {
        let d = tempfile::tempdir().unwrap();
        let t0 = Instant::now();
        let mut i = Intake::open(
            "inbox",
            d.path(),
            formats(),
            Duration::ZERO,
            Duration::from_secs(1),
            false,
            t0,
        )
        .unwrap();
        let p = d.path().join("stuck.pbm");
        std::fs::write(&p, "P1 1 1 0").unwrap();
        let s = Duration::from_millis;
        let taken = |i: &mut Intake, at: Instant| {
            i.make_ready(p.clone(), at);
            let got = i.next_ready();
            if got.is_some() {
                i.known.remove(&p);
            }
            got.is_some()
        };
        i.finished(&p, t0);
        assert!(!taken(&mut i, t0 + s(500)));
        assert!(taken(&mut i, t0 + s(1100)));
        i.finished(&p, t0 + s(1100));
        assert!(!taken(&mut i, t0 + s(2500)));
        assert!(taken(&mut i, t0 + s(3200)));
        i.finished(&p, t0 + s(3200));
        assert!(!taken(&mut i, t0 + s(6000)));
        // Up to five minutes at most, however many tries.
        for _ in 0..20 {
            i.finished(&p, t0);
        }
        assert!(!taken(&mut i, t0 + s(299_000)));
        assert!(taken(&mut i, t0 + s(300_100)));
        // A new version of the file is taken at once.
        i.finished(&p, t0);
        std::fs::write(&p, "P1 2 1 0 1").unwrap();
        assert!(taken(&mut i, t0 + s(10)));
        // A file moved away leaves no wait behind.
        std::fs::remove_file(&p).unwrap();
        i.finished(&p, t0);
        assert!(i.backoff.is_empty());
    }
}
