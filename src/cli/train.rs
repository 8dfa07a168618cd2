//! `burlwatch train`: learns a model from a folder of frames and masks
//! and writes it whole (a reader never sees half a model), with a summary
//! of the data, the tree and the held-out scores.

use std::path::PathBuf;
use std::time::Instant;

use anyhow::{bail, Context, Result};
use serde::Serialize;

use burlwatch::fileio::durable;
use burlwatch::learn::symmetry::Symmetry;
use burlwatch::learn::{self, ClassWeight, Criterion, Stage, TrainParams};
use burlwatch::model;
use burlwatch::window::Window;

use super::progress::Progress;
use super::{read_data, ConfigArg, DecodeArgs, SettingArgs};

#[derive(clap::Args, Debug)]
pub struct TrainArgs {
    /// Folder of NAME.pbm / NAME.png frames with NAME.mask.pbm masks
    /// [default: training.seed_data of the configuration].
    #[arg(long)]
    data: Option<PathBuf>,
    /// Where to write the model (JSON).
    #[arg(long)]
    out: PathBuf,
    /// Replace the model at --out if there is one.
    #[arg(long)]
    force: bool,
    /// Split criterion: gini, entropy or gain-ratio [default: entropy].
    #[arg(long)]
    criterion: Option<String>,
    /// Deepest level of splits, the root being depth 0 [default: 48].
    #[arg(long)]
    max_depth: Option<u32>,
    /// Least weighted pixel count on each side of a split [default: 1].
    #[arg(long)]
    min_leaf: Option<f64>,
    /// Least decrease of the tree's weighted impurity for a split [default: 0].
    #[arg(long)]
    min_gain: Option<f64>,
    /// Window side in pixels: 3, 5, 7, 9 or 11 [default: 11].
    #[arg(long)]
    window: Option<u8>,
    /// Class weights: none, balanced, or CLEAR:TARGET such as 1:50 [default: balanced].
    #[arg(long)]
    class_weight: Option<String>,
    /// Share of frames held out to choose pruning, threshold and grouping [default: 0.2].
    #[arg(long)]
    holdout: Option<f64>,
    /// Cross-fitted tuning over this many shares of the frames (0: tune on
    /// the holdout share) [default: 3].
    #[arg(long)]
    folds: Option<usize>,
    /// Let tuning try smoothing the detection mask by neighbourhood votes
    /// (kept only when it wins on the held-out frames).
    #[arg(long)]
    smoothing: bool,
    /// The fabric's symmetries, to take every frame also mirrored and
    /// turned: none, mirrors (warp and weft differ) or square (alike); or
    /// choose, to train under each and keep the one the held-out frames
    /// favour (13 to 20 times the training) [default: none].
    #[arg(long, value_parser = parse_symmetry)]
    symmetry: Option<(Symmetry, bool)>,
    /// Most memory growing the trees may take, in MiB: over it for two
    /// trees at once they grow one at a time, and over it for one training
    /// stops before growing [default: training.memory_mb, 2048].
    #[arg(long, value_parser = parse_memory_mb)]
    memory_mb: Option<u64>,
    /// Grow the final tree again on all frames once the holdout has chosen.
    #[arg(long)]
    refit: bool,
    /// Skip bad frame/mask pairs with a warning instead of failing.
    #[arg(long)]
    skip_bad: bool,
    /// Print the training summary as JSON.
    #[arg(long)]
    json: bool,
    #[command(flatten)]
    settings: SettingArgs,
    #[command(flatten)]
    decode: DecodeArgs,
    #[command(flatten)]
    config: ConfigArg,
}

#[derive(Serialize)]
struct TrainSummary<'a> {
    model: String,
    seconds: f64,
    skipped: usize,
    frames: u64,
    holdout_frames: u64,
    pixels: u64,
    unique_patterns: u64,
    grown_leaves: u64,
    leaves: u64,
    depth: u32,
    threshold: f64,
    min_area: u32,
    merge_distance: u32,
    smoothing: model::Smoothing,
    /// The size rule's trade, when it kept a smaller tree.
    smaller: Option<model::SizeTrade>,
    /// The symmetry trained under, when one was.
    #[serde(skip_serializing_if = "Option::is_none")]
    symmetry: Option<String>,
    /// The symmetries tried, when training chose.
    #[serde(skip_serializing_if = "<[_]>::is_empty")]
    symmetry_tried: &'a [model::SymmetryTried],
    /// The trees grew one at a time to stay within the memory limit.
    one_at_a_time: bool,
    holdout: &'a Option<model::HoldoutMetrics>,
}

pub fn run(a: TrainArgs) -> Result<i32> {
    let started = Instant::now();
    let cfg = a.config.load()?;
    let base = &cfg.live.training;
    let window = match a.window {
        None => base.window,
        Some(w) => {
            Window::new(w).with_context(|| format!("--window {w} must be one of 3, 5, 7, 9, 11"))?
        }
    };
    let criterion = match &a.criterion {
        None => base.criterion,
        Some(c) => Criterion::parse(c)
            .with_context(|| format!("--criterion {c:?} must be gini, entropy or gain-ratio"))?,
    };
    let class_weight = match &a.class_weight {
        None => base.class_weight,
        Some(c) => ClassWeight::parse(c).with_context(|| {
            format!("--class-weight {c:?} must be none, balanced or CLEAR:TARGET with two positive numbers")
        })?,
    };
    // Settings fixed instead of tuned: options over `[detection]`.
    let fixed = a.settings.overrides().over(cfg.live.overrides);
    let params = TrainParams {
        window,
        criterion,
        max_depth: a.max_depth.unwrap_or(base.max_depth),
        min_leaf: a.min_leaf.unwrap_or(base.min_leaf),
        min_gain: a.min_gain.unwrap_or(base.min_gain),
        class_weight,
        holdout: a.holdout.unwrap_or(base.holdout),
        refit: a.refit || base.refit,
        folds: a.folds.unwrap_or(base.folds),
        smoothing: a.smoothing || base.smoothing,
        symmetry: a.symmetry.map_or(base.symmetry, |s| s.0),
        choose_symmetry: a.symmetry.map_or(base.choose_symmetry, |s| s.1),
        memory_limit: a.memory_mb.map(|m| m << 20).or(base.memory_limit),
        threshold: fixed.threshold,
        min_area: fixed.min_area,
        merge_distance: fixed.merge_distance,
        ..base.clone()
    };
    params.validate().context("bad training option")?;
    if a.out.is_dir() {
        bail!(
            "--out {} is a folder; give the model file's path",
            a.out.display()
        );
    }
    if a.out.exists() && !a.force {
        bail!(
            "--out {} exists; pass --force to replace it (or give another path)",
            a.out.display()
        );
    }
    let data_dir = a
        .data
        .clone()
        .or_else(|| cfg.live.seed_data.clone())
        .context("no data folder: pass --data DIR or set training.seed_data in --config")?;
    let (folder, skipped) = read_data(&data_dir, &a.decode.limits(&cfg), a.skip_bad)?;
    let mut bar = Progress::new(folder.frames.len(), 10);
    let mut one_at_a_time = None;
    let m = learn::train(&folder.frames, &params, &mut |s| match s {
        Stage::Store { done, total } => {
            bar.set_label("building label store");
            bar.update(done, total)
        }
        Stage::Grow => bar.stage("growing tree"),
        Stage::OneAtATime { limit } => one_at_a_time = Some(limit),
        Stage::Prune => bar.stage("pruning"),
        Stage::Tune => bar.stage("choosing threshold and grouping on held-out frames"),
        Stage::Symmetry(s) => bar.stage(&format!("training under symmetry {}", s.name())),
    })
    .with_context(|| format!("training on {} failed", data_dir.display()))?;
    bar.finish();
    durable::write_atomic(&a.out, m.to_json().as_bytes())
        .with_context(|| format!("cannot write {}", a.out.display()))?;
    if !m.training.tuned {
        let why = if m.data.holdout_frames == 0 {
            "no frame was held out (--folds 0 with --holdout 0, or too few frames)".to_string()
        } else {
            format!(
                "no pixel of the {} held-out frame(s) scored above 0",
                m.data.holdout_frames
            )
        };
        eprintln!(
            "burlwatch: warning: {why}; the tree is unpruned and uses threshold {}, min_area {}, \
             merge_distance {} instead of settings chosen on held-out frames",
            m.threshold, m.grouping.min_area, m.grouping.merge_distance
        );
    }
    let seconds = started.elapsed().as_secs_f64();
    if a.json {
        let s = TrainSummary {
            model: a.out.display().to_string(),
            seconds,
            skipped,
            frames: m.data.frames,
            holdout_frames: m.data.holdout_frames,
            pixels: m.data.pixels,
            unique_patterns: m.data.unique_patterns,
            grown_leaves: m.training.grown_leaves,
            leaves: m.training.pruned_leaves,
            depth: m.tree.depth(),
            threshold: m.threshold,
            min_area: m.grouping.min_area,
            merge_distance: m.grouping.merge_distance,
            smoothing: m.smoothing,
            smaller: m.training.smaller,
            symmetry: m.training.symmetry.clone(),
            symmetry_tried: &m.training.symmetry_tried,
            one_at_a_time: one_at_a_time.is_some(),
            holdout: &m.holdout,
        };
        out!("{}", serde_json::to_string_pretty(&s)?);
    } else {
        let held = if m.training.folds > 0 {
            format!(
                "each held out once, over {} shares, to choose the settings",
                m.training.folds
            )
        } else {
            format!("{} held out", m.data.holdout_frames)
        };
        let transforms = if m.training.symmetry.is_some() {
            " (with their transforms)"
        } else {
            ""
        };
        out!(
            "trained on {} frames ({held}), {} pixels, {} distinct patterns{transforms}",
            m.data.frames,
            m.data.pixels,
            m.data.unique_patterns
        );
        if let Some(s) = &m.training.symmetry {
            out!("symmetry: {s} (every frame also taken mirrored and turned)");
        }
        if !m.training.symmetry_tried.is_empty() {
            let best = m
                .training
                .symmetry_tried
                .iter()
                .filter_map(|t| t.object_f1)
                .fold(f64::MIN, f64::max);
            let each: Vec<String> = m
                .training
                .symmetry_tried
                .iter()
                .map(|t| match (t.object_f1, &t.passed_over) {
                    (Some(f), _) => format!(
                        "{} {f:.3}{}{}",
                        t.symmetry,
                        match t.object_f1_se {
                            _ if f == best => " (best)".to_string(),
                            Some(se) => format!(" (se of the difference {se:.3})"),
                            None => String::new(),
                        },
                        if t.kept { ", kept" } else { "" }
                    ),
                    (None, Some(why)) => format!("{} not trained: {why}", t.symmetry),
                    (None, None) => format!("{} not trained", t.symmetry),
                })
                .collect();
            out!(
                "symmetry chosen on the held-out frames as they are (object F1; the cheapest within \
                 one standard error of the best is kept): {}",
                each.join("; ")
            );
        }
        if let Some(limit) = one_at_a_time {
            out!(
                "memory: the trees grew one at a time, since two at once could need more than \
                 the limit of {} MiB (--memory-mb, training.memory_mb)",
                limit >> 20
            );
        }
        out!(
            "tree: {} leaves grown, {} kept after pruning (alpha {:.3e}), depth {}",
            m.training.grown_leaves,
            m.training.pruned_leaves,
            m.training.pruning_alpha,
            m.tree.depth()
        );
        out!(
            "settings: threshold {:.4}, min_area {}, merge_distance {}, smoothing {}",
            m.threshold,
            m.grouping.min_area,
            m.grouping.merge_distance,
            m.smoothing.name()
        );
        if let Some(t) = &m.training.smaller {
            out!(
                "size rule: kept {} leaves over the best candidate's {} (held-out object F1 {:.3}, \
                 within one standard error, {:.3})",
                m.training.pruned_leaves,
                t.best_leaves,
                t.best_object_f1,
                t.object_f1_se
            );
        }
        match &m.holdout {
            Some(h) => out!(
                "held-out frames: objects P {:.3} R {:.3} F1 {:.3}; pixels P {:.3} R {:.3} F1 {:.3}",
                h.object.precision,
                h.object.recall,
                h.object.f1,
                h.pixel.precision,
                h.pixel.recall,
                h.pixel.f1
            ),
            None => out!("held-out frames: none (pruning and tuning skipped)"),
        }
        if skipped > 0 {
            out!("skipped {skipped} bad file(s)");
        }
        out!("wrote {} in {seconds:.2} s", a.out.display());
    }
    Ok(if skipped > 0 { super::EXIT_SOME_BAD } else { 0 })
}

fn parse_memory_mb(s: &str) -> std::result::Result<u64, String> {
    use burlwatch::config::raw::{MAX_MEMORY_MB, MIN_MEMORY_MB};
    match s.parse::<u64>() {
        Ok(m) if (MIN_MEMORY_MB..=MAX_MEMORY_MB).contains(&m) => Ok(m),
        _ => Err(format!(
            "{s:?} is not a whole number of MiB from {MIN_MEMORY_MB} to {MAX_MEMORY_MB}"
        )),
    }
}

fn parse_symmetry(s: &str) -> std::result::Result<(Symmetry, bool), String> {
    Symmetry::parse_setting(s)
        .ok_or_else(|| format!("{s:?} is not none, mirrors, square or choose"))
}
