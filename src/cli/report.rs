//! `burlwatch report`: one self-contained HTML file of a time range (the
//! `report` module gathers and writes it), for maintenance to read on a
//! laptop or a phone, or to print.

use std::path::PathBuf;
use std::time::{Instant, SystemTime};

use anyhow::{anyhow, bail, Context, Result};

use burlwatch::fileio;
use burlwatch::report::{gather, Sources, THUMBNAILS};
use burlwatch::review::Millis;

use super::load_config;
use super::log::When;

#[derive(clap::Args, Debug)]
pub struct ReportArgs {
    /// Configuration file (TOML) of the daemon to report on.
    #[arg(long)]
    config: PathBuf,
    /// The time range [default: --since 7d].
    #[command(flatten)]
    when: When,
    /// The HTML file to write.
    #[arg(long)]
    out: PathBuf,
    /// Thumbnails of at most this many frames with the most objects.
    #[arg(long, default_value_t = THUMBNAILS)]
    thumbnails: usize,
    /// The page's heading [default: "burlwatch report" and the host name].
    #[arg(long)]
    title: Option<String>,
}

/// The machine's host name, if it has one.
fn host_name() -> Option<String> {
    let name = std::fs::read_to_string("/proc/sys/kernel/hostname").ok()?;
    let name = name.trim();
    (!name.is_empty()).then(|| name.to_string())
}

pub fn run(a: ReportArgs) -> Result<i32> {
    if a.out.extension().is_none_or(|e| e != "html" && e != "htm") {
        bail!("--out {} must end in .html", a.out.display());
    }
    let cfg = load_config(&a.config)?;
    let folders = cfg.start.folders.absolute()?;
    let mut when = a.when.clone();
    if when.since.is_none() && when.from.is_none() && when.to.is_none() {
        when.since = Some("7d".into());
    }
    let now = SystemTime::now();
    let range = when.range(now)?;
    let started = Instant::now();
    let title = a.title.clone().unwrap_or_else(|| match host_name() {
        Some(h) => format!("burlwatch report, {h}"),
        None => "burlwatch report".into(),
    });
    let report = gather(&Sources {
        folders: &folders,
        live: &cfg.live,
        range,
        now: now
            .duration_since(SystemTime::UNIX_EPOCH)
            .map_or(0, |d| d.as_millis() as Millis),
        thumbnails: a.thumbnails,
        title,
    })
    .map_err(|e| anyhow!("{e}"))?;
    let html = report.html();
    fileio::durable::write_atomic(&a.out, html.as_bytes())
        .with_context(|| format!("cannot write {}", a.out.display()))?;
    let drawn = report.thumbnails.iter().filter(|t| t.png.is_ok()).count();
    out!(
        "{}: {:.2} MB; {} records from {} log file(s), {} alert line(s), {} drift sample(s), {} of {} picture(s) drawn; {:.2} s",
        a.out.display(),
        html.len() as f64 / 1e6,
        report.stats.summary.frames,
        report.files,
        report.alerts.len(),
        report.history.len(),
        drawn,
        report.thumbnails.len(),
        started.elapsed().as_secs_f64()
    );
    for t in &report.thumbnails {
        if let Err(why) = &t.png {
            out!("  no picture of {}: {why}", t.frame);
        }
    }
    Ok(0)
}
