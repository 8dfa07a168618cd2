//! `burlwatch suite`: trains and scores a model on each setting of the
//! evaluation suite ([`burlwatch::suite`]) with the configuration's
//! training settings, and prints per-setting and macro-averaged object and
//! pixel F1, the object F1's standard error, and the object errors by kind
//! (missed, unmatched, partial, false alarms). `--out` also writes each
//! setting's frames (as `generate` would), so `train` and `eval` reproduce
//! any one of them by hand.

use std::path::PathBuf;

use anyhow::{bail, Context, Result};
use serde::Serialize;

use burlwatch::suite::{self, Outcome, Sizes};

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
    /// Frame width and height in pixels (default: the settings' 512).
    #[arg(long)]
    size: Option<usize>,
    /// Also write each setting's frames to OUT/NAME/train and OUT/NAME/test.
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
    settings: &'a [Outcome],
    macro_object_f1: f64,
    macro_object_f1_se: f64,
    macro_pixel_f1: f64,
}

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
    if let Some(s) = a.size {
        if !(32..=4096).contains(&s) {
            bail!("--size {s} must be between 32 and 4096");
        }
    }
    let sizes = Sizes {
        train: a.train,
        test: a.test,
        seed: a.seed,
    };
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
    for (name, mut p) in all {
        if !a.only.is_empty() && !a.only.iter().any(|n| n == name) {
            continue;
        }
        if let Some(s) = a.size {
            p.width = s;
            p.height = s;
        }
        if let Some(dir) = &a.out {
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
        let o =
            suite::evaluate(name, &p, sizes, &params).with_context(|| format!("setting {name}"))?;
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
    let (object, pixel) = suite::macro_f1(&outcomes);
    if a.json {
        let text = serde_json::to_string_pretty(&Json {
            settings: &outcomes,
            macro_object_f1: object,
            macro_object_f1_se: suite::macro_se(&outcomes),
            macro_pixel_f1: pixel,
        })?;
        out!("{text}");
    } else {
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
    Ok(0)
}
