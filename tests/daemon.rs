//! The daemon end to end: the real binary on temporary folders, fed frames
//! by rename or written in place, stopped by signals or killed.
//!
//! These tests wait by polling the folders with a generous deadline; they
//! never assert on how long anything took.

use std::collections::{HashMap, HashSet};
use std::path::PathBuf;
use std::process::{Child, Command};
use std::time::{Duration, Instant};

use burlwatch::codec;
use burlwatch::record::{sha256_hex, FrameRecord};
use burlwatch::synth::{self, LoomParams};

use crate::util::{fill, frames, rename_in, repo, spawn_daemon, wait_for, Dir, Mounted};

/// A daemon's folders, its configuration and the committed model as its
/// running model.
struct Setup {
    dir: Dir,
}

impl Setup {
    fn new(extra: &str) -> Setup {
        let dir = Dir::new();
        let s = Setup { dir };
        s.write_config(extra);
        let state = s.dir.join("state");
        std::fs::create_dir_all(&state).unwrap();
        std::fs::copy(
            repo().join("tests/data/model-v2.json"),
            state.join("model.json"),
        )
        .unwrap();
        std::fs::create_dir_all(s.inbox()).unwrap();
        s
    }

    fn config_text(&self, extra: &str) -> String {
        let d = self.dir.path();
        format!(
            "[folders]\ninbox = {:?}\narchive = {:?}\nrejected = {:?}\ncorrections = {:?}\n\
             state = {:?}\nlogs = {:?}\n{extra}",
            d.join("inbox"),
            d.join("archive"),
            d.join("rejected"),
            d.join("corrections"),
            d.join("state"),
            d.join("logs"),
        )
    }

    fn write_config(&self, extra: &str) {
        let text = self.config_text(extra);
        std::fs::write(self.config(), text).unwrap();
    }

    fn config(&self) -> PathBuf {
        self.dir.join("burlwatch.toml")
    }

    fn inbox(&self) -> PathBuf {
        self.dir.join("inbox")
    }

    fn start(&self) -> Child {
        spawn_daemon(
            &self.config(),
            self.dir.path(),
            &self.dir.join("daemon.stderr"),
        )
    }

    /// Starts the daemon and waits until it watches the inbox.
    /// Starts a daemon and waits until it watches the inbox. The stderr
    /// file is shared by every daemon of the setup, so the new one counts
    /// only once its own "watching" line is there.
    fn start_watching(&self) -> Child {
        let before = self.stderr().matches("watching").count();
        let d = self.start();
        wait_for("the daemon to start", 60, || {
            self.stderr().matches("watching").count() > before
        });
        d
    }

    fn stderr(&self) -> String {
        std::fs::read_to_string(self.dir.join("daemon.stderr")).unwrap_or_default()
    }

    /// Drops a frame into the inbox the preferred way: written under a
    /// temporary name, then renamed.
    fn drop_frame(&self, name: &str, bytes: &[u8]) {
        rename_in(&self.inbox(), name, bytes);
    }

    /// The configuration of a second daemon on the same folders but with a
    /// state folder of its own (holding the same model).
    fn second_config(&self) -> PathBuf {
        let other = self.dir.join("other-state");
        std::fs::create_dir_all(&other).unwrap();
        std::fs::copy(self.dir.join("state/model.json"), other.join("model.json")).unwrap();
        let cfg = self.dir.join("second.toml");
        std::fs::write(
            &cfg,
            self.config_text("[status]\nenabled = false\n").replace(
                &format!("{:?}", self.dir.join("state")),
                &format!("{other:?}"),
            ),
        )
        .unwrap();
        cfg
    }

    fn names_in(&self, folder: &str) -> HashSet<String> {
        std::fs::read_dir(self.dir.join(folder))
            .map(|d| {
                d.filter_map(|e| e.ok())
                    .map(|e| e.file_name().to_string_lossy().into_owned())
                    .filter(|n| !n.starts_with('.'))
                    .collect()
            })
            .unwrap_or_default()
    }

    /// Every record in the detection log files, oldest file first; also
    /// checks that every file is whole JSON Lines.
    fn records(&self) -> Vec<FrameRecord> {
        let logs = self.dir.join("logs");
        let mut files: Vec<PathBuf> = std::fs::read_dir(&logs)
            .map(|d| d.filter_map(|e| e.ok()).map(|e| e.path()).collect())
            .unwrap_or_default();
        // The events log lives beside the detection log.
        files.retain(|p| {
            p.file_name()
                .is_some_and(|n| n.to_string_lossy().starts_with("detections"))
        });
        files.sort_by_key(|p| (p.ends_with("detections.jsonl"), p.clone()));
        let mut out = Vec::new();
        for f in files {
            let text = std::fs::read_to_string(&f).unwrap();
            assert!(
                text.is_empty() || text.ends_with('\n'),
                "{} ends mid-line",
                f.display()
            );
            for line in text.lines() {
                out.push(serde_json::from_str(line).expect("a whole record"));
            }
        }
        out
    }
}

fn signal(child: &Child, sig: i32) {
    // SAFETY: sends a signal to a child process we started.
    let rc = unsafe { libc::kill(child.id() as i32, sig) };
    assert_eq!(rc, 0, "kill");
}

fn exit_code(child: &mut Child, secs: u64) -> i32 {
    let deadline = Instant::now() + Duration::from_secs(secs);
    loop {
        if let Some(s) = child.try_wait().unwrap() {
            return s.code().unwrap_or(-1);
        }
        if Instant::now() > deadline {
            let _ = child.kill();
            panic!("the daemon did not exit within {secs} s");
        }
        std::thread::sleep(Duration::from_millis(20));
    }
}

/// Drops `all` into the inbox, waits until every one is archived, stops the
/// daemon with SIGTERM (exit 0), and checks one record per frame.
fn feed_and_stop(s: &Setup, d: &mut Child, all: &[(String, Vec<u8>)], secs: u64) {
    for (n, b) in all {
        s.drop_frame(n, b);
    }
    wait_for("every frame to be archived", secs, || {
        s.names_in("archive").len() == all.len()
    });
    signal(d, libc::SIGTERM);
    assert_eq!(exit_code(d, 20), 0, "{}", s.stderr());
    logged_once(&s.records(), all);
}

/// Checks that each frame has exactly one record, with its hash.
fn logged_once(records: &[FrameRecord], frames: &[(String, Vec<u8>)]) {
    let mut by_name: HashMap<&str, Vec<&FrameRecord>> = HashMap::new();
    for r in records {
        by_name.entry(r.frame.as_str()).or_default().push(r);
    }
    for (name, bytes) in frames {
        let rs = by_name
            .get(name.as_str())
            .map(|v| v.as_slice())
            .unwrap_or(&[]);
        assert_eq!(rs.len(), 1, "{name} has {} records", rs.len());
        // FIPS 180-4 SHA-256, the hash the record format names.
        assert_eq!(rs[0].sha256, sha256_hex(bytes), "{name}");
        assert_eq!((rs[0].width, rs[0].height), (64, 40));
        assert_eq!(rs[0].model_version, 1);
    }
    assert_eq!(records.len(), frames.len(), "records for frames never sent");
}

fn peak_rss_kib(child: &Child) -> Option<u64> {
    let status = std::fs::read_to_string(format!("/proc/{}/status", child.id())).ok()?;
    let line = status.lines().find(|l| l.starts_with("VmHWM:"))?;
    line.split_whitespace().nth(1)?.parse().ok()
}

/// `count` frames of 512x512 (32 KiB each as P4), made from 16 distinct
/// loom frames under `count` names.
fn big_frames(count: usize) -> Vec<(String, Vec<u8>)> {
    let p = LoomParams {
        width: 512,
        height: 512,
        ..LoomParams::standard()
    };
    let distinct: Vec<Vec<u8>> = (0..16)
        .map(|i| codec::encode_pbm(&synth::generate(&p, synth::frame_seed(31, i)).frame))
        .collect();
    (0..count)
        .map(|i| (format!("big-{i:04}.pbm"), distinct[i % 16].clone()))
        .collect()
}

#[test]
fn a_burst_of_2000_frames_is_logged_once_and_archived_in_bounded_memory() {
    // Two workers whatever the machine: the memory bound below counts one
    // frame buffer per worker and queue place.
    let s = Setup::new(
        "[log]\nsync = \"batch\"\n[watch]\nsettle_millis = 100\n[detection]\nworkers = 2\n",
    );
    // 2,000 frames of 32 KiB: 64 MiB if the daemon held them all.
    let all = big_frames(2000);
    let mut d = s.start_watching();
    // Written aside first, then renamed in all at once.
    let stage = s.dir.join("stage");
    std::fs::create_dir_all(&stage).unwrap();
    for (n, b) in &all {
        std::fs::write(stage.join(n), b).unwrap();
    }
    for (n, _) in &all {
        std::fs::rename(stage.join(n), s.inbox().join(n)).unwrap();
    }
    wait_for("2000 archived frames", 600, || {
        s.names_in("archive").len() == 2000
    });
    assert!(s.names_in("inbox").is_empty());
    let peak = peak_rss_kib(&d).expect("/proc/PID/status has VmHWM on Linux");
    signal(&d, libc::SIGTERM);
    assert_eq!(exit_code(&mut d, 20), 0, "{}", s.stderr());
    let records = s.records();
    assert_eq!(records.len(), 2000);
    let names: HashSet<&str> = records.iter().map(|r| r.frame.as_str()).collect();
    assert_eq!(names.len(), 2000);
    for (r, (n, b)) in records.iter().zip(&all) {
        // Hand-out order is arrival order, and every hash is the file's.
        assert_eq!(&r.frame, n);
        assert_eq!(r.sha256, sha256_hex(b));
        assert_eq!((r.width, r.height), (512, 512));
    }
    // Bounded memory: the frames wait in the inbox, not in the daemon
    // (the figure for the box is 40 MB).
    assert!(peak < 40 * 1024, "peak resident memory {peak} KiB");
}

#[test]
fn a_frame_written_slowly_in_place_is_read_when_complete() {
    let s = Setup::new("[watch]\nsettle_millis = 100\nrescan_seconds = 0.1\n");
    let mut d = s.start_watching();
    let (_, bytes) = frames(1, 3).remove(0);
    {
        use std::io::Write;
        let mut f = std::fs::File::create(s.inbox().join("slow.pbm")).unwrap();
        for chunk in bytes.chunks(bytes.len() / 4 + 1) {
            f.write_all(chunk).unwrap();
            f.flush().unwrap();
            // Longer than the settle time: only the close event may start
            // the read.
            std::thread::sleep(Duration::from_millis(300));
        }
    }
    wait_for("the slow frame to be archived", 30, || {
        s.names_in("archive").contains("slow.pbm")
    });
    signal(&d, libc::SIGTERM);
    assert_eq!(exit_code(&mut d, 20), 0);
    assert!(
        s.names_in("rejected").is_empty(),
        "{:?}",
        s.names_in("rejected")
    );
    let r = s.records();
    assert_eq!(r.len(), 1);
    assert_eq!(r[0].sha256, sha256_hex(&bytes));
}

#[test]
fn bad_files_are_rejected_with_a_reason_and_the_rest_logged() {
    let s =
        Setup::new("[watch]\nsettle_millis = 50\n[frames]\nmax_width = 4096\nmax_height = 4096\n");
    let mut d = s.start_watching();
    let good = frames(20, 11);
    let bad: Vec<(&str, &[u8], &str)> = vec![
        ("empty.pbm", b"", "empty"),
        ("truncated.pbm", b"P4\n64 40\n\x00\x01\x02", "truncated"),
        (
            "huge-header.pbm",
            b"P4\n100000 100000\n\x00",
            "over the limit",
        ),
        (
            "not-an-image.png",
            b"this is a shift report, not a frame",
            "not a PBM or PNG",
        ),
        ("bad-plain.pbm", b"P1\n2 2\n0 1\n1 x\n", "only '0' and '1'"),
        // Regression: a frame with no pixels was logged as inspected.
        ("no-pixels.pbm", b"P4\n0 0\n", "no pixels"),
    ];
    for (k, (n, b)) in good.iter().enumerate() {
        s.drop_frame(n, b);
        if let Some((bn, bb, _)) = bad.get(k) {
            s.drop_frame(bn, bb);
        }
    }
    wait_for("every frame to leave the inbox", 60, || {
        s.names_in("inbox").is_empty()
    });
    wait_for("20 archived frames", 30, || {
        s.names_in("archive").len() == 20
    });
    // Still alive after all that.
    assert!(
        d.try_wait().unwrap().is_none(),
        "the daemon stopped: {}",
        s.stderr()
    );
    signal(&d, libc::SIGTERM);
    assert_eq!(exit_code(&mut d, 20), 0);
    logged_once(&s.records(), &good);
    let rejected = s.names_in("rejected");
    for (n, _, why) in &bad {
        assert!(rejected.contains(*n), "{n} not rejected: {rejected:?}");
        let reason =
            std::fs::read_to_string(s.dir.join("rejected").join(format!("{n}.reason.txt")))
                .unwrap();
        assert!(reason.contains(why), "{n}: {reason}");
        assert!(reason.contains(n), "the reason names the file: {reason}");
    }
}

#[test]
fn killed_five_times_every_frame_is_logged_exactly_once() {
    killed_five_times("[log]\nsync = \"batch\"\nsync_millis = 50\n[watch]\nsettle_millis = 50\nrescan_seconds = 0.2\n");
}

/// With the smallest `log.rotate_bytes` and batched syncs (a fault probe
/// found kills doubling 22 of 40 frames, whose records a rotation had made
/// durable in a file older than the two then read back at start; the
/// moment is hard to hit by chance, so `detlog`'s
/// `keys_are_read_back_from_every_kept_file` checks it deterministically).
#[test]
fn killed_five_times_with_tiny_log_files_every_frame_is_logged_exactly_once() {
    killed_five_times("[log]\nsync = \"batch\"\nsync_millis = 50\nrotate_bytes = 4096\nkeep_files = 1000\n[watch]\nsettle_millis = 50\nrescan_seconds = 0.2\n");
}

fn killed_five_times(config: &str) {
    let s = Setup::new(config);
    let all = frames(500, 21);
    let feeder = {
        let inbox = s.inbox();
        let all = all.clone();
        std::thread::spawn(move || {
            for (n, b) in &all {
                let tmp = inbox.join(format!(".{n}.tmp"));
                std::fs::write(&tmp, b).unwrap();
                std::fs::rename(&tmp, inbox.join(n)).unwrap();
                std::thread::sleep(Duration::from_millis(4));
            }
        })
    };
    // Seeded "random" moments, so a failure can be replayed.
    let mut rng = synth::Rng::new(2026);
    for _ in 0..5 {
        let mut d = s.start();
        std::thread::sleep(Duration::from_millis(150 + rng.range(0, 400) as u64));
        d.kill().unwrap(); // SIGKILL
        d.wait().unwrap();
    }
    feeder.join().unwrap();
    // The killed daemons may have archived every frame already, so the
    // last one must be seen running (its signal handlers in place) before
    // it is stopped: a SIGTERM that lands while the process is still being
    // loaded ends it with the default action, not a clean exit.
    let mut d = s.start_watching();
    wait_for("500 archived frames", 120, || {
        s.names_in("archive").len() == 500
    });
    signal(&d, libc::SIGTERM);
    assert_eq!(exit_code(&mut d, 20), 0, "{}", s.stderr());
    assert!(s.names_in("inbox").is_empty());
    assert!(
        s.names_in("rejected").is_empty(),
        "{:?}",
        s.names_in("rejected")
    );
    logged_once(&s.records(), &all);
}

#[test]
fn sigterm_with_frames_in_flight_loses_nothing() {
    // A long batch: stopping must sync at once, not wait 30 s.
    let s = Setup::new(
        "[log]\nsync = \"batch\"\nsync_records = 32\nsync_millis = 30000\n[watch]\nsettle_millis = 50\nqueue = 64\n",
    );
    let all = frames(300, 5);
    let mut d = s.start_watching();
    for (n, b) in &all {
        s.drop_frame(n, b);
    }
    wait_for("a first synced batch", 30, || {
        !s.names_in("archive").is_empty()
    });
    signal(&d, libc::SIGTERM);
    assert_eq!(exit_code(&mut d, 20), 0, "{}", s.stderr());
    assert!(s
        .stderr()
        .contains("stopping: finishing the frames in flight"));
    let records = s.records();
    let archived = s.names_in("archive");
    let waiting = s.names_in("inbox");
    // Every frame is either archived with its one record, or still waiting.
    let logged: HashSet<String> = records.iter().map(|r| r.frame.clone()).collect();
    assert_eq!(logged.len(), records.len(), "a frame was logged twice");
    assert_eq!(logged, archived);
    for (n, _) in &all {
        assert!(
            archived.contains(n) ^ waiting.contains(n),
            "{n} lost or doubled"
        );
    }
}

#[test]
fn sighup_reloads_and_keeps_the_running_config_when_the_new_one_is_broken() {
    let extra = "[watch]\nsettle_millis = 50\n";
    let s = Setup::new(extra);
    // The committed golden frame, whose objects under the committed model
    // are committed too.
    let golden = std::fs::read(repo().join("tests/data/golden-0000.pbm")).unwrap();
    let want: Vec<burlwatch::record::ObjectRecord> = serde_json::from_str(
        &std::fs::read_to_string(repo().join("tests/data/golden-0000.objects.json")).unwrap(),
    )
    .unwrap();
    assert!(!want.is_empty());
    let mut d = s.start_watching();
    let mut sent = 0;
    let mut send = |s: &Setup| {
        sent += 1;
        s.drop_frame(&format!("golden-{sent}.pbm"), &golden);
        let n = sent;
        wait_for("the frame to be archived", 30, || {
            s.names_in("archive").len() == n
        });
        s.records().pop().unwrap()
    };
    assert_eq!(send(&s).objects, want);
    let errors = |s: &Setup| {
        s.stderr()
            .matches("keeping the running configuration")
            .count()
    };
    // A configuration that does not parse: the running one stays.
    std::fs::write(s.config(), "[folders\ninbox = ").unwrap();
    signal(&d, libc::SIGHUP);
    wait_for("the reload error", 30, || errors(&s) == 1);
    assert_eq!(send(&s).objects, want);
    // A good configuration but a damaged model: the running model stays.
    let model = s.dir.join("state/model.json");
    let good_model = std::fs::read(&model).unwrap();
    s.write_config(extra);
    std::fs::write(
        &model,
        "{\"format\": \"burlwatch-model\", \"format_version\": 2",
    )
    .unwrap();
    signal(&d, libc::SIGHUP);
    wait_for("the second reload error", 30, || errors(&s) == 2);
    assert!(s.stderr().contains("model.json"), "{}", s.stderr());
    assert_eq!(send(&s).objects, want);
    // A good configuration that keeps no object: taken.
    std::fs::write(&model, good_model).unwrap();
    s.write_config(&format!("{extra}[detection]\nmin_area = 1000000\n"));
    signal(&d, libc::SIGHUP);
    wait_for("the reload", 30, || s.stderr().contains("reloaded"));
    assert!(send(&s).objects.is_empty());
    assert!(d.try_wait().unwrap().is_none(), "the daemon stopped");
    signal(&d, libc::SIGTERM);
    assert_eq!(exit_code(&mut d, 20), 0);
}

#[test]
fn a_restart_archives_frames_already_logged_without_a_second_record() {
    // As after a crash between the sync of a record and the move of its
    // frame: the record is in the log, the frame still in the inbox, and
    // the log ends in half a record.
    let s = Setup::new("[watch]\nsettle_millis = 50\n");
    let all = frames(3, 41);
    let logs = s.dir.join("logs");
    std::fs::create_dir_all(&logs).unwrap();
    let first = FrameRecord {
        time: "2026-12-02T10:00:00.000Z".into(),
        frame: all[0].0.clone(),
        sha256: sha256_hex(&all[0].1),
        width: 64,
        height: 40,
        model_version: 1,
        model_hash: "0123456789ab".into(),
        millis: 1.0,
        objects: vec![],
    };
    let text = format!(
        "{}\n{{\"time\":\"2026-12-02T10:00:01.000Z\",\"frame\":\"{}\",\"sha",
        serde_json::to_string(&first).unwrap(),
        all[1].0
    );
    std::fs::write(logs.join("detections.jsonl"), text).unwrap();
    for (n, b) in &all {
        std::fs::write(s.inbox().join(n), b).unwrap();
    }
    let mut d = s.start();
    wait_for("3 archived frames", 30, || s.names_in("archive").len() == 3);
    signal(&d, libc::SIGTERM);
    assert_eq!(exit_code(&mut d, 20), 0);
    logged_once(&s.records(), &all);
    assert!(s.stderr().contains("already_logged=1"), "{}", s.stderr());
}

#[test]
fn file_events_work_with_folders_relative_to_the_working_folder() {
    // As in config/burlwatch.toml: folders relative to where the daemon
    // runs. Listing only every hour, so only file events can find a frame.
    let s = Setup::new("");
    std::fs::write(
        s.config(),
        "[folders]\ninbox = \"inbox\"\narchive = \"archive\"\nrejected = \"rejected\"\n\
         corrections = \"corrections\"\nstate = \"state\"\nlogs = \"logs\"\n\
         [watch]\nrescan_seconds = 3600\n",
    )
    .unwrap();
    let all = frames(3, 43);
    let mut d = s.start_watching();
    // A reload with the same relative folders changes nothing that needs a
    // restart (issue "Make room for the learning loop", second bug: the
    // folders were compared made absolute against as written).
    signal(&d, libc::SIGHUP);
    wait_for("the reload", 30, || s.stderr().contains("reloaded"));
    assert!(!s.stderr().contains("after a restart"), "{}", s.stderr());
    feed_and_stop(&s, &mut d, &all, 30);
}

#[test]
fn frames_are_found_by_listing_when_events_are_missing() {
    // No file events at all (as on a network filesystem): every frame must
    // still be found, by the periodic listing.
    let s = Setup::new("[watch]\nevents = false\nsettle_millis = 50\nrescan_seconds = 0.1\n");
    let all = frames(60, 13);
    let mut d = s.start_watching();
    for (n, b) in &all {
        s.drop_frame(n, b);
    }
    wait_for("60 archived frames", 60, || {
        s.names_in("archive").len() == 60
    });
    signal(&d, libc::SIGTERM);
    assert_eq!(exit_code(&mut d, 20), 0);
    logged_once(&s.records(), &all);
}

#[test]
fn frames_waiting_at_start_are_processed_oldest_first() {
    let s = Setup::new("[watch]\nsettle_millis = 50\nqueue = 1\n[detection]\nworkers = 1\n");
    let all = frames(5, 17);
    // Names in the reverse of their age.
    let now = std::time::SystemTime::now();
    for (k, (n, b)) in all.iter().enumerate() {
        let p = s.inbox().join(n);
        std::fs::write(&p, b).unwrap();
        let f = std::fs::File::options().write(true).open(&p).unwrap();
        f.set_modified(now - Duration::from_secs(100 * (k as u64 + 1)))
            .unwrap();
    }
    let mut d = s.start();
    wait_for("5 archived frames", 30, || s.names_in("archive").len() == 5);
    signal(&d, libc::SIGTERM);
    assert_eq!(exit_code(&mut d, 20), 0);
    let order: Vec<String> = s.records().into_iter().map(|r| r.frame).collect();
    let want: Vec<String> = all.iter().rev().map(|(n, _)| n.clone()).collect();
    assert_eq!(order, want);
}

#[test]
fn a_second_daemon_on_the_same_folders_stops_with_a_clear_message() {
    let s = Setup::new("");
    let mut first = s.start_watching();
    let second = crate::util::burlwatch(
        s.dir.path(),
        &["run", "--config", s.config().to_str().unwrap()],
    );
    assert_eq!(second.code, 1);
    assert!(
        second.stderr.contains("another burlwatch daemon"),
        "{}",
        second.stderr
    );
    assert!(
        second.stderr.contains("burlwatch.lock"),
        "{}",
        second.stderr
    );
    signal(&first, libc::SIGINT);
    assert_eq!(exit_code(&mut first, 20), 0);
}

#[test]
fn a_fresh_box_trains_its_first_model_from_the_seed_data() {
    let s = Setup::new("");
    std::fs::remove_file(s.dir.join("state/model.json")).unwrap();
    let seed = s.dir.join("seed");
    let g = crate::util::burlwatch(
        s.dir.path(),
        &[
            "generate",
            "--out",
            seed.to_str().unwrap(),
            "--count",
            "6",
            "--seed",
            "4",
            "--width",
            "96",
            "--height",
            "96",
        ],
    );
    assert_eq!(g.code, 0, "{}", g.stderr);
    s.write_config(&format!(
        "[training]\nseed_data = {seed:?}\n[watch]\nsettle_millis = 50\n"
    ));
    let mut d = s.start();
    wait_for("the first model", 120, || {
        s.dir.join("state/model.json").exists()
    });
    wait_for("the daemon to start", 60, || {
        s.stderr().contains("watching")
    });
    let all = frames(3, 2);
    feed_and_stop(&s, &mut d, &all, 30);
    let m = burlwatch::model::Model::from_json(
        &std::fs::read_to_string(s.dir.join("state/model.json")).unwrap(),
    )
    .unwrap();
    assert_eq!(m.model_version, 1);
}

#[test]
fn check_reports_what_is_wrong() {
    let s = Setup::new("");
    let cfg = s.config();
    let ok = crate::util::burlwatch(s.dir.path(), &["check", "--config", cfg.to_str().unwrap()]);
    assert_eq!(ok.code, 0, "{}{}", ok.stdout, ok.stderr);
    assert!(ok.stdout.contains("ready to run"), "{}", ok.stdout);
    // A damaged model is named.
    std::fs::write(
        s.dir.join("state/model.json"),
        "{\"format\": \"burlwatch-model\"",
    )
    .unwrap();
    let bad = crate::util::burlwatch(s.dir.path(), &["check", "--config", cfg.to_str().unwrap()]);
    assert_eq!(bad.code, 1);
    assert!(
        bad.stdout.contains("BAD") && bad.stdout.contains("model.json"),
        "{}",
        bad.stdout
    );
    // An unknown key is named with its line.
    std::fs::write(&cfg, s.config_text("[log]\nrotate = 5\n")).unwrap();
    let bad = crate::util::burlwatch(
        s.dir.path(),
        &["check", "--config", cfg.to_str().unwrap(), "--json"],
    );
    assert_eq!(bad.code, 1);
    assert!(bad.stdout.contains("rotate"), "{}", bad.stdout);
    let v: serde_json::Value = serde_json::from_str(&bad.stdout).unwrap();
    assert_eq!(v["ok"], false);
}

/// Issue "First run and everyday use", point 4: `check` while a daemon
/// serves the folders says so, not just "ready to run".
#[test]
fn check_says_when_a_daemon_already_serves_the_folders() {
    let s = Setup::new("");
    let mut d = s.start_watching();
    let cfg = s.config();
    let r = crate::util::burlwatch(s.dir.path(), &["check", "--config", cfg.to_str().unwrap()]);
    signal(&d, libc::SIGTERM);
    assert_eq!(exit_code(&mut d, 20), 0, "{}", s.stderr());
    assert_eq!(r.code, 0, "{}{}", r.stdout, r.stderr);
    let want = format!("already served by process {}", d.id());
    assert!(r.stdout.contains(&want), "{}", r.stdout);
    assert!(!r.stdout.contains("ready to run"), "{}", r.stdout);
}

/// Issue "First run and everyday use", point 3: `demo --keep` on a folder
/// from an earlier run is refused with a message naming it.
#[test]
fn the_demo_refuses_a_kept_folder_that_is_not_empty() {
    let d = Dir::new();
    let kept = d.join("kept");
    std::fs::create_dir_all(kept.join("logs")).unwrap();
    let r = crate::util::burlwatch(d.path(), &["demo", "--keep", kept.to_str().unwrap()]);
    assert_eq!(r.code, 1, "{}{}", r.stdout, r.stderr);
    assert!(
        r.stderr.contains("not empty") && r.stderr.contains(kept.to_str().unwrap()),
        "{}",
        r.stderr
    );
    // A file where the folder should be is named too.
    let file = d.write("a-file", b"x");
    let r = crate::util::burlwatch(d.path(), &["demo", "--keep", file.to_str().unwrap()]);
    assert_eq!(r.code, 1);
    assert!(r.stderr.contains("not a folder"), "{}", r.stderr);
}

#[test]
fn the_systemd_unit_verifies_and_is_well_hardened() {
    let Some(analyze) = crate::util::tool("systemd-analyze", "systemd") else {
        return;
    };
    // The unit as shipped, with ExecStart pointing at the binary just built
    // (verify checks that the program exists).
    let d = Dir::new();
    let unit = std::fs::read_to_string(repo().join("systemd/burlwatch.service")).unwrap();
    let unit = unit.replace("/usr/local/bin/burlwatch", env!("CARGO_BIN_EXE_burlwatch"));
    let path = d.write("burlwatch.service", unit.as_bytes());
    let verify = Command::new(&analyze)
        .args(["verify", "--man=no"])
        .arg(&path)
        .output()
        .unwrap();
    let said = String::from_utf8_lossy(&verify.stderr).into_owned()
        + &String::from_utf8_lossy(&verify.stdout);
    assert!(verify.status.success(), "systemd-analyze verify: {said}");
    assert!(
        !said.contains("burlwatch.service:"),
        "systemd-analyze verify: {said}"
    );
    // systemd-analyze security: overall exposure 2.0 or lower ("OK" or
    // better on systemd's own scale, as the issue asks).
    let sec = Command::new(&analyze)
        .args(["security", "--offline=yes", "--no-pager"])
        .arg(&path)
        .output()
        .unwrap();
    let text = String::from_utf8_lossy(&sec.stdout).into_owned();
    let line = text
        .lines()
        .find(|l| l.contains("Overall exposure level"))
        .unwrap_or_else(|| {
            panic!(
                "no exposure level in: {text}{}",
                String::from_utf8_lossy(&sec.stderr)
            )
        });
    let level: f64 = line
        .split(':')
        .nth(1)
        .and_then(|v| v.split_whitespace().next())
        .and_then(|v| v.parse().ok())
        .unwrap_or_else(|| panic!("cannot read {line:?}"));
    assert!(level <= 2.0, "{line}");
}

#[test]
fn the_demo_runs_the_daemon_and_stops_with_a_summary() {
    let d = Dir::new();
    let (seed, test) = (d.join("seed"), d.join("test"));
    generate(&d, &seed, "6", "4", &["--width", "96", "--height", "96"]);
    generate(&d, &test, "8", "5", &["--width", "96", "--height", "96"]);
    let r = crate::util::burlwatch(
        d.path(),
        &[
            "demo",
            "--frames",
            test.to_str().unwrap(),
            "--seed-data",
            seed.to_str().unwrap(),
            "--rate",
            "50",
            "--keep",
            d.join("run").to_str().unwrap(),
        ],
    );
    assert_eq!(r.code, 0, "{}{}", r.stdout, r.stderr);
    assert!(r.stdout.contains("done: 8 frames logged"), "{}", r.stdout);
    assert!(r.stdout.contains("1 rejected"), "{}", r.stdout);
    for k in 0..8 {
        assert!(
            r.stdout.contains(&format!("loom-standard-{k:04}.pbm")),
            "{}",
            r.stdout
        );
    }
    assert!(d.join("run/rejected/damaged-frame.pbm.reason.txt").exists());
    // Lines say what their columns are; a reject is reported where it is
    // now, after the frame lines, and no warning interleaves with them.
    assert!(r.stdout.contains("time (UTC)"), "{}", r.stdout);
    assert!(
        r.stdout.contains("rejected (moved to") && r.stdout.contains("run/rejected"),
        "{}",
        r.stdout
    );
    assert!(!r.stderr.contains("rejected"), "{}", r.stderr);
    assert!(!r.stdout.contains("inbox/damaged-frame"), "{}", r.stdout);
}

/// Issue "First run and everyday use", point 1: away from the repository
/// (no `demo-frames/` in the working folder) the demo makes its frames with
/// the loom generator instead of failing. The seed data is given here so
/// the test trains on a few frames; the test frames are the generated 30.
#[test]
fn the_demo_runs_away_from_the_repository() {
    let d = Dir::new();
    let seed = d.join("seed");
    generate(&d, &seed, "6", "4", &[]);
    assert!(!d.join("demo-frames").exists());
    let r = crate::util::burlwatch(
        d.path(),
        &[
            "demo",
            "--seed-data",
            seed.to_str().unwrap(),
            "--rate",
            "200",
        ],
    );
    assert_eq!(r.code, 0, "{}{}", r.stdout, r.stderr);
    assert!(r.stdout.contains("loom generator"), "{}", r.stdout);
    // The README's test set: 30 frames, the same names as demo-frames/test.
    assert!(r.stdout.contains("done: 30 frames logged"), "{}", r.stdout);
    assert!(r.stdout.contains("loom-standard-0029.pbm"), "{}", r.stdout);
}

/// `burlwatch generate` into `out`: `count` frames from `seed`.
fn generate(d: &Dir, out: &std::path::Path, count: &str, seed: &str, extra: &[&str]) {
    let mut args = vec![
        "generate",
        "--out",
        out.to_str().unwrap(),
        "--count",
        count,
        "--seed",
        seed,
    ];
    args.extend_from_slice(extra);
    let g = crate::util::burlwatch(d.path(), &args);
    assert_eq!(g.code, 0, "{}", g.stderr);
}

/// Regression (a fault probe found 40 of 40 records lost): the detection
/// log deleted, then renamed, while the daemon runs. Every frame that
/// comes after is logged once in the file readers look at, and the
/// daemon says what happened, once each time.
#[test]
fn a_detection_log_deleted_or_renamed_while_running_loses_no_record() {
    let s = Setup::new("[watch]\nrescan_seconds = 0.2\n[status]\nenabled = false\n");
    let mut d = s.start_watching();
    let all = frames(60, 41);
    let (first, rest) = all.split_at(20);
    let (second, third) = rest.split_at(20);
    let feed = |batch: &[(String, Vec<u8>)], total: usize| {
        for (n, b) in batch {
            s.drop_frame(n, b);
        }
        wait_for("the batch to be archived", 60, || {
            s.names_in("archive").len() == total
        });
    };
    feed(first, 20);
    let log = s.dir.join("logs/detections.jsonl");
    std::fs::remove_file(&log).unwrap();
    feed(second, 40);
    let moved = s.dir.join("logs/moved-away.txt");
    std::fs::rename(&log, &moved).unwrap();
    feed(third, 60);
    signal(&d, libc::SIGTERM);
    assert_eq!(exit_code(&mut d, 20), 0, "{}", s.stderr());
    // The second batch is whole in the file that was renamed, the third in
    // the new log: none lost, none twice.
    let read = |p: &std::path::Path| -> Vec<FrameRecord> {
        std::fs::read_to_string(p)
            .unwrap()
            .lines()
            .map(|l| serde_json::from_str(l).unwrap())
            .collect()
    };
    logged_once(&read(&moved), second);
    logged_once(&read(&log), third);
    assert_eq!(
        s.stderr()
            .matches("the detection log was deleted, renamed or replaced")
            .count(),
        2,
        "{}",
        s.stderr()
    );
}

/// Issue 14, "the logs folder deleted (or replaced) while running": the
/// whole logs folder removed under a running daemon. At the next sync the
/// daemon makes it again, starts a new log there, locks it anew (a second
/// daemon cannot take it) and goes on: the frames whose records went with
/// the folder stayed in the inbox and are logged once in the new log; the
/// daemon keeps running (before, the writer stopped, and the daemon with it).
#[test]
fn a_logs_folder_deleted_while_running_is_made_again() {
    let s = Setup::new("[watch]\nrescan_seconds = 0.2\n[status]\nenabled = false\n");
    let mut d = s.start_watching();
    let all = frames(40, 52);
    let (first, second) = all.split_at(20);
    for (n, b) in first {
        s.drop_frame(n, b);
    }
    wait_for("the first frames to be archived", 60, || {
        s.names_in("archive").len() == 20
    });
    std::fs::remove_dir_all(s.dir.join("logs")).unwrap();
    for (n, b) in second {
        s.drop_frame(n, b);
    }
    wait_for("the second frames to be archived", 60, || {
        s.names_in("archive").len() == 40
    });
    assert!(
        s.stderr().contains("was gone: made again"),
        "{}",
        s.stderr()
    );
    // The folder made again is locked, so a second daemon refuses it.
    assert!(burlwatch::daemon::files::folder_in_use(&s.dir.join("logs")));
    signal(&d, libc::SIGTERM);
    assert_eq!(exit_code(&mut d, 20), 0, "{}", s.stderr());
    logged_once(&s.records(), second);
}

/// Regression (a fault probe found 1,000 of 1,000 frames logged twice): a
/// second daemon with its own state folder but the same inbox, corrections
/// and logs folders refuses to start, naming the folder, and `check` says
/// so; the first daemon logs every frame once.
#[test]
fn a_second_daemon_with_another_state_folder_cannot_share_the_inbox() {
    let s = Setup::new("[status]\nenabled = false\n");
    let mut first = s.start_watching();
    let cfg2 = s.second_config();
    let second = crate::util::burlwatch(s.dir.path(), &["run", "--config", cfg2.to_str().unwrap()]);
    assert_eq!(second.code, 1, "{}", second.stderr);
    assert!(
        second.stderr.contains("folders.inbox")
            && second.stderr.contains("another burlwatch daemon")
            && second.stderr.contains(s.inbox().to_str().unwrap()),
        "{}",
        second.stderr
    );
    let check =
        crate::util::burlwatch(s.dir.path(), &["check", "--config", cfg2.to_str().unwrap()]);
    assert!(
        check
            .stdout
            .contains("in use by another burlwatch daemon with another state folder"),
        "{}",
        check.stdout
    );
    assert_ne!(check.code, 0);
    let all = frames(30, 43);
    feed_and_stop(&s, &mut first, &all, 60);
    // Stopped, the folders are free again.
    let mut again = s.start_watching();
    signal(&again, libc::SIGTERM);
    assert_eq!(exit_code(&mut again, 20), 0);
}

/// Regression (a fault probe: a FIFO renamed in place of a queued frame
/// blocked a worker in open() forever, and SIGTERM never ended the
/// daemon): a FIFO named like a frame is rejected with its reason without
/// blocking anything, every frame is logged, and the daemon stops at once.
#[test]
fn a_fifo_named_like_a_frame_never_blocks_the_pipeline() {
    let s = Setup::new(
        "[watch]\nsettle_millis = 50\nrescan_seconds = 0.2\n[status]\nenabled = false\n",
    );
    let mut d = s.start_watching();
    let fifo = s.inbox().join("pipe.pbm");
    let c = std::ffi::CString::new(fifo.as_os_str().as_encoded_bytes()).unwrap();
    // SAFETY: mkfifo with a valid NUL-terminated path.
    assert_eq!(unsafe { libc::mkfifo(c.as_ptr(), 0o600) }, 0);
    let all = frames(10, 44);
    for (n, b) in &all {
        s.drop_frame(n, b);
    }
    wait_for("every frame to be archived", 60, || {
        s.names_in("archive").len() == all.len()
    });
    wait_for("the FIFO to be rejected", 60, || {
        s.names_in("rejected").contains("pipe.pbm.reason.txt")
    });
    let why = std::fs::read_to_string(s.dir.join("rejected/pipe.pbm.reason.txt")).unwrap();
    assert!(why.contains("FIFO"), "{why}");
    signal(&d, libc::SIGTERM);
    assert_eq!(exit_code(&mut d, 20), 0, "{}", s.stderr());
    logged_once(&s.records(), &all);
}

/// Names a person or a hostile program may give frames: spaces, a newline
/// (which once forged a line of its own in the daemon's messages), other
/// control characters, a 200-byte name. Each good frame is logged once
/// under its exact name; each bad one is rejected with a reason; every
/// line of the daemon's messages is one message (it starts with the time).
#[test]
fn hostile_frame_names_are_logged_or_rejected_and_never_forge_a_message() {
    let s = Setup::new(
        "[watch]\nsettle_millis = 50\nrescan_seconds = 0.2\n[status]\nenabled = false\n",
    );
    let mut d = s.start_watching();
    let long = format!("{}.pbm", "l".repeat(196));
    let names = [
        "with spaces and (brackets).pbm".to_string(),
        "evil\nERROR forged message.pbm".to_string(),
        "bell\x07tab\tesc\x1b[2J.pbm".to_string(),
        long,
    ];
    let good: Vec<(String, Vec<u8>)> = frames(names.len(), 45)
        .into_iter()
        .zip(&names)
        .map(|((_, b), n)| (n.clone(), b))
        .collect();
    for (n, b) in &good {
        s.drop_frame(n, b);
    }
    // The same names once more, as unreadable files in a second round.
    wait_for("the good frames to be archived", 60, || {
        s.names_in("archive").len() == good.len()
    });
    for n in &names {
        s.drop_frame(n, b"not a frame at all");
    }
    wait_for("the bad files to be rejected", 60, || {
        s.names_in("rejected")
            .iter()
            .filter(|n| n.ends_with(".reason.txt"))
            .count()
            == names.len()
    });
    signal(&d, libc::SIGTERM);
    assert_eq!(exit_code(&mut d, 20), 0);
    let records = s.records();
    let logged: Vec<(String, Vec<u8>)> = good.clone();
    assert_eq!(records.len(), logged.len());
    for (n, b) in &logged {
        let r: Vec<_> = records.iter().filter(|r| &r.frame == n).collect();
        assert_eq!(r.len(), 1, "{n:?}");
        assert_eq!(r[0].sha256, sha256_hex(b));
    }
    let err = s.stderr();
    for line in err.lines() {
        assert!(
            line.starts_with("20"),
            "a line that is not a message: {line:?}\n{err}"
        );
    }
    assert!(err.contains("evil\\nERROR forged message.pbm"), "{err}");
    assert!(!err.contains('\x07') && !err.contains('\x1b'), "{err}");
}

/// Regression (a fault probe: a file whose name is not UTF-8 text was
/// ignored without a word): it is left alone and said once, however many
/// listings see it; the frames around it are logged.
#[test]
fn a_name_that_is_not_utf8_is_said_once_and_left_alone() {
    use std::os::unix::ffi::OsStrExt;
    let s = Setup::new(
        "[watch]\nsettle_millis = 50\nrescan_seconds = 0.1\n[status]\nenabled = false\n",
    );
    let mut d = s.start_watching();
    let odd = s
        .inbox()
        .join(std::ffi::OsStr::from_bytes(b"loom-\xff\xfe.pbm"));
    std::fs::write(&odd, b"P4\n8 1\n\x00").unwrap();
    let all = frames(5, 46);
    for (n, b) in &all {
        s.drop_frame(n, b);
    }
    wait_for("the frames to be archived", 60, || {
        s.names_in("archive").len() == all.len()
    });
    wait_for("the odd name to be said", 60, || {
        s.stderr().contains("not UTF-8")
    });
    // Several more listings (one every 0.1 s) see it again.
    std::thread::sleep(Duration::from_millis(600));
    signal(&d, libc::SIGTERM);
    assert_eq!(exit_code(&mut d, 20), 0);
    assert_eq!(s.stderr().matches("not UTF-8").count(), 1, "{}", s.stderr());
    assert!(
        s.stderr().contains("\\xFF\\xFE") || s.stderr().contains("\\xff\\xfe"),
        "{}",
        s.stderr()
    );
    assert!(odd.exists());
    logged_once(&s.records(), &all);
}

/// Regression (a fault probe: an inbox deleted and made again was no
/// longer watched; its frames waited for the next listing, without a
/// word): the daemon says the inbox is gone, watches and locks it anew
/// when it is back, and frames put there after are found by their file
/// events alone (listing is set to once an hour here).
#[test]
fn an_inbox_deleted_and_made_again_is_watched_anew() {
    let s = Setup::new(
        "[watch]\nsettle_millis = 50\nrescan_seconds = 3600\n[status]\nenabled = false\n",
    );
    let mut d = s.start_watching();
    let all = frames(10, 47);
    let (before, after) = all.split_at(5);
    for (n, b) in before {
        s.drop_frame(n, b);
    }
    wait_for("the first frames to be archived", 60, || {
        s.names_in("archive").len() == 5
    });
    std::fs::remove_dir_all(s.inbox()).unwrap();
    wait_for("the daemon to say the inbox is gone", 60, || {
        s.stderr().contains("inbox is gone")
    });
    std::fs::create_dir(s.inbox()).unwrap();
    wait_for("the daemon to watch the inbox anew", 60, || {
        s.stderr().contains("watching it anew")
    });
    // The new inbox is locked too: a second daemon with its own state
    // folder cannot take it.
    let cfg2 = s.second_config();
    let second = crate::util::burlwatch(s.dir.path(), &["run", "--config", cfg2.to_str().unwrap()]);
    assert_eq!(second.code, 1, "{}", second.stderr);
    assert!(second.stderr.contains("folders.inbox"), "{}", second.stderr);
    for (n, b) in after {
        s.drop_frame(n, b);
    }
    wait_for("the later frames to be archived", 60, || {
        s.names_in("archive").len() == 10
    });
    signal(&d, libc::SIGTERM);
    assert_eq!(exit_code(&mut d, 20), 0, "{}", s.stderr());
    logged_once(&s.records(), &all);
}

/// Regression (a fault probe: `check` said "ready to run" for folders the
/// daemon's user could not write): `check` run as an unprivileged user on
/// folders only root may write names each folder and why. Needs root (to
/// become another user with `runuser`, from Debian's util-linux); skipped
/// otherwise.
#[test]
fn check_names_folders_the_user_cannot_write() {
    // SAFETY: geteuid has no preconditions.
    if unsafe { libc::geteuid() } != 0 || crate::util::tool("runuser", "util-linux").is_none() {
        eprintln!("skipped: needs root and runuser to run check as another user");
        return;
    }
    use std::os::unix::fs::PermissionsExt;
    let s = Setup::new("");
    for f in ["archive", "rejected", "corrections", "logs"] {
        std::fs::create_dir_all(s.dir.join(f)).unwrap();
    }
    // Readable by everyone (the temporary folder is the owner's alone),
    // writable by root only.
    for p in [s.dir.path().to_path_buf(), s.inbox(), s.dir.join("state")] {
        std::fs::set_permissions(&p, std::fs::Permissions::from_mode(0o755)).unwrap();
    }
    for f in ["archive", "rejected", "corrections", "logs"] {
        std::fs::set_permissions(s.dir.join(f), std::fs::Permissions::from_mode(0o755)).unwrap();
    }
    std::fs::set_permissions(s.config(), std::fs::Permissions::from_mode(0o644)).unwrap();
    std::fs::set_permissions(
        s.dir.join("state/model.json"),
        std::fs::Permissions::from_mode(0o644),
    )
    .unwrap();
    let out = std::process::Command::new("runuser")
        .args(["-u", "nobody", "--"])
        .arg(env!("CARGO_BIN_EXE_burlwatch"))
        .args(["check", "--config"])
        .arg(s.config())
        .current_dir("/")
        .output()
        .unwrap();
    let stdout = String::from_utf8_lossy(&out.stdout);
    assert_eq!(out.status.code(), Some(1), "{stdout}");
    for key in ["folders.inbox", "folders.archive", "folders.logs"] {
        assert!(
            stdout
                .lines()
                .any(|l| l.contains(key) && l.contains("cannot be written by this user")),
            "{key}: {stdout}"
        );
    }
    assert!(!stdout.contains("ready to run"), "{stdout}");
    // As root the same folders are ready.
    let ok = crate::util::burlwatch(
        s.dir.path(),
        &["check", "--config", s.config().to_str().unwrap()],
    );
    assert_eq!(ok.code, 0, "{}", ok.stdout);
}

/// A real full disk: the logs folder on a 1 MiB tmpfs, filled while the
/// daemon runs. The frames that come meanwhile stay in the inbox, the
/// daemon says once that writing the log fails, and once space returns it
/// says so and logs every frame once, by itself. Needs the right to mount
/// (root); skipped with the reason otherwise.
#[test]
fn a_full_disk_for_the_log_keeps_frames_waiting_until_there_is_room() {
    full_disk("logs", "writing the detection log");
}

/// The same with the archive on its own full filesystem: records are
/// written, the moves fail (across filesystems: nothing partial is left
/// there), and once there is room the frames are archived without a
/// second record.
#[test]
fn a_full_disk_for_the_archive_keeps_frames_waiting_until_there_is_room() {
    full_disk("archive", "moving frames to the archive");
}

fn full_disk(folder: &str, what: &str) {
    let s = Setup::new(
        "[watch]\nsettle_millis = 50\nrescan_seconds = 0.1\n[status]\nenabled = false\n",
    );
    let Some(_mounted) = Mounted::tmpfs(&s.dir.join(folder), "1m") else {
        return;
    };
    let mut d = s.start_watching();
    let all = frames(30, 48);
    let (first, rest) = all.split_at(10);
    for (n, b) in first {
        s.drop_frame(n, b);
    }
    wait_for("the first frames to be archived", 60, || {
        s.names_in("archive").len() == 10
    });
    let filler = s.dir.join(folder).join(".filler");
    fill(&filler);
    for (n, b) in rest {
        s.drop_frame(n, b);
    }
    wait_for("the daemon to say it cannot go on", 60, || {
        s.stderr().contains(&format!("{what} fails"))
    });
    // The log file's last page may have held a record or two more; the
    // rest wait in the inbox (every archived frame's record is checked at
    // the end).
    assert!(s.names_in("archive").len() < 30);
    assert!(!s.names_in("inbox").is_empty());
    std::fs::remove_file(&filler).unwrap();
    wait_for("every frame to be archived once there is room", 120, || {
        s.names_in("archive").len() == 30
    });
    signal(&d, libc::SIGTERM);
    assert_eq!(exit_code(&mut d, 20), 0, "{}", s.stderr());
    logged_once(&s.records(), &all);
    let err = s.stderr();
    assert_eq!(err.matches(&format!("{what} fails")).count(), 1, "{err}");
    assert_eq!(
        err.matches(&format!("{what} works again")).count(),
        1,
        "{err}"
    );
    // Nothing partial or temporary was left where the files go.
    let left: Vec<String> = std::fs::read_dir(s.dir.join(folder))
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .filter(|n| n.ends_with(".part"))
        .collect();
    assert!(left.is_empty(), "{left:?}");
}

/// Issue 14, permissions: the daemon run as an unprivileged user (with
/// `setpriv`, from Debian's util-linux). A frame it may not read is
/// rejected with the reason; then its archive folder stops being
/// writable for it. Records are written, every move fails with a reason a
/// person can act on ("Permission denied"), said once; when the folder is
/// writable again the frames are archived without a second record. Needs
/// root to change users; skipped otherwise.
#[test]
fn an_archive_the_daemon_may_not_write_keeps_frames_waiting() {
    use std::os::unix::fs::PermissionsExt;
    // SAFETY: geteuid has no preconditions.
    if unsafe { libc::geteuid() } != 0 || crate::util::tool("setpriv", "util-linux").is_none() {
        eprintln!("skipped: needs root and setpriv to run the daemon as another user");
        return;
    }
    let s = Setup::new(
        "[watch]\nsettle_millis = 50\nrescan_seconds = 0.1\n[status]\nenabled = false\n",
    );
    for f in ["archive", "rejected", "corrections", "logs"] {
        std::fs::create_dir_all(s.dir.join(f)).unwrap();
    }
    // Everything belongs to nobody (uid and gid 65534).
    let own = |p: &std::path::Path| std::os::unix::fs::chown(p, Some(65534), Some(65534)).unwrap();
    own(s.dir.path());
    for e in walk(s.dir.path()) {
        own(&e);
    }
    let err = std::fs::File::create(s.dir.join("daemon.stderr")).unwrap();
    let mut d = Command::new("setpriv")
        .args(["--reuid=65534", "--regid=65534", "--clear-groups"])
        .arg(env!("CARGO_BIN_EXE_burlwatch"))
        .args(["run", "--config"])
        .arg(s.config())
        .current_dir(s.dir.path())
        .env_remove("RUST_LOG")
        .env_remove("NOTIFY_SOCKET")
        .stdout(std::process::Stdio::null())
        .stderr(err)
        .spawn()
        .unwrap();
    wait_for("the daemon to start", 60, || {
        s.stderr().contains("watching")
    });
    // A frame the daemon's user may not read is rejected with the reason.
    let locked = s.dir.join("locked.pbm");
    std::fs::write(&locked, &frames(1, 50)[0].1).unwrap();
    std::fs::set_permissions(&locked, std::fs::Permissions::from_mode(0o000)).unwrap();
    std::fs::rename(&locked, s.inbox().join("locked.pbm")).unwrap();
    wait_for("the unreadable frame to be rejected", 60, || {
        s.names_in("rejected").contains("locked.pbm.reason.txt")
    });
    let why = std::fs::read_to_string(s.dir.join("rejected/locked.pbm.reason.txt")).unwrap();
    assert!(why.contains("Permission denied"), "{why}");
    let archive = s.dir.join("archive");
    std::fs::set_permissions(&archive, std::fs::Permissions::from_mode(0o555)).unwrap();
    let all = frames(10, 49);
    for (n, b) in &all {
        s.drop_frame(n, b);
        own(&s.inbox().join(n));
    }
    wait_for(
        "the daemon to say it cannot move to the archive",
        60,
        || s.stderr().contains("moving frames to the archive fails"),
    );
    assert!(s.stderr().contains("Permission denied"), "{}", s.stderr());
    assert_eq!(s.names_in("archive").len(), 0);
    std::fs::set_permissions(&archive, std::fs::Permissions::from_mode(0o755)).unwrap();
    wait_for("every frame to be archived", 120, || {
        s.names_in("archive").len() == 10
    });
    signal(&d, libc::SIGTERM);
    assert_eq!(exit_code(&mut d, 20), 0, "{}", s.stderr());
    logged_once(&s.records(), &all);
    let err = s.stderr();
    assert_eq!(
        err.matches("moving frames to the archive fails").count(),
        1,
        "{err}"
    );
    assert_eq!(
        err.matches("moving frames to the archive works again")
            .count(),
        1,
        "{err}"
    );
}

/// Every path under `dir`.
fn walk(dir: &std::path::Path) -> Vec<PathBuf> {
    let mut out = Vec::new();
    for e in std::fs::read_dir(dir).unwrap() {
        let p = e.unwrap().path();
        if p.is_dir() {
            out.extend(walk(&p));
        }
        out.push(p);
    }
    out
}

/// A real full disk for the state folder (a 2 MiB tmpfs, filled once the
/// daemon runs): frames are logged and archived as ever; the drift
/// monitors' saves fail and that is said once, not at every save; once
/// there is room a save works and says so. Needs the right to mount;
/// skipped otherwise.
#[test]
fn a_full_disk_for_the_state_folder_leaves_detection_alone() {
    let s = Setup::new(
        "[watch]\nsettle_millis = 50\nrescan_seconds = 0.1\n[status]\nenabled = false\n",
    );
    let model = std::fs::read(s.dir.join("state/model.json")).unwrap();
    let Some(_mounted) = Mounted::tmpfs(&s.dir.join("state"), "2m") else {
        return;
    };
    std::fs::write(s.dir.join("state/model.json"), &model).unwrap();
    let mut d = s.start_watching();
    let filler = s.dir.join("state/.filler");
    fill(&filler);
    // More than two saves' worth of frames (one every 500).
    let all = frames(1100, 51);
    for (n, b) in &all {
        s.drop_frame(n, b);
    }
    wait_for("every frame to be archived", 180, || {
        s.names_in("archive").len() == all.len()
    });
    assert_eq!(
        s.stderr().matches("cannot save").count(),
        1,
        "{}",
        s.stderr()
    );
    std::fs::remove_file(&filler).unwrap();
    signal(&d, libc::SIGTERM);
    assert_eq!(exit_code(&mut d, 20), 0, "{}", s.stderr());
    logged_once(&s.records(), &all);
    assert!(s.stderr().contains("saved again after"), "{}", s.stderr());
}

/// A service manager of systemd's own (`systemd --user`), private to one
/// test: its runtime and configuration folders are the test's, and it runs
/// in a mount namespace of its own where `/run/systemd/system` exists (a
/// user manager starts only on a system booted with systemd; the test
/// machines' first process is not systemd). Stopped when dropped.
struct UserManager {
    dir: Dir,
    child: Child,
}

impl UserManager {
    /// `None`, with the reason printed, where systemd or the right to make
    /// a mount namespace is missing.
    fn start() -> Option<UserManager> {
        let systemd = PathBuf::from("/lib/systemd/systemd");
        crate::util::tool("systemctl", "systemd")?;
        // SAFETY: geteuid has no preconditions.
        if !systemd.exists() || unsafe { libc::geteuid() } != 0 {
            assert!(
                std::env::var("BURLWATCH_REQUIRE_TOOLS").as_deref() != Ok("1"),
                "the watchdog test needs root and /lib/systemd/systemd"
            );
            use std::io::Write as _;
            let _ = writeln!(
                std::io::stderr(),
                "SKIPPED: the watchdog test needs root (a mount namespace) and \
                 /lib/systemd/systemd (Debian package `systemd`)"
            );
            return None;
        }
        let dir = Dir::new();
        for f in ["runtime", "config", "data"] {
            std::fs::create_dir_all(dir.join(f)).unwrap();
        }
        std::fs::set_permissions(
            dir.join("runtime"),
            std::os::unix::fs::PermissionsExt::from_mode(0o700),
        )
        .unwrap();
        let log = std::fs::File::create(dir.join("manager.log")).unwrap();
        let child = UserManager::command(&dir, &systemd.to_string_lossy())
            .args(["--user", "--log-target=console"])
            .stdout(log.try_clone().unwrap())
            .stderr(log)
            .spawn()
            .unwrap();
        let m = UserManager { dir, child };
        let deadline = Instant::now() + Duration::from_secs(30);
        loop {
            let state = m.systemctl(&["is-system-running"]);
            if state.contains("running") || state.contains("degraded") {
                return Some(m);
            }
            assert!(
                Instant::now() < deadline,
                "the user manager did not start: {state}\n{}",
                m.log()
            );
            std::thread::sleep(Duration::from_millis(100));
        }
    }

    /// `program` in a mount namespace of its own where a tmpfs on
    /// `/run/systemd` holds an empty `system/`, with the test's folders.
    fn command(dir: &Dir, program: &str) -> Command {
        let mut c = Command::new("unshare");
        c.args([
            "-m",
            "sh",
            "-c",
            "mount -t tmpfs none /run/systemd && mkdir /run/systemd/system && exec \"$@\"",
            "sh",
            program,
        ])
        .env("XDG_RUNTIME_DIR", dir.join("runtime"))
        .env("XDG_CONFIG_HOME", dir.join("config"))
        .env("XDG_DATA_HOME", dir.join("data"))
        .env_remove("NOTIFY_SOCKET")
        .env_remove("DBUS_SESSION_BUS_ADDRESS");
        c
    }

    /// `systemctl --user ARGS`: what it printed, both streams.
    fn systemctl(&self, args: &[&str]) -> String {
        let out = UserManager::command(&self.dir, "systemctl")
            .arg("--user")
            .args(args)
            .output()
            .unwrap();
        String::from_utf8_lossy(&out.stdout).into_owned() + &String::from_utf8_lossy(&out.stderr)
    }

    /// A property of a unit, as `systemctl show` prints its value.
    fn property(&self, unit: &str, name: &str) -> String {
        self.systemctl(&["show", unit, "-p", name, "--value"])
            .trim()
            .to_string()
    }

    /// Installs a unit (in the runtime unit folder) and loads it.
    fn install(&self, name: &str, text: &str) {
        let units = self.dir.join("runtime/systemd/user");
        std::fs::create_dir_all(&units).unwrap();
        std::fs::write(units.join(name), text).unwrap();
        self.systemctl(&["daemon-reload"]);
    }

    fn log(&self) -> String {
        std::fs::read_to_string(self.dir.join("manager.log")).unwrap_or_default()
    }
}

impl Drop for UserManager {
    fn drop(&mut self) {
        self.systemctl(&["stop", "burlwatch.service"]);
        signal(&self.child, libc::SIGTERM);
        if exit_code(&mut self.child, 20) == -1 {
            let _ = self.child.kill();
        }
    }
}

/// Issue 14: "the watchdog restarts a deliberately stalled pipeline". The
/// unit as shipped (its `Type=notify`, watchdog, restart and hardening
/// lines; folders, user and paths made the test's, `WatchdogSec` cut from
/// 30 s to 4 s so the test is short) run by systemd's own service manager.
/// The workers are held by the stall switch of debug builds; once no frame
/// finished for 10 s the daemon stops feeding the watchdog, systemd kills
/// it (it tells the stop command `watchdog`, the process killed by SIGABRT)
/// and starts it again. With the
/// switch off, every frame is logged once and archived.
#[test]
fn the_systemd_watchdog_restarts_a_stalled_pipeline() {
    let Some(m) = UserManager::start() else {
        return;
    };
    let s = Setup::new(
        "[watch]\nsettle_millis = 50\nrescan_seconds = 0.1\n[status]\nenabled = false\n",
    );
    let stall = s.dir.join("stall");
    std::fs::write(&stall, b"").unwrap();
    let shipped = std::fs::read_to_string(repo().join("systemd/burlwatch.service")).unwrap();
    let mut unit = String::new();
    for line in shipped.lines() {
        let key = line.split('=').next().unwrap_or("");
        match key {
            // The test's user, folders and paths instead of the box's (its
            // folders are under /tmp and belong to root).
            "User"
            | "Group"
            | "StateDirectory"
            | "StateDirectoryMode"
            | "LogsDirectory"
            | "LogsDirectoryMode"
            | "ConfigurationDirectory"
            | "ReadWritePaths"
            | "PrivateTmp"
            | "PrivateUsers"
            | "WantedBy" => continue,
            // The test machines' kernel refuses these three under a user
            // manager (the service fails with 226/NAMESPACE; seen here, each
            // alone); `the_systemd_unit_verifies_and_is_well_hardened` checks
            // the shipped unit keeps them.
            "ProtectHome" | "ProtectKernelTunables" | "ProtectKernelLogs" => continue,
            "ExecStart" => {
                unit += &format!(
                    "ExecStart={} run --config {}\n",
                    env!("CARGO_BIN_EXE_burlwatch"),
                    s.config().display()
                )
            }
            "WatchdogSec" => {
                unit += "WatchdogSec=4s\n";
                unit += &format!("ReadWritePaths={}\n", s.dir.path().display());
                unit += &format!("Environment=BURLWATCH_TEST_STALL={}\n", stall.display());
                unit += &format!(
                    "StandardError=append:{}\n",
                    s.dir.join("daemon.stderr").display()
                );
                // systemd tells a stop command why the service stopped
                // (`$SERVICE_RESULT`, systemd.exec(5)): "watchdog" here.
                unit += &format!(
                    "ExecStopPost=/bin/sh -c 'echo \"$SERVICE_RESULT $EXIT_CODE $EXIT_STATUS\" >> {}'\n",
                    s.dir.join("stops").display()
                );
            }
            _ => {
                unit += line;
                unit.push('\n');
            }
        }
    }
    m.install("burlwatch.service", &unit);
    let started = m.systemctl(&["start", "burlwatch.service"]);
    assert_eq!(
        m.property("burlwatch.service", "ActiveState"),
        "active",
        "{started}\n{}\n{}\n{}",
        m.systemctl(&["status", "burlwatch.service"]),
        m.log(),
        s.stderr()
    );
    let all = frames(5, 51);
    for (n, b) in &all {
        s.drop_frame(n, b);
    }
    wait_for("systemd to restart the stalled daemon", 90, || {
        m.property("burlwatch.service", "NRestarts")
            .parse::<u32>()
            .is_ok_and(|n| n >= 1)
    });
    let stops = std::fs::read_to_string(s.dir.join("stops")).unwrap_or_default();
    let first = stops.lines().next().unwrap_or_default();
    // Killed with SIGABRT, systemd's watchdog signal (systemd.service(5)).
    assert!(
        first.starts_with("watchdog ") && first.ends_with(" ABRT"),
        "{stops}"
    );
    assert!(
        s.names_in("archive").is_empty(),
        "a frame moved while stalled"
    );
    std::fs::remove_file(&stall).unwrap();
    wait_for("every frame to be archived after the restart", 90, || {
        s.names_in("archive").len() == all.len()
    });
    m.systemctl(&["stop", "burlwatch.service"]);
    logged_once(&s.records(), &all);
}
