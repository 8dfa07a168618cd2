//! `burlwatch retrain`: grow a challenger from the labels now and put it
//! through the gate. A running daemon is asked to do it (it owns the
//! state folder); with none running it is done here, under the lock.

use std::path::PathBuf;
use std::time::Duration;

use anyhow::{anyhow, Result};

use burlwatch::daemon::requests::{Ask, Request};
use burlwatch::daemon::retrain;

use super::load_config;
use super::state::{ask, hold, Holder};

#[derive(clap::Args, Debug)]
pub struct RetrainArgs {
    /// Configuration file (TOML).
    #[arg(long)]
    config: PathBuf,
}

pub fn run(a: RetrainArgs) -> Result<i32> {
    let cfg = load_config(&a.config)?;
    match hold(&cfg, true)? {
        Holder::Daemon(pid) => {
            let wait = cfg.live.retrain.budget + Duration::from_secs(60);
            ask(
                &cfg,
                &pid,
                Request {
                    ask: Ask::Retrain,
                    by: "operator".into(),
                },
                wait,
            )
        }
        Holder::Here(held) => {
            let super::state::Held {
                mut learning,
                running,
                cfg,
                ..
            } = *held;
            let running = running.expect("loaded");
            let live = &cfg.live;
            let plan = match retrain::plan(&cfg.start.folders.state, &mut learning.labels, live)
                .map_err(|e| anyhow!("{e}"))?
            {
                Ok(p) => p,
                Err(why) => {
                    out!("no retrain: {why}");
                    return Ok(1);
                }
            };
            let entry = learning.entry_of(&running).map_err(|e| anyhow!("{e}"))?;
            let changeover = learning
                .changeover_since(&entry)
                .map_err(|e| anyhow!("{e}"))?;
            eprintln!(
                "burlwatch: training on {} labelled frame(s), judging on {} held out",
                plan.train.len(),
                plan.gate.len()
            );
            let deadline = std::time::Instant::now() + live.retrain.budget;
            let ch = retrain::challenge(&plan, &running, live, changeover, &|| {
                std::time::Instant::now() >= deadline
            })
            .map_err(|e| anyhow!("{e}"))?;
            let reason = ch.reason.clone();
            match learning
                .decide(&plan, ch, &running, "operator")
                .map_err(|e| anyhow!("{e}"))?
            {
                Some(m) => out!(
                    "version {} ({}) is in service: {reason}",
                    m.model_version,
                    burlwatch::detect::model_hash(&m)
                ),
                None => out!("the running model stays: {reason}"),
            }
            Ok(0)
        }
    }
}
