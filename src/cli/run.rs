//! `burlwatch run`: the daemon's command-line glue. Signals become
//! [`Control`] messages, statuses become systemd notifications, and
//! `tracing` writes the daemon's own messages to stderr (which journald
//! keeps).

use std::path::PathBuf;
use std::thread;

use anyhow::{Context, Result};
use crossbeam_channel::unbounded;

use burlwatch::daemon::{self, Control};

use super::notify::Notifier;
use super::{init_tracing, load_config};

#[derive(clap::Args, Debug)]
pub struct RunArgs {
    /// Configuration file (TOML).
    #[arg(long)]
    config: PathBuf,
}

/// `burlwatch run`: the daemon, until SIGTERM or SIGINT.
pub fn run(a: RunArgs) -> Result<i32> {
    let cfg = load_config(&a.config)?;
    init_tracing(&cfg.start.log.level);
    let (tx, rx) = unbounded();
    let mut signals = signal_hook::iterator::Signals::new([
        signal_hook::consts::SIGTERM,
        signal_hook::consts::SIGINT,
        signal_hook::consts::SIGHUP,
    ])
    .context("cannot install signal handlers")?;
    let path = a.config.clone();
    thread::Builder::new()
        .name("burlwatch-signals".into())
        .spawn(move || {
            for sig in signals.forever() {
                let msg = if sig == signal_hook::consts::SIGHUP {
                    tracing::info!(config = %path.display(), "SIGHUP: reloading");
                    Control::Reload(
                        load_config(&path)
                            .map_err(|e| tracing::error!("reload: {e:#}"))
                            .ok()
                            .map(Box::new),
                    )
                } else {
                    Control::Stop
                };
                if tx.send(msg).is_err() {
                    return;
                }
            }
        })?;
    let mut notifier = Notifier::from_env();
    daemon::run(cfg, rx, &mut |s| notifier.status(s)).map_err(|e| anyhow::anyhow!("{e}"))?;
    Ok(0)
}
