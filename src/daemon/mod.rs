//! The daemon: watches the inbox, detects every frame exactly once, logs
//! it, and moves it on.
//!
//! ```text
//! notify ──events──▶ main loop ──paths (bounded)──▶ workers ──results──▶ writer ──▶ log, archive
//!   listing (rescan) ──▲   ▲ control (stop, reload)    (decode, detect,    (in arrival order,
//!                          └──────────── done ───────── group, record)      sync, then move)
//! ```
//!
//! - The watcher callback only forwards events into a channel; when that
//!   channel is full, or the watcher reports lost events, the main loop
//!   lists the inbox again. It also lists it every `rescan_seconds`.
//! - At most `queue` frames' bytes are between the main loop and the
//!   writer at any moment: a burst waits in the inbox, only its names in
//!   memory.
//! - The writer appends records in the order frames were handed out, and
//!   moves a frame out of the inbox only after the sync that covers its
//!   record, and only if the file is still the version that was read.
//!   After a crash, a frame still in the inbox whose name and hash are in
//!   the log is archived without a second record.
//! - The running [`Detector`] (with the decode limits) sits behind an
//!   [`ArcSwap`]: a reload swaps it whole, and frames in flight finish with
//!   the one they started with.
//! - A panic inside detection rejects that frame; the writer waits for
//!   every job in turn, so no job may vanish.
//! - Stopping is asked for through the control channel (the binary maps
//!   signals onto it): no new frame is handed out, frames in flight are
//!   finished, logged, synced and moved, then `run` returns.
//!
//! Nothing here is global: the configuration, the control channel and the
//! status hook are passed in, so tests drive the daemon in-process too.

pub mod detlog;
pub mod files;
pub mod inbox;

use std::collections::{BTreeMap, HashSet, VecDeque};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::thread;
use std::time::{Duration, Instant, SystemTime};

use arc_swap::ArcSwap;
use crossbeam_channel::{bounded, select, tick, unbounded, Receiver, Sender};
use notify::{EventKind, RecursiveMode, Watcher};
use tracing::{debug, error, info, warn};

use crate::codec::DecodeLimits;
use crate::config::{Config, SyncPolicy};
use crate::detect::compile::Scratch;
use crate::detect::group::GroupParams;
use crate::detect::Detector;
use crate::detect::Settings;
use crate::error::{Error, ErrorKind, Result};
use crate::learn;
use crate::model::{self, Model};
use crate::record::FrameRecord;

use detlog::{DetectionLog, Key};
use files::Stamp;
use inbox::Settle;

/// What the daemon can be asked to do while it runs.
#[derive(Clone, Debug, PartialEq)]
pub enum Control {
    /// Finish the frames in flight and return.
    Stop,
    /// Take the reloadable parts of a new configuration (read by the
    /// caller; `None` when it did not parse) and reload the model from the
    /// state folder; anything invalid keeps the running ones.
    Reload(Option<Box<Config>>),
}

/// What the daemon tells its supervisor (the binary maps these onto the
/// systemd notification protocol).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Status {
    /// Started: the model is loaded and the inbox is watched.
    Ready,
    Reloading,
    /// Reload finished (whether or not the new configuration was taken).
    Reloaded,
    Stopping,
    /// The pipeline is making progress (or has nothing to do).
    Alive,
}

/// Counts of one run.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub struct Summary {
    /// Frames with a new record in the log.
    pub logged: u64,
    /// Frames found already logged (after a crash) and only archived.
    pub already_logged: u64,
    pub rejected: u64,
    /// Objects in the new records.
    pub objects: u64,
}

/// The detection settings in force: the model's own, overridden by the
/// configuration's `[detection]` keys.
pub fn settings_for(model: &Model, cfg: &Config) -> Result<Settings> {
    let s = Settings {
        threshold: cfg.threshold.unwrap_or(model.threshold),
        grouping: GroupParams {
            min_area: cfg.min_area.unwrap_or(model.grouping.min_area),
            merge_distance: cfg.merge_distance.unwrap_or(model.grouping.merge_distance),
        },
    };
    model::validate_settings(s.threshold, s.grouping)?;
    Ok(s)
}

/// Loads the running model from the state folder.
pub fn load_model(cfg: &Config) -> Result<Model> {
    let path = cfg.folders.state.join(files::MODEL);
    let text = std::fs::read_to_string(&path).map_err(|e| Error::from(e).with_path(&path))?;
    let m = Model::from_json(&text).map_err(|e| e.with_path(&path))?;
    if let Some(w) = cfg.window {
        if m.tree.window() != w {
            return Err(Error::new(ErrorKind::BadModel(format!(
                "the model uses a {0}x{0} window but detection.window is {1}",
                m.tree.window().size(),
                w.size()
            )))
            .with_path(&path));
        }
    }
    Ok(m)
}

/// The running model: the state folder's, or, on a fresh box, one trained
/// from `training.seed_data` and stored there as version 1.
pub fn load_or_train(cfg: &Config) -> Result<Model> {
    let path = cfg.folders.state.join(files::MODEL);
    if path.exists() {
        return load_model(cfg);
    }
    let seed = cfg.seed_data.as_ref().ok_or_else(|| {
        Error::new(ErrorKind::Data(format!(
            "no model at {} and no training.seed_data to train one from",
            path.display()
        )))
    })?;
    info!(seed = %seed.display(), "no model yet: training one from the seed data");
    let folder = crate::fileio::data::read_folder(seed, &cfg.limits, &mut |_, _| {})?;
    if let Some(p) = folder.problems.first() {
        return Err(Error::new(ErrorKind::Data(format!(
            "seed data has {} bad file(s), first: {p}",
            folder.problems.len()
        ))));
    }
    let mut m = learn::train(&folder.frames, &cfg.training, &mut |_| {})?;
    m.model_version = 1;
    files::write_atomic(&path, m.to_json().as_bytes())
        .map_err(|e| Error::from(e).with_path(&path))?;
    info!(path = %path.display(), leaves = m.tree.leaves(), "stored model version 1");
    load_model(cfg)
}

/// Creates the folders the daemon writes to.
pub fn make_folders(cfg: &Config) -> Result<()> {
    let f = &cfg.folders;
    for d in [
        &f.inbox,
        &f.archive,
        &f.rejected,
        &f.corrections,
        &f.state,
        &f.logs,
    ] {
        std::fs::create_dir_all(d).map_err(|e| Error::from(e).with_path(d))?;
    }
    Ok(())
}

/// A frame handed to the workers: its place in arrival order and path.
struct Job {
    seq: u64,
    path: PathBuf,
}

/// What a worker made of a frame, with the stamp of the file it read.
enum Outcome {
    Record(Box<FrameRecord>, Stamp),
    Reject(String, Option<Stamp>),
    /// The file went away before it was read, or could not be read for a
    /// passing reason: the next listing decides.
    Gone,
}

/// What the workers need, swapped whole on reload.
struct Running {
    detector: Detector,
    limits: DecodeLimits,
}

/// What the writer tells the main loop.
enum FromWriter {
    /// A job left the pipeline (its bytes are dropped): room for another.
    Taken,
    /// A frame is finished: moved, or left in the inbox for the next listing.
    Done(Done),
}

struct Done {
    path: PathBuf,
    outcome: DoneKind,
    objects: u64,
}

#[derive(Clone, Copy, PartialEq, Eq)]
enum DoneKind {
    Logged,
    AlreadyLogged,
    Rejected,
    /// Not moved (gone, or a log or move error): the next listing decides.
    Left,
}

/// Runs the daemon until [`Control::Stop`] (or until `control` closes).
pub fn run(
    mut cfg: Config,
    mut control: Receiver<Control>,
    status: &mut dyn FnMut(Status),
) -> Result<Summary> {
    make_folders(&cfg)?;
    // Absolute folders: file events name absolute paths, and a path must
    // have one spelling to be recognised in flight.
    let abs = |d: &PathBuf| std::fs::canonicalize(d).map_err(|e| Error::from(e).with_path(d));
    let f = &cfg.folders;
    cfg.folders = crate::config::Folders {
        inbox: abs(&f.inbox)?,
        archive: abs(&f.archive)?,
        rejected: abs(&f.rejected)?,
        corrections: abs(&f.corrections)?,
        state: abs(&f.state)?,
        logs: abs(&f.logs)?,
    };
    let _lock = files::StateLock::acquire(&cfg.folders.state)?;
    let model = load_or_train(&cfg)?;
    let settings = settings_for(&model, &cfg)?;
    info!(
        version = model.model_version,
        threshold = settings.threshold,
        min_area = settings.grouping.min_area,
        "model loaded"
    );
    let detector = Arc::new(ArcSwap::from_pointee(Running {
        detector: Detector::new(model, settings),
        limits: cfg.limits.clone(),
    }));
    // The frames waiting now: the log is asked which of them it holds.
    let waiting: HashSet<String> = inbox::list(&cfg.folders.inbox, &cfg.watch.formats)
        .map_err(|e| Error::from(e).with_path(&cfg.folders.inbox))?
        .iter()
        .filter_map(|l| l.path.file_name()?.to_str().map(String::from))
        .collect();
    let (log, logged) = DetectionLog::open(
        &cfg.folders.logs,
        cfg.log.rotate_bytes,
        cfg.log.keep_files,
        &waiting,
    )
    .map_err(|e| Error::from(e).with_path(&cfg.folders.logs))?;
    if let Ok(n) = files::prune_archive(&cfg.folders.archive, cfg.retention, SystemTime::now()) {
        if n > 0 {
            info!(deleted = n, "archive retention");
        }
    }

    // Watcher: its callback only forwards; a full channel means lost events.
    let (ev_tx, mut ev_rx) = bounded::<notify::Result<notify::Event>>(4096);
    let overflow = Arc::new(AtomicBool::new(false));
    let flag = overflow.clone();
    let watcher = if cfg.watch.events {
        let mut w = notify::recommended_watcher(move |ev| {
            if ev_tx.try_send(ev).is_err() {
                flag.store(true, Ordering::Relaxed);
            }
        })
        .map_err(|e| Error::new(ErrorKind::Data(format!("cannot watch the inbox: {e}"))))?;
        w.watch(&cfg.folders.inbox, RecursiveMode::NonRecursive)
            .map_err(|e| {
                Error::new(ErrorKind::Data(format!("cannot watch the inbox: {e}")))
                    .with_path(&cfg.folders.inbox)
            })?;
        Some(w)
    } else {
        info!("file events are off: the inbox is found by listing alone");
        None
    };

    let workers = if cfg.workers == 0 {
        thread::available_parallelism()
            .map(|n| n.get())
            .unwrap_or(1)
    } else {
        cfg.workers
    };
    let queue = cfg.watch.queue;
    let (work_tx, work_rx) = bounded::<Job>(queue);
    let (res_tx, res_rx) = bounded::<(Job, Outcome)>(queue + workers);
    let (done_tx, done_rx) = unbounded::<FromWriter>();
    // Stopping asks the writer to sync now rather than at its batch deadline.
    let (flush_tx, flush_rx) = bounded::<()>(1);
    // The watchdog is fed while frames keep finishing; a batch may hold
    // finished frames back for up to its sync time.
    let stall = Duration::from_secs(10)
        + match cfg.log.sync {
            SyncPolicy::Batch { millis, .. } => Duration::from_millis(2 * millis),
            SyncPolicy::EveryRecord => Duration::ZERO,
        };
    let mut handles = Vec::new();
    for k in 0..workers {
        let (rx, tx, det) = (work_rx.clone(), res_tx.clone(), detector.clone());
        handles.push(
            thread::Builder::new()
                .name(format!("burlwatch-worker-{k}"))
                .spawn(move || worker(rx, tx, det))
                .map_err(Error::from)?,
        );
    }
    drop((work_rx, res_tx));
    let writer = {
        let (folders, policy) = (cfg.folders.clone(), cfg.log.sync);
        thread::Builder::new()
            .name("burlwatch-writer".into())
            .spawn(move || write_loop(res_rx, flush_rx, done_tx, log, logged, policy, folders))
            .map_err(Error::from)?
    };

    let mut cfg = cfg;
    let mut settle = Settle::new(Duration::from_millis(cfg.watch.settle_millis));
    let mut ready: VecDeque<PathBuf> = VecDeque::new();
    // Paths queued or in flight: never handed out twice at once.
    let mut known: HashSet<PathBuf> = HashSet::new();
    // Jobs handed out and not yet taken by the writer (bounded by `queue`),
    // and those not yet finished (taken ones wait only for their sync).
    let mut in_flight = 0usize;
    let mut unfinished = 0usize;
    let mut seq = 0u64;
    let mut summary = Summary::default();
    let mut stopping = false;
    let mut workers_lost = false;
    let period = Duration::from_millis(cfg.watch.settle_millis.clamp(20, 100));
    let ticker = tick(period);
    let mut rescan_every = Duration::from_secs_f64(cfg.watch.rescan_seconds);
    let mut next_rescan = Instant::now();
    let mut next_prune = Instant::now() + Duration::from_secs(3600);
    let mut last_progress = Instant::now();
    status(Status::Ready);
    info!(inbox = %cfg.folders.inbox.display(), workers, queue, "watching");

    loop {
        // Hand out ready frames while there is room.
        while !stopping && in_flight < queue {
            let Some(path) = ready.pop_front() else { break };
            if work_tx.send(Job { seq, path }).is_err() {
                error!("every detection worker has stopped");
                workers_lost = true;
                break;
            }
            seq += 1;
            in_flight += 1;
            unfinished += 1;
        }
        if (stopping && unfinished == 0) || workers_lost {
            break;
        }
        let now = Instant::now();
        let lost = overflow.swap(false, Ordering::Relaxed);
        if lost {
            // Close events may be among those lost.
            settle.forget_announcements();
        }
        if !stopping && (now >= next_rescan || lost) {
            rescan(&cfg, &mut settle, &mut ready, &mut known, now);
            next_rescan = now + rescan_every;
        }
        select! {
            recv(ev_rx) -> ev => match ev {
                Ok(Ok(ev)) => on_event(ev, &cfg, &mut settle, &mut ready, &mut known, &mut next_rescan),
                Ok(Err(e)) => {
                    warn!("file watcher: {e}; listing the inbox again");
                    settle.forget_announcements();
                    next_rescan = Instant::now();
                }
                // The watcher's thread is gone: listing alone from now on.
                Err(_) => {
                    warn!("the file watcher stopped; the inbox is found by listing alone");
                    ev_rx = crossbeam_channel::never();
                }
            },
            recv(done_rx) -> d => match d {
                Ok(FromWriter::Taken) => in_flight -= 1,
                Ok(FromWriter::Done(d)) => {
                    unfinished -= 1;
                    known.remove(&d.path);
                    last_progress = Instant::now();
                    match d.outcome {
                        DoneKind::Logged => {
                            summary.logged += 1;
                            summary.objects += d.objects;
                        }
                        DoneKind::AlreadyLogged => summary.already_logged += 1,
                        DoneKind::Rejected => summary.rejected += 1,
                        DoneKind::Left => {}
                    }
                }
                Err(_) => break,
            },
            recv(control) -> c => match c {
                Ok(Control::Reload(new)) => {
                    status(Status::Reloading);
                    reload(&mut cfg, new, &detector);
                    rescan_every = Duration::from_secs_f64(cfg.watch.rescan_seconds);
                    status(Status::Reloaded);
                }
                Ok(Control::Stop) | Err(_) => {
                    if c.is_err() {
                        // No one can send any more: stop, and wait on the
                        // other channels only.
                        control = crossbeam_channel::never();
                    }
                    if !stopping {
                        let _ = flush_tx.send(());
                        info!(in_flight = unfinished, "stopping: finishing the frames in flight");
                        status(Status::Stopping);
                    }
                    stopping = true;
                }
            },
            recv(ticker) -> _ => {
                let now = Instant::now();
                check_settling(&mut settle, &mut ready, &mut known, now);
                if unfinished == 0 || now.duration_since(last_progress) < stall {
                    status(Status::Alive);
                }
                if now >= next_prune {
                    next_prune = now + Duration::from_secs(3600);
                    match files::prune_archive(&cfg.folders.archive, cfg.retention, SystemTime::now()) {
                        Ok(n) if n > 0 => info!(deleted = n, "archive retention"),
                        Ok(_) => {}
                        Err(e) => warn!("archive retention: {e}"),
                    }
                }
            }
        }
    }
    drop(work_tx);
    for h in handles {
        let _ = h.join();
    }
    let writer_ok = writer.join().is_ok();
    drop(watcher);
    if workers_lost {
        return Err(Error::new(ErrorKind::Data(
            "every detection worker stopped; frames not yet logged are still in the inbox".into(),
        )));
    }
    if !writer_ok {
        return Err(Error::new(ErrorKind::Data(
            "the detection log writer stopped unexpectedly; frames not yet logged are still in the inbox"
                .into(),
        )));
    }
    info!(
        logged = summary.logged,
        already_logged = summary.already_logged,
        rejected = summary.rejected,
        "stopped"
    );
    Ok(summary)
}

/// Queues `path` if it is a plain frame file not queued or in flight.
fn make_ready(
    path: PathBuf,
    settle: &mut Settle,
    ready: &mut VecDeque<PathBuf>,
    known: &mut HashSet<PathBuf>,
) {
    settle.remove(&path);
    let plain = std::fs::symlink_metadata(&path).is_ok_and(|m| m.file_type().is_file());
    if plain && known.insert(path.clone()) {
        ready.push_back(path);
    }
}

fn is_frame(path: &Path, cfg: &Config) -> bool {
    path.parent() == Some(cfg.folders.inbox.as_path())
        && path
            .file_name()
            .and_then(|n| n.to_str())
            .is_some_and(|n| inbox::is_frame_name(n, &cfg.watch.formats))
}

fn on_event(
    ev: notify::Event,
    cfg: &Config,
    settle: &mut Settle,
    ready: &mut VecDeque<PathBuf>,
    known: &mut HashSet<PathBuf>,
    next_rescan: &mut Instant,
) {
    use notify::event::{AccessKind, AccessMode, CreateKind, ModifyKind, RenameMode};
    if ev.need_rescan() {
        debug!("file events were lost; listing the inbox again");
        settle.forget_announcements();
        *next_rescan = Instant::now();
        return;
    }
    let now = Instant::now();
    // Events name paths under the watched folder as given to `watch`, so
    // they compare equal to paths built from the configured inbox.
    let target = |i: usize| ev.paths.get(i).filter(|p| is_frame(p, cfg)).cloned();
    match ev.kind {
        EventKind::Access(AccessKind::Close(AccessMode::Write)) => {
            if let Some(p) = target(0) {
                make_ready(p, settle, ready, known);
            }
        }
        EventKind::Modify(ModifyKind::Name(RenameMode::To)) => {
            if let Some(p) = target(0) {
                make_ready(p, settle, ready, known);
            }
        }
        EventKind::Modify(ModifyKind::Name(RenameMode::Both)) => {
            if let Some(p) = ev.paths.first() {
                settle.remove(p);
            }
            if let Some(p) = target(1) {
                make_ready(p, settle, ready, known);
            }
        }
        EventKind::Modify(ModifyKind::Name(RenameMode::From)) | EventKind::Remove(_) => {
            for p in &ev.paths {
                settle.remove(p);
            }
        }
        EventKind::Create(CreateKind::File | CreateKind::Any) | EventKind::Modify(_) => {
            if let Some(p) = target(0) {
                if !known.contains(&p) {
                    settle.announce(&p, now);
                }
            }
        }
        _ => {}
    }
}

/// Lists the inbox: every frame not queued or in flight is observed by
/// the settle tracker (a file first seen now is ready only with a settle
/// time of zero); the ready ones are queued oldest first.
fn rescan(
    cfg: &Config,
    settle: &mut Settle,
    ready: &mut VecDeque<PathBuf>,
    known: &mut HashSet<PathBuf>,
    now: Instant,
) {
    match inbox::list(&cfg.folders.inbox, &cfg.watch.formats) {
        Ok(listed) => {
            settle.retain_listed(&listed);
            let done: Vec<PathBuf> = listed
                .iter()
                .filter(|l| !known.contains(&l.path) && settle.observe(l, now))
                .map(|l| l.path.clone())
                .collect();
            for p in done {
                make_ready(p, settle, ready, known);
            }
        }
        Err(e) => warn!(inbox = %cfg.folders.inbox.display(), "cannot list the inbox: {e}"),
    }
}

/// Stats the settling files; those unchanged long enough become ready,
/// oldest first.
fn check_settling(
    settle: &mut Settle,
    ready: &mut VecDeque<PathBuf>,
    known: &mut HashSet<PathBuf>,
    now: Instant,
) {
    let mut done: Vec<inbox::Listed> = Vec::new();
    for path in settle.paths() {
        match std::fs::symlink_metadata(&path) {
            Ok(m) if m.file_type().is_file() => {
                let l = inbox::Listed {
                    path,
                    size: m.len(),
                    modified: m.modified().unwrap_or(SystemTime::UNIX_EPOCH),
                };
                if settle.observe(&l, now) {
                    done.push(l);
                }
            }
            _ => settle.remove(&path),
        }
    }
    done.sort_by(|a, b| a.modified.cmp(&b.modified).then(a.path.cmp(&b.path)));
    for l in done {
        make_ready(l.path, settle, ready, known);
    }
}

/// Applies a new configuration's reloadable parts (detection settings and
/// the model in the state folder); anything invalid keeps the running ones.
fn reload(cfg: &mut Config, new: Option<Box<Config>>, running: &ArcSwap<Running>) {
    let keep = "keeping the running configuration and model";
    let Some(new) = new else {
        error!("reload: the configuration is invalid; {keep}");
        return;
    };
    let model = match load_model(&new) {
        Ok(m) => m,
        Err(e) => {
            error!("reload: {e}; {keep}");
            return;
        }
    };
    let settings = match settings_for(&model, &new) {
        Ok(s) => s,
        Err(e) => {
            error!("reload: bad detection settings: {e}; {keep}");
            return;
        }
    };
    if new.folders != cfg.folders
        || new.workers != cfg.workers
        || new.watch.queue != cfg.watch.queue
        || new.watch.settle_millis != cfg.watch.settle_millis
        || new.watch.events != cfg.watch.events
        || new.log != cfg.log
    {
        warn!(
            "reload: changes to [folders], [log], detection.workers, watch.queue, \
             watch.settle_millis and watch.events take effect after a restart"
        );
    }
    info!(
        version = model.model_version,
        threshold = settings.threshold,
        "reloaded"
    );
    running.store(Arc::new(Running {
        detector: Detector::new(model, settings),
        limits: new.limits.clone(),
    }));
    cfg.threshold = new.threshold;
    cfg.min_area = new.min_area;
    cfg.merge_distance = new.merge_distance;
    cfg.window = new.window;
    cfg.limits = new.limits;
    cfg.retention = new.retention;
    cfg.seed_data = new.seed_data;
    cfg.training = new.training;
    cfg.watch.formats = new.watch.formats;
    cfg.watch.rescan_seconds = new.watch.rescan_seconds;
}

fn worker(jobs: Receiver<Job>, results: Sender<(Job, Outcome)>, running: Arc<ArcSwap<Running>>) {
    let mut scratch = Scratch::default();
    let started = Instant::now();
    let mut clock = || (SystemTime::now(), started.elapsed().as_secs_f64());
    for job in jobs {
        let run = running.load_full();
        let name = job
            .path
            .file_name()
            .map(|n| n.to_string_lossy().into_owned())
            .unwrap_or_default();
        let outcome = match files::read_frame(&job.path, &run.limits) {
            Err((e, stamp)) => match e.kind() {
                ErrorKind::Io(io) if io.kind() == std::io::ErrorKind::NotFound => Outcome::Gone,
                // The file cannot be read by us: reject it, with the reason.
                ErrorKind::Io(io) if io.kind() == std::io::ErrorKind::PermissionDenied => {
                    Outcome::Reject(e.to_string(), stamp)
                }
                // Out of file handles, an I/O error...: try again later.
                ErrorKind::Io(_) => {
                    warn!("{e}; it will be read again");
                    Outcome::Gone
                }
                _ => Outcome::Reject(e.to_string(), stamp),
            },
            Ok(files::FileBytes { bytes, stamp }) => {
                let det = &run.detector;
                let limits = &run.limits;
                // A bug in detection must cost one frame, not the daemon:
                // the frame is rejected with the panic's message.
                let result = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| {
                    det.process(&name, &bytes, limits, &mut scratch, &mut clock)
                }));
                match result {
                    Ok(Ok(d)) => Outcome::Record(Box::new(d.record), stamp),
                    Ok(Err(e)) => Outcome::Reject(e.with_path(&job.path).to_string(), Some(stamp)),
                    Err(panic) => {
                        scratch = Scratch::default();
                        let what = panic
                            .downcast_ref::<&str>()
                            .map(|s| s.to_string())
                            .or_else(|| panic.downcast_ref::<String>().cloned())
                            .unwrap_or_default();
                        error!(frame = %job.path.display(), "internal error while detecting: {what}");
                        Outcome::Reject(
                            format!(
                                "{}: internal error while detecting: {what}",
                                job.path.display()
                            ),
                            Some(stamp),
                        )
                    }
                }
            }
        };
        if results.send((job, outcome)).is_err() {
            return;
        }
    }
}

/// The writer: records in arrival order, synced per policy, frames moved
/// after the sync that covers them.
fn write_loop(
    results: Receiver<(Job, Outcome)>,
    mut flush_now: Receiver<()>,
    done: Sender<FromWriter>,
    mut log: DetectionLog,
    recovered: HashSet<Key>,
    policy: SyncPolicy,
    folders: crate::config::Folders,
) {
    // Keys of records written whose frames are not archived yet: those of
    // frames still in the inbox at start, then every record until its frame
    // is moved. Bounded by the frames in the inbox.
    let mut unmoved: HashSet<Key> = recovered;
    let mut waiting: BTreeMap<u64, (Job, Outcome)> = BTreeMap::new();
    let mut next = 0u64;
    // Logged but not yet synced: (path, objects, stamp of what was read, key).
    let mut unsynced: Vec<Unsynced> = Vec::new();
    let mut first_unsynced: Option<Instant> = None;
    // Stopping: sync as soon as records are written.
    let mut draining = false;
    let send = |path: PathBuf, outcome: DoneKind, objects: u64| {
        let _ = done.send(FromWriter::Done(Done {
            path,
            outcome,
            objects,
        }));
    };
    // A file replaced or rewritten since it was read stays in the inbox,
    // to be read again: the version it is now has no record yet.
    let changed = |path: &Path, stamp: Option<Stamp>| {
        let changed = stamp.is_some_and(|s| Stamp::now(path).ok() != Some(s));
        if changed {
            warn!(frame = %path.display(), "the file changed after it was read; it will be read again");
        }
        changed
    };
    // Moves a logged frame to the archive; true if it went.
    let archive = |path: PathBuf, kind: DoneKind, objects: u64, stamp: Stamp| -> bool {
        if changed(&path, Some(stamp)) {
            send(path, DoneKind::Left, 0);
            return false;
        }
        match files::move_into(&path, &folders.archive) {
            Ok(_) => {
                send(path, kind, objects);
                true
            }
            Err(e) => {
                error!(frame = %path.display(), "cannot move the frame to the archive: {e}");
                send(path, DoneKind::Left, 0);
                false
            }
        }
    };
    // After a failed sync the log drops the records it could not make
    // durable, and they are forgotten here, so their frames are logged
    // again when the next listing finds them.
    let flush = |log: &mut DetectionLog,
                 unmoved: &mut HashSet<Key>,
                 unsynced: &mut Vec<Unsynced>| {
        match log.sync() {
            Ok(()) => {
                for u in unsynced.drain(..) {
                    if archive(u.path, DoneKind::Logged, u.objects, u.stamp) {
                        unmoved.remove(&u.key);
                    }
                }
            }
            Err(e) => {
                error!("cannot sync the detection log: {e}; its frames stay in the inbox");
                for u in unsynced.drain(..) {
                    unmoved.remove(&u.key);
                    send(u.path, DoneKind::Left, 0);
                }
            }
        }
    };
    loop {
        let deadline = match (policy, first_unsynced) {
            (SyncPolicy::Batch { millis, .. }, Some(t)) if !draining => {
                Some(t + Duration::from_millis(millis))
            }
            (_, Some(_)) => Some(Instant::now()),
            _ => None,
        };
        let timeout = match deadline {
            Some(d) => crossbeam_channel::at(d),
            None => crossbeam_channel::never(),
        };
        let mut received = None;
        select! {
            recv(results) -> r => match r {
                Ok(r) => received = Some(r),
                Err(_) => break,
            },
            recv(flush_now) -> r => {
                draining = true;
                if r.is_err() {
                    flush_now = crossbeam_channel::never();
                }
            }
            recv(timeout) -> _ => {}
        }
        if let Some((job, outcome)) = received {
            waiting.insert(job.seq, (job, outcome));
        }
        while let Some((job, outcome)) = waiting.remove(&next) {
            next += 1;
            let _ = done.send(FromWriter::Taken);
            match outcome {
                Outcome::Gone => send(job.path, DoneKind::Left, 0),
                Outcome::Reject(reason, stamp) => {
                    if changed(&job.path, stamp) {
                        send(job.path, DoneKind::Left, 0);
                        continue;
                    }
                    warn!(frame = %job.path.display(), "rejected: {reason}");
                    match files::reject(&job.path, &folders.rejected, &reason) {
                        Ok(_) => send(job.path, DoneKind::Rejected, 0),
                        Err(e) => {
                            error!(frame = %job.path.display(), "cannot move the frame to rejected/: {e}");
                            send(job.path, DoneKind::Left, 0);
                        }
                    }
                }
                Outcome::Record(rec, stamp) => {
                    let key = (rec.frame.clone(), rec.sha256.clone());
                    if unmoved.contains(&key) {
                        debug!(frame = %job.path.display(), "already in the log: archiving only");
                        if archive(job.path, DoneKind::AlreadyLogged, 0, stamp) {
                            unmoved.remove(&key);
                        }
                        continue;
                    }
                    match log.append(&rec) {
                        Ok(()) => {
                            unmoved.insert(key.clone());
                            unsynced.push(Unsynced {
                                path: job.path,
                                objects: rec.objects.len() as u64,
                                stamp,
                                key,
                            });
                            first_unsynced.get_or_insert_with(Instant::now);
                        }
                        Err(e) => {
                            error!(frame = %job.path.display(), "cannot write the detection log: {e}; the frame stays in the inbox");
                            send(job.path, DoneKind::Left, 0);
                        }
                    }
                }
            }
        }
        let due = match policy {
            _ if draining => !unsynced.is_empty(),
            SyncPolicy::EveryRecord => !unsynced.is_empty(),
            SyncPolicy::Batch { records, millis } => {
                unsynced.len() >= records
                    || first_unsynced.is_some_and(|t| t.elapsed() >= Duration::from_millis(millis))
            }
        };
        if due {
            flush(&mut log, &mut unmoved, &mut unsynced);
            first_unsynced = None;
        }
    }
    flush(&mut log, &mut unmoved, &mut unsynced);
}

/// A record written to the log and not yet synced.
struct Unsynced {
    path: PathBuf,
    objects: u64,
    /// The version of the file that was read.
    stamp: Stamp,
    key: Key,
}

#[cfg(test)]
mod tests {
    use super::*;

    fn setup() -> (Config, Settle, VecDeque<PathBuf>, HashSet<PathBuf>) {
        let mut cfg = Config::default();
        cfg.folders.inbox = PathBuf::from("/nonexistent-inbox");
        (
            cfg,
            Settle::new(Duration::from_millis(100)),
            VecDeque::new(),
            HashSet::new(),
        )
    }

    #[test]
    fn lost_events_ask_for_a_listing_and_end_waits_for_close_events() {
        let (cfg, mut settle, mut ready, mut known) = setup();
        let path = cfg.folders.inbox.join("a.pbm");
        let t0 = Instant::now();
        settle.announce(&path, t0);
        let mut next_rescan = t0 + Duration::from_secs(3600);
        let ev = notify::Event::new(EventKind::Other).set_flag(notify::event::Flag::Rescan);
        on_event(
            ev,
            &cfg,
            &mut settle,
            &mut ready,
            &mut known,
            &mut next_rescan,
        );
        assert!(next_rescan <= Instant::now());
        // The announced file now settles like any other.
        let l = inbox::Listed {
            path,
            size: 1,
            modified: SystemTime::UNIX_EPOCH,
        };
        assert!(!settle.observe(&l, t0));
        assert!(settle.observe(&l, t0 + Duration::from_millis(150)));
    }

    #[test]
    fn events_outside_the_inbox_or_for_other_files_are_ignored() {
        use notify::event::{AccessKind, AccessMode};
        let (cfg, mut settle, mut ready, mut known) = setup();
        let mut next = Instant::now();
        for p in [
            "/elsewhere/a.pbm",
            "/nonexistent-inbox/.a.pbm",
            "/nonexistent-inbox/a.txt",
        ] {
            let ev = notify::Event::new(EventKind::Access(AccessKind::Close(AccessMode::Write)))
                .add_path(PathBuf::from(p));
            on_event(ev, &cfg, &mut settle, &mut ready, &mut known, &mut next);
        }
        // A close event for a frame name whose file is gone is ignored too.
        let ev = notify::Event::new(EventKind::Access(AccessKind::Close(AccessMode::Write)))
            .add_path(cfg.folders.inbox.join("b.pbm"));
        on_event(ev, &cfg, &mut settle, &mut ready, &mut known, &mut next);
        assert!(ready.is_empty() && known.is_empty() && settle.is_empty());
    }
}
