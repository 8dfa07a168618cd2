//! `burlwatch scan`: detects objects in frame files with the daemon's
//! per-frame step ([`Detector::process`]) and prints them, or the detection
//! log's JSON record of each frame. A bad file is named and skipped.

use std::path::PathBuf;
use std::time::{Instant, SystemTime};

use anyhow::Result;

use burlwatch::detect::compile::Scratch;
use burlwatch::detect::Detector;
use burlwatch::fileio::data;

use super::{load_model, ConfigArg, DecodeArgs, SettingArgs};

#[derive(clap::Args, Debug)]
pub struct ScanArgs {
    /// The model file.
    #[arg(long)]
    model: PathBuf,
    /// Frame files (PBM or PNG).
    #[arg(required = true)]
    frames: Vec<PathBuf>,
    /// One JSON record per frame (JSON Lines), as the detection log writes.
    #[arg(long)]
    json: bool,
    #[command(flatten)]
    settings: SettingArgs,
    #[command(flatten)]
    decode: DecodeArgs,
    #[command(flatten)]
    config: ConfigArg,
}

pub fn run(a: ScanArgs) -> Result<i32> {
    let cfg = a.config.load()?;
    let m = load_model(&a.model)?;
    let settings = a.settings.apply(&m, &cfg)?;
    let limits = a.decode.limits(&cfg);
    let detector = Detector::new(m, settings);
    let mut scratch = Scratch::default();
    let started = Instant::now();
    let mut clock = || (SystemTime::now(), started.elapsed().as_secs_f64());
    // A shell glob such as `*.pbm` also names the masks beside labelled
    // frames: they are not frames, so they are passed over, with one line.
    let (masks, frames): (Vec<&PathBuf>, Vec<&PathBuf>) = a.frames.iter().partition(|p| {
        p.file_name()
            .and_then(|n| n.to_str())
            .is_some_and(data::is_label_plane)
    });
    if !masks.is_empty() {
        eprintln!(
            "burlwatch: skipped {} label file(s) (names ending in {} or {}), which label frames and are not frames",
            masks.len(),
            data::MASK_SUFFIX,
            data::UNKNOWN_SUFFIX
        );
    }
    anyhow::ensure!(
        !frames.is_empty(),
        "no frame to scan: every file given is a mask ({}) or an unknown-pixel plane ({})",
        data::MASK_SUFFIX,
        data::UNKNOWN_SUFFIX
    );
    let mut failed = 0;
    for path in frames.iter().copied() {
        let bytes = match data::read_bounded(path, &limits) {
            Ok(b) => b,
            Err(e) => {
                eprintln!("burlwatch: error: {e}");
                failed += 1;
                continue;
            }
        };
        let name = path
            .file_name()
            .map(|n| n.to_string_lossy().into_owned())
            .unwrap_or_default();
        let rec = match detector.process(&name, &bytes, &limits, &mut scratch, &mut clock) {
            Ok(d) => d.record,
            Err(e) => {
                eprintln!("burlwatch: error: {}", e.with_path(path));
                failed += 1;
                continue;
            }
        };
        if a.json {
            out!("{}", serde_json::to_string(&rec)?);
        } else {
            out!(
                "{}  {}x{}  {} object(s)  {:.2} ms",
                path.display(),
                rec.width,
                rec.height,
                rec.objects.len(),
                rec.millis
            );
            for o in &rec.objects {
                out!(
                    "  #{:<3} box x {}..{} y {}..{}  area {:<5} centre ({:.1}, {:.1})  score {:.3}",
                    o.id,
                    o.bbox[0],
                    o.bbox[2],
                    o.bbox[1],
                    o.bbox[3],
                    o.area,
                    o.centroid[0],
                    o.centroid[1],
                    o.score
                );
            }
        }
    }
    if failed > 0 {
        eprintln!(
            "burlwatch: {failed} of {} frame(s) could not be read",
            frames.len()
        );
        return Ok(if failed == frames.len() {
            1
        } else {
            super::EXIT_SOME_BAD
        });
    }
    Ok(0)
}
