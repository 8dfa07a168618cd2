//! Command-line glue: the argument definitions and one module per command.
//! Each command parses its options into library types, calls the library,
//! and prints either a human-readable table (default) or JSON (`--json`).
//! Errors go to stderr.
//!
//! - offline: `train`, `scan`, `eval`, `rules`, `generate`, `suite`, `bench`;
//! - the daemon: `run` (with `notify` for systemd), `check`, `demo`;
//! - the learning loop: `mark` (a correction file), `changeover`,
//!   `retrain`, `models`; `state` is how they reach a running daemon
//!   (request files) or, with none, take the state lock themselves;
//! - the drift monitors: `alerts`; maintenance review: `log`, `render`,
//!   `report`;
//! - `progress`: the progress bar the long offline commands draw.
//!
//! Exit codes: 0 success; 1 the command failed; 2 the command line was
//! wrong (the argument parser's usage error); 3 it finished, but some input
//! files were bad (each named on stderr) and were passed over; 4 a running
//! daemon did not answer a request in time (it stays, to be carried out).

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

mod alerts;
mod bench;
mod changeover;
mod check;
mod demo;
mod eval;
mod generate;
mod log;
mod mark;
mod models;
mod notify;
mod progress;
mod render;
mod report;
mod retrain;
mod rules;
mod run;
mod scan;
mod state;
mod suite;
mod train;

use std::path::{Path, PathBuf};

use anyhow::{bail, Context, Result};
use clap::{Parser, Subcommand};

use burlwatch::codec::DecodeLimits;
use burlwatch::config::{self, Config};
use burlwatch::detect::{Overrides, Settings};
use burlwatch::fileio::data;
use burlwatch::model::Model;

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
    Train(train::TrainArgs),
    /// Detect objects in frame files.
    Scan(scan::ScanArgs),
    /// Score a model on a folder of frames and masks.
    Eval(eval::EvalArgs),
    /// Print a model's tree as if/then rules.
    Rules(rules::RulesArgs),
    /// Write seeded synthetic loom frames with their masks.
    Generate(generate::GenerateArgs),
    /// Train and score a model on each setting of the evaluation suite.
    Suite(suite::SuiteArgs),
    /// Measure how fast this box runs a model (one thread).
    Bench(bench::BenchArgs),
    /// Run the detector unattended: watch the inbox, log every frame.
    Run(run::RunArgs),
    /// Check a configuration, its folders and its model; start nothing.
    Check(check::CheckArgs),
    /// Show the daemon at work on the demo frames, in a temporary folder.
    Demo(demo::DemoArgs),
    /// Write a correction file: where detection on an archived frame was wrong.
    Mark(mark::MarkArgs),
    /// Record that the line now runs something new (a new fabric).
    Changeover(changeover::ChangeoverArgs),
    /// Grow a challenger model from the labels now and put it through the gate.
    Retrain(retrain::RetrainArgs),
    /// List, show or put in service the registered models.
    Models(models::ModelsArgs),
    /// Print the drift monitors' recent alerts and their state now.
    Alerts(alerts::AlertsArgs),
    /// Query the detection log: a summary of a time range, frames by filter, one frame.
    Log(log::LogArgs),
    /// Draw a frame with its detection: an annotated PNG.
    Render(render::RenderArgs),
    /// Write a self-contained HTML report of a time range: charts, tables, pictures.
    Report(report::ReportArgs),
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
            Some(p) => load_config(p),
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

/// Exit status: finished, but some input files were bad and passed over
/// (2 is the argument parser's, for a wrong command line).
pub const EXIT_SOME_BAD: i32 = 3;

pub fn run(args: Args) -> Result<i32> {
    match args.command {
        Command::Train(a) => train::run(a),
        Command::Scan(a) => scan::run(a),
        Command::Eval(a) => eval::run(a),
        Command::Rules(a) => rules::run(a),
        Command::Generate(a) => generate::run(a),
        Command::Suite(a) => suite::run(a),
        Command::Bench(a) => bench::run(a),
        Command::Run(a) => run::run(a),
        Command::Check(a) => check::run(a),
        Command::Demo(a) => demo::run(a),
        Command::Mark(a) => mark::run(a),
        Command::Changeover(a) => changeover::run(a),
        Command::Retrain(a) => retrain::run(a),
        Command::Models(a) => models::run(a),
        Command::Alerts(a) => alerts::run(a),
        Command::Log(a) => log::run(a),
        Command::Render(a) => render::run(a),
        Command::Report(a) => report::run(a),
    }
}

/// Loads and resolves a configuration file.
fn load_config(path: &Path) -> Result<Config> {
    config::load(path).map_err(|e| anyhow::anyhow!("{e}"))
}

/// Reads and validates a model file; errors name the file.
fn load_model(path: &Path) -> Result<Model> {
    burlwatch::fileio::models::read_model(path).map_err(|e| anyhow::anyhow!("{e}"))
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
        bail!(
            "no usable frame/mask pairs in {}: a pair is a frame NAME.pbm or NAME.png with its \
             mask NAME.mask.pbm beside it (set pixels mark the defects)",
            dir.display()
        );
    }
    Ok((folder, bad))
}

/// Sends `tracing`'s messages to stderr at `level` (or as `RUST_LOG` says),
/// coloured only on a terminal, each on one line (`messages::OneLine`).
fn init_tracing(level: &str) {
    use std::io::IsTerminal;
    use tracing_subscriber::EnvFilter;
    let filter = EnvFilter::try_from_default_env().unwrap_or_else(|_| EnvFilter::new(level));
    let ansi = std::io::stderr().is_terminal();
    // One line per message, whatever the file names in it hold.
    let _ = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_writer(move || burlwatch::messages::OneLine::new(std::io::stderr(), ansi))
        .with_ansi(ansi)
        .with_target(false)
        .try_init();
}
