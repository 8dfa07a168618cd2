//! Daemon benchmark: `cargo bench --bench daemon`.
//!
//! Runs the release `burlwatch run` on temporary folders with the default
//! demo model (trained here on `demo-frames/train`) and the 256x256 demo
//! frames of `demo-frames/test` (cycled under new names), all on this
//! machine, and reports:
//! 1. sustained throughput: frames renamed into the inbox as fast as
//!    possible, log sync batched; frames per second from the first rename
//!    to the last frame moved to the archive (medians of 3 runs);
//! 2. latency from the rename into the inbox to the durable record (the
//!    frame is moved to the archive only after the sync that covers its
//!    record, so its arrival in the archive marks durability) at a steady
//!    50 frames per second, with the default (sync every record) and the
//!    batched log: p50 and p99;
//!    then the same with the status endpoint off and with it on and
//!    scraped once a second (`/metrics` and `/healthz`), in three
//!    alternating pairs of runs;
//! 3. resident memory of the daemon after 10,000 and 20,000 frames.
//!
//! The feeder and the timing watcher run on the same 2 cores as the
//! daemon, so the figures are for the whole box.
//!
//! 4. with `BURLWATCH_BENCH_ONLY=soak` alone: 100,000 frames
//!    (`BURLWATCH_SOAK_FRAMES`) fed as fast as they are taken, reporting
//!    resident memory, open files and the logs' and archive's size every
//!    10,000.
//!
//! 5. with `BURLWATCH_BENCH_ONLY=big` alone: eight 8192 x 8192 frames
//!    (loom frames tiled) dropped at once for 4 workers, with the default
//!    `detection.max_pixels_at_once` (one such frame at a time) and with a
//!    budget of four (as before the budget): the daemon's peak resident
//!    memory and the time to archive all eight, in alternating runs.
//!
//! Environment: `BURLWATCH_BENCH_ONLY=daemon`, `status`, `soak` or `big` runs one
//! part; `BURLWATCH_BENCH_FRAMES` (default 5000) for the
//! throughput runs.

use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::sync::atomic::Ordering;
use std::time::{Duration, Instant};

mod support;
use support::{peak_rss_kib, percentile, rss_kib, Arrivals};

use burlwatch::codec::DecodeLimits;
use burlwatch::learn::{self, TrainParams};

struct Box_ {
    root: PathBuf,
    child: Child,
}

impl Drop for Box_ {
    fn drop(&mut self) {
        // SAFETY: signals our own child.
        unsafe { libc::kill(self.child.id() as i32, libc::SIGTERM) };
        let _ = self.child.wait();
        let _ = std::fs::remove_dir_all(&self.root);
    }
}

fn start(model: &str, extra: &str, tag: &str) -> Box_ {
    let root = std::env::temp_dir().join(format!("burlwatch-bench-{}-{tag}", std::process::id()));
    let _ = std::fs::remove_dir_all(&root);
    std::fs::create_dir_all(root.join("state")).unwrap();
    std::fs::create_dir_all(root.join("inbox")).unwrap();
    std::fs::create_dir_all(root.join("archive")).unwrap();
    std::fs::write(root.join("state/model.json"), model).unwrap();
    let cfg = format!(
        "[folders]\ninbox = {:?}\narchive = {:?}\nrejected = {:?}\ncorrections = {:?}\nstate = {:?}\nlogs = {:?}\n{extra}",
        root.join("inbox"),
        root.join("archive"),
        root.join("rejected"),
        root.join("corrections"),
        root.join("state"),
        root.join("logs")
    );
    std::fs::write(root.join("burlwatch.toml"), cfg).unwrap();
    let err = std::fs::File::create(root.join("stderr")).unwrap();
    let child = Command::new(env!("CARGO_BIN_EXE_burlwatch"))
        .args(["run", "--config"])
        .arg(root.join("burlwatch.toml"))
        .env_remove("RUST_LOG")
        .stdout(Stdio::null())
        .stderr(err)
        .spawn()
        .unwrap();
    let deadline = Instant::now() + Duration::from_secs(60);
    while !std::fs::read_to_string(root.join("stderr"))
        .unwrap_or_default()
        .contains("watching")
    {
        assert!(Instant::now() < deadline, "daemon did not start");
        std::thread::sleep(Duration::from_millis(10));
    }
    Box_ { root, child }
}

/// One GET on loopback; true for a 200 answer.
fn get(port: u16, path: &str) -> bool {
    use std::io::{Read, Write};
    let Ok(mut s) = std::net::TcpStream::connect(("127.0.0.1", port)) else {
        return false;
    };
    let _ = s.set_read_timeout(Some(Duration::from_secs(5)));
    let req = format!("GET {path} HTTP/1.1\r\nHost: 127.0.0.1\r\nConnection: close\r\n\r\n");
    if s.write_all(req.as_bytes()).is_err() {
        return false;
    }
    let mut answer = String::new();
    let _ = s.read_to_string(&mut answer);
    answer.starts_with("HTTP/1.1 200")
}

/// Frames renamed into the inbox at a steady 50 a second; the p50 and p99
/// of rename to durable record in ms, and, with `scrape`, how many
/// scrapes of /metrics and /healthz (once a second, on the endpoint's
/// port) answered 200.
fn latency(
    model: &str,
    frames: &[Vec<u8>],
    extra: &str,
    count: usize,
    scrape: Option<u16>,
) -> (f64, f64, usize) {
    let b = start(model, extra, "lat");
    let arrivals = Arrivals::watch(&b.root.join("archive"));
    let stage = b.root.join("stage");
    std::fs::create_dir_all(&stage).unwrap();
    let done = std::sync::Arc::new(std::sync::atomic::AtomicBool::new(false));
    let scraper = scrape.map(|port| {
        let done = done.clone();
        std::thread::spawn(move || {
            let mut ok = 0;
            while !done.load(Ordering::Relaxed) {
                ok += (get(port, "/metrics") && get(port, "/healthz")) as usize;
                std::thread::sleep(Duration::from_secs(1));
            }
            ok
        })
    });
    let mut sent = Vec::with_capacity(count);
    let t0 = Instant::now();
    for i in 0..count {
        let name = format!("l{i:06}.pbm");
        std::fs::write(stage.join(&name), &frames[i % frames.len()]).unwrap();
        let due = t0 + Duration::from_millis(20 * i as u64);
        std::thread::sleep(due.saturating_duration_since(Instant::now()));
        let at = Instant::now();
        std::fs::rename(stage.join(&name), b.root.join("inbox").join(&name)).unwrap();
        sent.push((name, at));
    }
    arrivals.wait_count(count, 60);
    done.store(true, Ordering::Relaxed);
    let scrapes = scraper.map_or(0, |t| t.join().unwrap());
    let times: std::collections::HashMap<String, Instant> =
        arrivals.times.lock().unwrap().iter().cloned().collect();
    let mut lat: Vec<f64> = sent
        .iter()
        .map(|(n, at)| times[n].duration_since(*at).as_secs_f64() * 1e3)
        .collect();
    (
        percentile(&mut lat, 0.5),
        percentile(&mut lat, 0.99),
        scrapes,
    )
}

fn main() {
    let repo = Path::new(env!("CARGO_MANIFEST_DIR"));
    let folder = burlwatch::fileio::data::read_folder(
        &repo.join("demo-frames/train"),
        &DecodeLimits::default(),
        &mut |_, _| {},
    )
    .expect("demo frames");
    let model = learn::train(&folder.frames, &TrainParams::default(), &mut |_| {})
        .expect("train")
        .to_json();
    let mut frames: Vec<Vec<u8>> = std::fs::read_dir(repo.join("demo-frames/test"))
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| {
            p.to_string_lossy().ends_with(".pbm") && !p.to_string_lossy().ends_with(".mask.pbm")
        })
        .map(|p| std::fs::read(p).unwrap())
        .collect();
    frames.sort();
    let n: usize = std::env::var("BURLWATCH_BENCH_FRAMES")
        .ok()
        .and_then(|s| s.parse().ok())
        .unwrap_or(5000);

    let only = std::env::var("BURLWATCH_BENCH_ONLY").unwrap_or_default();
    if only.is_empty() || only == "daemon" {
        throughput_latency_memory(&model, &frames, n);
    }
    if only.is_empty() || only == "status" {
        status_endpoint(&model, &frames);
    }
    if only == "soak" {
        soak(&model, &frames);
    }
    if only == "big" {
        big_frames(&model, &frames);
    }
}

/// Eight 8192 x 8192 frames at once for 4 workers: peak resident memory
/// and seconds to archive them, with the default pixel budget (one such
/// frame) and with room for four, in three alternating pairs of runs.
fn big_frames(model: &str, frames: &[Vec<u8>]) {
    let limits = DecodeLimits::default();
    let side = 8192;
    let big: Vec<Vec<u8>> = frames
        .iter()
        .take(8)
        .map(|bytes| {
            let tile = burlwatch::codec::decode(bytes, &limits).unwrap();
            let (w, h) = (tile.width(), tile.height());
            let f = burlwatch::frame::BitFrame::from_fn(side, side, |x, y| tile.get(x % w, y % h));
            burlwatch::codec::encode_pbm(&f)
        })
        .collect();
    let mut results: Vec<(&str, Vec<(f64, f64)>)> = vec![
        ("one at a time", Vec::new()),
        ("four at a time", Vec::new()),
    ];
    for run in 0..3 {
        for (k, budget) in [1u64, 4].into_iter().enumerate() {
            let b = start(
                model,
                &format!(
                    "[detection]\nworkers = 4\nmax_pixels_at_once = {}\n[drift]\nenabled = false\n[status]\nenabled = false\n",
                    budget * 8192 * 8192
                ),
                &format!("big{run}-{budget}"),
            );
            let arrivals = Arrivals::watch(&b.root.join("archive"));
            let stage = b.root.join("stage");
            std::fs::create_dir_all(&stage).unwrap();
            for (i, bytes) in big.iter().enumerate() {
                std::fs::write(stage.join(format!("big{i}.pbm")), bytes).unwrap();
            }
            let t0 = Instant::now();
            for i in 0..big.len() {
                let name = format!("big{i}.pbm");
                std::fs::rename(stage.join(&name), b.root.join("inbox").join(&name)).unwrap();
            }
            arrivals.wait_count(big.len(), 600);
            let secs = t0.elapsed().as_secs_f64();
            let peak = peak_rss_kib(b.child.id()) as f64 / 1024.0;
            results[k].1.push((peak, secs));
        }
    }
    for (what, runs) in results {
        let mut peaks: Vec<f64> = runs.iter().map(|r| r.0).collect();
        let mut secs: Vec<f64> = runs.iter().map(|r| r.1).collect();
        println!(
            "8 frames of 8192x8192, 4 workers, {what}: peak RSS median {:.0} MB (runs {:?}), {:.1} s median",
            percentile(&mut peaks, 0.5),
            runs.iter().map(|r| r.0.round()).collect::<Vec<_>>(),
            percentile(&mut secs, 0.5)
        );
    }
}

/// Open file descriptors of a process.
fn fds(pid: u32) -> usize {
    std::fs::read_dir(format!("/proc/{pid}/fd")).map_or(0, |d| d.count())
}

/// Bytes of the files directly in `dir`.
fn folder_bytes(dir: &Path) -> u64 {
    std::fs::read_dir(dir)
        .map(|d| {
            d.filter_map(|e| e.ok())
                .filter_map(|e| e.metadata().ok())
                .filter(|m| m.is_file())
                .map(|m| m.len())
                .sum()
        })
        .unwrap_or(0)
}

/// The soak: `BURLWATCH_SOAK_FRAMES` (100,000) frames fed as fast as the
/// daemon takes them (a backlog of at most 300 in the inbox), with small
/// log files (4 MiB, 3 kept) and a 100 MB archive: resident memory, open
/// file descriptors, and the logs' and archive's size at every 10,000.
fn soak(model: &str, frames: &[Vec<u8>]) {
    let total: usize = std::env::var("BURLWATCH_SOAK_FRAMES")
        .ok()
        .and_then(|s| s.parse().ok())
        .unwrap_or(100_000);
    let b = start(
        model,
        "[log]\nsync = \"batch\"\nrotate_bytes = 4194304\nkeep_files = 3\n[archive]\nkeep_bytes = 100000000\n[status]\nenabled = false\n",
        "soak",
    );
    let arrivals = Arrivals::watch(&b.root.join("archive"));
    let stage = b.root.join("stage");
    std::fs::create_dir_all(&stage).unwrap();
    let pid = b.child.id();
    let t0 = Instant::now();
    println!(
        "soak start: RSS {:.1} MB, {} open files",
        rss_kib(pid) as f64 / 1024.0,
        fds(pid)
    );
    for i in 0..total {
        while i > arrivals.count.load(Ordering::Relaxed) + 300 {
            std::thread::sleep(Duration::from_millis(1));
        }
        let name = format!("s{i:07}.pbm");
        std::fs::write(stage.join(&name), &frames[i % frames.len()]).unwrap();
        std::fs::rename(stage.join(&name), b.root.join("inbox").join(&name)).unwrap();
        if (i + 1) % 10_000 == 0 {
            arrivals.wait_count(i + 1, 300);
            println!(
                "soak {:>7} frames ({:.0} s): RSS {:.1} MB, {} open files, logs {:.1} MB, archive {:.1} MB",
                i + 1,
                t0.elapsed().as_secs_f64(),
                rss_kib(pid) as f64 / 1024.0,
                fds(pid),
                folder_bytes(&b.root.join("logs")) as f64 / 1e6,
                folder_bytes(&b.root.join("archive")) as f64 / 1e6,
            );
        }
    }
    let err = std::fs::read_to_string(b.root.join("stderr")).unwrap_or_default();
    println!(
        "soak done: {total} frames in {:.0} s; the daemon said {} error line(s)",
        t0.elapsed().as_secs_f64(),
        err.lines().filter(|l| l.contains("ERROR")).count()
    );
}

fn throughput_latency_memory(model: &str, frames: &[Vec<u8>], n: usize) {
    // 1. Throughput, sync batched.
    let mut rates = Vec::new();
    for run in 0..3 {
        let b = start(model, "[log]\nsync = \"batch\"\n", &format!("tp{run}"));
        let stage = b.root.join("stage");
        std::fs::create_dir_all(&stage).unwrap();
        for i in 0..n {
            std::fs::write(
                stage.join(format!("f{i:06}.pbm")),
                &frames[i % frames.len()],
            )
            .unwrap();
        }
        let arrivals = Arrivals::watch(&b.root.join("archive"));
        let t0 = Instant::now();
        for i in 0..n {
            let name = format!("f{i:06}.pbm");
            std::fs::rename(stage.join(&name), b.root.join("inbox").join(&name)).unwrap();
        }
        arrivals.wait_count(n, 600);
        let last = arrivals
            .times
            .lock()
            .unwrap()
            .iter()
            .map(|t| t.1)
            .max()
            .unwrap();
        rates.push(n as f64 / last.duration_since(t0).as_secs_f64());
    }
    let tp = percentile(&mut rates.clone(), 0.5);
    println!(
        "throughput, 256x256 demo frames by rename, log sync batched: {tp:.0} frames/s (median of 3: {})",
        rates.iter().map(|r| format!("{r:.0}")).collect::<Vec<_>>().join(", ")
    );

    // 2. Latency at a steady 50 frames/s.
    for (label, extra) in [
        ("sync every record (default)", ""),
        ("sync batched", "[log]\nsync = \"batch\"\n"),
    ] {
        let (p50, p99, _) = latency(model, frames, extra, 1000, None);
        println!(
            "latency rename -> durable record at 50 frames/s, {label}: p50 {p50:.2} ms, p99 {p99:.2} ms (1000 frames)"
        );
    }

    // 3. Resident memory over 20,000 frames.
    let b = start(model, "[log]\nsync = \"batch\"\n", "mem");
    let arrivals = Arrivals::watch(&b.root.join("archive"));
    let start_rss = rss_kib(b.child.id());
    let mut at = Vec::new();
    let stage = b.root.join("stage");
    std::fs::create_dir_all(&stage).unwrap();
    for i in 0..20_000 {
        // Keep a backlog of at most a few hundred frames in the inbox.
        while i > arrivals.count.load(Ordering::Relaxed) + 300 {
            std::thread::sleep(Duration::from_millis(1));
        }
        let name = format!("m{i:06}.pbm");
        std::fs::write(stage.join(&name), &frames[i % frames.len()]).unwrap();
        std::fs::rename(stage.join(&name), b.root.join("inbox").join(&name)).unwrap();
        if (i + 1) % 5_000 == 0 {
            arrivals.wait_count(i + 1, 120);
            at.push(rss_kib(b.child.id()));
        }
    }
    println!(
        "resident memory: {:.1} MB at start; after 5,000 / 10,000 / 15,000 / 20,000 frames: {}; \
         growth from 10,000 to 20,000: {:+.2} MB",
        start_rss as f64 / 1024.0,
        at.iter()
            .map(|k| format!("{:.1} MB", *k as f64 / 1024.0))
            .collect::<Vec<_>>()
            .join(" / "),
        (at[3] as f64 - at[1] as f64) / 1024.0
    );
}

fn status_endpoint(model: &str, frames: &[Vec<u8>]) {
    // 2b. The status endpoint: off, or on and scraped once a second
    // (/metrics and /healthz), in alternating runs.
    let mut off = Vec::new();
    let mut on = Vec::new();
    for run in 0..3 {
        let (p50, p99, _) = latency(model, frames, "[status]\nenabled = false\n", 1000, None);
        println!("  run {run}, endpoint off: p50 {p50:.2} ms, p99 {p99:.2} ms");
        off.push((p50, p99));
        let port = std::net::TcpListener::bind("127.0.0.1:0")
            .unwrap()
            .local_addr()
            .unwrap()
            .port();
        let (p50, p99, scrapes) = latency(
            model,
            frames,
            &format!("[status]\naddress = \"127.0.0.1:{port}\"\n"),
            1000,
            Some(port),
        );
        println!("  run {run}, endpoint scraped once a second: p50 {p50:.2} ms, p99 {p99:.2} ms ({scrapes} scrapes)");
        on.push((p50, p99));
    }
    let med = |v: &[(f64, f64)], k: usize| {
        let mut x: Vec<f64> = v.iter().map(|p| if k == 0 { p.0 } else { p.1 }).collect();
        percentile(&mut x, 0.5)
    };
    println!(
        "status endpoint at 50 frames/s, medians of 3 alternating runs: off p50 {:.2} ms p99 {:.2} ms; scraped once a second p50 {:.2} ms p99 {:.2} ms (p99 ratio {:.2})",
        med(&off, 0),
        med(&off, 1),
        med(&on, 0),
        med(&on, 1),
        med(&on, 1) / med(&off, 1)
    );
}
