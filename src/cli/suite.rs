//! `burlwatch suite`: trains and scores a model on each setting of the
//! evaluation suite ([`burlwatch::suite`]) with the configuration's
//! training settings, and prints per-setting and macro-averaged object and
//! pixel F1, the object F1's standard error, and the object errors by kind
//! (missed, unmatched, partial, false alarms). `--out` also writes each
//! setting's frames (as `generate` would), so `train` and `eval` reproduce
//! any one of them by hand. `--draws N` repeats all of it on N independent
//! draws of frames and adds each figure's mean and spread over them;
//! `--compare FILE` trains each setting of each draw a second time with
//! another configuration's training settings and reports the differences
//! draw by draw. A draw that fails stops the suite, and the draws before it
//! are still reported (JSON included) before the error.

use std::io::IsTerminal;
use std::path::PathBuf;

use anyhow::{bail, Context, Result};
use serde::Serialize;

use burlwatch::learn::TrainParams;
use burlwatch::suite::{self, Comparison, Outcome, PairedSpread, Sizes, Summary};
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
    /// Also train every setting of every draw with the training settings
    /// of this configuration file, and compare the two draw by draw (the
    /// base is `--config`'s, or the defaults).
    #[arg(long, value_name = "FILE")]
    compare: Option<PathBuf>,
    /// Print the results as JSON.
    #[arg(long)]
    json: bool,
    #[command(flatten)]
    config: ConfigArg,
}

/// One training's figures on one draw.
#[derive(Serialize)]
struct Figures<'a> {
    settings: &'a [Outcome],
    macro_object_f1: f64,
    macro_object_f1_se: f64,
    macro_pixel_f1: f64,
}

impl<'a> Figures<'a> {
    fn of(outcomes: &'a [Outcome]) -> Figures<'a> {
        let (object, pixel) = suite::macro_f1(outcomes);
        Figures {
            settings: outcomes,
            macro_object_f1: object,
            macro_object_f1_se: suite::macro_se(outcomes),
            macro_pixel_f1: pixel,
        }
    }
}

#[derive(Serialize)]
struct Json<'a> {
    /// The draw's training seed (its test frames use the next one).
    seed: u64,
    #[serde(flatten)]
    base: Figures<'a>,
    /// The same draw trained with `--compare`'s configuration.
    #[serde(skip_serializing_if = "Option::is_none")]
    compared: Option<Figures<'a>>,
}

#[derive(Serialize)]
struct DrawsJson<'a> {
    draws: Vec<Json<'a>>,
    summary: Summary,
    #[serde(skip_serializing_if = "Option::is_none")]
    compared_summary: Option<Summary>,
    #[serde(skip_serializing_if = "Option::is_none")]
    comparison: Option<Comparison>,
    /// The draw that failed, when one did: the draws above finished.
    #[serde(skip_serializing_if = "Option::is_none")]
    failed: Option<&'a Failed>,
}

#[derive(Serialize)]
struct Failed {
    /// Counted from 1.
    draw: usize,
    seed: u64,
    error: String,
}

/// Most draws one command runs (each is a whole suite).
const MAX_DRAWS: usize = 20;

/// A training the suite runs on every setting of every draw.
struct Side {
    /// `base` (the configuration's) or `compared` (`--compare`'s).
    name: &'static str,
    params: TrainParams,
}

pub fn run(a: SuiteArgs) -> Result<i32> {
    let cfg = a.config.load()?;
    let params = cfg.live.training.clone();
    params.validate().context("bad training setting")?;
    let mut sides = vec![Side {
        name: "base",
        params,
    }];
    if let Some(file) = &a.compare {
        let other = super::load_config(file)?.live.training;
        other
            .validate()
            .with_context(|| format!("{}: bad training setting", file.display()))?;
        sides.push(Side {
            name: "compared",
            params: other,
        });
    }
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
    // Per side, the finished draws' outcomes.
    let mut done: Vec<Vec<Vec<Outcome>>> = vec![Vec::new(); sides.len()];
    // A bar on a terminal's stderr while stdout shows nothing as it goes
    // (JSON, or the tables sent elsewhere): the tables report each setting
    // as it ends otherwise.
    let per_draw = chosen.len() * sides.len();
    let total = seeds.len() * per_draw;
    let watched = a.json || !std::io::stdout().is_terminal();
    let mut bar = Progress::new(total, if watched { 1 } else { usize::MAX });
    let mut failed = None;
    for (d, &seed) in seeds.iter().enumerate() {
        if !a.json && seeds.len() > 1 {
            if d > 0 {
                out!("");
            }
            out!(
                "draw {} of {}: training seed {seed}, test seed {}",
                d + 1,
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
        let label = format!("draw {} of {}", d + 1, seeds.len());
        let mut step = |i: usize, name: &str| {
            bar.set_label(&format!("{label}: {name}"));
            bar.update(d * per_draw + i, total);
        };
        match run_draw(&a, &chosen, &sides, sizes, out.as_deref(), &mut step) {
            Ok(draw) => {
                for (side, outcomes) in done.iter_mut().zip(draw) {
                    side.push(outcomes);
                }
            }
            // Nothing finished: the error alone says it.
            Err(e) if d == 0 => return Err(e),
            Err(e) => {
                failed = Some(Failed {
                    draw: d + 1,
                    seed,
                    error: format!("{e:#}"),
                });
                break;
            }
        }
    }
    bar.finish();
    let finished = done[0].len();
    let summaries: Vec<Summary> = done.iter().map(|d| suite::summarise(d)).collect();
    let comparison = (sides.len() > 1).then(|| suite::compare(&done[0], &done[1]));
    if a.json {
        let text = if seeds.len() == 1 && sides.len() == 1 {
            serde_json::to_string_pretty(&Json {
                seed: seeds[0],
                base: Figures::of(&done[0][0]),
                compared: None,
            })?
        } else {
            serde_json::to_string_pretty(&DrawsJson {
                draws: (0..finished)
                    .map(|d| Json {
                        seed: seeds[d],
                        base: Figures::of(&done[0][d]),
                        compared: done.get(1).map(|c| Figures::of(&c[d])),
                    })
                    .collect(),
                summary: summaries[0].clone(),
                compared_summary: summaries.get(1).cloned(),
                comparison: comparison.clone(),
                failed: failed.as_ref(),
            })?
        };
        out!("{text}");
    } else {
        if finished > 1 {
            for (side, s) in sides.iter().zip(&summaries) {
                let whose = if sides.len() > 1 {
                    format!(", {}", side.name)
                } else {
                    String::new()
                };
                print_summary(s, &whose)?;
            }
        }
        if let Some(c) = &comparison {
            print_comparison(c)?;
        }
    }
    match failed {
        None => Ok(0),
        Some(f) => bail!(
            "draw {} of {} (training seed {}) failed, so the suite stopped ({} before it \
             reported above): {}",
            f.draw,
            seeds.len(),
            f.seed,
            if finished == 1 {
                "the draw".to_string()
            } else {
                format!("the {finished} draws")
            },
            f.error
        ),
    }
}

/// Over the draws: each setting's object F1 (mean, its standard error,
/// sample standard deviation, lowest, highest) and mean pixel F1, then the
/// macro figure's; then what the models cost and the errors they made.
fn print_summary(s: &Summary, whose: &str) -> Result<()> {
    out!("");
    out!(
        "over {} draws{whose}: mean (its standard error), standard deviation, lowest and highest",
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
    out!("");
    out!(
        "over {} draws{whose}, means of a draw: the model's nodes and speed, training seconds, errors by kind",
        s.draws
    );
    out!(
        "{:<14} {:>8} {:>6} {:>7} {:>7} {:>9} {:>7} {:>6}",
        "setting",
        "nodes",
        "Mpx/s",
        "train s",
        "missed",
        "unmatched",
        "partial",
        "false"
    );
    for x in &s.settings {
        out!(
            "{:<14} {:>8.0} {:>6.0} {:>7.1} {:>7.1} {:>9.1} {:>7.1} {:>6.1}",
            x.setting,
            x.nodes.mean,
            x.detect_mpx_s.mean,
            x.train_seconds.mean,
            x.errors.missed,
            x.errors.unmatched,
            x.errors.partial,
            x.errors.false_alarms
        );
    }
    Ok(())
}

/// The compared training against the base, draw by draw.
fn print_comparison(c: &Comparison) -> Result<()> {
    out!("");
    out!(
        "compared against base over {} draw{}: object F1 means, the mean difference (compared - base; its \
         standard error over the draws), draws gained and lost",
        c.draws,
        if c.draws == 1 { "" } else { "s" }
    );
    out!(
        "{:<14} {:>6} {:>8} {:>17} {:>6} {:>5}",
        "setting",
        "base",
        "compared",
        "difference (se)",
        "gained",
        "lost"
    );
    // One draw has no spread to give an error from.
    let se = |p: &PairedSpread| {
        if c.draws > 1 {
            format!("({:.3})", p.difference.se)
        } else {
            "(-)    ".to_string()
        }
    };
    let row = |name: &str, p: &PairedSpread| -> Result<()> {
        out!(
            "{:<14} {:>6.3} {:>8.3} {:>+9.3} {} {:>6} {:>5}",
            name,
            p.base.mean,
            p.compared.mean,
            p.difference.mean,
            se(p),
            p.gains,
            p.losses
        );
        Ok(())
    };
    for x in &c.settings {
        row(&x.setting, &x.object_f1)?;
    }
    row("macro", &c.macro_object_f1)?;
    row("macro px F1", &c.macro_pixel_f1)
}

/// One draw: every chosen setting trained by each side and scored, its
/// table printed unless the output is JSON; per side, the outcomes.
fn run_draw(
    a: &SuiteArgs,
    chosen: &[(&str, LoomParams)],
    sides: &[Side],
    sizes: Sizes,
    out: Option<&std::path::Path>,
    step: &mut dyn FnMut(usize, &str),
) -> Result<Vec<Vec<Outcome>>> {
    let mut outcomes: Vec<Vec<Outcome>> = sides.iter().map(|_| Vec::new()).collect();
    let paired = sides.len() > 1;
    // The symmetry each model was trained under, when any side has one.
    let symmetric = sides
        .iter()
        .any(|x| x.params.choose_symmetry || !x.params.symmetry.is_none());
    let sym = |s: &str| {
        if symmetric {
            format!(" {s:>8}")
        } else {
            String::new()
        }
    };
    // The side's name leads each row when two trainings are compared.
    let lead = |s: &str| {
        if paired {
            format!("{s:<9}")
        } else {
            String::new()
        }
    };
    if !a.json {
        out!(
            "{}{:<14} {:>6} {:>6} {:>13} {:>6} {:>6} {:>9} {:>7} {:>6} {:>6} {:>5} {:>6} {:>7}{}",
            lead("training"),
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
            "train s",
            sym("symmetry")
        );
    }
    for (k, &(name, p)) in chosen.iter().enumerate() {
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
        for (j, side) in sides.iter().enumerate() {
            step(k * sides.len() + j, name);
            let o = suite::evaluate(name, &p, sizes, &side.params).with_context(|| {
                if paired {
                    format!("setting {name}, {} training", side.name)
                } else {
                    format!("setting {name}")
                }
            })?;
            if !a.json {
                out!(
                    "{}{:<14} {:>6.3} {:>6.3} {:>6.3} ({:.3}) {:>6.3} {:>6} {:>9} {:>7} {:>6} {:>6} {:>5} {:>6.0} {:>7.1}{}",
                    lead(side.name),
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
                    o.train_seconds,
                    sym(&o.symmetry)
                );
            }
            outcomes[j].push(o);
        }
    }
    if !a.json {
        for (side, o) in sides.iter().zip(&outcomes) {
            let (object, pixel) = suite::macro_f1(o);
            out!(
                "{}{:<14} {:>6} {:>6} {:>6.3} ({:.3}) {:>6.3}",
                lead(side.name),
                "macro",
                "",
                "",
                object,
                suite::macro_se(o),
                pixel
            );
        }
    }
    Ok(outcomes)
}
