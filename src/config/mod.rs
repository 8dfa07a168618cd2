//! The configuration file (TOML): what the offline commands and the daemon
//! read.
//!
//! Two stages. [`raw::RawConfig`] mirrors the file: every key optional,
//! unknown keys rejected (the error names the key by its whole path, such
//! as `training.depth`, and its line), nothing resolved. Resolving checks
//! every value and fills defaults, giving [`Config`] with library types.
//!
//! The resolved configuration is split by lifetime, not by file section:
//! - [`StartConfig`]: what is fixed while the daemon runs (folders, log,
//!   workers, queue, settling, file events); a reload that changes it
//!   says which keys need a restart ([`StartConfig::restart_needed`]);
//! - [`LiveConfig`]: what a reload swaps whole, next to the running
//!   detector (frame decoding, detection overrides, training, listing
//!   period, retention). A new section that may change while running is
//!   added here, in one place.
//!
//! Command-line options are applied on top of the resolved config by the
//! binary, so the order of precedence is: option, file, built-in default
//! (for detection settings: option, file, the model's own; see
//! [`crate::model::Overrides`]).
//!
//! Relative folder paths in the file are taken relative to the folder the
//! command runs in (the repository root for the example in `config/`).

pub mod raw;

use std::path::{Path, PathBuf};

use crate::codec::DecodeLimits;
use crate::error::Result;
use crate::learn::TrainParams;
use crate::model::Overrides;
use crate::window::Window;

pub use raw::RawConfig;

/// The daemon's folders.
#[derive(Clone, Debug, PartialEq)]
pub struct Folders {
    pub inbox: PathBuf,
    pub archive: PathBuf,
    pub rejected: PathBuf,
    pub corrections: PathBuf,
    pub state: PathBuf,
    pub logs: PathBuf,
}

impl Folders {
    /// Every folder with its configuration key.
    pub fn named(&self) -> [(&'static str, &PathBuf); 6] {
        [
            ("folders.inbox", &self.inbox),
            ("folders.archive", &self.archive),
            ("folders.rejected", &self.rejected),
            ("folders.corrections", &self.corrections),
            ("folders.state", &self.state),
            ("folders.logs", &self.logs),
        ]
    }

    /// Every folder made absolute the one way the daemon uses: the
    /// canonical path of a folder that exists, else the path joined to the
    /// working folder. Two configurations naming the same folders compare
    /// equal after this, however they spell them.
    pub fn absolute(&self) -> std::io::Result<Folders> {
        let abs = |p: &PathBuf| -> std::io::Result<PathBuf> {
            match std::fs::canonicalize(p) {
                Ok(c) => Ok(c),
                Err(_) => std::path::absolute(p),
            }
        };
        Ok(Folders {
            inbox: abs(&self.inbox)?,
            archive: abs(&self.archive)?,
            rejected: abs(&self.rejected)?,
            corrections: abs(&self.corrections)?,
            state: abs(&self.state)?,
            logs: abs(&self.logs)?,
        })
    }
}

/// How the detection log is made durable.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum SyncPolicy {
    /// `fsync` after every record, before its frame leaves the inbox.
    EveryRecord,
    /// `fsync` after `records` records or `millis` ms, whichever comes
    /// first; frames leave the inbox after the sync that covers them.
    Batch { records: usize, millis: u64 },
}

/// Resolved `[log]`.
#[derive(Clone, Debug, PartialEq)]
pub struct LogSettings {
    pub rotate_bytes: u64,
    pub keep_files: usize,
    pub sync: SyncPolicy,
    pub level: String,
    /// Seconds between one-line summaries; 0: none.
    pub summary_seconds: u64,
}

/// Resolved `[archive]`.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Retention {
    /// 0: no age limit.
    pub keep_days: u64,
    /// 0: no size limit.
    pub keep_bytes: u64,
}

/// What is fixed while the daemon runs.
#[derive(Clone, Debug, PartialEq)]
pub struct StartConfig {
    pub folders: Folders,
    /// Detection threads; 0 means one per processor.
    pub workers: usize,
    /// Most pixels in detection at once over all workers: bounds detection
    /// memory whatever the number of workers (a larger frame runs alone).
    pub max_pixels_at_once: u64,
    /// Frames read but not yet logged, at most (`watch.queue`).
    pub queue: usize,
    /// `watch.settle_millis`.
    pub settle_millis: u64,
    /// `watch.events`: use the operating system's file events.
    pub events: bool,
    pub log: LogSettings,
    /// `[drift]`: the monitors' settings; `None` when turned off.
    pub monitors: Option<crate::monitor::MonitorSettings>,
    /// `[alerts]`.
    pub alerts: AlertSettings,
    /// `[status]`: the status endpoint; `None` when turned off.
    pub status: Option<StatusSettings>,
}

/// Resolved `[status]`.
#[derive(Clone, Debug, PartialEq)]
pub struct StatusSettings {
    /// Where it listens (loopback unless `allow_remote` was given).
    pub address: std::net::SocketAddr,
    /// No frame finished for this long while frames wait: not healthy.
    pub stall: std::time::Duration,
}

/// Resolved `[alerts]`, and the drift history's interval: what the
/// alerts thread does besides logging alerts.
#[derive(Clone, Debug, PartialEq)]
pub struct AlertSettings {
    /// The alert command as an argument vector (empty: none).
    pub command: Vec<String>,
    /// How long the command may run before it is killed.
    pub timeout: std::time::Duration,
    /// `drift.history_minutes`: how often the monitors' values are
    /// appended to the drift history (`None`: never).
    pub history: Option<std::time::Duration>,
}

impl StartConfig {
    /// The keys of `self` that differ in `new` (both with folders made
    /// [`Folders::absolute`] by the caller): what a reload cannot apply.
    pub fn restart_needed(&self, new: &StartConfig) -> Vec<&'static str> {
        let mut keys = Vec::new();
        for ((key, a), (_, b)) in self.folders.named().iter().zip(new.folders.named()) {
            if *a != b {
                keys.push(*key);
            }
        }
        let mut differs = |key: &'static str, d: bool| {
            if d {
                keys.push(key);
            }
        };
        differs("detection.workers", self.workers != new.workers);
        differs(
            "detection.max_pixels_at_once",
            self.max_pixels_at_once != new.max_pixels_at_once,
        );
        differs("watch.queue", self.queue != new.queue);
        differs(
            "watch.settle_millis",
            self.settle_millis != new.settle_millis,
        );
        differs("watch.events", self.events != new.events);
        differs(
            "log.rotate_bytes",
            self.log.rotate_bytes != new.log.rotate_bytes,
        );
        differs("log.keep_files", self.log.keep_files != new.log.keep_files);
        differs("log.sync", self.log.sync != new.log.sync);
        differs("log.level", self.log.level != new.log.level);
        differs("drift", self.monitors != new.monitors);
        differs(
            "alerts",
            self.alerts.command != new.alerts.command || self.alerts.timeout != new.alerts.timeout,
        );
        differs(
            "drift.history_minutes",
            self.alerts.history != new.alerts.history,
        );
        differs("status", self.status != new.status);
        differs(
            "log.summary_seconds",
            self.log.summary_seconds != new.log.summary_seconds,
        );
        keys
    }
}

/// What a reload swaps whole.
#[derive(Clone, Debug, PartialEq)]
pub struct LiveConfig {
    /// `[frames]` decoding limits and PNG options.
    pub limits: DecodeLimits,
    /// `frames.formats`: lower-case file name endings, without the dot.
    pub formats: Vec<String>,
    /// `[detection]` threshold, min_area, merge_distance.
    pub overrides: Overrides,
    /// `detection.window`: the window a model must have, when set.
    pub window: Option<Window>,
    /// `training.seed_data`: labelled frames a fresh box trains from.
    pub seed_data: Option<PathBuf>,
    /// `[training]`.
    pub training: TrainParams,
    /// `watch.rescan_seconds`.
    pub rescan_seconds: f64,
    /// `[archive]`.
    pub retention: Retention,
    /// `[retrain]`.
    pub retrain: RetrainSettings,
}

/// Resolved `[retrain]` (see `config/burlwatch.toml` for each key).
#[derive(Clone, Debug, PartialEq)]
pub struct RetrainSettings {
    pub enabled: bool,
    pub check_every: std::time::Duration,
    pub min_new_labels: u64,
    pub min_line_labels: u64,
    pub quiet_hours: Option<QuietHours>,
    pub gate_share: f64,
    pub margin: f64,
    pub tolerance: f64,
    pub older_lines: bool,
    pub budget: std::time::Duration,
    /// `retrain.on_error_drift`: an error-drift alert brings the next
    /// check forward.
    pub on_error_drift: bool,
}

/// A daily span of local time, start inclusive, end exclusive, in minutes
/// after midnight; it wraps midnight when `start > end`.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct QuietHours {
    pub start: u32,
    pub end: u32,
}

impl QuietHours {
    /// Parses "HH:MM-HH:MM".
    pub fn parse(s: &str) -> Option<QuietHours> {
        let minutes = |t: &str| -> Option<u32> {
            let (h, m) = t.trim().split_once(':')?;
            let (h, m): (u32, u32) = (h.parse().ok()?, m.parse().ok()?);
            (h < 24 && m < 60 && t.trim().len() == 5).then_some(h * 60 + m)
        };
        let (a, b) = s.split_once('-')?;
        let (start, end) = (minutes(a)?, minutes(b)?);
        (start != end).then_some(QuietHours { start, end })
    }

    /// Whether `minute` (after local midnight) falls inside.
    pub fn contains(&self, minute: u32) -> bool {
        if self.start < self.end {
            (self.start..self.end).contains(&minute)
        } else {
            minute >= self.start || minute < self.end
        }
    }
}

/// The resolved configuration.
#[derive(Clone, Debug, PartialEq)]
pub struct Config {
    pub start: StartConfig,
    pub live: LiveConfig,
}

/// Levels accepted by `log.level`.
pub const LEVELS: &[&str] = &["error", "warn", "info", "debug", "trace"];

impl Default for Config {
    fn default() -> Self {
        RawConfig::default().resolve().expect("defaults are valid")
    }
}

/// Parses and resolves configuration text.
pub fn from_str(text: &str) -> Result<Config> {
    RawConfig::parse(text)?.resolve()
}

/// Reads, parses and resolves a configuration file; errors name the file.
pub fn load(path: &Path) -> Result<Config> {
    let text = std::fs::read_to_string(path).map_err(|e| crate::Error::from(e).with_path(path))?;
    from_str(&text).map_err(|e| e.with_path(path))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn example_file_is_valid() {
        let text = include_str!("../../config/burlwatch.toml");
        let c = from_str(text).expect("config/burlwatch.toml");
        assert_eq!(
            c.live.seed_data.as_deref(),
            Some(Path::new("demo-frames/train"))
        );
        // The file states the defaults.
        assert_eq!(c, from_str("").unwrap());
        assert_eq!(
            c.start.monitors,
            Some(crate::monitor::MonitorSettings::default())
        );
    }

    #[test]
    fn quiet_hours_wrap_midnight() {
        let q = QuietHours::parse("22:00-06:30").unwrap();
        assert!(q.contains(22 * 60) && q.contains(0) && q.contains(6 * 60 + 29));
        assert!(!q.contains(6 * 60 + 30) && !q.contains(12 * 60));
        let d = QuietHours::parse("12:00-13:00").unwrap();
        assert!(d.contains(12 * 60) && !d.contains(13 * 60) && !d.contains(11 * 60));
        for bad in [
            "",
            "12:00",
            "25:00-01:00",
            "1:00-2:00",
            "12:00-12:00",
            "ab:cd-01:00",
        ] {
            assert!(QuietHours::parse(bad).is_none(), "{bad}");
        }
        let e = from_str("[retrain]\nquiet_hours = \"late\"\n").unwrap_err();
        assert!(e.to_string().contains("retrain.quiet_hours"), "{e}");
        let e = from_str("[retrain]\ngate_share = 0.95\n").unwrap_err();
        assert!(e.to_string().contains("retrain.gate_share"), "{e}");
    }

    #[test]
    fn system_file_is_valid() {
        let c = from_str(include_str!("../../config/system.toml")).expect("config/system.toml");
        assert_eq!(c.start.folders.logs, Path::new("/var/log/burlwatch"));
        assert_eq!(c.start.log.sync, SyncPolicy::EveryRecord);
        assert_eq!(
            c.live.seed_data.as_deref(),
            Some(Path::new("/usr/local/share/burlwatch/seed"))
        );
        assert!(from_str("[training]\nseed_data = \"\"\n")
            .unwrap()
            .live
            .seed_data
            .is_none());
    }

    #[test]
    fn relative_and_absolute_spellings_of_one_folder_need_no_restart() {
        let d = tempfile::tempdir().unwrap();
        let inbox = d.path().join("in");
        std::fs::create_dir_all(&inbox).unwrap();
        let cwd = std::env::current_dir().unwrap();
        let rel = pathdiff(&inbox, &cwd);
        let mut a = Config::default().start;
        a.folders.inbox = inbox.clone();
        let mut b = a.clone();
        b.folders.inbox = rel;
        a.folders = a.folders.absolute().unwrap();
        b.folders = b.folders.absolute().unwrap();
        assert!(
            a.restart_needed(&b).is_empty(),
            "{:?}",
            a.restart_needed(&b)
        );
        b.queue += 1;
        b.log.sync = SyncPolicy::Batch {
            records: 8,
            millis: 20,
        };
        b.folders.archive = inbox;
        assert_eq!(
            a.restart_needed(&b),
            ["folders.archive", "watch.queue", "log.sync"]
        );
    }

    /// `path` spelled relative to `base` with `..` steps.
    fn pathdiff(path: &Path, base: &Path) -> PathBuf {
        let (p, b): (Vec<_>, Vec<_>) = (path.components().collect(), base.components().collect());
        let common = p.iter().zip(&b).take_while(|(x, y)| x == y).count();
        let mut out = PathBuf::new();
        for _ in common..b.len() {
            out.push("..");
        }
        for c in &p[common..] {
            out.push(c);
        }
        out
    }
}
