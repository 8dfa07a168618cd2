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
//! Environment: `BURLWATCH_BENCH_RECORDS` (default 26,000,000).

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
    std::fs::create_dir_all(logs).unwrap();
    let start = parse_time("2026-11-01T00:00:00.000Z").unwrap();
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
        let line = format!(
            "{{\"time\":\"{}\",\"frame\":\"loom-{i:09}.pbm\",\"sha256\":\"{i:064x}\",\"width\":256,\"height\":256,\"model_version\":3,\"model_hash\":\"0123456789ab\",\"millis\":{}.{:02},\"objects\":[{objects}]}}\n",
            format_time(t),
            1 + i % 3,
            i % 100
        );
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

fn main() {
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
