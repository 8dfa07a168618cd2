//! The writer: the one thread that owns the detection log. It takes the
//! workers' outcomes, puts them back in hand-out order, appends records,
//! syncs by the policy, and moves each frame out of the inbox only after
//! the log says its record is durable — and only if the file is still the
//! version that was read. Then it tells the subscribers ([`RecordSink`])
//! and the main loop.
//!
//! Exactly once rests on two things: the keys (name, sha256) of records
//! durable in the log whose frames are not moved yet (read back at start
//! for the frames in the inbox, then kept until the frame of that name is
//! moved or gone, so at most one entry per name in the inbox), so a frame
//! met again is archived without a second record; and the log's own word
//! on which records are durable ([`Settled`]), taken as soon as the log
//! knows (after every append and every sync), so a failed sync never makes
//! the writer forget a record that a rotation had already made durable.
//!
//! Subscribers hear `Logged` when a record is durable, whatever happens to
//! the move after; a frame whose move fails is `Left` and, when met again,
//! `AlreadyLogged`. If the log cannot be put back in order after a failure
//! ([`DetectionLog::broken`]), the writer stops, and with it the daemon:
//! opening the log again at the next start repairs it.

use std::collections::{BTreeMap, HashMap, HashSet};
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

use crossbeam_channel::{select, Receiver, Sender};
use tracing::{debug, error, info, warn};

use super::detlog::{line_of, DetectionLog, Key, Settled};
use super::faults::{Fault, Faults};
use super::files::{self, Stamp};
use super::sink::{Finished, RecordSink};
use super::worker::{Job, Outcome};
use crate::config::{Folders, SyncPolicy};
use crate::drift::FrameStats;
use crate::record::FrameRecord;

/// What the writer tells the main loop.
#[derive(Debug)]
pub(super) enum FromWriter {
    /// A job left the pipeline (its bytes are dropped): room for another.
    Taken,
    /// A frame handed out is finished: moved, or left in the inbox for the
    /// next listing.
    Done(PathBuf),
}

/// A record appended to the log whose fate the log has not told yet.
#[derive(Debug)]
pub(super) struct Pending {
    path: PathBuf,
    record: Box<FrameRecord>,
    stats: Box<FrameStats>,
    /// The version of the file that was read.
    stamp: Stamp,
    key: Key,
}

/// The writer's state; [`Writer::run`] is its thread.
pub(super) struct Writer {
    log: DetectionLog<Pending>,
    /// Keys durable in the log whose frames are not moved yet, by name.
    unmoved: Unmoved,
    /// Outcomes that arrived before an earlier job's.
    waiting: BTreeMap<u64, (Job, Outcome)>,
    next: u64,
    policy: SyncPolicy,
    first_unsynced: Option<Instant>,
    /// Stopping: sync as soon as records are written.
    draining: bool,
    archive: PathBuf,
    rejected: PathBuf,
    faults: Faults,
    out: Sender<FromWriter>,
    sinks: Vec<Box<dyn RecordSink>>,
    troubles: super::troubles::Troubles,
}

/// The operations the writer repeats for every frame, by name.
pub const LOG_WRITE: &str = "writing the detection log";
pub const ARCHIVE_MOVE: &str = "moving frames to the archive";
pub const REJECT_MOVE: &str = "moving files to rejected/";

/// However the writer ends, its subscribers hear that the run is over.
impl Drop for Writer {
    fn drop(&mut self) {
        for sink in &mut self.sinks {
            sink.stopped();
        }
    }
}

impl Writer {
    pub fn new(
        log: DetectionLog<Pending>,
        recovered: HashSet<Key>,
        policy: SyncPolicy,
        folders: &Folders,
        faults: Faults,
        out: Sender<FromWriter>,
        sinks: Vec<Box<dyn RecordSink>>,
    ) -> Writer {
        let mut unmoved = Unmoved::default();
        for key in recovered {
            unmoved.remember(key);
        }
        Writer {
            log,
            unmoved,
            waiting: BTreeMap::new(),
            next: 0,
            policy,
            first_unsynced: None,
            draining: false,
            archive: folders.archive.clone(),
            rejected: folders.rejected.clone(),
            faults,
            out,
            sinks,
            troubles: super::troubles::Troubles::default(),
        }
    }

    /// Runs until the workers are gone: a message on `flush_now` (the
    /// daemon is stopping) makes every later record synced at once.
    pub fn run(mut self, results: Receiver<(Job, Outcome)>, mut flush_now: Receiver<()>) {
        loop {
            let deadline = match (self.policy, self.first_unsynced) {
                (SyncPolicy::Batch { millis, .. }, Some(t)) if !self.draining => {
                    Some(t + Duration::from_millis(millis))
                }
                (_, Some(_)) => Some(Instant::now()),
                _ => None,
            };
            let timeout = match deadline {
                Some(d) => crossbeam_channel::at(d),
                None => crossbeam_channel::never(),
            };
            select! {
                recv(results) -> r => match r {
                    Ok((job, outcome)) => self.take(job, outcome),
                    Err(_) => break,
                },
                recv(flush_now) -> r => {
                    self.draining = true;
                    if r.is_err() {
                        flush_now = crossbeam_channel::never();
                    }
                }
                recv(timeout) -> _ => {}
            }
            if self.sync_due() {
                self.sync();
            }
            if let Some(why) = self.log.broken() {
                error!("the detection log cannot go on: {why}; stopping (a restart repairs it)");
                return;
            }
        }
        self.sync();
    }

    /// Takes one outcome and handles every outcome now in order.
    fn take(&mut self, job: Job, outcome: Outcome) {
        self.waiting.insert(job.seq, (job, outcome));
        while let Some((job, outcome)) = self.waiting.remove(&self.next) {
            self.next += 1;
            let _ = self.out.send(FromWriter::Taken);
            self.handle(job, outcome);
            // A rotation may have made earlier records durable, or a
            // failure cut some off: act on it now.
            if self.log.has_settled() {
                let settled = self.log.take_settled();
                self.settle(settled);
            }
        }
    }

    fn handle(&mut self, job: Job, outcome: Outcome) {
        match outcome {
            Outcome::Gone => {
                // (A frame still there could not be read for a passing
                // reason, which the worker said.)
                if gone(&job.path) {
                    info!(frame = %job.path.display(), "gone from the inbox before it was read: not inspected");
                }
                self.left(job.path)
            }
            Outcome::Reject(reason, stamp) => {
                if changed(&job.path, stamp) {
                    return self.left(job.path);
                }
                warn!(frame = %job.path.display(), "rejected: {reason}");
                let moved = self
                    .faults
                    .check(Fault::Move, &job.path)
                    .and_then(|()| files::reject(&job.path, &self.rejected, &reason));
                match moved {
                    Ok(_) => {
                        self.works(REJECT_MOVE);
                        self.finish(
                            &job.path,
                            &Finished::Rejected {
                                frame: &job.path,
                                reason: &reason,
                            },
                        )
                    }
                    // Taken away meanwhile: nothing to move, nothing failing.
                    Err(_) if gone(&job.path) => {
                        info!(frame = %job.path.display(), "gone from the inbox before it was moved to rejected/");
                        self.left(job.path);
                    }
                    Err(e) => {
                        self.fails(REJECT_MOVE, &e.to_string(), &job.path);
                        self.left(job.path);
                    }
                }
            }
            Outcome::Record(record, stamp, stats) => {
                let key = (record.frame.clone(), record.sha256.clone());
                if self.unmoved.contains(&key) {
                    debug!(frame = %job.path.display(), "already in the log: archiving only");
                    return self.archive_frame(&job.path, &key.0, stamp, true);
                }
                let line = match line_of(&record) {
                    Ok(l) => l,
                    Err(e) => {
                        error!(frame = %job.path.display(), "cannot write the record: {e}");
                        return self.left(job.path);
                    }
                };
                let pending = Pending {
                    path: job.path,
                    record,
                    stats,
                    stamp,
                    key,
                };
                match self.log.append_line(line, pending) {
                    Ok(()) => {
                        self.first_unsynced.get_or_insert_with(Instant::now);
                    }
                    Err((e, p)) => {
                        self.fails(LOG_WRITE, &e.to_string(), &p.path);
                        self.left(p.path);
                    }
                }
            }
        }
    }

    fn sync_due(&self) -> bool {
        if !self.log.has_pending() {
            return false;
        }
        match self.policy {
            _ if self.draining => true,
            SyncPolicy::EveryRecord => true,
            SyncPolicy::Batch { records, millis } => {
                self.log.unsynced() >= records
                    || self
                        .first_unsynced
                        .is_some_and(|t| t.elapsed() >= Duration::from_millis(millis))
            }
        }
    }

    /// Syncs the log and settles every record whose fate it reports.
    fn sync(&mut self) {
        let (settled, error) = self.log.sync();
        match &error {
            Some(e) => {
                let frame = settled
                    .lost
                    .first()
                    .map_or_else(PathBuf::new, |p| p.path.clone());
                self.fails(LOG_WRITE, &format!("cannot sync it: {e}"), &frame);
            }
            None if !settled.durable.is_empty() => self.works(LOG_WRITE),
            None => {}
        }
        self.first_unsynced = None;
        self.settle(settled);
    }

    /// Durable records: told to the subscribers, their keys kept until the
    /// frame is moved, then the frame archived. Lost records: forgotten, so
    /// the frames are logged when the next listing finds them.
    fn settle(&mut self, settled: Settled<Pending>) {
        for p in settled.durable {
            self.tell(&Finished::Logged(&p.record, &p.stats));
            self.unmoved.remember(p.key.clone());
            self.archive_frame(&p.path, &p.key.0, p.stamp, false);
        }
        for p in settled.lost {
            self.left(p.path);
        }
    }

    /// Moves a frame whose record is durable to the archive. Its key is
    /// forgotten once the frame is moved or gone; a frame left in place
    /// keeps it, so it is archived without a second record when met again.
    fn archive_frame(&mut self, path: &Path, name: &str, stamp: Stamp, already_logged: bool) {
        if changed(path, Some(stamp)) {
            if std::fs::symlink_metadata(path).is_err() {
                self.unmoved.forget(name);
            }
            return self.left(path.to_path_buf());
        }
        let moved = self
            .faults
            .check(Fault::Move, path)
            .and_then(|()| files::move_into(path, &self.archive));
        match moved {
            Ok(_) => {
                self.works(ARCHIVE_MOVE);
                self.unmoved.forget(name);
                if already_logged {
                    self.tell(&Finished::AlreadyLogged { frame: path });
                }
                let _ = self.out.send(FromWriter::Done(path.to_path_buf()));
            }
            // Taken away after it was read: its record stands, nothing is
            // failing.
            Err(_) if gone(path) => {
                info!(frame = %path.display(), "gone from the inbox before it was archived (its record is logged)");
                self.unmoved.forget(name);
                self.left(path.to_path_buf());
            }
            Err(e) => {
                self.fails(ARCHIVE_MOVE, &e.to_string(), path);
                if std::fs::symlink_metadata(path).is_err() {
                    self.unmoved.forget(name);
                }
                self.left(path.to_path_buf());
            }
        }
    }

    /// An operation failed for `frame`: said (once per run of failures)
    /// and told to the subscribers when it starts failing.
    fn fails(&mut self, what: &'static str, e: &str, frame: &Path) {
        if self.troubles.fail(
            what,
            e,
            frame,
            "frames stay in the inbox and are tried again, less often each time",
        ) {
            self.tell(&Finished::Trouble {
                what,
                error: Some(e),
            });
        }
    }

    /// An operation worked: if it had been failing, said and told.
    fn works(&mut self, what: &'static str) {
        if self.troubles.ok(what) {
            self.tell(&Finished::Trouble { what, error: None });
        }
    }

    fn left(&mut self, path: PathBuf) {
        self.finish(&path, &Finished::Left { frame: &path });
    }

    /// Tells the subscribers and the main loop that a frame is finished.
    fn finish(&mut self, path: &Path, event: &Finished<'_>) {
        self.tell(event);
        let _ = self.out.send(FromWriter::Done(path.to_path_buf()));
    }

    fn tell(&mut self, event: &Finished<'_>) {
        for s in &mut self.sinks {
            s.finished(event);
        }
    }
}

/// Whether nothing is named `path` any more (someone took the file away).
fn gone(path: &Path) -> bool {
    matches!(std::fs::symlink_metadata(path), Err(e) if e.kind() == std::io::ErrorKind::NotFound)
}

/// The keys of durable records whose frames are not moved yet, by frame
/// name: a name holds one file at a time, so once the frame of a name is
/// moved or gone, every key of that name can go. Bounded by the names in
/// the inbox.
#[derive(Debug, Default)]
struct Unmoved(HashMap<String, HashSet<String>>);

impl Unmoved {
    fn remember(&mut self, (name, hash): Key) {
        self.0.entry(name).or_default().insert(hash);
    }

    fn contains(&self, (name, hash): &Key) -> bool {
        self.0.get(name).is_some_and(|h| h.contains(hash))
    }

    fn forget(&mut self, name: &str) {
        self.0.remove(name);
    }
}

/// Whether the file at `path` is no longer the version that was read: a
/// file replaced or rewritten since stays in the inbox, to be read again,
/// since the version it is now has no record yet.
fn changed(path: &Path, stamp: Option<Stamp>) -> bool {
    let changed = stamp.is_some_and(|s| Stamp::now(path).ok() != Some(s));
    if changed {
        warn!(frame = %path.display(), "the file changed after it was read; it will be read again");
    }
    changed
}
