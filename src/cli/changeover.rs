//! `burlwatch changeover`: records that the line now runs something new
//! (a new fabric, a new weave). Retraining and the gate use the labels of
//! the new line from then on; the running model keeps running until a
//! retrained one passes the gate.

use std::path::PathBuf;
use std::time::Duration;

use anyhow::{anyhow, Result};

use burlwatch::daemon::requests::{Ask, Request};

use super::load_config;
use super::state::{ask, hold, Holder};

#[derive(clap::Args, Debug)]
pub struct ChangeoverArgs {
    /// Configuration file (TOML).
    #[arg(long)]
    config: PathBuf,
    /// What the line runs now, for the events log ("denim, 3/1 twill").
    #[arg(long)]
    note: Option<String>,
}

pub fn run(a: ChangeoverArgs) -> Result<i32> {
    let cfg = load_config(&a.config)?;
    match hold(&cfg, false)? {
        Holder::Daemon(pid) => ask(
            &cfg,
            &pid,
            Request {
                ask: Ask::Changeover { note: a.note },
                by: "operator".into(),
            },
            Duration::from_secs(10),
        ),
        Holder::Here(held) => {
            let mut learning = held.learning;
            let line = learning
                .changeover(a.note, "operator")
                .map_err(|e| anyhow!("{e}"))?;
            out!(
                "line {} runs from now; the running model keeps running until a retrained one passes the gate",
                line.line
            );
            Ok(0)
        }
    }
}
