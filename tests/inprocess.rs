//! The daemon driven in-process: `daemon::run_with` on temporary folders
//! with the control channel, the clock, the ticks and the disk-fault plan
//! in the test's hands, and a sink that reports every finished frame — so
//! these tests wait on messages, not on sleeps.

use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::sync::{Arc, Mutex};
use std::thread;
use std::time::{Duration, Instant, SystemTime};

use crossbeam_channel::{unbounded, Receiver, Sender};

use burlwatch::config::{self, Config};
use burlwatch::daemon::{self, Clock, Control, Fault, Faults, Finished, Hooks, RecordSink, Status};
use burlwatch::record::FrameRecord;

use crate::util::{frames, repo, Dir};

/// Reports each finished frame as (kind, file name).
struct Report(Sender<(&'static str, String)>);

impl RecordSink for Report {
    fn finished(&mut self, event: &Finished<'_>) {
        let name = |p: &Path| p.file_name().unwrap().to_string_lossy().into_owned();
        let _ = self.0.send(match event {
            Finished::Logged(r, _) => ("logged", r.frame.clone()),
            Finished::AlreadyLogged { frame } => ("already", name(frame)),
            Finished::Rejected { frame, .. } => ("rejected", name(frame)),
            Finished::Left { frame } => ("left", name(frame)),
            Finished::Trouble { what, error } => (
                if error.is_some() { "trouble" } else { "works" },
                what.to_string(),
            ),
        });
    }
}

/// A clock that moves only when the test says so.
#[derive(Clone)]
struct TestClock(Arc<Mutex<(Instant, SystemTime)>>);

impl TestClock {
    fn new() -> TestClock {
        TestClock(Arc::new(Mutex::new((Instant::now(), SystemTime::now()))))
    }
    fn advance(&self, d: Duration) {
        let mut t = self.0.lock().unwrap();
        t.0 += d;
        t.1 += d;
    }
    /// The wall clock alone moves, as when it is set.
    fn step(&self, d: Duration) {
        self.0.lock().unwrap().1 += d;
    }
}

impl Clock for TestClock {
    fn now(&self) -> Instant {
        self.0.lock().unwrap().0
    }
    fn wall(&self) -> SystemTime {
        self.0.lock().unwrap().1
    }
}

/// Folders with the committed model in service, and a config around them.
struct Box_ {
    dir: Dir,
}

impl Box_ {
    fn new() -> Box_ {
        let dir = Dir::new();
        let state = dir.join("state");
        std::fs::create_dir_all(&state).unwrap();
        std::fs::copy(
            repo().join("tests/data/model-v2.json"),
            state.join("model.json"),
        )
        .unwrap();
        std::fs::create_dir_all(dir.join("inbox")).unwrap();
        Box_ { dir }
    }

    /// Configuration text with folders under `root` as written.
    fn text(root: &Path, extra: &str) -> String {
        let f = |n: &str| format!("{:?}", root.join(n));
        format!(
            "[folders]\ninbox = {}\narchive = {}\nrejected = {}\ncorrections = {}\n\
             state = {}\nlogs = {}\n{extra}",
            f("inbox"),
            f("archive"),
            f("rejected"),
            f("corrections"),
            f("state"),
            f("logs")
        )
    }

    fn config(&self, extra: &str) -> Config {
        config::from_str(&Box_::text(self.dir.path(), extra)).unwrap()
    }

    fn drop_frames(&self, all: &[(String, Vec<u8>)]) {
        let stage = self.dir.join("stage");
        std::fs::create_dir_all(&stage).unwrap();
        for (n, b) in all {
            std::fs::write(stage.join(n), b).unwrap();
            std::fs::rename(stage.join(n), self.dir.join("inbox").join(n)).unwrap();
        }
    }

    /// Every record in every detection log file (the events log beside
    /// them is not one).
    fn records(&self) -> Vec<FrameRecord> {
        let mut out = Vec::new();
        for e in std::fs::read_dir(self.dir.join("logs")).unwrap() {
            let path = e.unwrap().path();
            if !path.to_string_lossy().contains("detections") {
                continue;
            }
            let text = std::fs::read_to_string(path).unwrap();
            for line in text.lines() {
                out.push(serde_json::from_str(line).unwrap());
            }
        }
        out
    }
}

/// The daemon on its own thread, with what the test needs to drive it.
struct Running {
    control: Sender<Control>,
    statuses: Receiver<Status>,
    finished: Receiver<(&'static str, String)>,
    thread: thread::JoinHandle<burlwatch::Result<daemon::Summary>>,
}

fn start(
    cfg: Config,
    clock: Option<TestClock>,
    ticks: Option<Receiver<Instant>>,
    faults: Faults,
) -> Running {
    let (control, rx) = unbounded();
    let (status_tx, statuses) = unbounded();
    let (fin_tx, finished) = unbounded();
    let thread = thread::spawn(move || {
        let mut hooks = Hooks {
            faults,
            ticks,
            sinks: vec![Box::new(Report(fin_tx))],
            ..Hooks::default()
        };
        if let Some(c) = clock {
            hooks.clock = Arc::new(c);
        }
        daemon::run_with(
            cfg,
            rx,
            &mut |s| {
                let _ = status_tx.send(s);
            },
            hooks,
        )
    });
    let r = Running {
        control,
        statuses,
        finished,
        thread,
    };
    r.wait_status("ready", |s| *s == Status::Ready);
    r
}

impl Running {
    fn wait_status(&self, what: &str, want: impl Fn(&Status) -> bool) -> Status {
        let deadline = Instant::now() + Duration::from_secs(60);
        loop {
            let left = deadline.saturating_duration_since(Instant::now());
            match self.statuses.recv_timeout(left) {
                Ok(s) if want(&s) => return s,
                Ok(_) => {}
                Err(_) => panic!("no {what} status within 60 s"),
            }
        }
    }

    /// Waits until `n` frames were finished with `kind`; returns every
    /// finished frame seen meanwhile.
    fn wait_finished(&self, kind: &str, n: usize) -> Vec<(&'static str, String)> {
        self.wait_until(|seen| seen.iter().filter(|(k, _)| *k == kind).count() >= n)
    }

    /// Collects finished frames until `done` holds for all seen so far.
    fn wait_until(
        &self,
        done: impl Fn(&[(&'static str, String)]) -> bool,
    ) -> Vec<(&'static str, String)> {
        let mut seen = Vec::new();
        let deadline = Instant::now() + Duration::from_secs(120);
        while !done(&seen) {
            let left = deadline.saturating_duration_since(Instant::now());
            match self.finished.recv_timeout(left) {
                Ok(f) => seen.push(f),
                Err(_) => panic!("only {seen:?} finished within 120 s"),
            }
        }
        seen
    }

    fn stop(self) -> daemon::Summary {
        self.control.send(Control::Stop).unwrap();
        self.thread.join().unwrap().unwrap()
    }
}

/// Issue "Make room for the learning loop", first bug. A batch of records
/// is unsynced when a rotation syncs the full file; the next sync fails.
/// The rotated records are durable, so their frames must be archived, and
/// only the records the failed sync cut off are logged again, once. Syncs
/// come every 10 records and a file holds about 17, so the rotation always
/// falls inside a batch, whatever the timing.
#[test]
fn a_failed_sync_after_a_rotation_logs_every_frame_exactly_once() {
    let b = Box_::new();
    let cfg = b.config(
        "[log]\nrotate_bytes = 4096\nkeep_files = 100\nsync = \"batch\"\nsync_records = 10\n\
         sync_millis = 2000\n[watch]\nrescan_seconds = 0.1\nsettle_millis = 20\n[detection]\nworkers = 2\n",
    );
    // Fail the first sync that follows the first rotation.
    let state = Arc::new(Mutex::new((false, false)));
    let s = state.clone();
    let faults = Faults::plan(move |op, _, _| {
        let mut s = s.lock().unwrap();
        match op {
            Fault::Rotate => s.0 = true,
            Fault::Sync if s.0 && !s.1 => {
                s.1 = true;
                return true;
            }
            _ => {}
        }
        false
    });
    let d = start(cfg, None, None, faults);
    let all = frames(80, 5);
    b.drop_frames(&all);
    let seen = d.wait_finished("logged", all.len());
    assert!(state.lock().unwrap().1, "the planned sync failure happened");
    let left: Vec<_> = seen.iter().filter(|(k, _)| *k == "left").collect();
    assert!(
        !left.is_empty(),
        "the failed sync left some frames: {seen:?}"
    );
    let summary = d.stop();
    assert_eq!(summary.logged, 80);
    // Each frame once in the logs, and every frame archived.
    let mut count: HashMap<String, usize> = HashMap::new();
    for r in b.records() {
        *count.entry(r.frame).or_default() += 1;
    }
    let twice: Vec<_> = count.iter().filter(|(_, &c)| c != 1).collect();
    assert!(twice.is_empty(), "logged more than once: {twice:?}");
    assert_eq!(count.len(), 80);
    assert_eq!(
        std::fs::read_dir(b.dir.join("archive")).unwrap().count(),
        80
    );
    assert_eq!(std::fs::read_dir(b.dir.join("inbox")).unwrap().count(), 0);
}

/// Issue "Make room for the learning loop", second bug: a reload of the
/// same configuration with relative folders needs no restart; a changed
/// start-only key is named.
#[test]
fn a_reload_with_relative_folders_names_only_real_changes() {
    let b = Box_::new();
    // The same folders, spelled relative to the working folder.
    let cwd = std::env::current_dir().unwrap();
    let depth = cwd.components().count() - 1;
    let up: PathBuf = std::iter::repeat_n("..", depth).collect();
    let rel = up.join(b.dir.path().strip_prefix("/").unwrap());
    assert!(rel.is_relative());
    let text = Box_::text(&rel, "[watch]\nrescan_seconds = 3600\n");
    let cfg = config::from_str(&text).unwrap();
    let d = start(cfg.clone(), None, None, Faults::none());
    d.control
        .send(Control::Reload(Some(Box::new(cfg.clone()))))
        .unwrap();
    let s = d.wait_status("reloaded", |s| matches!(s, Status::Reloaded { .. }));
    assert_eq!(
        s,
        Status::Reloaded {
            applied: true,
            restart_needed: vec![]
        }
    );
    let changed = config::from_str(&format!("{text}queue = 8\n")).unwrap();
    d.control
        .send(Control::Reload(Some(Box::new(changed))))
        .unwrap();
    let s = d.wait_status("reloaded", |s| matches!(s, Status::Reloaded { .. }));
    assert_eq!(
        s,
        Status::Reloaded {
            applied: true,
            restart_needed: vec!["watch.queue"]
        }
    );
    // A configuration that did not parse keeps everything.
    d.control.send(Control::Reload(None)).unwrap();
    let s = d.wait_status("reloaded", |s| matches!(s, Status::Reloaded { .. }));
    assert!(matches!(s, Status::Reloaded { applied: false, .. }));
    d.stop();
}

/// Settling and listing follow the daemon's clock and ticks, not the wall:
/// with the clock held, a frame dropped after start is not listed; once
/// the clock reaches the listing, it is seen but must stay unchanged for
/// the settle time of the daemon's clock before it is read.
#[test]
fn settling_follows_the_clock_it_is_given() {
    let b = Box_::new();
    let cfg = b.config("[watch]\nevents = false\nsettle_millis = 500\nrescan_seconds = 60\n");
    let clock = TestClock::new();
    let (tick, ticks) = unbounded();
    let d = start(cfg, Some(clock.clone()), Some(ticks), Faults::none());
    // The first listing (due at start) happens before the first tick is
    // handled: once a tick is answered, the inbox has been listed empty.
    tick.send(Instant::now()).unwrap();
    d.wait_status("alive", |s| *s == Status::Alive);
    b.drop_frames(&frames(1, 9));
    // Nothing may finish meanwhile; a short real wait shows it did not.
    let quiet = |d: &Running, why: &str| {
        tick.send(Instant::now()).unwrap();
        d.wait_status("alive", |s| *s == Status::Alive);
        if let Ok(f) = d.finished.recv_timeout(Duration::from_millis(200)) {
            panic!("{f:?} finished {why}");
        }
    };
    quiet(&d, "before its listing");
    clock.advance(Duration::from_secs(30));
    quiet(&d, "before its listing");
    // The listing is due: it sees the frame for the first time.
    clock.advance(Duration::from_secs(30));
    quiet(&d, "before it settled");
    clock.advance(Duration::from_millis(300));
    quiet(&d, "before it settled");
    clock.advance(Duration::from_millis(300));
    tick.send(Instant::now()).unwrap();
    let seen = d.wait_finished("logged", 1);
    assert_eq!(seen, [("logged", "frame-0000.pbm".to_string())]);
    assert_eq!(d.stop().logged, 1);
}

/// A move to the archive that fails leaves the frame in the inbox with its
/// record durable: subscribers heard it logged, and when the frame is met
/// again it is archived without a second record.
#[test]
fn a_failed_move_archives_the_frame_later_without_a_second_record() {
    let b = Box_::new();
    let cfg = b.config("[watch]\nrescan_seconds = 0.1\nsettle_millis = 20\n");
    let faults = Faults::plan(|op, n, _| op == Fault::Move && n < 3);
    let d = start(cfg, None, None, faults);
    let all = frames(10, 21);
    b.drop_frames(&all);
    let count =
        |seen: &[(&str, String)], k: &str| seen.iter().filter(|(kind, _)| *kind == k).count();
    let seen = d.wait_until(|s| count(s, "logged") == 10 && count(s, "already") == 3);
    let count = |k: &str| count(&seen, k);
    assert_eq!(
        (count("logged"), count("left"), count("already")),
        (10, 3, 3)
    );
    let summary = d.stop();
    assert_eq!((summary.logged, summary.already_logged), (10, 3));
    let mut names: Vec<String> = b.records().into_iter().map(|r| r.frame).collect();
    names.sort();
    let want: Vec<String> = all.iter().map(|(n, _)| n.clone()).collect();
    assert_eq!(names, want, "one record per frame");
    assert_eq!(
        std::fs::read_dir(b.dir.join("archive")).unwrap().count(),
        10
    );
}

/// Issue "First run and everyday use", point 7: every
/// `log.summary_seconds` of the daemon's clock, one summary of what
/// happened since the last one (also an info line, and systemd's STATUS).
#[test]
fn a_summary_counts_what_happened_since_the_last_one() {
    let b = Box_::new();
    let cfg = b.config(
        "[watch]\nevents = false\nsettle_millis = 0\nrescan_seconds = 1\n[log]\nsummary_seconds = 60\n",
    );
    b.drop_frames(&frames(2, 31));
    let clock = TestClock::new();
    let (tick, ticks) = unbounded();
    let d = start(cfg, Some(clock.clone()), Some(ticks), Faults::none());
    d.wait_finished("logged", 2);
    clock.advance(Duration::from_secs(60));
    tick.send(Instant::now()).unwrap();
    let s = d.wait_status("summary", |s| matches!(s, Status::Summary { .. }));
    let Status::Summary { last, seconds } = s else {
        unreachable!()
    };
    assert_eq!((last.logged, last.rejected, seconds), (2, 0, 60));
    clock.advance(Duration::from_secs(60));
    tick.send(Instant::now()).unwrap();
    let s = d.wait_status("summary", |s| matches!(s, Status::Summary { .. }));
    let Status::Summary { last, .. } = s else {
        unreachable!()
    };
    assert_eq!(
        last,
        daemon::Summary::default(),
        "nothing since the last one"
    );
    assert_eq!(d.stop().logged, 2);
}

/// One HTTP/1.0 GET on loopback: the status code and the body.
fn get(addr: std::net::SocketAddr, path: &str) -> (u16, String) {
    use std::io::{Read, Write};
    let mut s = std::net::TcpStream::connect(addr).unwrap();
    s.set_read_timeout(Some(Duration::from_secs(10))).unwrap();
    write!(s, "GET {path} HTTP/1.0\r\nHost: localhost\r\n\r\n").unwrap();
    let mut text = String::new();
    s.read_to_string(&mut text).unwrap();
    let code = text[9..12].parse().unwrap();
    let body = text.split_once("\r\n\r\n").map_or("", |p| p.1).to_string();
    (code, body)
}

/// A metric's value in the exposition text.
fn metric(text: &str, name: &str) -> f64 {
    text.lines()
        .find_map(|l| l.strip_prefix(name)?.strip_prefix(' ')?.parse().ok())
        .unwrap_or_else(|| panic!("no {name} in\n{text}"))
}

/// `/metrics` counts what the log holds; promtool (Debian's `prometheus`
/// package, the format's own checker) accepts it; `/healthz` says 503
/// while the writer is held so frames wait and none finishes, and 200
/// again once it goes on; other paths and methods change nothing.
#[test]
fn the_status_endpoint_counts_the_log_and_reports_a_stall() {
    use std::sync::atomic::{AtomicBool, Ordering};
    let b = Box_::new();
    let cfg = b.config(
        "[status]\naddress = \"127.0.0.1:0\"\nstall_seconds = 1\n\
         [watch]\nrescan_seconds = 0.1\nsettle_millis = 20\n",
    );
    let hold = Arc::new(AtomicBool::new(false));
    let h = hold.clone();
    // The writer's appends wait while `hold` is set: a stalled pipeline.
    let faults = Faults::plan(move |op, _, _| {
        while op == Fault::Write && h.load(Ordering::Relaxed) {
            thread::sleep(Duration::from_millis(5));
        }
        false
    });
    let d = start(cfg, None, None, faults);
    let Status::Listening(addr) = d.wait_status("listening", |s| matches!(s, Status::Listening(_)))
    else {
        unreachable!()
    };
    assert!(addr.ip().is_loopback() && addr.port() != 0);
    let mut batch = frames(12, 4242);
    batch.push(("broken.pbm".into(), b"P4\n99999 3\n".to_vec()));
    b.drop_frames(&batch);
    d.wait_until(|seen| seen.len() >= batch.len());
    let (code, text) = get(addr, "/metrics");
    assert_eq!(code, 200);
    let records = b.records();
    let objects: usize = records.iter().map(|r| r.objects.len()).sum();
    assert_eq!(
        metric(&text, "burlwatch_frames_total"),
        records.len() as f64
    );
    assert_eq!(metric(&text, "burlwatch_objects_total"), objects as f64);
    assert_eq!(metric(&text, "burlwatch_rejects_total"), 1.0);
    assert_eq!(
        metric(&text, "burlwatch_frame_seconds_count"),
        records.len() as f64
    );
    assert_eq!(metric(&text, "burlwatch_model_version"), 1.0);
    check_with_promtool(&text);
    let (code, body) = get(addr, "/healthz");
    assert_eq!(code, 200, "{body}");
    let h: serde_json::Value = serde_json::from_str(&body).unwrap();
    assert_eq!(h["healthy"], true);
    assert_eq!(h["model_version"], 1);
    assert!(h["last_frame"].is_string());

    hold.store(true, Ordering::Relaxed);
    b.drop_frames(&frames(3, 4343));
    crate::util::wait_for("/healthz to say 503", 60, || get(addr, "/healthz").0 == 503);
    let (_, body) = get(addr, "/healthz");
    assert!(body.contains("none was finished"), "{body}");
    hold.store(false, Ordering::Relaxed);
    crate::util::wait_for("/healthz to say 200 again", 60, || {
        get(addr, "/healthz").0 == 200
    });

    // Nothing else is served, and nothing changes state.
    assert_eq!(get(addr, "/").0, 404);
    {
        use std::io::{Read, Write};
        let mut s = std::net::TcpStream::connect(addr).unwrap();
        s.set_read_timeout(Some(Duration::from_secs(10))).unwrap();
        write!(s, "POST /metrics HTTP/1.1\r\nHost: localhost\r\nContent-Length: 0\r\nConnection: close\r\n\r\n").unwrap();
        let mut t = String::new();
        let _ = s.read_to_string(&mut t);
        assert!(t.starts_with("HTTP/1.1 405"), "{t}");
    }
    d.stop();
    // The endpoint is gone with the daemon.
    assert!(std::net::TcpStream::connect(addr).is_err());
}

/// Runs `promtool check metrics` on the text when promtool is installed;
/// without it the check is skipped with a reason, unless
/// BURLWATCH_REQUIRE_TOOLS=1 (CI), which makes it a failure.
fn check_with_promtool(text: &str) {
    use std::io::Write;
    let child = std::process::Command::new("promtool")
        .args(["check", "metrics"])
        .stdin(std::process::Stdio::piped())
        .stdout(std::process::Stdio::piped())
        .stderr(std::process::Stdio::piped())
        .spawn();
    let mut child = match child {
        Ok(c) => c,
        Err(e) => {
            assert!(
                std::env::var("BURLWATCH_REQUIRE_TOOLS").as_deref() != Ok("1"),
                "promtool is required (BURLWATCH_REQUIRE_TOOLS=1) but cannot run: {e}"
            );
            let _ = writeln!(
                std::io::stderr(),
                "skipped: promtool (Debian's prometheus package) is not installed: {e}"
            );
            return;
        }
    };
    child
        .stdin
        .take()
        .unwrap()
        .write_all(text.as_bytes())
        .unwrap();
    let out = child.wait_with_output().unwrap();
    assert!(
        out.status.success(),
        "promtool check metrics refused:\n{}{}\n{text}",
        String::from_utf8_lossy(&out.stdout),
        String::from_utf8_lossy(&out.stderr)
    );
}

/// Issue 14: the detection log cannot be written for a while (a full
/// disk, here the fault plan's first 25 writes): the frames stay in the
/// inbox and are tried again with backoff, the trouble is told once when
/// it starts and once when it ends (not once per frame), and every frame
/// is logged once when writing works again.
#[test]
fn a_log_that_cannot_be_written_for_a_while_loses_nothing_and_says_so_once() {
    let b = Box_::new();
    let cfg =
        b.config("[watch]\nrescan_seconds = 0.05\nsettle_millis = 20\n[status]\nenabled = false\n");
    let faults = Faults::plan(|op, n, _| op == Fault::Write && n < 25);
    let d = start(cfg, None, None, faults);
    let all = frames(10, 23);
    b.drop_frames(&all);
    let seen = d.wait_until(|s| s.iter().filter(|(k, _)| *k == "logged").count() == 10);
    let count = |k: &str| seen.iter().filter(|(kind, _)| *kind == k).count();
    assert_eq!(count("trouble"), 1, "{seen:?}");
    assert_eq!(count("works"), 1, "{seen:?}");
    assert!(count("left") >= 10, "{seen:?}");
    let at = |k: &str| seen.iter().position(|(kind, _)| *kind == k).unwrap();
    assert!(at("trouble") < at("works") && at("works") < at("logged"));
    d.stop();
    let mut names: Vec<String> = b.records().into_iter().map(|r| r.frame).collect();
    names.sort();
    let want: Vec<String> = all.iter().map(|(n, _)| n.clone()).collect();
    assert_eq!(names, want, "one record per frame");
}

/// Issue 14: a stalled pipeline (workers held by the fault plan's stall
/// switch, which exists only in a fault plan) stops feeding the watchdog
/// once no frame has finished for the stall time while frames wait; under
/// systemd (`WatchdogSec`, `Restart=on-failure` in the unit, checked by
/// `daemon::the_systemd_unit_verifies_and_is_well_hardened`) that is a
/// restart. When the pipeline moves again, so does the watchdog.
#[test]
fn a_stalled_pipeline_stops_feeding_the_watchdog() {
    use std::sync::atomic::{AtomicBool, Ordering};
    let b = Box_::new();
    let cfg = b.config(
        "[watch]\nevents = false\nsettle_millis = 0\nrescan_seconds = 1\n[status]\nenabled = false\n",
    );
    b.drop_frames(&frames(3, 33));
    let stalled = Arc::new(AtomicBool::new(true));
    let flag = stalled.clone();
    let faults = Faults::plan(move |op, _, _| op == Fault::Stall && flag.load(Ordering::Relaxed));
    let clock = TestClock::new();
    let (tick, ticks) = unbounded();
    let d = start(cfg, Some(clock.clone()), Some(ticks), faults);
    // The frames are handed out and held; within the stall time the
    // watchdog is still fed.
    tick.send(Instant::now()).unwrap();
    d.wait_status("alive", |s| *s == Status::Alive);
    clock.advance(Duration::from_secs(11));
    while d.statuses.try_recv().is_ok() {}
    for _ in 0..3 {
        tick.send(Instant::now()).unwrap();
    }
    // Time for the main loop to take the ticks; no Alive among the
    // statuses meanwhile.
    thread::sleep(Duration::from_millis(300));
    let meanwhile: Vec<Status> = d.statuses.try_iter().collect();
    assert!(
        !meanwhile.contains(&Status::Alive),
        "the watchdog was fed while stalled: {meanwhile:?}"
    );
    assert!(
        d.finished.try_recv().is_err(),
        "a frame finished while stalled"
    );
    // Moving again: the frames finish and the watchdog is fed.
    stalled.store(false, Ordering::Relaxed);
    d.wait_finished("logged", 3);
    tick.send(Instant::now()).unwrap();
    d.wait_status("alive again", |s| *s == Status::Alive);
    assert_eq!(d.stop().logged, 3);
}

/// Issue 14, "the clock jumping back and forward": a wall clock stepped a
/// year ahead must not make archive retention delete every frame at once.
/// The frames archived before the step are counted younger by the step
/// (remembered across a restart) and deleted once `keep_days` have truly
/// passed. Without the allowance, the first retention run after the step
/// deletes all three.
#[test]
fn a_clock_stepped_a_year_ahead_does_not_empty_the_archive() {
    let b = Box_::new();
    let text = "[watch]\nevents = false\nsettle_millis = 0\nrescan_seconds = 1\n\
                [status]\nenabled = false\n[archive]\nkeep_days = 30\n";
    let archived = || std::fs::read_dir(b.dir.join("archive")).map_or(0, |d| d.count());
    // Listed at start (the test's clock alone moves the listing period).
    b.drop_frames(&frames(3, 41));
    let clock = TestClock::new();
    let (tick, ticks) = unbounded();
    let d = start(
        b.config(text),
        Some(clock.clone()),
        Some(ticks),
        Faults::none(),
    );
    d.wait_finished("logged", 3);
    // Each tick is answered with Alive early on, so a tick (and the
    // retention run in it) is over when the next tick's Alive arrives.
    let tick_once = |d: &Running, tick: &Sender<Instant>| {
        for _ in 0..2 {
            while d.statuses.try_recv().is_ok() {}
            tick.send(Instant::now()).unwrap();
            d.wait_status("alive", |s| *s == Status::Alive);
        }
    };
    tick_once(&d, &tick);
    let year = Duration::from_secs(365 * 86_400);
    clock.step(year);
    tick_once(&d, &tick);
    // Retention is due an hour on (monotonic time).
    clock.advance(Duration::from_secs(3601));
    tick_once(&d, &tick);
    assert_eq!(archived(), 3, "the step alone deleted archived frames");
    let steps = std::fs::read_to_string(b.dir.join("state/clock-steps.json")).unwrap();
    assert!(steps.contains("\"seconds\":31536000"), "{steps}");
    d.stop();

    // Restarted with the clock still a year ahead: the step is remembered.
    let clock = TestClock::new();
    clock.step(year + Duration::from_secs(3601));
    let (tick, ticks) = unbounded();
    let d = start(
        b.config(text),
        Some(clock.clone()),
        Some(ticks),
        Faults::none(),
    );
    assert_eq!(archived(), 3, "the retention run at start forgot the step");
    // Thirty days and an hour later the frames are truly that old.
    clock.advance(Duration::from_secs(30 * 86_400 + 3601));
    tick_once(&d, &tick);
    let left: Vec<_> = std::fs::read_dir(b.dir.join("archive"))
        .unwrap()
        .map(|e| e.unwrap().path())
        .collect();
    assert_eq!(
        archived(),
        0,
        "frames older than keep_days were kept: {left:?}"
    );
    d.stop();
}

/// Issue 14, "files vanishing between the event and the read": frames
/// taken out of the inbox after they were handed to a worker (before the
/// read) and after they were read (before the move). The first are not
/// inspected and leave no record; the second keep the record of what was
/// inspected; neither is rejected, tried again or taken for a failing
/// disk, and the rest are logged and archived once each.
#[test]
fn frames_taken_away_between_the_event_and_the_read_are_let_go() {
    let b = Box_::new();
    let cfg = b.config(
        "[watch]\nevents = false\nsettle_millis = 0\nrescan_seconds = 1\n[status]\nenabled = false\n",
    );
    let all = frames(6, 43);
    b.drop_frames(&all);
    let name = |p: &Path| p.file_name().unwrap().to_string_lossy().into_owned();
    let before_read = [all[1].0.clone(), all[3].0.clone()];
    let before_move = all[4].0.clone();
    let faults = Faults::plan(move |op, _, path| {
        let n = name(path);
        // The worker's last step before the read, and the writer's before
        // the move: the file is deleted there, as by another program.
        if (op == Fault::Stall && before_read.contains(&n))
            || (op == Fault::Move && n == before_move)
        {
            let _ = std::fs::remove_file(path);
        }
        false
    });
    let clock = TestClock::new();
    let (tick, ticks) = unbounded();
    let d = start(cfg, Some(clock.clone()), Some(ticks), faults);
    // Frame 4 is both logged and left.
    let seen = d.wait_until(|s| s.len() >= 7);
    let kinds = |k: &str| {
        let mut v: Vec<String> = seen
            .iter()
            .filter(|(x, _)| *x == k)
            .map(|(_, n)| n.clone())
            .collect();
        v.sort();
        v
    };
    assert_eq!(
        kinds("left"),
        [all[1].0.clone(), all[3].0.clone(), all[4].0.clone()]
    );
    assert_eq!(kinds("logged").len(), 4, "{seen:?}");
    assert!(
        kinds("trouble").is_empty() && kinds("rejected").is_empty(),
        "{seen:?}"
    );
    // Later listings find nothing more to do.
    for _ in 0..3 {
        clock.advance(Duration::from_secs(2));
        tick.send(Instant::now()).unwrap();
    }
    thread::sleep(Duration::from_millis(300));
    assert!(d.finished.try_recv().is_err());
    let summary = d.stop();
    assert_eq!(summary.logged, 4);
    let mut logged: Vec<String> = b.records().into_iter().map(|r| r.frame).collect();
    logged.sort();
    assert_eq!(
        logged,
        [
            all[0].0.clone(),
            all[2].0.clone(),
            all[4].0.clone(),
            all[5].0.clone()
        ]
    );
    let archived = std::fs::read_dir(b.dir.join("archive")).unwrap().count();
    assert_eq!(archived, 3, "frame 4 was gone before its move");
    assert_eq!(
        std::fs::read_dir(b.dir.join("rejected")).map_or(0, |d| d.count()),
        0
    );
    assert_eq!(std::fs::read_dir(b.dir.join("inbox")).unwrap().count(), 0);
}
