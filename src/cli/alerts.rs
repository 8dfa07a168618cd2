//! `burlwatch alerts`: the recent alerts of the drift monitors and each
//! monitor's state as the daemon last saved it. Reads files only
//! (`logs/alerts.jsonl`, `state/monitors.json`): it works with the daemon
//! running or not, and changes nothing.

use std::path::PathBuf;

use anyhow::{anyhow, Result};

use burlwatch::daemon::alerts::{read_alerts, read_saved};

use super::load_config;

#[derive(clap::Args, Debug)]
pub struct AlertsArgs {
    /// Configuration file (TOML).
    #[arg(long)]
    config: PathBuf,
    /// How many of the most recent alerts to print.
    #[arg(long, default_value_t = 20)]
    last: usize,
    /// Print JSON.
    #[arg(long)]
    json: bool,
}

pub fn run(a: AlertsArgs) -> Result<i32> {
    let cfg = load_config(&a.config)?;
    let folders = cfg.start.folders.absolute()?;
    let alerts = read_alerts(&folders.logs).map_err(|e| anyhow!("{e}"))?;
    // A damaged state file is said, and the alerts printed all the same
    // (the daemon starts its monitors afresh from such a file).
    let (saved, damaged) = match read_saved(&folders.state) {
        Ok(s) => (s, None),
        Err(e) => (None, Some(e.to_string())),
    };
    let recent = &alerts[alerts.len().saturating_sub(a.last)..];
    if a.json {
        let monitors = saved.as_ref().map(|s| {
            serde_json::json!({
                "saved": s.saved,
                "model_version": s.monitors.model().version,
                "model_hash": s.monitors.model().hash,
                "frames": s.monitors.frames(),
                "corrections": s.monitors.corrections(),
                "states": s.monitors.states(),
            })
        });
        let doc = serde_json::json!({
            "enabled": cfg.start.monitors.is_some(),
            "monitors": monitors,
            "monitors_error": damaged,
            "alerts": recent,
            "alerts_total": alerts.len(),
        });
        out!("{}", serde_json::to_string_pretty(&doc)?);
        return Ok(0);
    }
    if cfg.start.monitors.is_none() {
        out!("The drift monitors are off in this configuration (drift.enabled = false).");
    }
    match &saved {
        None if damaged.is_some() => out!(
            "The monitors' saved state cannot be read: {}",
            damaged.as_deref().unwrap_or_default()
        ),
        None => out!(
            "No monitor state yet: the daemon has not saved one in {}.",
            folders.state.display()
        ),
        Some(s) => {
            let m = &s.monitors;
            out!(
                "Monitors of model {} ({}), {} frames and {} corrections since it went in service; saved {}:",
                m.model().version,
                m.model().hash,
                m.frames(),
                m.corrections(),
                s.saved
            );
            out!(
                "  {:<7} {:<18} {:<8} {:>10}  {:>14}  {:>6}",
                "monitor",
                "statistic",
                "level",
                "value",
                "watch / alert",
                "over"
            );
            for st in m.states() {
                out!(
                    "  {:<7} {:<18} {:<8} {:>10.4}  {:>14}  {:>6}",
                    st.monitor,
                    st.statistic,
                    st.level,
                    st.value.min(1e9),
                    format!("{} / {}", st.thresholds.watch, st.thresholds.alert),
                    st.window
                );
            }
            for st in m.states().iter().filter(|s| s.level != "ok") {
                out!("  {}: {}", st.statistic, st.detail);
            }
        }
    }
    if alerts.is_empty() {
        out!("No alerts.");
    } else {
        out!(
            "Recent alerts ({} of {}), oldest first:",
            recent.len(),
            alerts.len()
        );
        for al in recent {
            let repeats = if al.repeats > 0 {
                format!(" ({} repeats held back before)", al.repeats)
            } else {
                String::new()
            };
            out!(
                "  {}  {:<7} {} -> {} at {:.4}, model {} ({}){repeats}",
                al.time,
                al.state,
                al.monitor,
                al.statistic,
                al.value.min(1e9),
                al.model_version,
                al.model_hash
            );
            out!("      {}", al.message);
        }
    }
    Ok(0)
}
