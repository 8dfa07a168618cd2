//! `burlwatch demo`: the real daemon at work on the demo frames in a
//! temporary folder, fed at a steady pace, with each record printed as it
//! is logged.

use std::collections::HashMap;
use std::io::{BufRead, BufReader, Seek, SeekFrom};
use std::path::{Path, PathBuf};
use std::sync::{Arc, Mutex};
use std::thread;
use std::time::{Duration, Instant};

use anyhow::{Context, Result};
use crossbeam_channel::unbounded;

use burlwatch::config;
use burlwatch::daemon::{self, detlog, Control};
use burlwatch::record::FrameRecord;
use burlwatch::synth::LoomParams;

use super::init_tracing;

#[derive(clap::Args, Debug)]
pub struct DemoArgs {
    /// Frames fed to the daemon (their masks are not used) [default:
    /// demo-frames/test, or the same frames made by the loom generator
    /// when that folder is not here].
    #[arg(long)]
    frames: Option<PathBuf>,
    /// Labelled frames the demo model is trained from [default:
    /// demo-frames/train, or made by the loom generator likewise].
    #[arg(long)]
    seed_data: Option<PathBuf>,
    /// Frames per second dropped into the inbox.
    #[arg(long, default_value_t = 10.0)]
    rate: f64,
    /// Keep the demo's folders here instead of a temporary folder.
    #[arg(long)]
    keep: Option<PathBuf>,
}

/// `burlwatch demo`: the real daemon on a temporary folder, fed the demo
/// frames at a steady pace.
pub fn run(a: DemoArgs) -> Result<i32> {
    // Rejects are reported after the frame lines, from their reason files,
    // so the daemon's own warnings would only interleave with them.
    init_tracing("error");
    let root = match &a.keep {
        Some(p) => {
            anyhow::ensure!(
                !p.exists() || p.is_dir(),
                "--keep {}: not a folder",
                p.display()
            );
            // An earlier run's folders would be replayed and miscounted.
            let used = std::fs::read_dir(p).is_ok_and(|mut d| d.next().is_some());
            anyhow::ensure!(
                !used,
                "--keep {}: the folder is not empty (an earlier demo's?); give a new or empty folder",
                p.display()
            );
            p.clone()
        }
        None => std::env::temp_dir().join(format!("burlwatch-demo-{}", std::process::id())),
    };
    // The committed demo frames, or the same frames made afresh (the
    // README's `generate` commands), so the demo runs from any folder.
    let committed = |d: &str| Path::new("demo-frames").join(d);
    let have_committed = committed("test").is_dir() && committed("train").is_dir();
    let pick = |given: &Option<PathBuf>, d: &str| -> Option<PathBuf> {
        given
            .clone()
            .or_else(|| have_committed.then(|| committed(d)))
    };
    let (mut frames, mut seed_data) = (pick(&a.frames, "test"), pick(&a.seed_data, "train"));
    if frames.is_none() || seed_data.is_none() {
        out!("no demo-frames/ folder here: making the demo frames with the loom generator...");
        let p = LoomParams::standard();
        if seed_data.is_none() {
            let dir = root.join("made/train");
            super::generate::write_set(&dir, "standard", &p, 1, 120, false)?;
            seed_data = Some(dir);
        }
        if frames.is_none() {
            let dir = root.join("made/test");
            super::generate::write_set(&dir, "standard", &p, 2, 30, false)?;
            frames = Some(dir);
        }
    }
    let (frames, seed_data) = (frames.expect("set above"), seed_data.expect("set above"));
    let mut names: Vec<PathBuf> = std::fs::read_dir(&frames)
        .with_context(|| format!("cannot read {}", frames.display()))?
        .filter_map(|e| e.ok().map(|e| e.path()))
        .filter(|p| {
            p.file_name().and_then(|n| n.to_str()).is_some_and(|n| {
                !n.ends_with(burlwatch::fileio::data::MASK_SUFFIX)
                    && (n.ends_with(".pbm") || n.ends_with(".png"))
            })
        })
        .collect();
    names.sort();
    anyhow::ensure!(!names.is_empty(), "no frames in {}", frames.display());
    anyhow::ensure!(
        a.rate > 0.0 && a.rate <= 1000.0,
        "--rate must be in (0, 1000]"
    );
    let text = format!(
        "[folders]\ninbox = {:?}\narchive = {:?}\nrejected = {:?}\ncorrections = {:?}\nstate = {:?}\nlogs = {:?}\n\
         [training]\nseed_data = {:?}\n[watch]\nsettle_millis = 100\nrescan_seconds = 1.0\n[log]\nsync = \"batch\"\nsync_millis = 20\nlevel = \"warn\"\n",
        root.join("inbox"), root.join("archive"), root.join("rejected"), root.join("corrections"),
        root.join("state"), root.join("logs"), seed_data
    );
    std::fs::create_dir_all(&root)?;
    std::fs::write(root.join("burlwatch.toml"), &text)?;
    let cfg = config::from_str(&text).map_err(|e| anyhow::anyhow!("{e}"))?;
    out!("burlwatch demo in {}", root.display());
    out!(
        "training the demo model from {} (a few seconds)...",
        seed_data.display()
    );
    let (tx, rx) = unbounded();
    let (ready_tx, ready_rx) = unbounded();
    let daemon_cfg = cfg.clone();
    let daemon = thread::spawn(move || {
        daemon::run(daemon_cfg, rx, &mut |s| {
            if s == daemon::Status::Ready {
                let _ = ready_tx.send(());
            }
        })
    });
    if ready_rx.recv().is_err() {
        let e = daemon.join().expect("daemon thread");
        anyhow::bail!(
            "the daemon did not start: {}",
            e.err().map(|e| e.to_string()).unwrap_or_default()
        );
    }
    out!(
        "daemon ready; dropping {} frames at {} per second, plus one damaged file",
        names.len(),
        a.rate
    );
    let width = names
        .iter()
        .filter_map(|p| p.file_name().map(|n| n.len()))
        .max()
        .unwrap_or(5);
    out!(
        "{:<13}  {:<width$}  {:>8}  objects (id at centre x,y, area)",
        "time (UTC)",
        "frame",
        "detect"
    );
    // Feeder: write to a temporary name, then rename into the inbox.
    let sent: Arc<Mutex<HashMap<String, Instant>>> = Arc::default();
    let feeder = {
        let (sent, inbox, period) = (
            sent.clone(),
            cfg.start.folders.inbox.clone(),
            Duration::from_secs_f64(1.0 / a.rate),
        );
        let names = names.clone();
        thread::spawn(move || -> std::io::Result<()> {
            let start = Instant::now();
            for (k, p) in names.iter().enumerate() {
                let name = p.file_name().expect("file").to_string_lossy().into_owned();
                let tmp = inbox.join(format!(".{name}.tmp"));
                std::fs::copy(p, &tmp)?;
                sent.lock()
                    .expect("lock")
                    .insert(name.clone(), Instant::now());
                std::fs::rename(&tmp, inbox.join(&name))?;
                if k == names.len() / 2 {
                    std::fs::write(inbox.join("damaged-frame.pbm"), b"P4\n64 64\n\x00\x01")?;
                }
                let due = start + period * (k as u32 + 1);
                thread::sleep(due.saturating_duration_since(Instant::now()));
            }
            Ok(())
        })
    };
    // Follow the log as records appear.
    let log_path = cfg.start.folders.logs.join(detlog::CURRENT);
    let mut pos = 0u64;
    let mut latencies: Vec<f64> = Vec::new();
    let (mut objects, mut seen) = (0usize, 0usize);
    let deadline = Instant::now() + Duration::from_secs_f64(names.len() as f64 / a.rate + 20.0);
    while seen < names.len() && Instant::now() < deadline {
        thread::sleep(Duration::from_millis(5));
        let Ok(mut f) = std::fs::File::open(&log_path) else {
            continue;
        };
        f.seek(SeekFrom::Start(pos))?;
        let mut reader = BufReader::new(f);
        let mut line = String::new();
        while reader.read_line(&mut line)? > 0 {
            if !line.ends_with('\n') {
                break;
            }
            pos += line.len() as u64;
            let rec: FrameRecord = serde_json::from_str(&line)?;
            if let Some(t) = sent.lock().expect("lock").get(&rec.frame) {
                latencies.push(t.elapsed().as_secs_f64() * 1e3);
            }
            seen += 1;
            objects += rec.objects.len();
            let what: Vec<String> = rec
                .objects
                .iter()
                .map(|o| {
                    format!(
                        "#{} at ({:.0},{:.0}) {} px",
                        o.id, o.centroid[0], o.centroid[1], o.area
                    )
                })
                .collect();
            out!(
                "{:<13}  {:<width$}  {:>5.1} ms  {}",
                &rec.time[11..],
                rec.frame,
                rec.millis,
                if what.is_empty() {
                    "clear".to_string()
                } else {
                    what.join(", ")
                }
            );
            line.clear();
        }
    }
    feeder.join().expect("feeder thread")?;
    // Give the damaged file its moment, then stop.
    let reject_deadline = Instant::now() + Duration::from_secs(3);
    while std::fs::read_dir(&cfg.start.folders.rejected)
        .map(|d| d.count())
        .unwrap_or(0)
        == 0
        && Instant::now() < reject_deadline
    {
        thread::sleep(Duration::from_millis(20));
    }
    let _ = tx.send(Control::Stop);
    let summary = daemon
        .join()
        .expect("daemon thread")
        .map_err(|e| anyhow::anyhow!("{e}"))?;
    latencies.sort_by(f64::total_cmp);
    let pct = |q: f64| {
        latencies
            .get(((latencies.len() as f64 - 1.0) * q).round() as usize)
            .copied()
            .unwrap_or(0.0)
    };
    out!(
        "done: {} frames logged, {} objects, {} rejected, latency from drop to logged record \
         p50 {:.1} ms, p99 {:.1} ms",
        summary.logged,
        objects,
        summary.rejected,
        pct(0.5),
        pct(0.99)
    );
    // Why each reject was refused, from its reason file.
    let mut reasons: Vec<PathBuf> = std::fs::read_dir(&cfg.start.folders.rejected)
        .map(|d| d.filter_map(|e| e.ok().map(|e| e.path())).collect())
        .unwrap_or_default();
    reasons.retain(|p| p.to_string_lossy().ends_with(".reason.txt"));
    reasons.sort();
    for r in reasons {
        let text = std::fs::read_to_string(&r).unwrap_or_default();
        out!(
            "rejected (moved to {}): {}",
            cfg.start.folders.rejected.display(),
            text.lines().nth(1).unwrap_or("(no reason recorded)")
        );
    }
    match &a.keep {
        Some(dir) => out!("the demo's folders are kept in {}", dir.display()),
        None => out!("(run with --keep DIR to keep the log, archive and rejects)"),
    }
    if a.keep.is_none() {
        let _ = std::fs::remove_dir_all(&root);
    }
    Ok(if seen == names.len() { 0 } else { 1 })
}
