//! Command-line glue: argument definitions and the offline commands
//! (`train`, `scan`, `eval`, `rules`, `generate`). Each command parses its
//! options into library types, calls the library, and prints either a
//! human-readable table (default) or JSON (`--json`). Errors go to stderr.
//!
//! Exit codes: 0 success; 1 the command failed; 2 it finished but some input
//! files were bad (each named on stderr).

/// `println!` that ends the program quietly when stdout is closed early
/// (`burlwatch rules ... | head`) and reports other write errors.
macro_rules! out {
    ($($t:tt)*) => {{
        use std::io::Write as _;
        if let Err(e) = writeln!(std::io::stdout(), $($t)*) {
            if e.kind() == std::io::ErrorKind::BrokenPipe {
                std::process::exit(0);
            }
            return Err(anyhow::Error::from(e).context("cannot write to standard output"));
        }
    }};
}

mod bench;
mod daemon;
mod notify;
mod progress;

use std::path::{Path, PathBuf};
use std::time::{Instant, SystemTime};

use anyhow::{bail, Context, Result};
use clap::{Parser, Subcommand};
use serde::Serialize;

use burlwatch::codec::DecodeLimits;
use burlwatch::config::{self, Config};
use burlwatch::detect::compile::{self, Program, Scratch};
use burlwatch::detect::Detector;
use burlwatch::detect::{Overrides, Settings};
use burlwatch::fileio::data;
use burlwatch::learn::{self, ClassWeight, Criterion, Stage, TrainParams};
use burlwatch::model;
use burlwatch::model::{Model, Node};
use burlwatch::score::{self, Confusion, Scores};
use burlwatch::synth::{self, LoomParams};
use burlwatch::window::Window;

use progress::Progress;

#[derive(Parser, Debug)]
#[command(
    name = "burlwatch",
    version,
    about = "Finds defects in binarized camera frames with a compiled decision tree over pixel neighbourhoods."
)]
pub struct Args {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand, Debug)]
enum Command {
    /// Learn a model from a folder of frames and masks.
    Train(TrainArgs),
    /// Detect objects in frame files.
    Scan(ScanArgs),
    /// Score a model on a folder of frames and masks.
    Eval(EvalArgs),
    /// Print a model's tree as if/then rules.
    Rules(RulesArgs),
    /// Write seeded synthetic loom frames with their masks.
    Generate(GenerateArgs),
    /// Measure how fast this box runs a model (one thread).
    Bench(bench::BenchArgs),
    /// Run the detector unattended: watch the inbox, log every frame.
    Run(daemon::RunArgs),
    /// Check a configuration, its folders and its model; start nothing.
    Check(daemon::CheckArgs),
    /// Show the daemon at work on the demo frames, in a temporary folder.
    Demo(daemon::DemoArgs),
}

/// Frame decoding options shared by the commands that read frames.
#[derive(clap::Args, Debug, Clone)]
struct DecodeArgs {
    /// Largest frame width accepted, in pixels [default: 8192].
    #[arg(long)]
    max_width: Option<usize>,
    /// Largest frame height accepted, in pixels [default: 8192].
    #[arg(long)]
    max_height: Option<usize>,
    /// PNG: pixels with 8-bit luma below this are set (ink) [default: 128].
    #[arg(long)]
    png_threshold: Option<u8>,
    /// PNG: set the light pixels instead of the dark ones.
    #[arg(long)]
    png_invert: bool,
}

impl DecodeArgs {
    fn limits(&self, cfg: &Config) -> DecodeLimits {
        let d = &cfg.live.limits;
        DecodeLimits {
            max_width: self.max_width.unwrap_or(d.max_width),
            max_height: self.max_height.unwrap_or(d.max_height),
            png_threshold: self.png_threshold.unwrap_or(d.png_threshold),
            png_invert: self.png_invert || d.png_invert,
        }
    }
}

/// The configuration file option shared by the commands.
#[derive(clap::Args, Debug, Clone)]
struct ConfigArg {
    /// Configuration file (TOML); options on the command line win over it.
    #[arg(long)]
    config: Option<PathBuf>,
}

impl ConfigArg {
    fn load(&self) -> Result<Config> {
        match &self.config {
            None => Ok(Config::default()),
            Some(p) => config::load(p).map_err(|e| anyhow::anyhow!("{e}")),
        }
    }
}

/// Overrides of the settings a model carries.
#[derive(clap::Args, Debug, Clone)]
struct SettingArgs {
    /// Score a pixel must reach to be a detection (default: the model's).
    #[arg(long)]
    threshold: Option<f64>,
    /// Drop objects with fewer pixels (default: the model's).
    #[arg(long)]
    min_area: Option<u32>,
    /// Merge objects separated by at most this many clear pixels (default: the model's).
    #[arg(long)]
    merge_distance: Option<u32>,
}

impl SettingArgs {
    /// The options as overrides (they win over the configuration's).
    fn overrides(&self) -> Overrides {
        Overrides {
            threshold: self.threshold,
            min_area: self.min_area,
            merge_distance: self.merge_distance,
        }
    }

    /// The settings in force for `m`: these options, then the
    /// configuration's `[detection]` keys, then the model's own.
    fn apply(&self, m: &Model, cfg: &Config) -> Result<Settings> {
        self.overrides()
            .over(cfg.live.overrides)
            .settings_for(m.settings())
            .map_err(|e| {
                anyhow::anyhow!(
                    "{} (from --threshold, --min-area, --merge-distance or [detection])",
                    e.kind()
                )
            })
    }
}

#[derive(clap::Args, Debug)]
struct TrainArgs {
    /// Folder of NAME.pbm / NAME.png frames with NAME.mask.pbm masks
    /// [default: training.seed_data of the configuration].
    #[arg(long)]
    data: Option<PathBuf>,
    /// Where to write the model (JSON).
    #[arg(long)]
    out: PathBuf,
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

#[derive(clap::Args, Debug)]
struct ScanArgs {
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

#[derive(clap::Args, Debug)]
struct EvalArgs {
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

#[derive(clap::Args, Debug)]
struct RulesArgs {
    /// The model file.
    #[arg(long)]
    model: PathBuf,
    /// Print the rules as JSON.
    #[arg(long)]
    json: bool,
}

#[derive(clap::Args, Debug)]
struct GenerateArgs {
    /// Folder to write into (created if missing).
    #[arg(long)]
    out: PathBuf,
    /// Number of frames.
    #[arg(long, default_value_t = 30)]
    count: usize,
    /// Seed: the same seed and preset always give the same frames.
    #[arg(long, default_value_t = 1)]
    seed: u64,
    /// Loom setting: standard, alternate or drifted.
    #[arg(long, default_value = "standard")]
    preset: String,
    /// Frame width in pixels (default: the preset's).
    #[arg(long)]
    width: Option<usize>,
    /// Frame height in pixels (default: the preset's).
    #[arg(long)]
    height: Option<usize>,
    /// Share of pixels flipped by camera noise (default: the preset's).
    #[arg(long)]
    noise: Option<f64>,
    /// Write frames as PNG instead of PBM (masks stay PBM).
    #[arg(long)]
    png: bool,
}

pub fn run(args: Args) -> Result<i32> {
    match args.command {
        Command::Train(a) => train(a),
        Command::Scan(a) => scan(a),
        Command::Eval(a) => eval(a),
        Command::Rules(a) => rules(a),
        Command::Generate(a) => generate(a),
        Command::Bench(a) => bench::bench(a),
        Command::Run(a) => daemon::run(a),
        Command::Check(a) => daemon::check(a),
        Command::Demo(a) => daemon::demo(a),
    }
}

fn load_model(path: &Path) -> Result<Model> {
    let text = std::fs::read_to_string(path)
        .with_context(|| format!("cannot read model {}", path.display()))?;
    Model::from_json(&text).map_err(|e| anyhow::anyhow!("{}: {e}", path.display()))
}

/// Reads a data folder, reporting bad pairs; fails on them unless `skip_bad`.
fn read_data(dir: &Path, limits: &DecodeLimits, skip_bad: bool) -> Result<(data::Folder, usize)> {
    let mut bar = Progress::new(usize::MAX, 0);
    let mut first = true;
    let folder = data::read_folder(dir, limits, &mut |done, total| {
        if first {
            bar = Progress::new(total, 20);
            bar.set_label("reading frames");
            first = false;
        }
        bar.update(done, total);
    })
    .with_context(|| format!("cannot read data folder {}", dir.display()))?;
    bar.finish();
    let bad = folder.problems.len();
    for p in &folder.problems {
        if skip_bad {
            eprintln!("burlwatch: warning: skipped {p}");
        } else {
            eprintln!("burlwatch: error: {p}");
        }
    }
    if bad > 0 && !skip_bad {
        bail!(
            "{bad} bad file(s) in {}; fix them or pass --skip-bad",
            dir.display()
        );
    }
    if folder.frames.is_empty() {
        bail!("no usable frame/mask pairs in {}", dir.display());
    }
    Ok((folder, bad))
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
    holdout: &'a Option<model::HoldoutMetrics>,
}

fn train(a: TrainArgs) -> Result<i32> {
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
    let params = TrainParams {
        window,
        criterion,
        max_depth: a.max_depth.unwrap_or(base.max_depth),
        min_leaf: a.min_leaf.unwrap_or(base.min_leaf),
        min_gain: a.min_gain.unwrap_or(base.min_gain),
        class_weight,
        holdout: a.holdout.unwrap_or(base.holdout),
        refit: a.refit || base.refit,
        threshold: a.settings.threshold.or(cfg.live.overrides.threshold),
        min_area: a.settings.min_area.or(cfg.live.overrides.min_area),
        merge_distance: a
            .settings
            .merge_distance
            .or(cfg.live.overrides.merge_distance),
        ..base.clone()
    };
    params.validate().context("bad training option")?;
    if a.out.is_dir() {
        bail!(
            "--out {} is a folder; give the model file's path",
            a.out.display()
        );
    }
    let data = a
        .data
        .clone()
        .or_else(|| cfg.live.seed_data.clone())
        .context("no data folder: pass --data DIR or set training.seed_data in --config")?;
    let a = TrainArgs {
        data: Some(data),
        ..a
    };
    let data_dir = a.data.as_deref().expect("set above");
    let (folder, skipped) = read_data(data_dir, &a.decode.limits(&cfg), a.skip_bad)?;
    let mut bar = Progress::new(folder.frames.len(), 10);
    let m = learn::train(&folder.frames, &params, &mut |s| match s {
        Stage::Store { done, total } => {
            bar.set_label("building label store");
            bar.update(done, total)
        }
        Stage::Grow => bar.stage("growing tree"),
        Stage::Prune => bar.stage("pruning"),
        Stage::Tune => bar.stage("choosing threshold and grouping on held-out frames"),
    })
    .with_context(|| format!("training on {} failed", data_dir.display()))?;
    bar.finish();
    write_atomic(&a.out, m.to_json().as_bytes())?;
    if !m.training.tuned {
        let why = if m.data.holdout_frames == 0 {
            "no frame was held out (--holdout 0, or too few frames)".to_string()
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
            holdout: &m.holdout,
        };
        out!("{}", serde_json::to_string_pretty(&s)?);
    } else {
        out!(
            "trained on {} frames ({} held out), {} pixels, {} distinct patterns",
            m.data.frames,
            m.data.holdout_frames,
            m.data.pixels,
            m.data.unique_patterns
        );
        out!(
            "tree: {} leaves grown, {} kept after pruning (alpha {:.3e}), depth {}",
            m.training.grown_leaves,
            m.training.pruned_leaves,
            m.training.pruning_alpha,
            m.tree.depth()
        );
        out!(
            "settings: threshold {:.4}, min_area {}, merge_distance {}",
            m.threshold,
            m.grouping.min_area,
            m.grouping.merge_distance
        );
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
    Ok(if skipped > 0 { 2 } else { 0 })
}

/// Writes a file through a temporary sibling and a rename, so a reader
/// never sees half a model.
fn write_atomic(path: &Path, bytes: &[u8]) -> Result<()> {
    let name = path
        .file_name()
        .with_context(|| format!("{} is not a file path", path.display()))?;
    if let Some(parent) = path.parent().filter(|p| !p.as_os_str().is_empty()) {
        std::fs::create_dir_all(parent)
            .with_context(|| format!("cannot create folder {}", parent.display()))?;
    }
    let tmp = path.with_file_name(format!(".{}.tmp", name.to_string_lossy()));
    std::fs::write(&tmp, bytes).with_context(|| format!("cannot write {}", tmp.display()))?;
    if let Err(e) = std::fs::rename(&tmp, path) {
        let _ = std::fs::remove_file(&tmp);
        return Err(e).with_context(|| format!("cannot write {}", path.display()));
    }
    Ok(())
}

fn scan(a: ScanArgs) -> Result<i32> {
    let cfg = a.config.load()?;
    let m = load_model(&a.model)?;
    let settings = a.settings.apply(&m, &cfg)?;
    let limits = a.decode.limits(&cfg);
    let detector = Detector::new(m, settings);
    let mut scratch = Scratch::default();
    let started = Instant::now();
    let mut clock = || (SystemTime::now(), started.elapsed().as_secs_f64());
    let mut failed = 0;
    for path in &a.frames {
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
            a.frames.len()
        );
        return Ok(if failed == a.frames.len() { 1 } else { 2 });
    }
    Ok(0)
}

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

#[derive(Serialize)]
struct FrameScore {
    frame: String,
    pixel: Level,
    object: Level,
}

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

fn eval(a: EvalArgs) -> Result<i32> {
    let cfg = a.config.load()?;
    let m = load_model(&a.model)?;
    let settings = a.settings.apply(&m, &cfg)?;
    let (folder, skipped) = read_data(&a.data, &a.decode.limits(&cfg), a.skip_bad)?;
    if let Some(f) = folder
        .frames
        .iter()
        .find(|f| f.frame.width() == 0 || f.frame.height() == 0)
    {
        eprintln!("burlwatch: note: frame {} is empty", f.name);
    }
    let mut total = Scores::default();
    let mut per_frame = Vec::new();
    let program = Program::compile(&m.tree, settings.threshold);
    let mut scratch = Scratch::default();
    let mut bar = Progress::new(folder.frames.len(), 20);
    bar.set_label("scoring frames");
    for (k, f) in folder.frames.iter().enumerate() {
        bar.update(k, folder.frames.len());
        let r = compile::run(&program, &m.tree, &settings, &f.frame, &mut scratch);
        let s = Scores {
            pixel: score::pixel_confusion(&r.mask, &f.mask),
            object: score::object_confusion(&r.objects, &score::truth_objects(&f.mask)),
        };
        total.add(&s);
        if a.per_frame {
            per_frame.push(FrameScore {
                frame: f.name.clone(),
                pixel: Level::of(&s.pixel, true),
                object: Level::of(&s.object, false),
            });
        }
    }
    bar.finish();
    let report = EvalReport {
        model_version: m.model_version,
        frames: folder.frames.len(),
        skipped,
        threshold: settings.threshold,
        min_area: settings.grouping.min_area,
        merge_distance: settings.grouping.merge_distance,
        pixel: Level::of(&total.pixel, true),
        object: Level::of(&total.object, false),
        per_frame,
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
                "TP",
                "FP",
                "FN"
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
    Ok(if skipped > 0 { 2 } else { 0 })
}

#[derive(Serialize)]
struct Condition {
    dx: i8,
    dy: i8,
    set: bool,
}

#[derive(Serialize)]
struct Rule {
    leaf: usize,
    conditions: Vec<Condition>,
    score: f64,
    clear: u64,
    target: u64,
    detects: bool,
}

/// One rule per leaf: the conditions on the path from the root.
fn rule_list(m: &Model) -> Vec<Rule> {
    let nodes = m.tree.nodes();
    // Parent and branch of every node, in one forward pass.
    let mut up: Vec<Option<(usize, bool)>> = vec![None; nodes.len()];
    for (i, n) in nodes.iter().enumerate() {
        if let Node::Split {
            if_clear, if_set, ..
        } = n
        {
            up[*if_clear as usize] = Some((i, false));
            up[*if_set as usize] = Some((i, true));
        }
    }
    let mut rules = Vec::new();
    for (i, n) in nodes.iter().enumerate() {
        let Node::Leaf(l) = n else { continue };
        let mut conds = Vec::new();
        let mut at = i;
        while let Some((p, set)) = up[at] {
            if let Node::Split { feature, .. } = nodes[p] {
                let o = m.tree.offset(feature);
                conds.push(Condition {
                    dx: o.dx,
                    dy: o.dy,
                    set,
                });
            }
            at = p;
        }
        conds.reverse();
        rules.push(Rule {
            leaf: i,
            conditions: conds,
            score: l.score,
            clear: l.counts[0],
            target: l.counts[1],
            detects: l.score >= m.threshold,
        });
    }
    rules
}

fn rules(a: RulesArgs) -> Result<i32> {
    let m = load_model(&a.model)?;
    let rules = rule_list(&m);
    if a.json {
        out!("{}", serde_json::to_string_pretty(&rules)?);
        return Ok(0);
    }
    let w = m.tree.window();
    out!(
        "model version {}: {} rules over a {}x{} window; pixel (dx,dy) is relative to the centre, +x right, +y down",
        m.model_version,
        rules.len(),
        w.size(),
        w.size()
    );
    out!(
        "a pixel is a detection when its rule's score is at least {:.4}",
        m.threshold
    );
    for (k, r) in rules.iter().enumerate() {
        let conds: Vec<String> = r
            .conditions
            .iter()
            .map(|c| {
                format!(
                    "{} is {}",
                    burlwatch::window::Offset { dx: c.dx, dy: c.dy },
                    if c.set { "set" } else { "clear" }
                )
            })
            .collect();
        let cond = if conds.is_empty() {
            "always".to_string()
        } else {
            format!("if {}", conds.join(" and "))
        };
        out!(
            "rule {:>4}: {cond}\n           then score {:.4} ({} clear, {} target pixels){}",
            k + 1,
            r.score,
            r.clear,
            r.target,
            if r.detects { " => DETECT" } else { "" }
        );
    }
    Ok(0)
}

fn generate(a: GenerateArgs) -> Result<i32> {
    let mut params = match a.preset.as_str() {
        "standard" => LoomParams::standard(),
        "alternate" => LoomParams::alternate(),
        "drifted" => LoomParams::drifted(),
        other => bail!("--preset {other:?} must be standard, alternate or drifted"),
    };
    if let Some(w) = a.width {
        params.width = w;
    }
    if let Some(h) = a.height {
        params.height = h;
    }
    if let Some(n) = a.noise {
        if !(0.0..=0.5).contains(&n) {
            bail!("--noise {n} must be between 0 and 0.5");
        }
        params.noise = n;
    }
    if params.width < 32 || params.height < 32 || params.width > 8192 || params.height > 8192 {
        bail!("frame size must be between 32x32 and 8192x8192");
    }
    std::fs::create_dir_all(&a.out)
        .with_context(|| format!("cannot create {}", a.out.display()))?;
    let mut defects = 0;
    for i in 0..a.count {
        let f = synth::generate(
            &params,
            a.seed.wrapping_mul(1_000_003).wrapping_add(i as u64),
        );
        defects += f.defects.len();
        let name = format!("loom-{}-{:04}", a.preset, i);
        if a.png {
            let p = a.out.join(format!("{name}.png"));
            std::fs::write(&p, burlwatch::codec::encode_png(&f.frame)?)
                .with_context(|| format!("cannot write {}", p.display()))?;
            let mp = a.out.join(format!("{name}{}", data::MASK_SUFFIX));
            std::fs::write(&mp, burlwatch::codec::encode_pbm(&f.mask))
                .with_context(|| format!("cannot write {}", mp.display()))?;
        } else {
            data::write_pair(&a.out, &name, &f.frame, &f.mask)?;
        }
    }
    out!(
        "wrote {} {} frames ({}x{}, {} defects) to {}",
        a.count,
        a.preset,
        params.width,
        params.height,
        defects,
        a.out.display()
    );
    Ok(0)
}
