//! Learning-loop benchmark: `cargo bench --bench learning`.
//!
//! On temporary folders, with the release `burlwatch` and this machine:
//! a daemon starts with a model trained on `demo-frames/train` (standard
//! weave), takes 46 frames of the coarser `alternate` weave (256x256), a
//! changeover is recorded and every frame is corrected with its true mask
//! (about 2 million labelled training pixels on the new line, the rest held
//! out for the gate). Then it reports:
//! 1. correction intake: from a correction's rename into the corrections
//!    folder to its arrival in `applied/` (labels, store and index written
//!    and synced), median and p90 of the 46;
//! 2. latency from a frame's rename into the inbox to its durable record at
//!    a steady 50 frames/s, without a retrain and while retrains run back
//!    to back (requested one after the other): p50 and p99 of each;
//! 3. the daemon's resident memory before and after those retrains (once
//!    a first retrain has put a model of the new weave in service);
//! 4. the peak resident memory of the offline `burlwatch retrain` on the
//!    same state folder (the whole process: reading labels, training, gate);
//! 5. retraining from those labels, gate included, in-process as the
//!    daemon's job thread runs it (`retrain::plan` + `retrain::challenge`):
//!    median of 3.
//!
//! First of all, a daemon on a fresh box trains its first model from the
//! seed data: its peak resident memory and what it keeps afterwards. Last,
//! how many labelled frames a new weave needs, and whether the old weave's
//! labels help (`retrain.older_lines`).
//!
//! The feeder and watcher share the 2 cores with the daemon. With
//! `BURLWATCH_BENCH_KEEP` set, the folders are left for a look.

use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

mod support;
use support::{percentile, rss_kib, Arrivals};

use burlwatch::codec::{self, DecodeLimits};
use burlwatch::learn::{self, TrainParams};
use burlwatch::synth::{self, LoomParams};

const NEW_FRAMES: usize = 46;

struct Box_ {
    root: PathBuf,
}

impl Box_ {
    fn config(&self) -> PathBuf {
        self.root.join("burlwatch.toml")
    }

    fn start(&self) -> Child {
        let err = std::fs::OpenOptions::new()
            .create(true)
            .append(true)
            .open(self.root.join("stderr"))
            .unwrap();
        let before = self.stderr().matches("watching").count();
        let child = Command::new(env!("CARGO_BIN_EXE_burlwatch"))
            .args(["run", "--config"])
            .arg(self.config())
            .env_remove("RUST_LOG")
            .stdout(Stdio::null())
            .stderr(err)
            .spawn()
            .unwrap();
        let deadline = Instant::now() + Duration::from_secs(120);
        while self.stderr().matches("watching").count() == before {
            assert!(Instant::now() < deadline, "daemon did not start");
            std::thread::sleep(Duration::from_millis(10));
        }
        child
    }

    fn stderr(&self) -> String {
        std::fs::read_to_string(self.root.join("stderr")).unwrap_or_default()
    }

    fn cli(&self, args: &[&str]) -> std::process::Output {
        Command::new(env!("CARGO_BIN_EXE_burlwatch"))
            .args(args)
            .arg("--config")
            .arg(self.config())
            .output()
            .unwrap()
    }

    fn records(&self) -> Vec<burlwatch::record::FrameRecord> {
        std::fs::read_to_string(self.root.join("logs/detections.jsonl"))
            .unwrap_or_default()
            .lines()
            .map(|l| serde_json::from_str(l).unwrap())
            .collect()
    }
}

fn stop(mut c: Child) {
    // SAFETY: signals our own child.
    unsafe { libc::kill(c.id() as i32, libc::SIGTERM) };
    let _ = c.wait();
}

/// Feeds `count` frames at 50 per second (named `tag-NNNNNN.pbm`) while
/// `go()` holds, and returns each frame's latency to its durable record in
/// ms.
fn feed_50(
    b: &Box_,
    frames: &[Vec<u8>],
    tag: &str,
    count: usize,
    go: &dyn Fn() -> bool,
) -> Vec<f64> {
    let arrivals = Arrivals::watch(&b.root.join("archive"));
    let stage = b.root.join("stage");
    std::fs::create_dir_all(&stage).unwrap();
    let mut sent = Vec::new();
    let t0 = Instant::now();
    for i in 0..count {
        if !go() {
            break;
        }
        let name = format!("{tag}-{i:06}.pbm");
        std::fs::write(stage.join(&name), &frames[i % frames.len()]).unwrap();
        let due = t0 + Duration::from_millis(20 * i as u64);
        std::thread::sleep(due.saturating_duration_since(Instant::now()));
        let at = Instant::now();
        std::fs::rename(stage.join(&name), b.root.join("inbox").join(&name)).unwrap();
        sent.push((name, at));
    }
    sent.iter()
        .map(|(n, at)| arrivals.wait(n, 60).duration_since(*at).as_secs_f64() * 1e3)
        .collect()
}

fn main() {
    let repo = Path::new(env!("CARGO_MANIFEST_DIR"));
    let root =
        std::env::temp_dir().join(format!("burlwatch-bench-learning-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&root);
    for d in ["state", "inbox", "archive", "corrections"] {
        std::fs::create_dir_all(root.join(d)).unwrap();
    }
    let limits = DecodeLimits::default();
    first_model(repo, &root);
    let seed = burlwatch::fileio::data::read_folder(
        &repo.join("demo-frames/train"),
        &limits,
        &mut |_, _| {},
    )
    .unwrap();
    let model = learn::train(&seed.frames, &TrainParams::default(), &mut |_| {}).unwrap();
    std::fs::write(root.join("state/model.json"), model.to_json()).unwrap();
    let cfg = format!(
        "[folders]\ninbox = {:?}\narchive = {:?}\nrejected = {:?}\ncorrections = {:?}\nstate = {:?}\nlogs = {:?}\n\
         [training]\nseed_data = \"\"\n[log]\nsummary_seconds = 0\n[retrain]\ncheck_minutes = 10000\n",
        root.join("inbox"),
        root.join("archive"),
        root.join("rejected"),
        root.join("corrections"),
        root.join("state"),
        root.join("logs")
    );
    let b = Box_ { root: root.clone() };
    std::fs::write(b.config(), cfg).unwrap();
    let d = b.start();

    // The new weave, detected, then corrected with its true masks.
    let new = synth::generate_set(&LoomParams::alternate(), 31, NEW_FRAMES);
    let stage = root.join("stage");
    std::fs::create_dir_all(&stage).unwrap();
    let archive = Arrivals::watch(&root.join("archive"));
    for (i, g) in new.iter().enumerate() {
        let name = format!("coarse-{i:04}.pbm");
        std::fs::write(stage.join(&name), codec::encode_pbm(&g.frame)).unwrap();
        std::fs::rename(stage.join(&name), root.join("inbox").join(&name)).unwrap();
        archive.wait(&name, 60);
    }
    assert!(b.cli(&["changeover"]).status.success());
    let records = b.records();
    let applied = Arrivals::watch(&root.join("corrections/applied"));
    let mut intake = Vec::new();
    for (i, g) in new.iter().enumerate() {
        let name = format!("coarse-{i:04}.pbm");
        let r = records.iter().find(|r| r.frame == name).unwrap();
        let mask = format!("coarse-{i:04}.truth.pbm");
        std::fs::write(
            root.join("corrections").join(&mask),
            codec::encode_pbm(&g.mask),
        )
        .unwrap();
        let text = format!(
            "frame = {name:?}\nsha256 = {:?}\nmask = {mask:?}\n",
            r.sha256
        );
        let cname = format!("coarse-{i:04}.toml");
        std::fs::write(stage.join(&cname), text).unwrap();
        let at = Instant::now();
        std::fs::rename(stage.join(&cname), root.join("corrections").join(&cname)).unwrap();
        intake.push(applied.wait(&cname, 60).duration_since(at).as_secs_f64() * 1e3);
    }
    println!(
        "correction intake (rename to applied/, labels synced), 256x256 with a mask: median {:.1} ms, p90 {:.1} ms ({} corrections)",
        percentile(&mut intake.clone(), 0.5),
        percentile(&mut intake, 0.9),
        NEW_FRAMES
    );

    // Latency without, then with retrains running.
    let frames: Vec<Vec<u8>> = synth::generate_set(&LoomParams::alternate(), 32, 20)
        .iter()
        .map(|g| codec::encode_pbm(&g.frame))
        .collect();
    let mut quiet = feed_50(&b, &frames, "q", 1000, &|| true);
    // One retrain first: it puts a model of the new weave in service (a
    // larger tree than the seed model's), so the memory compared below is
    // that of retrains alone.
    let first = burlwatch::daemon::requests::send(
        &root.join("state"),
        &burlwatch::daemon::requests::Request {
            ask: burlwatch::daemon::requests::Ask::Retrain,
            by: "bench".into(),
        },
    )
    .unwrap();
    let answer = burlwatch::daemon::requests::wait(&first, Duration::from_secs(600)).unwrap();
    println!("first retrain: {}", answer.message);
    std::thread::sleep(Duration::from_secs(1));
    let rss_before = rss_kib(d.id());
    let mut busy = Vec::new();
    let mut retrains = 0;
    while busy.len() < 600 && retrains < 40 {
        let req = burlwatch::daemon::requests::send(
            &root.join("state"),
            &burlwatch::daemon::requests::Request {
                ask: burlwatch::daemon::requests::Ask::Retrain,
                by: "bench".into(),
            },
        )
        .unwrap();
        let ans = burlwatch::daemon::requests::answer_path(&req);
        let started = b.stderr().matches("retrain started").count();
        let deadline = Instant::now() + Duration::from_secs(30);
        while b.stderr().matches("retrain started").count() == started {
            assert!(Instant::now() < deadline, "retrain did not start");
            std::thread::sleep(Duration::from_millis(1));
        }
        busy.extend(feed_50(
            &b,
            &frames,
            &format!("b{retrains}"),
            100_000,
            &|| !ans.exists(),
        ));
        burlwatch::daemon::requests::wait(&req, Duration::from_secs(600));
        retrains += 1;
    }
    std::thread::sleep(Duration::from_secs(1));
    let rss_after = rss_kib(d.id());
    println!(
        "latency rename -> durable record at 50 frames/s: without a retrain p50 {:.2} ms, p99 {:.2} ms ({} frames); \
         while retraining p50 {:.2} ms, p99 {:.2} ms ({} frames during {retrains} retrains)",
        percentile(&mut quiet, 0.5),
        percentile(&mut quiet.clone(), 0.99),
        quiet.len(),
        percentile(&mut busy, 0.5),
        percentile(&mut busy.clone(), 0.99),
        busy.len()
    );
    println!(
        "daemon resident memory with the new model in service: {:.1} MB before these retrains, {:.1} MB after the last ({:+.1}%)",
        rss_before as f64 / 1024.0,
        rss_after as f64 / 1024.0,
        (rss_after as f64 / rss_before as f64 - 1.0) * 100.0
    );
    stop(d);

    // Peak memory of the offline retrain command, measured before this
    // process grows: a child's peak counts its parent's pages until it
    // runs the new program.
    let (ok, peak) = peak_of(
        Command::new(env!("CARGO_BIN_EXE_burlwatch"))
            .args(["retrain", "--config"])
            .arg(b.config())
            .stdout(Stdio::null())
            .stderr(Stdio::null()),
    );
    assert!(ok, "offline retrain failed");
    println!(
        "offline `burlwatch retrain` on the same labels: peak resident memory {:.1} MB (the whole process)",
        peak as f64 / 1024.0
    );
    // Retraining in-process, as the job thread runs it.
    let config = burlwatch::config::load(&b.config()).unwrap();
    let state = root.join("state");
    let mut labels =
        burlwatch::daemon::labels::LabelSet::open(&state, config.live.training.window, &limits)
            .unwrap();
    let running = burlwatch::fileio::models::read_model(&state.join("model.json")).unwrap();
    let mut secs = Vec::new();
    let mut pixels = 0;
    let mut reason = String::new();
    for _ in 0..3 {
        let t = Instant::now();
        let plan = burlwatch::daemon::retrain::plan(&state, &mut labels, &config.live)
            .unwrap()
            .unwrap();
        let ch =
            burlwatch::daemon::retrain::challenge(&plan, &running, &config.live, true, &|| false)
                .unwrap();
        secs.push(t.elapsed().as_secs_f64());
        pixels = ch.pixels;
        reason = ch.reason;
    }
    println!(
        "retrain from {:.2} million labelled pixels, gate included: median {:.2} s (3 runs: {}); {reason}",
        pixels as f64 / 1e6,
        percentile(&mut secs.clone(), 0.5),
        secs.iter().map(|s| format!("{s:.2}")).collect::<Vec<_>>().join(", ")
    );

    labels_needed(&seed.frames, repo);
    if std::env::var_os("BURLWATCH_BENCH_KEEP").is_some() {
        println!("folders kept in {}", root.display());
    } else {
        let _ = std::fs::remove_dir_all(&root);
    }
}

/// How many labelled frames a new weave needs, and whether the old
/// weave's labels help: models trained (with the defaults) on the first n
/// of 64 labelled `alternate` frames alone, and on those plus the 120
/// `demo-frames/train` frames of the standard weave, scored (object F1) on
/// 30 other `alternate` frames and on `demo-frames/test`.
fn labels_needed(seed: &[burlwatch::frame::LabelledFrame], repo: &Path) {
    use burlwatch::frame::LabelledFrame;
    let limits = DecodeLimits::default();
    let labelled = |set: Vec<synth::LoomFrame>, tag: &str| -> Vec<LabelledFrame> {
        set.into_iter()
            .enumerate()
            .map(|(i, g)| LabelledFrame::new(format!("{tag}-{i}"), g.frame, g.mask))
            .collect()
    };
    let pool = labelled(
        synth::generate_set(&LoomParams::alternate(), 41, 64),
        "pool",
    );
    let test_new = labelled(
        synth::generate_set(&LoomParams::alternate(), 42, 30),
        "test",
    );
    let test_old = burlwatch::fileio::data::read_folder(
        &repo.join("demo-frames/test"),
        &limits,
        &mut |_, _| {},
    )
    .unwrap()
    .frames;
    let f1 = |m: &burlwatch::model::Model, frames: &[LabelledFrame]| {
        let d = burlwatch::detect::Detector::new(m.clone(), m.settings());
        burlwatch::score::score_frames(&d, frames, false, &mut |_, _| {})
            .unwrap()
            .total
            .object
            .f1()
    };
    let p = TrainParams::default();
    let old = learn::train(seed, &p, &mut |_| {}).unwrap();
    println!(
        "labels on a new weave (object F1 on 30 new-weave / 30 old-weave test frames): seed model {:.2} / {:.2}",
        f1(&old, &test_new),
        f1(&old, &test_old)
    );
    for n in [8, 16, 32, 64] {
        let new_only = learn::train(&pool[..n], &p, &mut |_| {}).unwrap();
        let mut both: Vec<LabelledFrame> = seed.to_vec();
        both.extend(pool[..n].iter().cloned());
        let with_old = learn::train(&both, &p, &mut |_| {}).unwrap();
        println!(
            "  {n:>2} new-weave frames: alone {:.2} / {:.2}; with the old weave's 120 {:.2} / {:.2}",
            f1(&new_only, &test_new),
            f1(&new_only, &test_old),
            f1(&with_old, &test_new),
            f1(&with_old, &test_old)
        );
    }
}

/// A daemon on a fresh box trains its first model from the 120 frames of
/// `demo-frames/train`: its peak resident memory (from `wait4` after it
/// stops) and its resident memory once it watches.
fn first_model(repo: &Path, root: &Path) {
    let dir = root.join("first");
    std::fs::create_dir_all(&dir).unwrap();
    let cfg = dir.join("burlwatch.toml");
    std::fs::write(
        &cfg,
        format!(
            "[folders]\ninbox = {:?}\narchive = {:?}\nrejected = {:?}\ncorrections = {:?}\nstate = {:?}\nlogs = {:?}\n\
             [training]\nseed_data = {:?}\n[log]\nsummary_seconds = 0\n",
            dir.join("inbox"),
            dir.join("archive"),
            dir.join("rejected"),
            dir.join("corrections"),
            dir.join("state"),
            dir.join("logs"),
            repo.join("demo-frames/train"),
        ),
    )
    .unwrap();
    let err = dir.join("stderr");
    let child = Command::new(env!("CARGO_BIN_EXE_burlwatch"))
        .args(["run", "--config"])
        .arg(&cfg)
        .env_remove("RUST_LOG")
        .stdout(Stdio::null())
        .stderr(std::fs::File::create(&err).unwrap())
        .spawn()
        .unwrap();
    let deadline = Instant::now() + Duration::from_secs(300);
    while !std::fs::read_to_string(&err)
        .unwrap_or_default()
        .contains("watching")
    {
        assert!(Instant::now() < deadline, "daemon did not start");
        std::thread::sleep(Duration::from_millis(20));
    }
    std::thread::sleep(Duration::from_millis(500));
    let after = rss_kib(child.id());
    // SAFETY: signals our own child.
    unsafe { libc::kill(child.id() as i32, libc::SIGTERM) };
    let (_, peak) = wait_peak(child);
    println!(
        "a daemon training its first model from demo-frames/train (120 frames): peak resident memory {:.1} MB, {:.1} MB once it watches",
        peak as f64 / 1024.0,
        after as f64 / 1024.0
    );
}

/// Runs a command to its end; whether it succeeded and its peak resident
/// size in KiB (from `wait4`'s resource usage of that one child).
fn peak_of(cmd: &mut Command) -> (bool, u64) {
    wait_peak(cmd.spawn().unwrap())
}

/// Waits for a child; whether it succeeded and its peak resident size in
/// KiB, read from its own high-water mark (`VmHWM`, which starts afresh
/// when it runs the new program) every few milliseconds until it ends.
/// (`wait4`'s peak would count the pages it shared with this process
/// between fork and exec.)
fn wait_peak(mut child: Child) -> (bool, u64) {
    let path = format!("/proc/{}/status", child.id());
    let mut peak = 0u64;
    loop {
        if let Ok(s) = std::fs::read_to_string(&path) {
            if let Some(v) = s
                .lines()
                .find(|l| l.starts_with("VmHWM:"))
                .and_then(|l| l.split_whitespace().nth(1))
                .and_then(|v| v.parse::<u64>().ok())
            {
                peak = peak.max(v);
            }
        }
        if let Some(st) = child.try_wait().unwrap() {
            return (st.success(), peak);
        }
        std::thread::sleep(Duration::from_millis(2));
    }
}
