//! `burlwatch check`: the configuration, its folders and its model, each
//! found usable or not, with nothing started.

use std::path::PathBuf;

use anyhow::Result;

use burlwatch::daemon::{self, checks::Finding};

use super::load_config;

#[derive(clap::Args, Debug)]
pub struct CheckArgs {
    /// Configuration file (TOML).
    #[arg(long)]
    config: PathBuf,
    /// Print the findings as JSON.
    #[arg(long)]
    json: bool,
}

/// `burlwatch check`: the configuration, its folders and its model, with
/// nothing started. Exit 0 when everything is usable, 1 otherwise.
pub fn run(a: CheckArgs) -> Result<i32> {
    let mut found: Vec<Finding> = Vec::new();
    let cfg = match load_config(&a.config) {
        Ok(c) => {
            found.push(Finding {
                what: "configuration".into(),
                ok: true,
                detail: a.config.display().to_string(),
            });
            Some(c)
        }
        Err(e) => {
            found.push(Finding {
                what: "configuration".into(),
                ok: false,
                detail: format!("{e:#}"),
            });
            None
        }
    };
    if let Some(cfg) = &cfg {
        found.extend(daemon::checks::all(cfg));
    }
    let ok = found.iter().all(|f| f.ok);
    if a.json {
        out!(
            "{}",
            serde_json::to_string_pretty(&serde_json::json!({"ok": ok, "checks": found}))?
        );
    } else {
        for f in &found {
            out!(
                "{:<4} {:<20} {}",
                if f.ok { "ok" } else { "BAD" },
                f.what,
                f.detail
            );
        }
        let serving = cfg
            .as_ref()
            .and_then(|c| daemon::files::daemon_running(&c.start.folders.state));
        match (ok, serving) {
            (true, None) => out!("ready to run"),
            (true, Some(pid)) => out!(
                "ready, but already served by process {pid}: a second daemon on these folders \
                 would stop on the lock; stop that one first (or use it)"
            ),
            (false, _) => out!("not ready: see BAD above"),
        }
    }
    Ok(if ok { 0 } else { 1 })
}
