//! Log query benchmark: `cargo bench --bench review`.
//!
//! Writes a month of detection logs at 10 frames a second (26 million
//! records, about 6 GB, in 64 MiB rotated files as the daemon rotates
//! them) into a temporary folder, then runs the release `burlwatch log
//! summary --json` over all of it three times and reports the median
//! time, records per second, and the command's peak resident memory
//! (the largest of its runs, from the operating system's accounting of
//! finished children). Also times `log frames` with a filter over the
//! same logs. Then deletes the logs.
//!
//! Then the report: a box with seven days of logs at 10 frames a second
//! (6,048,000 records), among them frames of `demo-frames/test` archived
//! under new names and logged with what the demo model (trained here on
//! `demo-frames/train`, registered as the daemon registers it) finds in
//! them, so that the 50 frames with the most objects are real archived
//! frames to draw; a drift history line every 5 minutes, alerts, events
//! and rejected files. Runs the release `burlwatch report` over the seven
//! days three times: median time, the file's size, peak memory.
//!
//! Environment: `BURLWATCH_BENCH_RECORDS` (default 26,000,000);
//! `BURLWATCH_BENCH_ONLY` = `log` or `report` runs one part;
//! `BURLWATCH_BENCH_KEEP` keeps the report's box.

use std::io::{BufWriter, Write};
use std::path::Path;
use std::process::{Command, Stdio};
use std::time::Instant;

mod support;
use support::percentile;

use burlwatch::review::{format_time, parse_time};

/// The daemon's default rotation size.
const ROTATE: u64 = 64 << 20;

fn write_logs(logs: &Path, records: u64) -> u64 {
    write_logs_from(
        logs,
        parse_time("2026-11-01T00:00:00.000Z").unwrap(),
        records,
        &|_, _| None,
    )
}

/// Records every 100 ms from `start`; `special(i, time)` may give the
/// i-th record's line instead of the generated one.
fn write_logs_from(
    logs: &Path,
    start: i64,
    records: u64,
    special: &dyn Fn(u64, i64) -> Option<String>,
) -> u64 {
    std::fs::create_dir_all(logs).unwrap();
    let mut bytes = 0u64;
    let mut in_file = 0u64;
    let mut w =
        BufWriter::with_capacity(1 << 20, std::fs::File::create(logs.join("part")).unwrap());
    for i in 0..records {
        let t = start + (i as i64) * 100;
        let objects = match i % 10 {
            0 => "{\"id\":1,\"bbox\":[10,20,24,31],\"centroid\":[17.0,25.5],\"area\":96,\"score\":0.9731}".to_string(),
            5 => "{\"id\":1,\"bbox\":[10,20,24,31],\"centroid\":[17.0,25.5],\"area\":96,\"score\":0.9731},{\"id\":2,\"bbox\":[100,120,111,129],\"centroid\":[105.5,124.5],\"area\":64,\"score\":0.8812}".to_string(),
            _ => String::new(),
        };
        let line = special(i, t).map(|l| format!("{l}\n")).unwrap_or_else(|| format!(
            "{{\"time\":\"{}\",\"frame\":\"loom-{i:09}.pbm\",\"sha256\":\"{i:064x}\",\"width\":256,\"height\":256,\"model_version\":3,\"model_hash\":\"0123456789ab\",\"millis\":{}.{:02},\"objects\":[{objects}]}}\n",
            format_time(t),
            1 + i % 3,
            i % 100
        ));
        w.write_all(line.as_bytes()).unwrap();
        bytes += line.len() as u64;
        in_file += line.len() as u64;
        if in_file >= ROTATE {
            w.flush().unwrap();
            drop(w);
            let s = format_time(t + 1);
            let digits: String = s[..19]
                .chars()
                .filter(|c| c.is_ascii_digit() || *c == 'T')
                .collect();
            std::fs::rename(
                logs.join("part"),
                logs.join(format!("detections-{digits}_{}000000Z.jsonl", &s[20..23])),
            )
            .unwrap();
            w = BufWriter::with_capacity(
                1 << 20,
                std::fs::File::create(logs.join("part")).unwrap(),
            );
            in_file = 0;
        }
    }
    w.flush().unwrap();
    drop(w);
    std::fs::rename(logs.join("part"), logs.join("detections.jsonl")).unwrap();
    bytes
}

/// Peak resident memory of the finished children so far, MB.
fn children_peak_mb() -> f64 {
    // SAFETY: getrusage fills the struct we pass.
    let mut u: libc::rusage = unsafe { std::mem::zeroed() };
    unsafe { libc::getrusage(libc::RUSAGE_CHILDREN, &mut u) };
    u.ru_maxrss as f64 / 1024.0
}

fn run(root: &Path, args: &[&str]) -> f64 {
    let t = Instant::now();
    let out = Command::new(env!("CARGO_BIN_EXE_burlwatch"))
        .arg(args[0])
        .arg("--config")
        .arg(root.join("burlwatch.toml"))
        .args(&args[1..])
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .output()
        .unwrap();
    let secs = t.elapsed().as_secs_f64();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    secs
}

/// As [`run`], also returning the command's peak resident memory in MB,
/// read from its own `VmHWM` while it runs: this process is large here
/// (it trained a model), and the operating system's accounting of
/// finished children would count the memory a child shared with it
/// before it started the program.
fn run_watched(root: &Path, args: &[&str]) -> (f64, f64) {
    let t = Instant::now();
    let mut child = Command::new(env!("CARGO_BIN_EXE_burlwatch"))
        .arg(args[0])
        .arg("--config")
        .arg(root.join("burlwatch.toml"))
        .args(&args[1..])
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let status = format!("/proc/{}/status", child.id());
    let mut peak_kib = 0u64;
    let code = loop {
        if let Ok(text) = std::fs::read_to_string(&status) {
            if let Some(kib) = text
                .lines()
                .find_map(|l| l.strip_prefix("VmHWM:"))
                .and_then(|v| v.trim().trim_end_matches("kB").trim().parse::<u64>().ok())
            {
                peak_kib = peak_kib.max(kib);
            }
        }
        if let Some(code) = child.try_wait().unwrap() {
            break code;
        }
        std::thread::sleep(std::time::Duration::from_millis(2));
    };
    let secs = t.elapsed().as_secs_f64();
    assert!(code.success(), "{args:?} failed");
    (secs, peak_kib as f64 / 1024.0)
}

fn main() {
    let only = std::env::var("BURLWATCH_BENCH_ONLY").unwrap_or_default();
    if only != "report" {
        log_queries();
    }
    if only != "log" {
        report();
    }
}

fn log_queries() {
    let records: u64 = std::env::var("BURLWATCH_BENCH_RECORDS")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(26_000_000);
    let root = std::env::temp_dir().join(format!("burlwatch-bench-review-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&root);
    std::fs::create_dir_all(&root).unwrap();
    std::fs::write(
        root.join("burlwatch.toml"),
        format!(
            "[folders]\nlogs = {:?}\nstate = {:?}\n",
            root.join("logs"),
            root.join("state")
        ),
    )
    .unwrap();
    let t = Instant::now();
    let bytes = write_logs(&root.join("logs"), records);
    let files = std::fs::read_dir(root.join("logs")).unwrap().count();
    println!(
        "wrote {records} records ({:.2} GB in {files} files) in {:.1} s",
        bytes as f64 / 1e9,
        t.elapsed().as_secs_f64()
    );
    let mut times = Vec::new();
    for _ in 0..3 {
        times.push(run(&root, &["log", "summary", "--json"]));
    }
    let med = percentile(&mut times.clone(), 0.5);
    println!(
        "log summary over all: median {med:.2} s of {:?}: {:.2} million records/s, {:.0} MB/s; peak RSS {:.1} MB",
        times.iter().map(|t| format!("{t:.2}")).collect::<Vec<_>>(),
        records as f64 / med / 1e6,
        bytes as f64 / med / 1e6,
        children_peak_mb()
    );
    let mut f = Vec::new();
    for _ in 0..3 {
        f.push(run(
            &root,
            &["log", "frames", "--min-objects", "2", "--limit", "10"],
        ));
    }
    let fm = percentile(&mut f.clone(), 0.5);
    println!(
        "log frames --min-objects 2 --limit 10 over all: median {fm:.2} s ({:.2} million records/s); peak RSS of all runs {:.1} MB",
        records as f64 / fm / 1e6,
        children_peak_mb()
    );
    let _ = std::fs::remove_dir_all(&root);
}

/// The seven-day report with 50 thumbnails.
fn report() {
    use burlwatch::codec::{self, DecodeLimits};
    use burlwatch::daemon::registry::{Entry, Origin, Registry, TrainedOn};
    use burlwatch::detect::{compile::Scratch, Detector};
    use burlwatch::learn::{self, TrainParams};
    use burlwatch::monitor::{DriftSample, SampleValue};
    use burlwatch::record::FrameRecord;

    const DAYS: i64 = 7;
    let records = (DAYS * 24 * 3600 * 10) as u64;
    let root = std::env::temp_dir().join(format!("burlwatch-bench-report-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&root);
    for f in [
        "logs",
        "state",
        "archive",
        "rejected",
        "inbox",
        "corrections",
    ] {
        std::fs::create_dir_all(root.join(f)).unwrap();
    }
    std::fs::write(
        root.join("burlwatch.toml"),
        [
            "inbox",
            "archive",
            "rejected",
            "corrections",
            "state",
            "logs",
        ]
        .iter()
        .fold("[folders]\n".to_string(), |s, f| {
            format!("{s}{f} = {:?}\n", root.join(f))
        }),
    )
    .unwrap();
    // The demo model, registered as the daemon registers its seed model.
    let repo = Path::new(env!("CARGO_MANIFEST_DIR"));
    let limits = DecodeLimits::default();
    let train = burlwatch::fileio::data::read_folder(
        &repo.join("demo-frames/train"),
        &limits,
        &mut |_, _| {},
    )
    .unwrap();
    let model = learn::train(&train.frames, &TrainParams::default(), &mut |_| {}).unwrap();
    let registry = Registry::read_only(&root.join("state"));
    std::fs::create_dir_all(root.join("state/models")).unwrap();
    let entry = registry
        .add(
            &model,
            Entry {
                version: 0,
                hash: String::new(),
                parent: None,
                time: "2026-11-24T00:00:00.000Z".into(),
                origin: Origin::Seed,
                trained_on: TrainedOn::default(),
                passed: true,
                reason: "trained from the seed data on a fresh box".into(),
                gate: None,
            },
        )
        .unwrap();
    let detector = Detector::new(model.clone(), model.settings());
    // The test frames with two objects or more, each archived four times
    // under new names, with the records the detector gives them.
    let mut frames: Vec<(Vec<u8>, Vec<burlwatch::detect::group::Object>, usize, usize)> =
        Vec::new();
    let mut paths: Vec<_> = std::fs::read_dir(repo.join("demo-frames/test"))
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| {
            let n = p.to_string_lossy();
            n.ends_with(".pbm") && !n.ends_with(".mask.pbm")
        })
        .collect();
    paths.sort();
    for p in paths {
        let bytes = std::fs::read(&p).unwrap();
        let frame = codec::decode(&bytes, &limits).unwrap();
        let r = detector.detect(&frame, &mut Scratch::default());
        if r.objects.len() >= 2 {
            frames.push((bytes, r.objects, frame.width(), frame.height()));
        }
    }
    let copies = 4;
    let real = frames.len() * copies;
    let every = records / (real as u64 + 1);
    let start = parse_time("2026-11-24T00:00:00.000Z").unwrap();
    let version = entry.version;
    let hash = entry.hash.clone();
    let archive = root.join("archive");
    let special = |i: u64, t: i64| -> Option<String> {
        if i % every != every / 2 || i / every >= real as u64 {
            return None;
        }
        let k = (i / every) as usize;
        let (bytes, objects, w, h) = &frames[k % frames.len()];
        let name = format!("loom-real-{k:04}.pbm");
        std::fs::write(archive.join(&name), bytes).unwrap();
        let rec = FrameRecord::new(
            std::time::UNIX_EPOCH + std::time::Duration::from_millis(t as u64),
            &name,
            bytes,
            *w,
            *h,
            version,
            &hash,
            2.5,
            objects,
        );
        Some(serde_json::to_string(&rec).unwrap())
    };
    let t = Instant::now();
    // The generated records carry one object at most, the real frames two
    // or more: the report's thumbnails are the real ones.
    let bytes = write_logs_from(&root.join("logs"), start, records, &|i, t| {
        special(i, t).or_else(|| {
            Some(format!(
                "{{\"time\":\"{}\",\"frame\":\"loom-{i:09}.pbm\",\"sha256\":\"{i:064x}\",\"width\":256,\"height\":256,\"model_version\":{version},\"model_hash\":\"{hash}\",\"millis\":{}.{:02},\"objects\":[{}]}}",
                format_time(t),
                1 + i % 3,
                i % 100,
                if i % 10 == 0 {
                    "{\"id\":1,\"bbox\":[10,20,24,31],\"centroid\":[17.0,25.5],\"area\":96,\"score\":0.9731}"
                } else {
                    ""
                }
            ))
        })
    });
    // A drift history line every 5 minutes, an alert a day, rejects.
    let mut history = String::new();
    for k in 0..(DAYS * 24 * 12) {
        let s = DriftSample {
            time: format_time(start + k * 300_000),
            model_version: version,
            model_hash: hash.clone(),
            frames: (k * 3000) as u64,
            statistics: [
                "pattern_psi",
                "leaf_psi",
                "objects_per_frame",
                "detected_share",
                "error_rate",
            ]
            .iter()
            .enumerate()
            .map(|(j, name)| SampleValue {
                statistic: name.to_string(),
                level: "ok".into(),
                value: 0.02 + 0.01 * ((k + j as i64) % 7) as f64,
                watch: if j < 2 { 0.1 } else { 20.0 },
                alert: if j < 2 { 0.25 } else { 40.0 },
            })
            .collect(),
        };
        history.push_str(&serde_json::to_string(&s).unwrap());
        history.push('\n');
    }
    std::fs::write(root.join("logs/drift.jsonl"), history).unwrap();
    let mut alerts = String::new();
    for d in 0..DAYS {
        alerts.push_str(&format!(
            "{{\"time\":\"{}\",\"monitor\":\"input\",\"statistic\":\"leaf_psi\",\"value\":0.31,\"thresholds\":{{\"watch\":0.1,\"alert\":0.25}},\"model_version\":{version},\"model_hash\":\"{hash}\",\"window\":50,\"state\":\"alert\",\"message\":\"alert: where the pixels of the last 50 frames go in the tree moved\"}}\n",
            format_time(start + d * 86_400_000 + 3_600_000)
        ));
    }
    std::fs::write(root.join("logs/alerts.jsonl"), alerts).unwrap();
    for k in 0..20 {
        std::fs::write(
            root.join(format!("rejected/bad-{k}.pbm.reason.txt")),
            format!(
                "{}\nbad-{k}.pbm: not a PBM or PNG file\n",
                format_time(start + k * 30_000_000)
            ),
        )
        .unwrap();
    }
    println!(
        "report box: {records} records ({:.2} GB) over {DAYS} days, {real} of them archived frames with 2 or more objects; written in {:.1} s",
        bytes as f64 / 1e9,
        t.elapsed().as_secs_f64()
    );
    let out = root.join("report.html");
    let from = format_time(start);
    let to = format_time(start + DAYS * 86_400_000);
    let mut times = Vec::new();
    let mut peak: f64 = 0.0;
    for _ in 0..3 {
        let (secs, mb) = run_watched(
            &root,
            &[
                "report",
                "--from",
                &from,
                "--to",
                &to,
                "--out",
                out.to_str().unwrap(),
            ],
        );
        times.push(secs);
        peak = peak.max(mb);
    }
    let html = std::fs::read_to_string(&out).unwrap();
    let drawn = html.matches("data:image/png;base64,").count();
    let med = percentile(&mut times.clone(), 0.5);
    println!(
        "report over {DAYS} days with {drawn} thumbnails: median {med:.2} s of {:?} ({:.2} million records/s); file {:.2} MB; peak RSS {peak:.1} MB",
        times.iter().map(|t| format!("{t:.2}")).collect::<Vec<_>>(),
        records as f64 / med / 1e6,
        html.len() as f64 / 1e6,
    );
    assert_eq!(drawn, 50, "every thumbnail is drawn");
    if std::env::var_os("BURLWATCH_BENCH_KEEP").is_some() {
        println!("kept {}", root.display());
    } else {
        let _ = std::fs::remove_dir_all(&root);
    }
}
