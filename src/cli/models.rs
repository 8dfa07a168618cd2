//! `burlwatch models`: the model registry. `models` lists every version
//! (the one in service marked) with its scores; `models show N` prints one
//! with its rules; `models use N` puts a version in service by hand (a
//! running daemon follows within a second).

use std::path::PathBuf;
use std::time::Duration;

use anyhow::{anyhow, bail, Result};
use clap::Subcommand;

use burlwatch::daemon::registry::{Entry, Registry};
use burlwatch::daemon::requests::{Ask, Request};
use burlwatch::detect::model_hash;

use super::load_config;
use super::state::{ask, hold, Holder};

#[derive(clap::Args, Debug)]
pub struct ModelsArgs {
    /// Configuration file (TOML).
    #[arg(long)]
    config: PathBuf,
    /// Print JSON.
    #[arg(long)]
    json: bool,
    #[command(subcommand)]
    action: Option<Action>,
}

#[derive(Subcommand, Debug)]
enum Action {
    /// List every registered version (the default).
    List,
    /// Print one version: its entry and its rules.
    Show { version: u64 },
    /// Put a registered version in service.
    Use { version: u64 },
}

/// The version and hash in `state/model.json`, if readable.
fn in_service(state: &std::path::Path) -> Option<(u64, String)> {
    let m =
        burlwatch::fileio::models::read_model(&state.join(burlwatch::daemon::files::MODEL)).ok()?;
    Some((m.model_version, model_hash(&m)))
}

fn gate_text(e: &Entry) -> String {
    match &e.gate {
        Some(g) => format!(
            "{:.3} vs {:.3} on {} held out",
            g.f1, g.running_f1, g.frames
        ),
        None => "-".into(),
    }
}

pub fn run(a: ModelsArgs) -> Result<i32> {
    let cfg = load_config(&a.config)?;
    let state = cfg.start.folders.absolute()?.state;
    let registry = Registry::read_only(&state);
    let serving = in_service(&state);
    let is_serving = |e: &Entry| serving.as_ref() == Some(&(e.version, e.hash.clone()));
    match a.action.unwrap_or(Action::List) {
        Action::List => {
            let entries = registry.entries().map_err(|e| anyhow!("{e}"))?;
            if a.json {
                let v: Vec<serde_json::Value> = entries
                    .iter()
                    .map(|e| {
                        let mut v = serde_json::to_value(e).expect("entry serialises");
                        v["in_service"] = is_serving(e).into();
                        v
                    })
                    .collect();
                out!("{}", serde_json::to_string_pretty(&v)?);
                return Ok(0);
            }
            if entries.is_empty() {
                out!(
                    "no registered models yet in {} (the daemon registers its first at start)",
                    state.display()
                );
                return Ok(0);
            }
            out!(
                "{:<2} {:>7} {:<12} {:<8} {:>4} {:>6} {:<8} {:<28} time",
                "",
                "version",
                "hash",
                "origin",
                "line",
                "frames",
                "gate",
                "object F1 (new vs running)"
            );
            for e in &entries {
                out!(
                    "{:<2} {:>7} {:<12} {:<8} {:>4} {:>6} {:<8} {:<28} {}",
                    if is_serving(e) { "*" } else { "" },
                    e.version,
                    e.hash,
                    format!("{:?}", e.origin).to_lowercase(),
                    e.trained_on.line,
                    e.trained_on.frames,
                    if e.passed { "passed" } else { "refused" },
                    gate_text(e),
                    e.time
                );
            }
            out!("* in service");
            Ok(0)
        }
        Action::Show { version } => {
            let Some(e) = registry.entry(version).map_err(|e| anyhow!("{e}"))? else {
                bail!(
                    "no model version {version} in the registry of {}",
                    state.display()
                );
            };
            let m = registry.model(&e).map_err(|e| anyhow!("{e}"))?;
            if a.json {
                let mut v = serde_json::to_value(&e)?;
                v["in_service"] = is_serving(&e).into();
                out!("{}", serde_json::to_string_pretty(&v)?);
                return Ok(0);
            }
            out!(
                "version {} ({}){}",
                e.version,
                e.hash,
                if is_serving(&e) { ", in service" } else { "" }
            );
            out!(
                "made     {} ({:?}), parent {}",
                e.time,
                e.origin,
                e.parent.map_or("-".into(), |p| p.to_string())
            );
            out!(
                "trained  line {}, {} frame(s), {} labelled pixels",
                e.trained_on.line,
                e.trained_on.frames,
                e.trained_on.pixels
            );
            out!(
                "gate     {}: {}",
                if e.passed { "passed" } else { "refused" },
                e.reason
            );
            if let Some(g) = &e.gate {
                out!(
                    "         object F1 {:.3} (running model {:.3}) on line {}'s {} held-out frame(s)",
                    g.f1, g.running_f1, g.line, g.frames
                );
                if let (Some(n), Some(o)) = (g.older_f1, g.running_older_f1) {
                    out!(
                        "         older lines: {n:.3} (running model {o:.3}) on {} frame(s)",
                        g.older_frames
                    );
                }
            }
            super::rules::print(&m)?;
            Ok(0)
        }
        Action::Use { version } => match hold(&cfg, true)? {
            Holder::Daemon(pid) => ask(
                &cfg,
                &pid,
                Request {
                    ask: Ask::Use { version },
                    by: "operator".into(),
                },
                Duration::from_secs(10),
            ),
            Holder::Here(held) => {
                let super::state::Held {
                    mut learning,
                    running,
                    cfg,
                    ..
                } = *held;
                let m = learning
                    .use_version(version, running.as_ref(), "operator", &cfg.live)
                    .map_err(|e| anyhow!("{e}"))?;
                out!("version {version} ({}) is in service", model_hash(&m));
                Ok(0)
            }
        },
    }
}
