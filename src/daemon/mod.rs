//! The daemon: watches the inbox, detects every frame exactly once, logs
//! it, and moves it on.
//!
//! ```text
//! intake (notify events ──▶ settle ◀── listing) ──▶ main loop ──jobs (bounded)──▶ workers ──▶ writer ──▶ log, archive
//!   intake.rs                                        Event        worker.rs            writer.rs   │ detlog.rs, files.rs
//!                          control (stop, reload) ──▶   ▲                                          ▼
//!                          ticks ──────────────────▶    └────── Taken / Done ◀──────────── sinks (counts, drift monitors)
//! corrections intake ──ready files──▶ main loop ──▶ learner thread ──▶ labels, registry, events (learning.rs)
//!                       requests/ ──────────────────▶   │  └─▶ retrain job thread (retrain.rs)
//!                                      main loop ◀──────┘ InService(model): swaps Running
//! ```
//!
//! - [`run`] only wires the parts together: [`start`] (folders, lock,
//!   model), an `intake::Intake` per watched folder, the workers, the
//!   `writer::Writer` thread, and the main loop, which selects over a
//!   closed `Event` type and hands ready frames out.
//! - At most `watch.queue` frames' bytes are between the main loop and the
//!   writer at any moment: a burst waits in the inbox, only its names in
//!   memory.
//! - The writer appends records in hand-out order and moves a frame out of
//!   the inbox only after the log says its record is durable, and only if
//!   the file is still the version that was read. After a crash, a frame
//!   still in the inbox whose name and hash are in the log is archived
//!   without a second record.
//! - The [`Running`] state (the detector and the live configuration) sits
//!   behind an [`ArcSwap`]: a reload swaps it whole, and frames in flight
//!   finish with the one they started with. A retrained model will be put
//!   in service the same way.
//! - Finished frames are announced to [`sink::RecordSink`] subscribers.
//! - Stopping is asked for through the control channel (the binary maps
//!   signals onto it): no new frame is handed out, frames in flight are
//!   finished, logged, synced and moved, then `run` returns.
//!
//! Nothing here is global: the configuration, the control channel, the
//! status hook, the clock, the ticks and the disk-fault plan are passed in
//! ([`Hooks`]), so tests drive the daemon in-process.
//!
//! The learning loop: the corrections folder is a second `Intake`, whose
//! ready files go to the learner thread ([`learning::Learning`] inside:
//! labels, registry, lines, events log). It applies corrections, answers
//! the commands' requests ([`requests`]), keeps the retraining schedule
//! and runs each retrain on a job thread of its own ([`retrain`]). A model
//! it put in `state/model.json` comes back to the main loop, which swaps
//! [`Running`]: frames in flight finish with the detector they started
//! with, every later one gets the new one, none is dropped or logged
//! twice.
//!
//! The drift monitors ([`alerts`]): a [`sink::RecordSink`] feeds them
//! every logged frame with the statistics its worker took, the learner
//! each new correction's error indicator, and the main loop resets them
//! when it swaps in another model (before the swap, so every frame of the
//! new model meets its references). Their alerts, the alert command and
//! their saved state are on a thread of their own. The status endpoint's
//! metrics will be another sink.

pub mod alerts;
pub mod checks;
pub mod clocksteps;
pub mod corrections;
pub mod detlog;
pub mod events;
pub mod faults;
pub mod files;
pub mod intake;
pub mod labels;
mod learner;
pub mod learning;
pub mod registry;
pub mod requests;
pub mod retrain;
pub mod sink;
pub mod start;
pub mod status;
pub mod troubles;
mod worker;
mod writer;

use std::sync::Arc;
use std::thread;
use std::time::{Duration, Instant, SystemTime};

use arc_swap::ArcSwap;
use crossbeam_channel::{bounded, select, unbounded, Receiver, Sender};
use tracing::{error, info, warn};

use crate::config::{Config, LiveConfig, StartConfig, SyncPolicy};
use crate::error::{Error, Result};

pub use faults::{Fault, Faults};
pub use sink::{Counter, Finished, RecordSink, Summary};
pub use worker::Running;

use intake::{Intake, WatchEvent};
use learner::{FromLearner, Learner, ToLearner};
use worker::Job;
use writer::{FromWriter, Writer};

/// What the daemon can be asked to do while it runs.
#[derive(Clone, Debug, PartialEq)]
pub enum Control {
    /// Finish the frames in flight and return.
    Stop,
    /// Take the live part of a new configuration (read by the caller;
    /// `None` when it did not parse) and reload the model from the state
    /// folder; anything invalid keeps the running ones.
    Reload(Option<Box<Config>>),
}

/// What the daemon tells its supervisor (the binary maps these onto the
/// systemd notification protocol).
#[derive(Clone, Debug, PartialEq, Eq)]
pub enum Status {
    /// Started: the model is loaded and the inbox is watched.
    Ready,
    Reloading,
    /// Reload finished: whether the new configuration and model were
    /// taken, and the keys that changed but need a restart.
    Reloaded {
        applied: bool,
        restart_needed: Vec<&'static str>,
    },
    Stopping,
    /// The pipeline is making progress (or has nothing to do).
    Alive,
    /// The status endpoint listens here (the port chosen, when the
    /// configuration said 0).
    Listening(std::net::SocketAddr),
    /// What the daemon did in the last `seconds` (every
    /// `log.summary_seconds`; also written as an info line).
    Summary {
        last: Summary,
        seconds: u64,
    },
}

/// The daemon's time: monotonic for deadlines, wall-clock for retention.
pub trait Clock: Send + Sync {
    fn now(&self) -> Instant;
    fn wall(&self) -> SystemTime;
}

/// The operating system's clocks.
#[derive(Clone, Copy, Debug, Default)]
pub struct SystemClock;

impl Clock for SystemClock {
    fn now(&self) -> Instant {
        Instant::now()
    }
    fn wall(&self) -> SystemTime {
        SystemTime::now()
    }
}

/// What a caller may pass in besides the configuration and control
/// channel; the defaults are production's.
pub struct Hooks {
    pub clock: Arc<dyn Clock>,
    /// The main loop's heartbeat (settling files, watchdog, retention).
    /// `None`: a real ticker every 20-100 ms (from `watch.settle_millis`).
    /// (Only that something arrived matters; what arrives is ignored.)
    pub ticks: Option<Receiver<Instant>>,
    pub faults: Faults,
    /// Subscribers to finished frames, besides the daemon's own counts.
    pub sinks: Vec<Box<dyn RecordSink>>,
}

impl Default for Hooks {
    fn default() -> Self {
        Hooks {
            clock: Arc::new(SystemClock),
            ticks: None,
            faults: Faults::none(),
            sinks: Vec::new(),
        }
    }
}

/// Runs the daemon until [`Control::Stop`] (or until `control` closes).
pub fn run(
    cfg: Config,
    control: Receiver<Control>,
    status: &mut dyn FnMut(Status),
) -> Result<Summary> {
    run_with(cfg, control, status, Hooks::default())
}

/// [`run`] with the clock, ticks, fault plan and subscribers given.
pub fn run_with(
    cfg: Config,
    control: Receiver<Control>,
    status: &mut dyn FnMut(Status),
    hooks: Hooks,
) -> Result<Summary> {
    let Config { mut start, live } = cfg;
    learner::map_large_blocks();
    if let Some(bad) = checks::folders_with(&start.folders, false)
        .into_iter()
        .find(|f| !f.ok)
    {
        return Err(Error::daemon(format!("{}: {}", bad.what, bad.detail)));
    }
    start.folders = start::make_folders(&start.folders)?;
    let _lock = files::StateLock::acquire(&start.folders.state)?;
    let _folder_locks = files::FolderLocks::acquire(&[
        ("folders.inbox", &start.folders.inbox),
        ("folders.corrections", &start.folders.corrections),
        ("folders.logs", &start.folders.logs),
    ])?;
    let (model, origin, trained_on) = start::load_or_train(&start.folders, &live)?;
    let learning = learning::Learning::open(&start.folders, &live, model.tree.window())?;
    let (model, _) = learning.in_service(model, origin, trained_on)?;
    let detector = start::detector(model, &live)?;
    info!(
        version = detector.version(),
        threshold = detector.settings().threshold,
        min_area = detector.settings().grouping.min_area,
        "model loaded"
    );
    let now = hooks.clock.now();
    let mut inbox = Intake::open(
        "inbox",
        &start.folders.inbox,
        live.formats.clone(),
        Duration::from_millis(start.settle_millis),
        Duration::from_secs_f64(live.rescan_seconds),
        start.events,
        now,
    )?;
    let mut corrections = Intake::open(
        "corrections folder",
        &start.folders.corrections,
        vec!["toml".into()],
        Duration::from_millis(start.settle_millis),
        Duration::from_secs_f64(live.rescan_seconds),
        start.events,
        now,
    )?;
    // Locked above (`FolderLocks`); a folder made again is locked anew.
    inbox.keep_locked("folders.inbox");
    corrections.keep_locked("folders.corrections");
    // The frames waiting now: the log is asked which of them it holds.
    let waiting = inbox
        .names()
        .map_err(|e| Error::from(e).with_path(inbox.dir()))?;
    let (log, logged) = detlog::DetectionLog::open(
        &start.folders.logs,
        start.log.rotate_bytes,
        start.log.keep_files,
        &waiting,
        hooks.faults.clone(),
    )
    .map_err(|e| Error::from(e).with_path(&start.folders.logs))?;
    let mut steps = clocksteps::ClockSteps::open(&start.folders.state);
    steps.look(
        hooks.clock.now(),
        hooks.clock.wall(),
        live.retention.keep_days,
    );
    prune(&start, &live, hooks.clock.wall(), &steps);

    let board = status::Board::new();
    board.set_model(detector.version(), detector.hash());
    let samples = start.monitors.as_ref().map(|m| m.samples);
    let monitors = match &start.monitors {
        Some(settings) => {
            let model = crate::monitor::ModelRef::of(&detector);
            let (monitors, first) =
                alerts::restore(&start.folders.state, settings, model, hooks.clock.wall());
            Some(alerts::start(
                monitors,
                first,
                start.alerts.clone(),
                &start.folders.logs,
                &start.folders.state,
                hooks.clock.clone(),
                Some(board.clone()),
            )?)
        }
        None => {
            info!("drift monitors are off (drift.enabled = false)");
            None
        }
    };
    let (watch, monitor_sink, alerts_thread) = match monitors {
        Some((w, s, t)) => (Some(w), Some(s), Some(t)),
        None => (None, None, None),
    };
    let running = Arc::new(ArcSwap::from_pointee(Running::new(detector, live, samples)));
    let workers = match start.workers {
        0 => thread::available_parallelism().map_or(1, |n| n.get()),
        n => n,
    };
    let (work_tx, work_rx) = bounded::<Job>(start.queue);
    let (res_tx, res_rx) = bounded(start.queue + workers);
    let (out_tx, out_rx) = unbounded::<FromWriter>();
    // Stopping asks the writer to sync now rather than at its batch deadline.
    let (flush_tx, flush_rx) = bounded::<()>(1);
    let mut threads = Vec::new();
    let budget = Arc::new(worker::PixelBudget::new(start.max_pixels_at_once));
    for k in 0..workers {
        let (rx, tx, run) = (work_rx.clone(), res_tx.clone(), running.clone());
        let budget = budget.clone();
        let faults = hooks.faults.clone();
        threads.push(
            thread::Builder::new()
                .name(format!("burlwatch-worker-{k}"))
                .spawn(move || worker::work(rx, tx, run, budget, faults))
                .map_err(Error::from)?,
        );
    }
    drop((work_rx, res_tx));
    let counts = Counter::default();
    let summary_every = Duration::from_secs(start.log.summary_seconds);
    let mut sinks: Vec<Box<dyn RecordSink>> = vec![Box::new(counts.clone())];
    if let Some(sink) = monitor_sink {
        sinks.push(Box::new(sink));
    }
    sinks.push(Box::new(status::MetricsSink(board.clone())));
    // The status endpoint: a failure to listen is said, and the daemon
    // runs on without it.
    let mut listening = None;
    let server = match &start.status {
        Some(st) => {
            if !st.address.ip().is_loopback() {
                warn!(
                    address = %st.address,
                    "the status endpoint listens where other hosts can reach it (status.allow_remote = true)"
                );
            }
            match status::serve(st.address, board.clone(), watch.clone()) {
                Ok(server) => {
                    listening = Some(server.address);
                    Some(server)
                }
                Err(e) => {
                    warn!("{e}; the daemon runs without it");
                    None
                }
            }
        }
        None => None,
    };
    sinks.extend(hooks.sinks);
    let writer = Writer::new(
        log,
        logged,
        start.log.sync,
        &start.folders,
        hooks.faults,
        out_tx,
        sinks,
    );
    let writer = thread::Builder::new()
        .name("burlwatch-writer".into())
        .spawn(move || writer.run(res_rx, flush_rx))
        .map_err(Error::from)?;
    let (to_learner, learner_rx) = unbounded::<ToLearner>();
    let (learner_tx, from_learner) = unbounded::<FromLearner>();
    let learner = Learner::new(
        learning,
        running.clone(),
        learner_tx,
        watch.clone(),
        Some(board.clone()),
    );
    let learner = thread::Builder::new()
        .name("burlwatch-learner".into())
        .spawn(move || learner.run(learner_rx))
        .map_err(Error::from)?;

    let period = Duration::from_millis(start.settle_millis.clamp(20, 100));
    let ticks = hooks
        .ticks
        .unwrap_or_else(|| crossbeam_channel::tick(period));
    let mut main = MainLoop {
        stall: stall_time(start.log.sync),
        queue: start.queue,
        start,
        running,
        inbox,
        corrections,
        to_learner,
        from_learner,
        work_tx,
        flush_tx,
        from_writer: out_rx,
        control,
        ticks,
        clock: hooks.clock,
        watch,
        board,
        seq: 0,
        in_flight: 0,
        unfinished: 0,
        stopping: false,
        workers_lost: false,
        writer_lost: false,
        last_progress: now,
        next_prune: now + Duration::from_secs(3600),
        steps,
        finished_since_prune: 0,
        counts: counts.clone(),
        summary_every,
        next_summary: now + summary_every,
        summarised: Summary::default(),
    };
    status(Status::Ready);
    if let Some(a) = listening {
        status(Status::Listening(a));
    }
    info!(inbox = %main.start.folders.inbox.display(), workers, queue = main.queue, "watching");
    main.run(status);
    let (workers_lost, writer_lost) = (main.workers_lost, main.writer_lost);
    drop(main);
    // The server holds the monitors too: it goes before the alerts thread
    // is waited for.
    drop(server);
    for t in threads {
        let _ = t.join();
    }
    let _ = learner.join();
    let writer_ok = writer.join().is_ok();
    // Every sender is gone now: the alerts thread writes what it was
    // given (the monitors' last state) and ends.
    if let Some(t) = alerts_thread {
        let _ = t.join();
    }
    if workers_lost {
        return Err(Error::daemon(
            "every detection worker stopped; frames not yet logged are still in the inbox",
        ));
    }
    if writer_lost || !writer_ok {
        return Err(Error::daemon(
            "the detection log writer stopped unexpectedly; frames not yet logged are still in the inbox",
        ));
    }
    let summary = counts.get();
    info!(
        logged = summary.logged,
        already_logged = summary.already_logged,
        rejected = summary.rejected,
        "stopped"
    );
    Ok(summary)
}

/// How long the pipeline may go without finishing a frame, while frames
/// are pending, before the watchdog is no longer fed: a batch may hold
/// finished frames back for up to its sync time.
fn stall_time(sync: SyncPolicy) -> Duration {
    Duration::from_secs(10)
        + match sync {
            SyncPolicy::Batch { millis, .. } => Duration::from_millis(2 * millis),
            SyncPolicy::EveryRecord => Duration::ZERO,
        }
}

/// Archive retention, logged when it deletes anything.
/// Archive retention runs at start, every hour, and after this many
/// frames, so a fast line cannot overrun `archive.keep_bytes` by more than
/// that many frames.
pub const PRUNE_FRAMES: u64 = 10_000;

/// Frames archived before a forward step of the wall clock are counted
/// younger by the step (see [`clocksteps`]).
fn prune(start: &StartConfig, live: &LiveConfig, now: SystemTime, steps: &clocksteps::ClockSteps) {
    let allowance = steps.allowance(now, live.retention.keep_days);
    let now = now.checked_sub(allowance).unwrap_or(SystemTime::UNIX_EPOCH);
    match files::prune_archive(&start.folders.archive, live.retention, now) {
        Ok(n) if n > 0 => info!(deleted = n, "archive retention"),
        Ok(_) => {}
        Err(e) => warn!("archive retention: {e}"),
    }
}

/// Everything the main loop waits for.
#[derive(Debug)]
enum Event {
    Watch(WatchEvent),
    CorrectionWatch(WatchEvent),
    Writer(FromWriter),
    Learner(FromLearner),
    /// The learner's thread is gone.
    LearnerGone,
    /// The writer's thread is gone.
    WriterGone,
    Control(Control),
    /// No one can send control messages any more: stop.
    ControlGone,
    Tick,
    /// The tick channel closed (a test's).
    TicksGone,
}

/// The main loop's state: what is handed out, and what is running.
struct MainLoop {
    start: StartConfig,
    running: Arc<ArcSwap<Running>>,
    inbox: Intake,
    corrections: Intake,
    to_learner: Sender<ToLearner>,
    from_learner: Receiver<FromLearner>,
    work_tx: Sender<Job>,
    flush_tx: Sender<()>,
    from_writer: Receiver<FromWriter>,
    control: Receiver<Control>,
    ticks: Receiver<Instant>,
    clock: Arc<dyn Clock>,
    /// The drift monitors (`None` when off).
    watch: Option<alerts::Watch>,
    /// What the status endpoint shows.
    board: Arc<status::Board>,
    queue: usize,
    stall: Duration,
    /// The next job's place in hand-out order.
    seq: u64,
    /// Jobs handed out and not yet taken by the writer (at most `queue`).
    in_flight: usize,
    /// Jobs handed out and not yet finished (taken ones wait for a sync).
    unfinished: usize,
    stopping: bool,
    workers_lost: bool,
    writer_lost: bool,
    last_progress: Instant,
    next_prune: Instant,
    /// Steps of the wall clock seen, which retention allows for.
    steps: clocksteps::ClockSteps,
    /// Frames finished since archive retention last ran.
    finished_since_prune: u64,
    /// The run's counts, and what the last summary line had counted.
    counts: Counter,
    summary_every: Duration,
    next_summary: Instant,
    summarised: Summary,
}

impl MainLoop {
    fn run(&mut self, status: &mut dyn FnMut(Status)) {
        loop {
            if !self.stopping {
                self.inbox.poll(self.clock.now());
                self.corrections.poll(self.clock.now());
                while let Some(path) = self.corrections.next_ready() {
                    let _ = self.to_learner.send(ToLearner::Correction(path));
                }
            }
            self.hand_out();
            if (self.stopping && self.unfinished == 0) || self.workers_lost || self.writer_lost {
                return;
            }
            match self.next_event() {
                Event::Watch(ev) => self.inbox.on_watch(ev, self.clock.now()),
                Event::CorrectionWatch(ev) => self.corrections.on_watch(ev, self.clock.now()),
                Event::Writer(FromWriter::Taken) => self.in_flight -= 1,
                Event::Writer(FromWriter::Done(path)) => {
                    self.unfinished -= 1;
                    self.finished_since_prune += 1;
                    self.inbox.finished(&path, self.clock.now());
                    self.last_progress = self.clock.now();
                }
                Event::Learner(FromLearner::CorrectionDone(path)) => {
                    self.corrections.finished(&path, self.clock.now())
                }
                Event::Learner(FromLearner::InService(model)) => self.put_in_service(*model),
                Event::LearnerGone => {
                    error!("the learner stopped; corrections and retraining wait for a restart");
                    self.from_learner = crossbeam_channel::never();
                }
                Event::WriterGone => {
                    error!("the detection log writer stopped");
                    self.writer_lost = true;
                    self.board.writer_lost();
                }
                Event::Control(Control::Reload(new)) => {
                    status(Status::Reloading);
                    let (applied, restart_needed) = self.reload(new);
                    status(Status::Reloaded {
                        applied,
                        restart_needed,
                    });
                }
                Event::Control(Control::Stop) => self.stop(status),
                Event::ControlGone => {
                    self.control = crossbeam_channel::never();
                    self.stop(status);
                }
                Event::Tick => self.tick(status),
                // Only a test's tick channel can close: no more ticks.
                Event::TicksGone => self.ticks = crossbeam_channel::never(),
            }
        }
    }

    fn next_event(&self) -> Event {
        select! {
            recv(self.inbox.events()) -> ev => Event::Watch(ev),
            recv(self.corrections.events()) -> ev => Event::CorrectionWatch(ev),
            recv(self.from_learner) -> m => m.map_or(Event::LearnerGone, Event::Learner),
            recv(self.from_writer) -> m => m.map_or(Event::WriterGone, Event::Writer),
            recv(self.control) -> c => c.map_or(Event::ControlGone, Event::Control),
            recv(self.ticks) -> t => t.map_or(Event::TicksGone, |_| Event::Tick),
        }
    }

    /// Hands out ready frames while there is room.
    fn hand_out(&mut self) {
        while !self.stopping && self.in_flight < self.queue {
            let Some(path) = self.inbox.next_ready() else {
                break;
            };
            if self
                .work_tx
                .send(Job {
                    seq: self.seq,
                    path,
                })
                .is_err()
            {
                error!("every detection worker has stopped");
                self.workers_lost = true;
                self.board.workers_lost();
                break;
            }
            self.seq += 1;
            self.in_flight += 1;
            self.unfinished += 1;
        }
    }

    fn stop(&mut self, status: &mut dyn FnMut(Status)) {
        if !self.stopping {
            let _ = self.flush_tx.send(());
            info!(
                in_flight = self.unfinished,
                "stopping: finishing the frames in flight"
            );
            status(Status::Stopping);
        }
        self.stopping = true;
    }

    fn tick(&mut self, status: &mut dyn FnMut(Status)) {
        let now = self.clock.now();
        self.inbox.tick(now);
        self.corrections.tick(now);
        let keep_days = self.running.load().live.retention.keep_days;
        self.steps.look(now, self.clock.wall(), keep_days);
        if self.unfinished == 0 || now.duration_since(self.last_progress) < self.stall {
            status(Status::Alive);
        }
        let waiting = self.inbox.waiting();
        let overdue = self
            .start
            .status
            .as_ref()
            .is_some_and(|s| now.duration_since(self.last_progress) >= s.stall);
        self.board.tick(
            self.unfinished as u64,
            waiting as u64,
            (self.unfinished > 0 || waiting > 0) && overdue,
            self.inbox.events_on(),
        );
        if now >= self.next_prune || self.finished_since_prune >= PRUNE_FRAMES {
            self.next_prune = now + Duration::from_secs(3600);
            self.finished_since_prune = 0;
            prune(
                &self.start,
                &self.running.load().live,
                self.clock.wall(),
                &self.steps,
            );
        }
        if !self.summary_every.is_zero() && now >= self.next_summary {
            self.next_summary = now + self.summary_every;
            let total = self.counts.get();
            let last = total.since(&self.summarised);
            self.summarised = total;
            let seconds = self.summary_every.as_secs();
            info!(
                frames = last.logged + last.already_logged,
                objects = last.objects,
                rejected = last.rejected,
                "in the last {seconds} s"
            );
            status(Status::Summary { last, seconds });
        }
    }

    /// Swaps a model the learner put in `state/model.json` into service:
    /// frames in flight finish with the detector they started with.
    fn put_in_service(&mut self, model: crate::model::Model) {
        let live = self.running.load().live.clone();
        match start::detector(model, &live) {
            Ok(detector) => {
                info!(
                    version = detector.version(),
                    hash = detector.hash(),
                    "model in service"
                );
                self.swap(detector, live);
            }
            Err(e) => error!("cannot put the new model in service: {e}; keeping the running one"),
        }
    }

    /// Takes a new configuration's live part and the state folder's model,
    /// both or neither; says which start-only keys changed. Returns whether
    /// they were taken, and those keys.
    fn reload(&mut self, new: Option<Box<Config>>) -> (bool, Vec<&'static str>) {
        let keep = "keeping the running configuration and model";
        let Some(new) = new else {
            error!("reload: the configuration is invalid; {keep}");
            return (false, Vec::new());
        };
        let Config { start, live } = *new;
        let detector = match start::load_model(&self.start.folders, &live)
            .and_then(|m| start::detector(m, &live))
        {
            Ok(d) => d,
            Err(e) => {
                error!("reload: {e}; {keep}");
                return (false, Vec::new());
            }
        };
        // Compared with the folders made absolute the same way as at start.
        let restart_needed = match start.folders.absolute() {
            Ok(folders) => self.start.restart_needed(&StartConfig { folders, ..start }),
            Err(e) => {
                warn!("reload: cannot resolve the new folders: {e}");
                Vec::new()
            }
        };
        if !restart_needed.is_empty() {
            warn!(
                keys = %restart_needed.join(", "),
                "reload: these changes take effect after a restart"
            );
        }
        info!(
            version = detector.version(),
            threshold = detector.settings().threshold,
            "reloaded"
        );
        self.inbox.configure(
            live.formats.clone(),
            Duration::from_secs_f64(live.rescan_seconds),
            self.clock.now(),
        );
        self.swap(detector, live);
        (true, restart_needed)
    }

    /// Puts a detector in service: the monitors take its references first,
    /// so every frame it detects meets them.
    fn swap(&mut self, detector: crate::detect::Detector, live: LiveConfig) {
        if let Some(w) = &self.watch {
            w.reset(crate::monitor::ModelRef::of(&detector));
        }
        let samples = self.start.monitors.as_ref().map(|m| m.samples);
        self.board.set_model(detector.version(), detector.hash());
        self.running
            .store(Arc::new(Running::new(detector, live, samples)));
    }
}
