//! The learner thread: owns the state folder's learning side
//! ([`Learning`]) while the daemon runs. It applies the correction files
//! the main loop hands it, answers the commands' requests, checks the
//! retraining schedule, and runs a retrain on a job thread of its own at
//! low priority with a time budget, so neither detection nor correction
//! intake waits for training. A model to put in service is sent to the
//! main loop, which swaps it in; `state/model.json` is already the new
//! model by then.

use std::path::PathBuf;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::thread;
use std::time::{Duration, Instant};

use arc_swap::ArcSwap;
use crossbeam_channel::{bounded, select, Receiver, Sender};
use tracing::{error, info, warn};

use super::corrections;
use super::learning::Learning;
use super::requests::{self, Answer, Ask, Request};
use super::retrain::{self, Challenge, Plan};
use super::worker::Running;
use crate::model::Model;

/// What the main loop tells the learner.
#[derive(Debug)]
pub(super) enum ToLearner {
    /// A correction file is ready to be read.
    Correction(PathBuf),
}

/// What the learner tells the main loop.
#[derive(Debug)]
pub(super) enum FromLearner {
    /// A correction handed over is finished (applied, rejected or left).
    CorrectionDone(PathBuf),
    /// Put this model in service (already in `state/model.json`).
    InService(Box<Model>),
}

/// A retrain running on its job thread.
struct Job {
    done: Receiver<JobEnd>,
    stop: Arc<AtomicBool>,
    by: String,
    /// Requests to answer when it ends.
    waiting: Vec<PathBuf>,
    thread: thread::JoinHandle<()>,
    /// The learner's `last_tried` before this job: taken back when the
    /// job's decision cannot be recorded, so the schedule tries again.
    tried_before: Option<u64>,
}

/// How a retrain job ended.
enum JobEnd {
    /// Not enough labels yet (why), or the labels could not be read.
    NoRetrain(String),
    /// A challenger grown and judged (or why none was).
    Done(Box<(Plan, crate::error::Result<Challenge>, Model)>),
}

/// The learner's state.
pub(super) struct Learner {
    learning: Learning,
    running: Arc<ArcSwap<Running>>,
    out: Sender<FromLearner>,
    job: Option<Job>,
    next_check: Instant,
    /// The label generation of the last retrain tried (or model put in
    /// service by hand): the schedule counts new labels from there.
    last_tried: Option<u64>,
    /// The drift monitors, for the corrections' error indicators.
    watch: Option<super::alerts::Watch>,
    /// Failing operations on corrections, said once per run of failures.
    troubles: super::troubles::Troubles,
    /// What the status endpoint shows.
    board: Option<Arc<super::status::Board>>,
}

/// Lowers the calling thread's CPU and disk priority (Linux: both are per
/// thread, and threads it starts inherit them): nice 10, and the idle I/O
/// class, which schedulers that know classes serve only when no one else
/// waits for the disk.
fn lower_priority() {
    const IOPRIO_WHO_PROCESS: libc::c_long = 1;
    const IOPRIO_CLASS_IDLE: libc::c_long = 3;
    const IOPRIO_CLASS_SHIFT: libc::c_long = 13;
    // SAFETY: setpriority and ioprio_set on this thread's id; no memory
    // involved. Failures (a scheduler without classes) change nothing.
    unsafe {
        let tid = libc::syscall(libc::SYS_gettid);
        libc::setpriority(libc::PRIO_PROCESS, tid as libc::id_t, 10);
        libc::syscall(
            libc::SYS_ioprio_set,
            IOPRIO_WHO_PROCESS,
            tid,
            IOPRIO_CLASS_IDLE << IOPRIO_CLASS_SHIFT,
        );
    }
}

/// Makes the allocator map large blocks (1 MiB and more) on their own
/// and give them back as soon as they are freed, rather than raising that
/// bound after the first large free and keeping later ones in its heaps:
/// a retrain's store and tree then leave nothing behind.
pub(super) fn map_large_blocks() {
    #[cfg(all(target_os = "linux", target_env = "gnu"))]
    // SAFETY: mallopt sets an allocator parameter; no memory involved.
    unsafe {
        libc::mallopt(libc::M_MMAP_THRESHOLD, 1 << 20);
    }
}

/// Gives freed heap memory back to the system (glibc keeps it otherwise).
fn trim_heap() {
    #[cfg(all(target_os = "linux", target_env = "gnu"))]
    // SAFETY: malloc_trim only releases free memory of the allocator.
    unsafe {
        libc::malloc_trim(0);
    }
}

impl Learner {
    pub fn new(
        learning: Learning,
        running: Arc<ArcSwap<Running>>,
        out: Sender<FromLearner>,
        watch: Option<super::alerts::Watch>,
        board: Option<Arc<super::status::Board>>,
    ) -> Learner {
        let every = running.load().live.retrain.check_every;
        let last_tried = learning.last_decided_generation();
        let interrupted = requests::answer_interrupted(&learning.folders.state);
        if interrupted > 0 {
            warn!(
                interrupted,
                "requests interrupted by the last stop were answered as such"
            );
        }
        Learner {
            learning,
            running,
            out,
            job: None,
            next_check: Instant::now() + every,
            last_tried,
            watch,
            troubles: Default::default(),
            board,
        }
    }

    /// Runs until `from_main` closes; a retrain still running is stopped.
    pub fn run(mut self, from_main: Receiver<ToLearner>) {
        let tick = crossbeam_channel::tick(Duration::from_millis(200));
        loop {
            let done = self.job.as_ref().map(|j| j.done.clone());
            let done = done.unwrap_or_else(crossbeam_channel::never);
            select! {
                recv(from_main) -> m => match m {
                    Ok(ToLearner::Correction(path)) => self.correction(path),
                    Err(_) => break,
                },
                recv(done) -> r => match r {
                    Ok(JobEnd::Done(done)) => {
                        let (plan, result, running) = *done;
                        self.finish_job(plan, result, &running)
                    }
                    Ok(JobEnd::NoRetrain(why)) => self.no_retrain(&why),
                    Err(_) => self.no_retrain("the retrain thread stopped"),
                },
                recv(tick) -> _ => {
                    self.requests();
                    self.schedule();
                    corrections::reject_links(&self.learning.folders.corrections);
                }
            }
        }
        if let Some(job) = self.job.take() {
            job.stop.store(true, Ordering::Relaxed);
            let _ = job.thread.join();
        }
    }

    fn correction(&mut self, path: PathBuf) {
        let run = self.running.load_full();
        let applied = corrections::apply(&path, &mut self.learning, &run.live, Some(&run.detector));
        self.troubled(&applied, &path);
        if let (
            corrections::Applied::New {
                model_hash, error, ..
            },
            Some(watch),
        ) = (&applied, &self.watch)
        {
            if watch.correction(*error, model_hash) && run.live.retrain.on_error_drift {
                info!("error drift: the next retrain check is now");
                self.next_check = Instant::now();
            }
        }
        let _ = self.out.send(FromLearner::CorrectionDone(path));
    }

    /// Says a run of failures to apply corrections once (and once when it
    /// ends), and shows it on the status endpoint meanwhile.
    fn troubled(&mut self, applied: &corrections::Applied, path: &std::path::Path) {
        use corrections::{Applied, CHECKING, STORING};
        let then =
            "corrections stay in the corrections folder and are read again, less often each time";
        match applied {
            Applied::Waiting { what, error } => {
                if self.troubles.fail(what, error, path, then) {
                    if let Some(b) = &self.board {
                        b.trouble(what, Some(format!("{what} fails: {error}; {then}")));
                    }
                }
            }
            Applied::Gone => {}
            _ => {
                for what in [CHECKING, STORING] {
                    if self.troubles.ok(what) {
                        if let Some(b) = &self.board {
                            b.trouble(what, None);
                        }
                    }
                }
            }
        }
    }

    fn requests(&mut self) {
        for (path, req) in requests::pending(&self.learning.folders.state) {
            match req {
                Err(why) => requests::answer(
                    &path,
                    &Answer {
                        ok: false,
                        message: format!("cannot read the request: {why}"),
                    },
                ),
                Ok(r) => {
                    if let Some(claimed) = requests::claim(&path) {
                        self.request(claimed, r);
                    }
                }
            }
        }
    }

    fn request(&mut self, path: PathBuf, r: Request) {
        let reply = |ok: bool, message: String| requests::answer(&path, &Answer { ok, message });
        match r.ask {
            Ask::Changeover { note } => match self.learning.changeover(note, &r.by) {
                Ok(line) => {
                    info!(line = line.line, "changeover recorded");
                    reply(
                        true,
                        format!(
                            "line {} runs from now; the running model keeps running until a retrained one passes the gate",
                            line.line
                        ),
                    )
                }
                Err(e) => reply(false, e.to_string()),
            },
            Ask::Use { version } => {
                let running = self.running.load_full();
                match self.learning.use_version(
                    version,
                    Some(running.detector.model()),
                    &r.by,
                    &running.live,
                ) {
                    Ok(m) => {
                        // The schedule waits for labels newer than this choice.
                        self.last_tried = Some(self.learning.labels.generation());
                        let hash = crate::detect::model_hash(&m);
                        let _ = self.out.send(FromLearner::InService(Box::new(m)));
                        reply(true, format!("version {version} ({hash}) is in service"))
                    }
                    Err(e) => reply(false, e.to_string()),
                }
            }
            Ask::Retrain => {
                if let Some(job) = &mut self.job {
                    // Answered with that retrain's decision.
                    job.waiting.push(path);
                    return;
                }
                match self.start_job(&r.by) {
                    Ok(()) => self.job.as_mut().expect("started").waiting.push(path),
                    Err(why) => reply(false, format!("no retrain: {why}")),
                }
            }
        }
    }

    /// Starts a scheduled retrain when it is due and worth it.
    fn schedule(&mut self) {
        let now = Instant::now();
        if now < self.next_check {
            return;
        }
        let run = self.running.load_full();
        let rt = &run.live.retrain;
        self.next_check = now + rt.check_every;
        if !rt.enabled || self.job.is_some() {
            return;
        }
        if let Some(q) = rt.quiet_hours {
            if q.contains(local_minute()) {
                return;
            }
        }
        let Ok(entry) = self.learning.entry_of(run.detector.model()) else {
            return;
        };
        let new = self
            .learning
            .new_labels(&entry, self.last_tried.unwrap_or(0));
        if new < rt.min_new_labels {
            return;
        }
        match self.start_job("schedule") {
            Ok(()) => info!(new_labels = new, "scheduled retrain: reading the labels"),
            Err(why) => warn!("scheduled retrain not started: {why}"),
        }
    }

    /// Starts a retrain's job thread: it reads the labels (what to read is
    /// decided here from the index, quickly), says if there are not enough,
    /// or grows and judges a challenger. Errs only when it cannot start.
    fn start_job(&mut self, by: &str) -> std::result::Result<(), String> {
        let run = self.running.load_full();
        let entry = self
            .learning
            .entry_of(run.detector.model())
            .map_err(|e| e.to_string())?;
        let changeover = self
            .learning
            .changeover_since(&entry)
            .map_err(|e| e.to_string())?;
        let planned = retrain::plan_job(
            &self.learning.folders.state,
            &mut self.learning.labels,
            &run.live,
        )
        .map_err(|e| e.to_string())?;
        let tried_before = self.last_tried.replace(planned.generation());
        let stop = Arc::new(AtomicBool::new(false));
        let (tx, rx) = bounded(1);
        let model = Box::new(run.detector.model().clone());
        let live = run.live.clone();
        let flag = stop.clone();
        let by_name = by.to_string();
        let spawned = thread::Builder::new()
            .name("burlwatch-retrain".into())
            .spawn(move || {
                lower_priority();
                let deadline = Instant::now() + live.retrain.budget;
                let halt = || flag.load(Ordering::Relaxed) || Instant::now() >= deadline;
                let plan = match planned.read(&live) {
                    Ok(Ok(p)) => p,
                    Ok(Err(why)) => {
                        let _ = tx.send(JobEnd::NoRetrain(why));
                        return;
                    }
                    Err(e) => {
                        let _ = tx.send(JobEnd::NoRetrain(format!("cannot read the labels: {e}")));
                        return;
                    }
                };
                info!(
                    by = %by_name,
                    line = plan.line,
                    train = plan.train.len(),
                    held_out = plan.gate.len(),
                    "retrain started"
                );
                let result = retrain::challenge(&plan, &model, &live, changeover, &halt);
                let _ = tx.send(JobEnd::Done(Box::new((plan, result, *model))));
            });
        let thread = match spawned {
            Ok(t) => t,
            Err(e) => {
                self.learning.labels.release_jobs();
                return Err(e.to_string());
            }
        };
        self.job = Some(Job {
            done: rx,
            stop,
            by: by.to_string(),
            waiting: Vec::new(),
            thread,
            tried_before,
        });
        Ok(())
    }

    /// A retrain job found nothing to do: its store jobs are let go and
    /// whoever asked is told why.
    fn no_retrain(&mut self, why: &str) {
        if let Some(job) = self.job.take() {
            let _ = job.thread.join();
            info!("no retrain: {why}");
            for path in job.waiting {
                requests::answer(
                    &path,
                    &Answer {
                        ok: false,
                        message: format!("no retrain: {why}"),
                    },
                );
            }
        }
        self.learning.labels.release_jobs();
    }

    /// Why a retrain's outcome no longer applies, if it does not: the
    /// model in service or the line changed since it started.
    fn superseded(&self, plan: &Plan, started_with: &Model) -> Option<String> {
        // `model.json`, which the learner itself writes before the main
        // loop swaps: the truth even before the swap.
        let path = self.learning.folders.state.join(super::files::MODEL);
        if let Ok(now) = crate::fileio::models::read_model(&path) {
            if now.model_version != started_with.model_version
                || crate::detect::model_hash(&now) != crate::detect::model_hash(started_with)
            {
                return Some(format!(
                    "version {} went in service while it was trained",
                    now.model_version
                ));
            }
        }
        let line = super::labels::read_lines(&self.learning.folders.state)
            .ok()
            .and_then(|l| l.last().map(|l| l.line))
            .unwrap_or(plan.line);
        (line != plan.line).then(|| {
            format!(
                "a changeover to line {line} came while it was trained for line {}",
                plan.line
            )
        })
    }

    fn finish_job(&mut self, plan: Plan, result: crate::error::Result<Challenge>, running: &Model) {
        let job = self.job.take().expect("a job ended");
        let _ = job.thread.join();
        let then = "the running model stays, and the retrain is tried again at the next check";
        let (ok, message) = match result {
            // A retrain that could not write (a full state folder...) is
            // tried again at the next check, not only once labels are new.
            Err(e) if matches!(e.kind(), crate::error::ErrorKind::Io(_)) => {
                self.last_tried = job.tried_before;
                self.retrain_fails(&e.to_string(), then);
                (false, format!("retrain failed: {e}"))
            }
            Err(e) => {
                error!("retrain failed: {e}");
                (false, format!("retrain failed: {e}"))
            }
            Ok(mut ch) => {
                // The operator put another model in service, or recorded a
                // changeover, while this one grew: it was judged against a
                // model or for a line no longer current, so it is refused.
                if let Some(why) = self.superseded(&plan, running) {
                    ch.passed = false;
                    ch.reason = format!("superseded: {why}; {}", ch.reason);
                }
                let reason = ch.reason.clone();
                match self.learning.decide(&plan, ch, running, &job.by) {
                    Ok(decided) => {
                        if self.troubles.ok(RETRAINING) {
                            if let Some(b) = &self.board {
                                b.trouble(RETRAINING, None);
                            }
                        }
                        match decided {
                            Some(m) => {
                                let msg = format!(
                                    "version {} ({}) is in service: {reason}",
                                    m.model_version,
                                    crate::detect::model_hash(&m)
                                );
                                info!("{msg}");
                                let _ = self.out.send(FromLearner::InService(Box::new(m)));
                                (true, msg)
                            }
                            None => {
                                let msg = format!("the running model stays: {reason}");
                                info!("{msg}");
                                (true, msg)
                            }
                        }
                    }
                    // Nothing was decided (a full state folder...): the
                    // schedule tries again at its next check.
                    Err(e) => {
                        self.last_tried = job.tried_before;
                        let e = format!("cannot record the decision: {e}");
                        self.retrain_fails(&e, then);
                        (false, e)
                    }
                }
            }
        };
        // Store jobs the decision did not commit (a failed retrain) let go.
        self.learning.labels.release_jobs();
        // Everything the retrain allocated is dropped by now: give it back.
        trim_heap();
        for path in job.waiting {
            requests::answer(
                &path,
                &Answer {
                    ok,
                    message: message.clone(),
                },
            );
        }
    }

    /// A retrain failed for its files: said once per run of failures, and
    /// shown on the status endpoint meanwhile.
    fn retrain_fails(&mut self, e: &str, then: &str) {
        let state = self.learning.folders.state.clone();
        if self.troubles.fail(RETRAINING, e, &state, then) {
            if let Some(b) = &self.board {
                b.trouble(RETRAINING, Some(format!("{RETRAINING} fails: {e}; {then}")));
            }
        }
    }
}

/// What a retrain that cannot write is called in the messages.
const RETRAINING: &str = "retraining";

/// Minutes after local midnight now.
fn local_minute() -> u32 {
    // SAFETY: localtime_r writes into the struct we pass; time() reads the clock.
    unsafe {
        let t = libc::time(std::ptr::null_mut());
        let mut tm: libc::tm = std::mem::zeroed();
        if libc::localtime_r(&t, &mut tm).is_null() {
            return 0;
        }
        (tm.tm_hour * 60 + tm.tm_min) as u32
    }
}
