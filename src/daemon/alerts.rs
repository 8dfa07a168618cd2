//! The drift monitors inside the daemon and the alerts they raise.
//!
//! ```text
//! writer thread: Finished::Logged(record, stats) ──▶ MonitorSink ─┐
//! learner thread: a correction's error indicator ──▶ Watch ───────┤ Monitors (Arc<Mutex>)
//! main loop: a model put in service ──▶ Watch::reset ─────────────┘      │ alerts, snapshots
//!                                                                        ▼
//!                                     alerts thread: logs/alerts.jsonl, the alert command,
//!                                                    state/monitors.json, logs/drift.jsonl
//! ```
//!
//! - The monitors' logic is [`crate::monitor`] (pure); here it is fed,
//!   shared and saved. Frames come through a [`RecordSink`] on the
//!   writer's thread, so only frames whose records are durable count.
//! - Every file write and the alert command happen on the alerts thread:
//!   a slow disk or a hanging command never holds up detection. Alerts
//!   are appended to `alerts.jsonl` in the logs folder (one synced line
//!   each) before the command runs.
//! - The command is an argument vector, run directly (no shell), with the
//!   alert as one JSON line on its standard input, killed after its
//!   timeout; a command that fails, hangs or cannot start is logged, and
//!   nothing else changes.
//! - The monitors' state is saved to `state/monitors.json` (atomically)
//!   every [`SAVE_FRAMES`] frames or [`SAVE_SECONDS`], with every alert
//!   (right after its line, before the command) and when the run ends, and
//!   read back at start if it belongs to the same model and settings: a
//!   restart loses at most the frames since the last save, and repeats an
//!   alert only if the crash fell between its line and that save.
//! - Every `drift.history_minutes` (on the wall clock's whole multiples of
//!   it, at the first frame after one) every statistic's value and
//!   thresholds are appended to the drift history, `logs/drift.jsonl`
//!   (a [`DriftSample`] a line), renamed to `drift.1.jsonl` past
//!   [`HISTORY_ROTATE`]: what the report charts.

use std::io::{Read, Write};
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::sync::{Arc, Mutex, MutexGuard};
use std::thread;
use std::time::{Duration, Instant};

use crossbeam_channel::{Receiver, Sender};
use serde::{Deserialize, Serialize};
use tracing::{error, info, warn};

use super::events::append_line;
use super::sink::{Finished, RecordSink};
use super::Clock;
use crate::config::AlertSettings;
use crate::error::{Error, Result};
use crate::fileio::durable::write_atomic;
use crate::monitor::{Alert, DriftSample, ModelRef, MonitorSettings, MonitorState, Monitors};

/// The alerts log's file name in the logs folder.
pub const FILE: &str = "alerts.jsonl";
/// The drift history's file name in the logs folder: one
/// [`DriftSample`] line every `drift.history_minutes`.
pub const HISTORY_FILE: &str = "drift.jsonl";
/// The drift history's previous file, which a full one is renamed to
/// (replacing the one before).
pub const HISTORY_OLDER: &str = "drift.1.jsonl";
/// The drift history's file is renamed to [`HISTORY_OLDER`] once past
/// this size: at the default interval a line is about 700 bytes, so the
/// two files keep about 40 days in at most 8 MiB.
pub const HISTORY_ROTATE: u64 = 4 << 20;
/// The monitors' saved state in the state folder.
pub const STATE_FILE: &str = "monitors.json";
const STATE_FORMAT: &str = "burlwatch-monitors";
const STATE_VERSION: u32 = 1;
/// The monitors are saved at least this often, in frames...
pub const SAVE_FRAMES: u64 = 500;
/// ...and in seconds (when frames come).
pub const SAVE_SECONDS: u64 = 10;

/// `state/monitors.json`.
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct Saved {
    pub format: String,
    pub format_version: u32,
    /// When it was saved, RFC 3339 UTC.
    pub saved: String,
    pub monitors: Monitors,
}

/// Reads the saved state; `None` when there is none.
pub fn read_saved(state: &Path) -> Result<Option<Saved>> {
    let path = state.join(STATE_FILE);
    let text = match std::fs::read_to_string(&path) {
        Ok(t) => t,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(None),
        Err(e) => return Err(Error::from(e).with_path(&path)),
    };
    let saved: Saved = serde_json::from_str(&text).map_err(|e| {
        Error::daemon(format!(
            "{}: not a monitors state file: {e}",
            path.display()
        ))
    })?;
    if saved.format != STATE_FORMAT || saved.format_version != STATE_VERSION {
        return Err(Error::daemon(format!(
            "{}: format {:?} version {}, expected {STATE_FORMAT:?} version {STATE_VERSION}",
            path.display(),
            saved.format,
            saved.format_version
        )));
    }
    Ok(Some(saved))
}

/// The monitors for `model` at start: the saved ones when they are for the
/// same model and settings; else fresh ones (saying why), with a `cleared`
/// alert for each statistic the saved ones had raised, so the log's last
/// word on it is not a raise that no longer stands.
pub fn restore(
    state: &Path,
    settings: &MonitorSettings,
    model: ModelRef,
    now: std::time::SystemTime,
) -> (Monitors, Vec<Alert>) {
    match read_saved(state) {
        Ok(Some(s)) if s.monitors.model() == &model && s.monitors.settings() == settings => {
            info!(
                frames = s.monitors.frames(),
                saved = %s.saved,
                "drift monitors: state restored"
            );
            (s.monitors, Vec::new())
        }
        Ok(Some(mut s)) => {
            info!(
                "drift monitors: the saved state is for model {} ({}) or other settings; starting afresh",
                s.monitors.model().version,
                s.monitors.model().hash
            );
            let alerts = s.monitors.reset(settings.clone(), model, now);
            (s.monitors, alerts)
        }
        Ok(None) => (Monitors::new(settings.clone(), model), Vec::new()),
        Err(e) => {
            warn!("drift monitors: {e}; starting afresh");
            (Monitors::new(settings.clone(), model), Vec::new())
        }
    }
}

/// Every alert in the logs folder's alerts log that parses, oldest first
/// (a torn line is passed over).
pub fn read_alerts(logs: &Path) -> Result<Vec<Alert>> {
    super::events::read_json_lines(&logs.join(FILE))
}

/// The drift history in the logs folder, oldest first: the older file,
/// then the current one (a torn line is passed over).
pub fn read_history(logs: &Path) -> Result<Vec<DriftSample>> {
    let mut samples = super::events::read_json_lines(&logs.join(HISTORY_OLDER))?;
    samples.extend(super::events::read_json_lines(&logs.join(HISTORY_FILE))?);
    Ok(samples)
}

/// What the alerts thread is asked to do.
#[derive(Debug)]
enum ToAlerts {
    /// Log these alerts, save the state they leave (JSON), then run the
    /// command for each.
    Alerts(Vec<Alert>, String),
    /// Save this state (JSON).
    Save(String),
    /// Append this line to the drift history.
    History(String),
}

/// The monitors shared by the writer's sink, the learner and the main
/// loop; every change they make is passed to the alerts thread.
#[derive(Clone)]
pub struct Watch {
    monitors: Arc<Mutex<Monitors>>,
    tx: Sender<ToAlerts>,
    clock: Arc<dyn Clock>,
}

impl Watch {
    fn lock(&self) -> MutexGuard<'_, Monitors> {
        self.monitors.lock().unwrap_or_else(|p| p.into_inner())
    }

    fn send(&self, alerts: Vec<Alert>, monitors: &Monitors) {
        if !alerts.is_empty() {
            let _ = self
                .tx
                .send(ToAlerts::Alerts(alerts, self.snapshot(monitors)));
        }
    }

    fn save_now(&self, monitors: &Monitors) {
        let _ = self.tx.send(ToAlerts::Save(self.snapshot(monitors)));
    }

    fn snapshot(&self, monitors: &Monitors) -> String {
        let saved = Saved {
            format: STATE_FORMAT.into(),
            format_version: STATE_VERSION,
            saved: crate::record::rfc3339(self.clock.wall()),
            monitors: monitors.clone(),
        };
        serde_json::to_string(&saved).expect("monitors serialise")
    }

    /// Takes one correction of a record of `model_hash`; true when it
    /// raised error drift (whether or not the repeat interval let its
    /// alert line out). Saved at once: corrections are few.
    pub fn correction(&self, error: bool, model_hash: &str) -> bool {
        let mut m = self.lock();
        let before = m.error_drift();
        let alerts = m.correction(error, model_hash, self.clock.wall());
        if alerts.is_empty() {
            self.save_now(&m);
        } else {
            self.send(alerts, &m);
        }
        !before && m.error_drift()
    }

    /// A model was put in service (or runs with other detection settings):
    /// the monitors start again from its references, clearing what was
    /// raised.
    pub fn reset(&self, model: ModelRef) {
        let mut m = self.lock();
        let settings = m.settings().clone();
        let alerts = m.reset(settings, model, self.clock.wall());
        if alerts.is_empty() {
            self.save_now(&m);
        } else {
            self.send(alerts, &m);
        }
    }

    /// Every statistic's state now.
    pub fn states(&self) -> Vec<MonitorState> {
        self.lock().states()
    }
}

/// The monitors' subscriber on the writer's thread.
pub struct MonitorSink {
    watch: Watch,
    since_save: u64,
    last_save: Instant,
    /// The drift history's interval, and when its next line is due (on
    /// the wall clock, at whole multiples of the interval).
    history: Option<Duration>,
    next_history: Option<std::time::SystemTime>,
}

/// The first multiple of `every` since 1970 after `now`.
fn next_multiple(now: std::time::SystemTime, every: Duration) -> std::time::SystemTime {
    let since = now
        .duration_since(std::time::UNIX_EPOCH)
        .unwrap_or_default()
        .as_millis();
    let every_ms = every.as_millis().max(1);
    let next = (since / every_ms + 1) * every_ms;
    std::time::UNIX_EPOCH + Duration::from_millis(next as u64)
}

impl RecordSink for MonitorSink {
    fn finished(&mut self, event: &Finished<'_>) {
        let Finished::Logged(record, stats) = event else {
            return;
        };
        let mut m = self.watch.lock();
        let now = self.watch.clock.wall();
        let alerts = m.frame(stats, record.objects.len(), &record.model_hash, now);
        if let Some(every) = self.history {
            // The wall clock set back by more than an interval (a clock
            // corrected, a box whose clock was wrong): the next line is due
            // from the clock as it now reads, not a day from now.
            if self
                .next_history
                .is_some_and(|due| due.duration_since(now).is_ok_and(|ahead| ahead > every))
            {
                self.next_history = Some(next_multiple(now, every));
            }
            match self.next_history {
                Some(due) if now >= due => {
                    let line = serde_json::to_string(&m.sample(now)).expect("sample serialises");
                    let _ = self.watch.tx.send(ToAlerts::History(line));
                    self.next_history = Some(next_multiple(now, every));
                }
                Some(_) => {}
                None => self.next_history = Some(next_multiple(now, every)),
            }
        }
        self.since_save += 1;
        if !alerts.is_empty() {
            self.watch.send(alerts, &m);
        } else if self.since_save >= SAVE_FRAMES
            || self.last_save.elapsed() >= Duration::from_secs(SAVE_SECONDS)
        {
            self.watch.save_now(&m);
        } else {
            return;
        }
        self.since_save = 0;
        self.last_save = Instant::now();
    }

    fn stopped(&mut self) {
        let m = self.watch.lock();
        self.watch.save_now(&m);
    }
}

/// Starts the alerts thread: returns the shared monitors, the writer's
/// sink, and the thread (which ends once every [`Watch`] and the sink are
/// dropped, after its last file write).
pub fn start(
    monitors: Monitors,
    first: Vec<Alert>,
    settings: AlertSettings,
    logs: &Path,
    state: &Path,
    clock: Arc<dyn Clock>,
    board: Option<Arc<super::status::Board>>,
) -> Result<(Watch, MonitorSink, thread::JoinHandle<()>)> {
    let (tx, rx) = crossbeam_channel::unbounded();
    let watch = Watch {
        monitors: Arc::new(Mutex::new(monitors)),
        tx,
        clock,
    };
    let sink = MonitorSink {
        watch: watch.clone(),
        since_save: 0,
        last_save: Instant::now(),
        history: settings.history,
        next_history: None,
    };
    {
        let m = watch.lock();
        watch.send(first, &m);
    }
    let runner = Runner {
        log: logs.join(FILE),
        history: logs.join(HISTORY_FILE),
        state: state.join(STATE_FILE),
        commands: Commands::start(settings)?,
        board,
        save_failures: std::cell::Cell::new(0),
    };
    let handle = thread::Builder::new()
        .name("burlwatch-alerts".into())
        .spawn(move || runner.run(rx))
        .map_err(Error::from)?;
    Ok((watch, sink, handle))
}

/// Alert commands waiting to run, at most.
pub const COMMAND_QUEUE: usize = 64;

/// The alert command's own thread: commands run one at a time, in the
/// order of their alerts, without holding up the alerts log or the saves.
struct Commands {
    tx: Option<Sender<String>>,
    stopping: Arc<std::sync::atomic::AtomicBool>,
    program: String,
    thread: Option<thread::JoinHandle<()>>,
}

impl Commands {
    /// `None` when there is no command.
    fn start(settings: AlertSettings) -> Result<Option<Commands>> {
        if settings.command.is_empty() {
            return Ok(None);
        }
        let (tx, rx) = crossbeam_channel::bounded::<String>(COMMAND_QUEUE);
        let stopping = Arc::new(std::sync::atomic::AtomicBool::new(false));
        let stop = stopping.clone();
        let program = settings.command[0].clone();
        let thread = thread::Builder::new()
            .name("burlwatch-alert-command".into())
            .spawn(move || {
                let mut skipped = 0;
                for line in rx {
                    // Stopping: what is still queued is not run (every
                    // alert is in the log); the one running finishes or
                    // times out.
                    if stop.load(std::sync::atomic::Ordering::Relaxed) {
                        skipped += 1;
                        continue;
                    }
                    if let Err(why) = run_command(&settings.command, &line, settings.timeout) {
                        warn!(
                            program = %settings.command[0],
                            "alert command: {why}; the alert is in {FILE}"
                        );
                    }
                }
                if skipped > 0 {
                    warn!(
                        skipped,
                        "stopping: alert commands not run; the alerts are in {FILE}"
                    );
                }
            })
            .map_err(Error::from)?;
        Ok(Some(Commands {
            tx: Some(tx),
            stopping,
            program,
            thread: Some(thread),
        }))
    }

    fn send(&self, line: String) {
        let Some(tx) = &self.tx else { return };
        if tx.try_send(line).is_err() {
            warn!(
                program = %self.program,
                "alert command: {COMMAND_QUEUE} commands already wait; this alert's is not run (it is in {FILE})"
            );
        }
    }
}

impl Drop for Commands {
    fn drop(&mut self) {
        self.stopping
            .store(true, std::sync::atomic::Ordering::Relaxed);
        drop(self.tx.take());
        if let Some(t) = self.thread.take() {
            let _ = t.join();
        }
    }
}

/// The alerts thread's work.
struct Runner {
    log: PathBuf,
    history: PathBuf,
    state: PathBuf,
    commands: Option<Commands>,
    /// Counts the lines written, for the status endpoint.
    board: Option<Arc<super::status::Board>>,
    /// Saves of the state failing since this many tries (said once when
    /// they start failing and once when they work again, not every save).
    save_failures: std::cell::Cell<u64>,
}

impl Runner {
    fn run(self, rx: Receiver<ToAlerts>) {
        for msg in rx {
            match msg {
                ToAlerts::Alerts(alerts, state) => {
                    // Logged and saved first, the slow command after, on
                    // its own thread: a crash in between repeats no alert
                    // at the next start, and a hanging command holds up
                    // neither the log nor the saves.
                    let lines: Vec<String> = alerts.iter().map(|a| self.log_alert(a)).collect();
                    self.save(&state);
                    if let Some(c) = &self.commands {
                        for line in lines {
                            c.send(line);
                        }
                    }
                }
                ToAlerts::Save(state) => self.save(&state),
                ToAlerts::History(line) => self.add_history(line),
            }
        }
    }

    /// Appends one line to the drift history, first renaming a full file
    /// to the older one. A failure is said and the line dropped: the
    /// history is for review, detection does not wait on it.
    fn add_history(&self, line: String) {
        if std::fs::metadata(&self.history).is_ok_and(|m| m.len() >= HISTORY_ROTATE) {
            let older = self.history.with_file_name(HISTORY_OLDER);
            if let Err(e) = std::fs::rename(&self.history, &older) {
                warn!(
                    "drift history: cannot rename {} to {}: {e}",
                    self.history.display(),
                    older.display()
                );
            }
        }
        if let Err(e) = append_line(&self.history, line) {
            warn!(
                "drift history: cannot write {}: {e}",
                self.history.display()
            );
        }
    }

    fn save(&self, state: &str) {
        let failures = self.save_failures.get();
        match write_atomic(&self.state, state.as_bytes()) {
            Ok(()) if failures > 0 => {
                info!(
                    "drift monitors: {} saved again after {failures} failed save(s)",
                    self.state.display()
                );
                self.save_failures.set(0);
            }
            Ok(()) => {}
            Err(e) => {
                if failures == 0 {
                    warn!(
                        "drift monitors: cannot save {}: {e}; detection goes on, and a restart now would start the monitors afresh (said once until a save works)",
                        self.state.display()
                    );
                }
                self.save_failures.set(failures + 1);
            }
        }
    }

    /// Says the alert in the daemon's messages and appends it to the
    /// alerts log; returns its line.
    fn log_alert(&self, a: &Alert) -> String {
        if a.state == "cleared" {
            info!(monitor = %a.monitor, statistic = %a.statistic, "{}", a.message);
        } else {
            warn!(monitor = %a.monitor, statistic = %a.statistic, state = %a.state, "{}", a.message);
        }
        let line = serde_json::to_string(a).expect("alert serialises");
        if let Err(e) = append_line(&self.log, line.clone()) {
            error!("cannot write the alerts log: {e}");
        }
        if let Some(b) = &self.board {
            b.alert();
        }
        line
    }
}

/// The most of the command's standard error kept for the message.
const STDERR_KEPT: usize = 2048;

/// Runs `argv` with `input` and a newline on its standard input, waiting
/// at most `timeout`; the error says what went wrong (could not start,
/// timed out and was killed, exit status with the end of its standard
/// error).
pub fn run_command(
    argv: &[String],
    input: &str,
    timeout: Duration,
) -> std::result::Result<(), String> {
    use std::os::unix::process::CommandExt;
    // A process group of its own, so a timeout kills what it started too.
    let mut child = Command::new(&argv[0])
        .args(&argv[1..])
        .stdin(Stdio::piped())
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .process_group(0)
        .spawn()
        .map_err(|e| format!("cannot start {:?}: {e}", argv[0]))?;
    // The alert goes in on a thread of its own: a command that does not
    // read it cannot hold this one past the timeout.
    if let Some(mut stdin) = child.stdin.take() {
        let bytes = format!("{input}\n").into_bytes();
        let _ = thread::Builder::new()
            .name("burlwatch-alert-stdin".into())
            .spawn(move || {
                let _ = stdin.write_all(&bytes);
            });
    }
    // Standard error is read on a thread of its own, so a command that
    // writes much cannot block on a full pipe, and one whose children keep
    // the pipe open cannot hold this thread.
    let kept = Arc::new(Mutex::new(Vec::new()));
    if let Some(mut err) = child.stderr.take() {
        let kept = kept.clone();
        let _ = thread::Builder::new()
            .name("burlwatch-alert-stderr".into())
            .spawn(move || {
                let mut buf = [0u8; 1024];
                while let Ok(n) = err.read(&mut buf) {
                    if n == 0 {
                        break;
                    }
                    let mut k = kept.lock().unwrap_or_else(|p| p.into_inner());
                    k.extend_from_slice(&buf[..n]);
                    let over = k.len().saturating_sub(STDERR_KEPT);
                    k.drain(..over);
                }
            });
    }
    let deadline = Instant::now() + timeout;
    let status = loop {
        match child.try_wait() {
            Ok(Some(status)) => break status,
            Ok(None) if Instant::now() >= deadline => {
                // SAFETY: signals the process group the command leads (its
                // id is the group's, from `process_group(0)`).
                unsafe { libc::kill(-(child.id() as i32), libc::SIGKILL) };
                let _ = child.kill();
                let _ = child.wait();
                return Err(format!(
                    "still running after {:.1} s: killed",
                    timeout.as_secs_f64()
                ));
            }
            Ok(None) => thread::sleep(Duration::from_millis(10)),
            Err(e) => return Err(format!("cannot wait for it: {e}")),
        }
    };
    if status.success() {
        return Ok(());
    }
    // Give the reader a moment to take what the command wrote last.
    thread::sleep(Duration::from_millis(20));
    let err = String::from_utf8_lossy(&kept.lock().unwrap_or_else(|p| p.into_inner())).into_owned();
    let err = err.trim();
    Err(if err.is_empty() {
        format!("{status}")
    } else {
        format!("{status}: {err}")
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn sample(k: u64) -> String {
        serde_json::to_string(&DriftSample {
            time: format!("2026-12-01T00:{:02}:00.000Z", k % 60),
            model_version: 1,
            model_hash: "h".into(),
            frames: k,
            statistics: Vec::new(),
        })
        .unwrap()
    }

    #[test]
    fn a_full_drift_history_is_renamed_and_both_files_are_read_in_order() {
        let dir = tempfile::tempdir().unwrap();
        let runner = Runner {
            log: dir.path().join(FILE),
            history: dir.path().join(HISTORY_FILE),
            state: dir.path().join(STATE_FILE),
            commands: None,
            board: None,
            save_failures: std::cell::Cell::new(0),
        };
        runner.add_history(sample(1));
        runner.add_history(sample(2));
        assert_eq!(
            read_history(dir.path())
                .unwrap()
                .iter()
                .map(|s| s.frames)
                .collect::<Vec<_>>(),
            [1, 2]
        );
        // Past the size: the next line starts a new file, the full one is
        // kept as the older file, replacing the one before.
        std::fs::write(dir.path().join(HISTORY_OLDER), "old\n").unwrap();
        let mut big = std::fs::read_to_string(&runner.history).unwrap();
        while (big.len() as u64) < HISTORY_ROTATE {
            big.push_str(&sample(3));
            big.push('\n');
        }
        std::fs::write(&runner.history, &big).unwrap();
        runner.add_history(sample(4));
        assert_eq!(
            std::fs::read_to_string(&runner.history).unwrap(),
            format!("{}\n", sample(4))
        );
        let all = read_history(dir.path()).unwrap();
        assert_eq!(all.first().unwrap().frames, 1);
        assert_eq!(all.last().unwrap().frames, 4);
        assert_eq!(all.len() as u64, big.lines().count() as u64 + 1);
    }

    #[test]
    fn history_lines_fall_on_whole_multiples_of_the_interval() {
        let t = std::time::UNIX_EPOCH + Duration::from_millis(1_000_123);
        assert_eq!(
            next_multiple(t, Duration::from_secs(300)),
            std::time::UNIX_EPOCH + Duration::from_secs(1_200)
        );
        let on = std::time::UNIX_EPOCH + Duration::from_secs(1_200);
        assert_eq!(
            next_multiple(on, Duration::from_secs(300)),
            std::time::UNIX_EPOCH + Duration::from_secs(1_500)
        );
    }

    /// A wall clock that the test sets.
    struct SetClock(Mutex<std::time::SystemTime>);

    impl Clock for SetClock {
        fn now(&self) -> Instant {
            Instant::now()
        }
        fn wall(&self) -> std::time::SystemTime {
            *self.0.lock().unwrap()
        }
    }

    /// Issue 14 (clock jumps): the wall clock set back by a day does not
    /// stop the drift history for a day; set forward, the next line comes
    /// at the next frame.
    #[test]
    fn the_drift_history_goes_on_when_the_clock_is_set_back_or_forward() {
        use crate::drift::FrameStats;
        use crate::record::FrameRecord;
        let dir = tempfile::tempdir().unwrap();
        let t0 = std::time::UNIX_EPOCH + Duration::from_secs(1_800_000_000);
        let clock = Arc::new(SetClock(Mutex::new(t0)));
        let model = ModelRef {
            version: 1,
            hash: "abc".into(),
            threshold: 0.9,
            min_area: 5,
            merge_distance: 0,
            patterns: Vec::new(),
            leaves: vec![1.0 / 16.0; 16],
            trained: [1.0, 0.01],
        };
        let settings = MonitorSettings::default();
        let (watch, mut sink, thread) = start(
            Monitors::new(settings, model),
            Vec::new(),
            AlertSettings {
                command: Vec::new(),
                timeout: Duration::from_secs(1),
                history: Some(Duration::from_secs(60)),
            },
            dir.path(),
            dir.path(),
            clock.clone(),
            None,
        )
        .unwrap();
        let record = FrameRecord {
            time: String::new(),
            frame: "f.pbm".into(),
            sha256: "00".into(),
            width: 1,
            height: 1,
            model_version: 1,
            model_hash: "abc".into(),
            millis: 1.0,
            objects: Vec::new(),
        };
        let stats = FrameStats::default();
        let mut frame_at = |t: std::time::SystemTime| {
            *clock.0.lock().unwrap() = t;
            sink.finished(&Finished::Logged(&record, &stats));
        };
        let s = Duration::from_secs;
        frame_at(t0);
        frame_at(t0 + s(61));
        frame_at(t0 + s(122));
        // Set back a day: lines go on a minute apart on the new clock.
        let back = t0 - s(86_400);
        frame_at(back);
        frame_at(back + s(61));
        frame_at(back + s(122));
        // Set forward a week: the next frame has its line.
        frame_at(t0 + s(7 * 86_400));
        drop(sink);
        drop(watch);
        thread.join().unwrap();
        let times: Vec<String> = read_history(dir.path())
            .unwrap()
            .into_iter()
            .map(|h| h.time)
            .collect();
        assert_eq!(times.len(), 5, "{times:?}");
        assert!(times[2] < times[1], "the set-back clock's lines: {times:?}");
    }
}
