//! `burlwatch eval`: scores a model on a folder of frames and masks with
//! [`score::score_frames`] and prints what it returns: pixel and object
//! precision, recall and F1, optionally per frame.

use std::path::PathBuf;

use anyhow::{Context, Result};
use serde::Serialize;

use burlwatch::detect::Detector;
use burlwatch::score::{self, Confusion};

use super::progress::Progress;
use super::{load_model, read_data, ConfigArg, DecodeArgs, SettingArgs};

#[derive(clap::Args, Debug)]
pub struct EvalArgs {
    /// Folder of frames with masks.
    #[arg(long)]
    data: PathBuf,
    /// The model file.
    #[arg(long)]
    model: PathBuf,
    /// Print the scores as JSON.
    #[arg(long)]
    json: bool,
    /// Also list every frame's scores.
    #[arg(long)]
    per_frame: bool,
    /// Score the good pairs even if some pairs are bad.
    #[arg(long)]
    skip_bad: bool,
    #[command(flatten)]
    settings: SettingArgs,
    #[command(flatten)]
    decode: DecodeArgs,
    #[command(flatten)]
    config: ConfigArg,
}

/// One level's counts and ratios in `eval --json`.
#[derive(Serialize)]
struct Level {
    tp: u64,
    fp: u64,
    #[serde(rename = "fn")]
    fn_: u64,
    #[serde(skip_serializing_if = "Option::is_none")]
    tn: Option<u64>,
    precision: f64,
    recall: f64,
    f1: f64,
}

impl Level {
    fn of(c: &Confusion, with_tn: bool) -> Level {
        Level {
            tp: c.tp,
            fp: c.fp,
            fn_: c.fn_,
            tn: with_tn.then_some(c.tn),
            precision: c.precision(),
            recall: c.recall(),
            f1: c.f1(),
        }
    }
}

/// One frame's line of `eval --json --per-frame`.
#[derive(Serialize)]
struct FrameScore {
    frame: String,
    pixel: Level,
    object: Level,
}

/// What `eval --json` prints.
#[derive(Serialize)]
struct EvalReport {
    model_version: u64,
    frames: usize,
    skipped: usize,
    threshold: f64,
    min_area: u32,
    merge_distance: u32,
    pixel: Level,
    object: Level,
    #[serde(skip_serializing_if = "Vec::is_empty")]
    per_frame: Vec<FrameScore>,
}

pub fn run(a: EvalArgs) -> Result<i32> {
    let cfg = a.config.load()?;
    let m = load_model(&a.model)?;
    let settings = a.settings.apply(&m, &cfg)?;
    let (folder, skipped) = read_data(&a.data, &a.decode.limits(&cfg), a.skip_bad)?;
    let detector = Detector::new(m, settings);
    let mut bar = Progress::new(folder.frames.len(), 20);
    bar.set_label("scoring frames");
    let scored = score::score_frames(
        &detector,
        &folder.frames,
        a.per_frame,
        &mut |done, total| bar.update(done, total),
    )
    .with_context(|| format!("cannot score {}", a.data.display()))?;
    bar.finish();
    let report = EvalReport {
        model_version: detector.version(),
        frames: scored.frames,
        skipped,
        threshold: settings.threshold,
        min_area: settings.grouping.min_area,
        merge_distance: settings.grouping.merge_distance,
        pixel: Level::of(&scored.total.pixel, true),
        object: Level::of(&scored.total.object, false),
        per_frame: scored
            .per_frame
            .iter()
            .map(|f| FrameScore {
                frame: f.name.clone(),
                pixel: Level::of(&f.scores.pixel, true),
                object: Level::of(&f.scores.object, false),
            })
            .collect(),
    };
    if a.json {
        out!("{}", serde_json::to_string_pretty(&report)?);
    } else {
        out!(
            "{} frames, threshold {:.4}, min_area {}, merge_distance {}",
            report.frames,
            report.threshold,
            report.min_area,
            report.merge_distance
        );
        out!(
            "{:<8} {:>9} {:>7} {:>7} {:>9} {:>9} {:>9} {:>11}",
            "level",
            "precision",
            "recall",
            "F1",
            "TP",
            "FP",
            "FN",
            "TN"
        );
        let line = |name: &str, l: &Level| -> Result<()> {
            out!(
                "{:<8} {:>9.4} {:>7.4} {:>7.4} {:>9} {:>9} {:>9} {:>11}",
                name,
                l.precision,
                l.recall,
                l.f1,
                l.tp,
                l.fp,
                l.fn_,
                l.tn.map_or("-".to_string(), |t| t.to_string())
            );
            Ok(())
        };
        line("pixels", &report.pixel)?;
        line("objects", &report.object)?;
        if !report.per_frame.is_empty() {
            out!();
            out!(
                "{:<24} {:>8} {:>8} {:>6} {:>6} {:>6}",
                "frame",
                "pixel F1",
                "obj F1",
                "obj TP",
                "obj FP",
                "obj FN"
            );
            for f in &report.per_frame {
                out!(
                    "{:<24} {:>8.3} {:>8.3} {:>6} {:>6} {:>6}",
                    f.frame,
                    f.pixel.f1,
                    f.object.f1,
                    f.object.tp,
                    f.object.fp,
                    f.object.fn_
                );
            }
        }
        out!("(objects match at bounding-box IoU >= 0.5, one to one)");
        if skipped > 0 {
            out!("skipped {skipped} bad file(s)");
        }
    }
    Ok(if skipped > 0 { super::EXIT_SOME_BAD } else { 0 })
}
