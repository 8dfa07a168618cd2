//! `burlwatch suite`: trains and scores a model on each setting of the
//! evaluation suite ([`burlwatch::suite`]) with the configuration's
//! training settings, and prints per-setting and macro-averaged object and
//! pixel F1, the object F1's standard error, and the object errors by kind
//! (missed, unmatched, partial, false alarms). `--out` also writes each
//! setting's frames (as `generate` would), so `train` and `eval` reproduce
//! any one of them by hand. `--draws N` repeats all of it on N independent
//! draws of frames and adds each figure's mean and spread over them.

use std::io::IsTerminal;
use std::path::PathBuf;

use anyhow::{bail, Context, Result};
use serde::Serialize;

use burlwatch::suite::{self, Outcome, Sizes, Summary};
use burlwatch::synth::LoomParams;

use super::progress::Progress;
use super::ConfigArg;

#[derive(clap::Args, Debug)]
pub struct SuiteArgs {
    /// Only these settings (comma-separated names; default: all).
    #[arg(long, value_delimiter = ',')]
    only: Vec<String>,
    /// Training frames per setting.
    #[arg(long, default_value_t = 20)]
    train: usize,
    /// Test frames per setting (60 keep the object F1's standard error
    /// near 0.03; scoring is cheap next to training).
    #[arg(long, default_value_t = 60)]
    test: usize,
    /// Seed of the training frames (the test frames use the next one).
    #[arg(long, default_value_t = 1)]
    seed: u64,
    /// Independent draws of training and test frames (1 to 20): draw i
    /// uses seeds SEED + 2i and SEED + 2i + 1. With more than one, each
    /// figure's mean and spread over the draws follows the draws' tables.
    #[arg(long, default_value_t = 1)]
    draws: usize,
    /// Frame width and height in pixels (default: the settings' 512).
    #[arg(long)]
    size: Option<usize>,
    /// Also write each setting's frames to OUT/NAME/train and OUT/NAME/test
    /// (with several draws, OUT/seed-S/NAME/...).
    #[arg(long)]
    out: Option<PathBuf>,
    /// Print the results as JSON.
    #[arg(long)]
    json: bool,
    #[command(flatten)]
    config: ConfigArg,
}

#[derive(Serialize)]
struct Json<'a> {
    /// The draw's training seed (its test frames use the next one).
    seed: u64,
    settings: &'a [Outcome],
    macro_object_f1: f64,
    macro_object_f1_se: f64,
    macro_pixel_f1: f64,
}

#[derive(Serialize)]
struct DrawsJson<'a> {
    draws: Vec<Json<'a>>,
    summary: Summary,
}

/// Most draws one command runs (each is a whole suite).
const MAX_DRAWS: usize = 20;

pub fn run(a: SuiteArgs) -> Result<i32> {
    let cfg = a.config.load()?;
    let params = cfg.live.training.clone();
    params.validate().context("bad training setting")?;
    let all = suite::settings();
    for name in &a.only {
        if !all.iter().any(|(n, _)| n == name) {
            let names: Vec<&str> = all.iter().map(|(n, _)| *n).collect();
            bail!(
                "--only {name:?} is not a setting of the suite: {}",
                names.join(", ")
            );
        }
    }
    if a.train == 0 || a.test == 0 {
        bail!("--train and --test must be at least 1");
    }
    if !(1..=MAX_DRAWS).contains(&a.draws) {
        bail!("--draws {} must be between 1 and {MAX_DRAWS}", a.draws);
    }
    if let Some(s) = a.size {
        if !(32..=4096).contains(&s) {
            bail!("--size {s} must be between 32 and 4096");
        }
    }
    // The settings to run, at their frame size, in the suite's order.
    let chosen: Vec<(&str, LoomParams)> = all
        .into_iter()
        .filter(|(n, _)| a.only.is_empty() || a.only.iter().any(|o| o == n))
        .map(|(n, mut p)| {
            if let Some(s) = a.size {
                p.width = s;
                p.height = s;
            }
            (n, p)
        })
        .collect();
    let seeds = suite::draw_seeds(a.seed, a.draws);
    let mut draws = Vec::with_capacity(seeds.len());
    // A bar on a terminal's stderr while stdout shows nothing as it goes
    // (JSON, or the tables sent elsewhere): the tables report each setting
    // as it ends otherwise.
    let total = seeds.len() * chosen.len();
    let watched = a.json || !std::io::stdout().is_terminal();
    let mut bar = Progress::new(total, if watched { 1 } else { usize::MAX });
    for &seed in &seeds {
        if !a.json && seeds.len() > 1 {
            if !draws.is_empty() {
                out!("");
            }
            out!(
                "draw {} of {}: training seed {seed}, test seed {}",
                draws.len() + 1,
                seeds.len(),
                seed.wrapping_add(1)
            );
        }
        let out = a.out.as_ref().map(|dir| {
            if seeds.len() > 1 {
                dir.join(format!("seed-{seed}"))
            } else {
                dir.clone()
            }
        });
        let sizes = Sizes {
            train: a.train,
            test: a.test,
            seed,
        };
        let label = format!("draw {} of {}", draws.len() + 1, seeds.len());
        let done = draws.len() * chosen.len();
        let mut step = |i: usize, name: &str| {
            bar.set_label(&format!("{label}: {name}"));
            bar.update(done + i, total);
        };
        draws.push(run_draw(
            &a,
            &chosen,
            sizes,
            out.as_deref(),
            &params,
            &mut step,
        )?);
    }
    bar.finish();
    if a.json {
        fn one<'a>((seed, outcomes): (&u64, &'a Vec<Outcome>)) -> Json<'a> {
            let (object, pixel) = suite::macro_f1(outcomes);
            Json {
                seed: *seed,
                settings: outcomes,
                macro_object_f1: object,
                macro_object_f1_se: suite::macro_se(outcomes),
                macro_pixel_f1: pixel,
            }
        }
        let text = if draws.len() == 1 {
            serde_json::to_string_pretty(&one((&seeds[0], &draws[0])))?
        } else {
            serde_json::to_string_pretty(&DrawsJson {
                draws: seeds.iter().zip(&draws).map(one).collect(),
                summary: suite::summarise(&draws),
            })?
        };
        out!("{text}");
    } else if draws.len() > 1 {
        print_summary(&suite::summarise(&draws))?;
    }
    Ok(0)
}

/// Over the draws: each setting's object F1 (mean, its standard error,
/// sample standard deviation, lowest, highest) and mean pixel F1, then the
/// macro figure's.
fn print_summary(s: &Summary) -> Result<()> {
    out!("");
    out!(
        "over {} draws: mean (its standard error), standard deviation, lowest and highest",
        s.draws
    );
    out!(
        "{:<14} {:>19} {:>6} {:>6} {:>6} {:>11}",
        "setting",
        "obj F1 mean (se)",
        "sd",
        "min",
        "max",
        "px F1 mean"
    );
    for x in &s.settings {
        out!(
            "{:<14} {:>11.3} ({:.3}) {:>6.3} {:>6.3} {:>6.3} {:>11.3}",
            x.setting,
            x.object_f1.mean,
            x.object_f1.se,
            x.object_f1.sd,
            x.object_f1.min,
            x.object_f1.max,
            x.pixel_f1.mean
        );
    }
    let m = &s.macro_object_f1;
    out!(
        "{:<14} {:>11.3} ({:.3}) {:>6.3} {:>6.3} {:>6.3} {:>11.3}",
        "macro",
        m.mean,
        m.se,
        m.sd,
        m.min,
        m.max,
        s.macro_pixel_f1.mean
    );
    Ok(())
}

/// One draw: every chosen setting trained and scored, its table printed
/// unless the output is JSON.
fn run_draw(
    a: &SuiteArgs,
    chosen: &[(&str, LoomParams)],
    sizes: Sizes,
    out: Option<&std::path::Path>,
    params: &burlwatch::learn::TrainParams,
    step: &mut dyn FnMut(usize, &str),
) -> Result<Vec<Outcome>> {
    let mut outcomes = Vec::new();
    if !a.json {
        out!(
            "{:<14} {:>6} {:>6} {:>13} {:>6} {:>6} {:>9} {:>7} {:>6} {:>6} {:>5} {:>6} {:>7}",
            "setting",
            "obj P",
            "obj R",
            "obj F1 (se)",
            "px F1",
            "missed",
            "unmatched",
            "partial",
            "false",
            "nodes",
            "depth",
            "Mpx/s",
            "train s"
        );
    }
    for &(name, p) in chosen {
        if let Some(dir) = out {
            for (part, seed, count) in [
                ("train", sizes.seed, sizes.train),
                ("test", sizes.seed.wrapping_add(1), sizes.test),
            ] {
                super::generate::write_set(
                    &dir.join(name).join(part),
                    name,
                    &p,
                    seed,
                    count,
                    false,
                )?;
            }
        }
        step(outcomes.len(), name);
        let o =
            suite::evaluate(name, &p, sizes, params).with_context(|| format!("setting {name}"))?;
        if !a.json {
            out!(
                "{:<14} {:>6.3} {:>6.3} {:>6.3} ({:.3}) {:>6.3} {:>6} {:>9} {:>7} {:>6} {:>6} {:>5} {:>6.0} {:>7.1}",
                o.setting,
                o.object.precision(),
                o.object.recall(),
                o.object_f1,
                o.object_f1_se,
                o.pixel_f1,
                o.errors.missed,
                o.errors.unmatched,
                o.errors.partial,
                o.errors.false_alarms,
                o.nodes,
                o.depth,
                o.detect_mpx_s,
                o.train_seconds
            );
        }
        outcomes.push(o);
    }
    if !a.json {
        let (object, pixel) = suite::macro_f1(&outcomes);
        out!(
            "{:<14} {:>6} {:>6} {:>6.3} ({:.3}) {:>6.3}",
            "macro",
            "",
            "",
            object,
            suite::macro_se(&outcomes),
            pixel
        );
    }
    Ok(outcomes)
}
