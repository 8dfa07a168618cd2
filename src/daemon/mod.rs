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
//! - At most `queue` frames are between the main loop and the writer at
//!   any moment: a burst waits in the inbox as names, not in memory.
//! - The writer appends records in the order frames were handed out, and
//!   moves a frame out of the inbox only after the sync that covers its
//!   record. After a crash, a frame still in the inbox whose name and hash
//!   are in the log is archived without a second record.
//! - The running [`Detector`] sits behind an [`ArcSwap`]: a reload swaps it
//!   whole, and frames in flight finish with the one they started with.
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
use crossbeam_channel::{bounded, select, tick, unbounded, Receiver, RecvTimeoutError, Sender};
use notify::{EventKind, RecursiveMode, Watcher};
use tracing::{debug, error, info, warn};

use crate::codec::DecodeLimits;
use crate::compile::Scratch;
use crate::config::{Config, SyncPolicy};
use crate::detector::Detector;
use crate::error::{Error, ErrorKind, Result};
use crate::evaluate::Settings;
use crate::group::GroupParams;
use crate::learn;
use crate::model::{self, Model};
use crate::record::FrameRecord;

use detlog::{DetectionLog, Key};
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
    let folder = crate::data::read_folder(seed, &cfg.limits, &mut |_, _| {})?;
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

/// What a worker made of a frame.
enum Outcome {
    Record(Box<FrameRecord>),
    Reject(String),
    /// The file went away before it was read.
    Gone,
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
    cfg: Config,
    control: Receiver<Control>,
    status: &mut dyn FnMut(Status),
) -> Result<Summary> {
    make_folders(&cfg)?;
    let _lock = files::StateLock::acquire(&cfg.folders.state)?;
    let model = load_or_train(&cfg)?;
    let settings = settings_for(&model, &cfg)?;
    info!(
        version = model.model_version,
        threshold = settings.threshold,
        min_area = settings.grouping.min_area,
        "model loaded"
    );
    let detector = Arc::new(ArcSwap::from_pointee(Detector::new(model, settings)));
    let (log, logged) =
        DetectionLog::open(&cfg.folders.logs, cfg.log.rotate_bytes, cfg.log.keep_files)
            .map_err(|e| Error::from(e).with_path(&cfg.folders.logs))?;
    if let Ok(n) = files::prune_archive(&cfg.folders.archive, cfg.retention, SystemTime::now()) {
        if n > 0 {
            info!(deleted = n, "archive retention");
        }
    }

    // Watcher: its callback only forwards; a full channel means lost events.
    let (ev_tx, ev_rx) = bounded::<notify::Result<notify::Event>>(4096);
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
    let mut handles = Vec::new();
    for k in 0..workers {
        let (rx, tx, det, limits) = (
            work_rx.clone(),
            res_tx.clone(),
            detector.clone(),
            cfg.limits.clone(),
        );
        handles.push(
            thread::Builder::new()
                .name(format!("treeline-worker-{k}"))
                .spawn(move || worker(rx, tx, det, limits))
                .map_err(Error::from)?,
        );
    }
    drop((work_rx, res_tx));
    let writer = {
        let (folders, policy) = (cfg.folders.clone(), cfg.log.sync);
        thread::Builder::new()
            .name("treeline-writer".into())
            .spawn(move || write_loop(res_rx, done_tx, log, logged, policy, folders))
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
    let period = Duration::from_millis(cfg.watch.settle_millis.clamp(20, 100));
    let ticker = tick(period);
    let rescan_every = Duration::from_secs_f64(cfg.watch.rescan_seconds);
    let mut next_rescan = Instant::now();
    let mut next_prune = Instant::now() + Duration::from_secs(3600);
    let mut last_progress = Instant::now();
    status(Status::Ready);
    info!(inbox = %cfg.folders.inbox.display(), workers, queue, "watching");

    loop {
        // Hand out ready frames while there is room.
        while !stopping && in_flight < queue {
            let Some(path) = ready.pop_front() else { break };
            work_tx
                .send(Job { seq, path })
                .expect("workers outlive the main loop");
            seq += 1;
            in_flight += 1;
            unfinished += 1;
        }
        if stopping && unfinished == 0 {
            break;
        }
        let now = Instant::now();
        if !stopping && (now >= next_rescan || overflow.swap(false, Ordering::Relaxed)) {
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
                Err(_) => {}
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
                    status(Status::Reloaded);
                }
                Ok(Control::Stop) | Err(_) => {
                    if !stopping {
                        info!(in_flight = unfinished, "stopping: finishing the frames in flight");
                        status(Status::Stopping);
                    }
                    stopping = true;
                }
            },
            recv(ticker) -> _ => {
                let now = Instant::now();
                check_settling(&mut settle, &mut ready, &mut known, now);
                if unfinished == 0 || now.duration_since(last_progress) < Duration::from_secs(10) {
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
    let _ = writer.join();
    drop(watcher);
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
fn reload(cfg: &mut Config, new: Option<Box<Config>>, detector: &ArcSwap<Detector>) {
    let Some(new) = new else {
        error!("reload: the configuration is invalid; keeping the running configuration and model");
        return;
    };
    let model = match load_model(&new) {
        Ok(m) => m,
        Err(e) => {
            error!("reload: {e}; keeping the running configuration and model");
            return;
        }
    };
    let settings = match settings_for(&model, &new) {
        Ok(s) => s,
        Err(e) => {
            error!(
                "reload: bad detection settings: {e}; keeping the running configuration and model"
            );
            return;
        }
    };
    if new.folders != cfg.folders
        || new.workers != cfg.workers
        || new.watch.queue != cfg.watch.queue
        || new.log != cfg.log
    {
        warn!("reload: changes to [folders], [log], detection.workers and watch.queue take effect after a restart");
    }
    info!(
        version = model.model_version,
        threshold = settings.threshold,
        "reloaded"
    );
    detector.store(Arc::new(Detector::new(model, settings)));
    cfg.threshold = new.threshold;
    cfg.min_area = new.min_area;
    cfg.merge_distance = new.merge_distance;
    cfg.window = new.window;
    cfg.limits = new.limits;
    cfg.retention = new.retention;
    cfg.watch.formats = new.watch.formats;
    cfg.watch.rescan_seconds = new.watch.rescan_seconds;
}

fn worker(
    jobs: Receiver<Job>,
    results: Sender<(Job, Outcome)>,
    detector: Arc<ArcSwap<Detector>>,
    limits: DecodeLimits,
) {
    let mut scratch = Scratch::default();
    let started = Instant::now();
    let mut clock = || (SystemTime::now(), started.elapsed().as_secs_f64());
    for job in jobs {
        let det = detector.load_full();
        let name = job
            .path
            .file_name()
            .map(|n| n.to_string_lossy().into_owned())
            .unwrap_or_default();
        let outcome = match crate::data::read_bounded(&job.path, &limits) {
            Err(e) if matches!(e.kind(), ErrorKind::Io(io) if io.kind() == std::io::ErrorKind::NotFound) => {
                Outcome::Gone
            }
            Err(e) => Outcome::Reject(e.to_string()),
            Ok(bytes) => match det.process(&name, &bytes, &limits, &mut scratch, &mut clock) {
                Ok(d) => Outcome::Record(Box::new(d.record)),
                Err(e) => Outcome::Reject(e.with_path(&job.path).to_string()),
            },
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
    done: Sender<FromWriter>,
    mut log: DetectionLog,
    logged: HashSet<Key>,
    policy: SyncPolicy,
    folders: crate::config::Folders,
) {
    let mut logged = detlog::Recent::new(logged);
    let mut waiting: BTreeMap<u64, (Job, Outcome)> = BTreeMap::new();
    let mut next = 0u64;
    // Logged but not yet synced: (path, objects).
    let mut unsynced: Vec<(PathBuf, u64)> = Vec::new();
    let mut first_unsynced: Option<Instant> = None;
    let send = |path: PathBuf, outcome: DoneKind, objects: u64| {
        let _ = done.send(FromWriter::Done(Done {
            path,
            outcome,
            objects,
        }));
    };
    let archive = |path: PathBuf, kind: DoneKind, objects: u64| match files::move_into(
        &path,
        &folders.archive,
    ) {
        Ok(_) => send(path, kind, objects),
        Err(e) => {
            error!(frame = %path.display(), "cannot move the frame to the archive: {e}");
            send(path, DoneKind::Left, 0);
        }
    };
    let flush = |log: &mut DetectionLog, unsynced: &mut Vec<(PathBuf, u64)>| match log.sync() {
        Ok(()) => {
            for (p, objects) in unsynced.drain(..) {
                archive(p, DoneKind::Logged, objects);
            }
        }
        Err(e) => {
            error!("cannot sync the detection log: {e}; its frames stay in the inbox");
            for (p, _) in unsynced.drain(..) {
                send(p, DoneKind::Left, 0);
            }
        }
    };
    loop {
        let received = match (policy, first_unsynced) {
            (SyncPolicy::Batch { millis, .. }, Some(t)) => {
                let deadline = t + Duration::from_millis(millis);
                match results.recv_deadline(deadline) {
                    Ok(r) => Some(r),
                    Err(RecvTimeoutError::Timeout) => None,
                    Err(RecvTimeoutError::Disconnected) => break,
                }
            }
            _ => match results.recv() {
                Ok(r) => Some(r),
                Err(_) => break,
            },
        };
        if let Some((job, outcome)) = received {
            waiting.insert(job.seq, (job, outcome));
        }
        while let Some((job, outcome)) = waiting.remove(&next) {
            next += 1;
            let _ = done.send(FromWriter::Taken);
            match outcome {
                Outcome::Gone => send(job.path, DoneKind::Left, 0),
                Outcome::Reject(reason) => {
                    warn!(frame = %job.path.display(), "rejected: {reason}");
                    match files::reject(&job.path, &folders.rejected, &reason) {
                        Ok(_) => send(job.path, DoneKind::Rejected, 0),
                        Err(e) => {
                            error!(frame = %job.path.display(), "cannot move the frame to rejected/: {e}");
                            send(job.path, DoneKind::Left, 0);
                        }
                    }
                }
                Outcome::Record(rec) => {
                    let key = (rec.frame.clone(), rec.sha256.clone());
                    if logged.contains(&key) {
                        debug!(frame = %job.path.display(), "already in the log: archiving only");
                        archive(job.path, DoneKind::AlreadyLogged, 0);
                        continue;
                    }
                    match log.append(&rec) {
                        Ok(()) => {
                            logged.insert(key);
                            unsynced.push((job.path, rec.objects.len() as u64));
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
            SyncPolicy::EveryRecord => !unsynced.is_empty(),
            SyncPolicy::Batch { records, millis } => {
                unsynced.len() >= records
                    || first_unsynced.is_some_and(|t| t.elapsed() >= Duration::from_millis(millis))
            }
        };
        if due {
            flush(&mut log, &mut unsynced);
            first_unsynced = None;
        }
    }
    flush(&mut log, &mut unsynced);
}
