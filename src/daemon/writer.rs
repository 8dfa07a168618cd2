//! The writer: the one thread that owns the detection log. It takes the
//! workers' outcomes, puts them back in hand-out order, appends records,
//! syncs by the policy, and moves each frame out of the inbox only after
//! the log says its record is durable — and only if the file is still the
//! version that was read. Then it tells the subscribers ([`RecordSink`])
//! and the main loop.
//!
//! Exactly once rests on two sets: the keys (name, sha256) of records
//! durable in the log whose frames are not moved yet (read back at start
//! for the frames in the inbox, then kept until each move), so a frame met
//! again is archived without a second record; and the log's own word on
//! which records are durable ([`Settled`]), so a failed sync never makes
//! the writer forget a record that a rotation had already made durable.

use std::collections::{BTreeMap, HashSet};
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

use crossbeam_channel::{select, Receiver, Sender};
use tracing::{debug, error, warn};

use super::detlog::{line_of, DetectionLog, Key, Settled};
use super::faults::{Fault, Faults};
use super::files::{self, Stamp};
use super::sink::{Finished, RecordSink};
use super::worker::{Job, Outcome};
use crate::config::SyncPolicy;
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
    /// The version of the file that was read.
    stamp: Stamp,
    key: Key,
}

/// The writer's state; [`Writer::run`] is its thread.
pub(super) struct Writer {
    log: DetectionLog<Pending>,
    /// Keys durable in the log whose frames are not moved yet.
    unmoved: HashSet<Key>,
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
}

impl Writer {
    #[allow(clippy::too_many_arguments)]
    pub fn new(
        log: DetectionLog<Pending>,
        recovered: HashSet<Key>,
        policy: SyncPolicy,
        archive: PathBuf,
        rejected: PathBuf,
        faults: Faults,
        out: Sender<FromWriter>,
        sinks: Vec<Box<dyn RecordSink>>,
    ) -> Writer {
        Writer {
            log,
            unmoved: recovered,
            waiting: BTreeMap::new(),
            next: 0,
            policy,
            first_unsynced: None,
            draining: false,
            archive,
            rejected,
            faults,
            out,
            sinks,
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
        }
    }

    fn handle(&mut self, job: Job, outcome: Outcome) {
        match outcome {
            Outcome::Gone => self.left(job.path),
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
                    Ok(_) => self.finish(
                        &job.path,
                        &Finished::Rejected {
                            frame: &job.path,
                            reason: &reason,
                        },
                    ),
                    Err(e) => {
                        error!(frame = %job.path.display(), "cannot move the frame to rejected/: {e}");
                        self.left(job.path);
                    }
                }
            }
            Outcome::Record(record, stamp) => {
                let key = (record.frame.clone(), record.sha256.clone());
                if self.unmoved.contains(&key) {
                    debug!(frame = %job.path.display(), "already in the log: archiving only");
                    if self
                        .archive_frame(&job.path, stamp, |p| Finished::AlreadyLogged { frame: p })
                    {
                        self.unmoved.remove(&key);
                    }
                    return;
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
                    stamp,
                    key,
                };
                match self.log.append_line(line, pending) {
                    Ok(()) => {
                        self.first_unsynced.get_or_insert_with(Instant::now);
                    }
                    Err((e, p)) => {
                        error!(frame = %p.path.display(), "cannot write the detection log: {e}; the frame stays in the inbox");
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
                    || self.log.unsynced() == 0
                    || self
                        .first_unsynced
                        .is_some_and(|t| t.elapsed() >= Duration::from_millis(millis))
            }
        }
    }

    /// Syncs the log and settles every record whose fate it reports.
    fn sync(&mut self) {
        let (settled, error) = self.log.sync();
        if let Some(e) = &error {
            error!(
                "cannot sync the detection log: {e}; {} frame(s) stay in the inbox",
                settled.lost.len()
            );
        }
        self.first_unsynced = None;
        self.settle(settled);
    }

    /// Durable records: keys kept until the frame is moved, then the frame
    /// archived. Lost records: forgotten, so the frames are logged when the
    /// next listing finds them.
    fn settle(&mut self, settled: Settled<Pending>) {
        for p in settled.durable {
            self.unmoved.insert(p.key.clone());
            let record = p.record;
            if self.archive_frame(&p.path, p.stamp, |_| Finished::Logged(&record)) {
                self.unmoved.remove(&p.key);
            }
        }
        for p in settled.lost {
            self.left(p.path);
        }
    }

    /// Moves a logged frame to the archive; true if it went.
    fn archive_frame<'a>(
        &mut self,
        path: &'a Path,
        stamp: Stamp,
        event: impl FnOnce(&'a Path) -> Finished<'a>,
    ) -> bool {
        if changed(path, Some(stamp)) {
            self.left(path.to_path_buf());
            return false;
        }
        let moved = self
            .faults
            .check(Fault::Move, path)
            .and_then(|()| files::move_into(path, &self.archive));
        match moved {
            Ok(_) => {
                self.finish(path, &event(path));
                true
            }
            Err(e) => {
                error!(frame = %path.display(), "cannot move the frame to the archive: {e}");
                self.left(path.to_path_buf());
                false
            }
        }
    }

    fn left(&mut self, path: PathBuf) {
        self.finish(&path, &Finished::Left { frame: &path });
    }

    fn finish(&mut self, path: &Path, event: &Finished<'_>) {
        for s in &mut self.sinks {
            s.finished(event);
        }
        let _ = self.out.send(FromWriter::Done(path.to_path_buf()));
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
