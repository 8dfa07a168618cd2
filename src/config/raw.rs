//! The configuration file as written: every key optional, unknown keys
//! rejected, and the resolving step that checks values and fills defaults
//! (see the parent module for the two stages). Each key is documented
//! where it is defined, and in `config/burlwatch.toml`.

use std::path::PathBuf;

use serde::Deserialize;

use super::{
    AlertSettings, Config, Folders, LiveConfig, LogSettings, QuietHours, Retention,
    RetrainSettings, StartConfig, StatusSettings, SyncPolicy, LEVELS,
};
use crate::codec::DecodeLimits;
use crate::error::{Error, Result};
use crate::learn::symmetry::Symmetry;
use crate::learn::{ClassWeight, Criterion, TrainParams};
use crate::model::{Overrides, MAX_MERGE_DISTANCE};
use crate::window::Window;

/// `training.memory_mb` when not given: what growing the trees may take on
/// a small box, above the bound of the demo's 120 frames (1,088 MiB, two
/// trees at a time) and of the daemon's retrain of 2 million labelled
/// pixels.
pub const DEFAULT_MEMORY_MB: u64 = 2048;
/// The range `training.memory_mb` must fall in (1 TiB at most).
pub const MIN_MEMORY_MB: u64 = 16;
pub const MAX_MEMORY_MB: u64 = 1 << 20;

/// `[frames]`: how frame files are decoded.
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawFrames {
    /// Largest accepted width in pixels (default 8192).
    pub max_width: Option<usize>,
    /// Largest accepted height in pixels (default 8192).
    pub max_height: Option<usize>,
    /// PNG: pixels with 8-bit luma below this are set (default 128).
    pub png_threshold: Option<u8>,
    /// PNG: set the light pixels instead (default false).
    pub png_invert: Option<bool>,
    /// File name endings the daemon takes as frames (default ["pbm", "png"]).
    pub formats: Option<Vec<String>>,
}

/// `[training]`: how models are learned.
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawTraining {
    /// Folder of labelled frames a fresh model is trained from (default
    /// "demo-frames/train"; "" for none).
    pub seed_data: Option<PathBuf>,
    /// Window side: 3, 5, 7, 9 or 11 (default 11).
    pub window: Option<u8>,
    /// "gini", "entropy" or "gain-ratio" (default "entropy").
    pub criterion: Option<String>,
    /// Deepest level of splits (default 48).
    pub max_depth: Option<u32>,
    /// Least weighted pixels on each side of a split (default 1).
    pub min_leaf: Option<f64>,
    /// Least decrease of the tree's weighted impurity per split (default 0).
    pub min_gain: Option<f64>,
    /// "none", "balanced" or "CLEAR:TARGET" (default "balanced").
    pub class_weight: Option<String>,
    /// Share of frames held out to choose pruning and settings (default 0.2).
    pub holdout: Option<f64>,
    /// Grow the final tree again on all frames after tuning (default false).
    pub refit: Option<bool>,
    /// Cross-fitted tuning over this many shares of the frames (default
    /// 3; 0: tune on the holdout share).
    pub folds: Option<usize>,
    /// Let tuning try smoothing the detection mask (default false).
    pub smoothing: Option<bool>,
    /// The fabric's symmetries: "none", "mirrors" or "square".
    pub symmetry: Option<String>,
    /// Most memory growing the trees may take, in MiB (default 2048).
    pub memory_mb: Option<u64>,
}

/// `[detection]`: overrides of the settings a model carries.
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawDetection {
    /// Score a pixel must reach (default: the model's own).
    pub threshold: Option<f64>,
    /// Smallest object kept, in pixels (default: the model's own).
    pub min_area: Option<u32>,
    /// Components this many clear pixels apart merge (default: the model's own).
    pub merge_distance: Option<u32>,
    /// Detection threads (default 0: one per processor).
    pub workers: Option<usize>,
    /// Most pixels in detection at once, over all workers (default
    /// 67,108,864: one 8192 x 8192 frame).
    pub max_pixels_at_once: Option<u64>,
    /// When set, a model with another window is refused.
    pub window: Option<u8>,
}

/// The default of `detection.max_pixels_at_once`: one frame of the
/// default largest size, 8192 x 8192.
pub const DEFAULT_PIXELS_AT_ONCE: u64 = 8192 * 8192;

/// `[folders]`: where the daemon reads and writes.
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawFolders {
    /// Frames arrive here (default "var/inbox").
    pub inbox: Option<PathBuf>,
    /// Logged frames move here (default "var/archive").
    pub archive: Option<PathBuf>,
    /// Frames that cannot be read move here (default "var/rejected").
    pub rejected: Option<PathBuf>,
    /// The operator's correction files (default "var/corrections").
    pub corrections: Option<PathBuf>,
    /// Models, the lock file (default "var/state").
    pub state: Option<PathBuf>,
    /// The detection log (default "var/logs").
    pub logs: Option<PathBuf>,
}

/// `[watch]`: how the inbox is watched.
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawWatch {
    /// A file seen without a close-after-write event is read only once its
    /// size and time stamp have not changed for this long (default 500).
    pub settle_millis: Option<u64>,
    /// The inbox is listed again this often, whatever the events (default 5).
    pub rescan_seconds: Option<f64>,
    /// Frames read but not yet logged, at most (default 16).
    pub queue: Option<usize>,
    /// Use the operating system's file events (default true). Set false
    /// for network filesystems that deliver none: the inbox is then found
    /// by listing alone.
    pub events: Option<bool>,
}

/// `[log]`: the detection log and the daemon's own messages.
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawLog {
    /// Start a new log file past this size in bytes (default 64 MiB).
    pub rotate_bytes: Option<u64>,
    /// Log files kept, the current one included (default 10).
    pub keep_files: Option<usize>,
    /// "every-record" (default) or "batch".
    pub sync: Option<String>,
    /// With "batch": sync after this many records (default 64)...
    pub sync_records: Option<usize>,
    /// ...or this many milliseconds after the first unsynced one (default 200).
    pub sync_millis: Option<u64>,
    /// The daemon's own messages: "error", "warn", "info" (default),
    /// "debug" or "trace". `RUST_LOG` wins when set.
    pub level: Option<String>,
    /// Seconds between the daemon's one-line summaries (frames, objects,
    /// rejects since the last one), at info level (default 60; 0: none).
    pub summary_seconds: Option<u64>,
}

/// `[archive]`: how long archived frames are kept.
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawArchive {
    /// Archived frames older than this many days are deleted (default 30;
    /// 0 keeps them forever).
    pub keep_days: Option<u64>,
    /// The oldest archived frames are deleted while the archive is larger
    /// than this many bytes (default 10 GiB; 0: no limit).
    pub keep_bytes: Option<u64>,
}

/// `[retrain]`: when the daemon grows a challenger model from the
/// operator's corrections, and what it must do to be put in service.
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawRetrain {
    /// Scheduled retraining on or off (default true); `burlwatch retrain`
    /// works either way.
    pub enabled: Option<bool>,
    /// How often the daemon checks whether to retrain, minutes (default 60).
    pub check_minutes: Option<f64>,
    /// Labelled frames added since the running model was trained that make
    /// a scheduled retrain worth it (default 5).
    pub min_new_labels: Option<u64>,
    /// Labelled frames of the line now running needed before any retrain
    /// (default 8).
    pub min_line_labels: Option<u64>,
    /// "HH:MM-HH:MM", local time: no scheduled retrain starts then
    /// (default: none). May wrap midnight ("22:00-06:00").
    pub quiet_hours: Option<String>,
    /// Share of labelled frames held out for the gate, chosen by content
    /// hash (default 0.3).
    pub gate_share: Option<f64>,
    /// Object F1 a challenger must gain over the running model on the
    /// line's held-out frames (default 0; ties keep the running model).
    pub margin: Option<f64>,
    /// Object F1 a challenger may lose on older lines' held-out frames
    /// when the running model was trained for the line now running (no
    /// changeover since it was trained) (default 0.05).
    pub tolerance: Option<f64>,
    /// Train on older lines' labels (and the seed data) too, not only the
    /// line now running (default true: measured to help until a line has
    /// several dozen labelled frames; see README).
    pub older_lines: Option<bool>,
    /// Seconds a retrain may run before it is abandoned, checked while its
    /// tree grows and between its stages (default 600).
    pub budget_seconds: Option<f64>,
    /// An error-drift alert brings the next retrain check forward (default
    /// true).
    pub on_error_drift: Option<bool>,
}

/// `[drift]`: the drift monitors (README, "Drift monitors").
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawDrift {
    /// The monitors on or off (default true).
    pub enabled: Option<bool>,
    /// Frames in the input windows and the output monitors' recent mean
    /// (default 50).
    pub window_frames: Option<usize>,
    /// Pixels per frame walked down the tree for the leaf groups (default
    /// 32).
    pub leaf_samples: Option<usize>,
    /// PSI at which an input statistic is watched (default 0.1).
    pub psi_watch: Option<f64>,
    /// PSI at which it alerts (default 0.25).
    pub psi_alert: Option<f64>,
    /// A raised level is lowered below this fraction of its threshold
    /// (default 0.8).
    pub clear_fraction: Option<f64>,
    /// Frames of a new model that set the output monitors' level (default
    /// 100).
    pub warmup_frames: Option<u64>,
    /// Page-Hinkley delta, in standard deviations (default 0.25).
    pub output_delta: Option<f64>,
    /// Page-Hinkley threshold, in standard deviations (default 40).
    pub output_threshold: Option<f64>,
    /// Corrections before the error monitor tests its levels (default 30).
    pub error_warm_start: Option<u64>,
    /// Minutes between two lines of the drift history, `logs/drift.jsonl`
    /// (default 5; 0: none kept).
    pub history_minutes: Option<f64>,
}

/// `[alerts]`: what happens when a monitor's level changes.
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawAlerts {
    /// A command run for every alert, as an argument vector (never through
    /// a shell), with the alert as JSON on its standard input.
    pub command: Option<Vec<String>>,
    /// Seconds the command may run before it is killed (default 10).
    pub timeout_seconds: Option<f64>,
    /// Least minutes between two announcements of the same raise (default
    /// 30).
    pub repeat_minutes: Option<f64>,
}

/// `[status]`: the status endpoint (`/metrics`, `/healthz`).
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawStatus {
    /// On or off (default true).
    pub enabled: Option<bool>,
    /// Address and port (default "127.0.0.1:9737"); port 0 picks a free one.
    pub address: Option<String>,
    /// Listen on an address other hosts can reach (default false: only a
    /// loopback address is taken).
    pub allow_remote: Option<bool>,
    /// Seconds without a finished frame, while frames wait, before the
    /// daemon is reported unhealthy (default 60).
    pub stall_seconds: Option<f64>,
}

/// The file as written.
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawConfig {
    #[serde(default)]
    pub frames: RawFrames,
    #[serde(default)]
    pub training: RawTraining,
    #[serde(default)]
    pub detection: RawDetection,
    #[serde(default)]
    pub folders: RawFolders,
    #[serde(default)]
    pub watch: RawWatch,
    #[serde(default)]
    pub log: RawLog,
    #[serde(default)]
    pub archive: RawArchive,
    #[serde(default)]
    pub retrain: RawRetrain,
    #[serde(default)]
    pub drift: RawDrift,
    #[serde(default)]
    pub alerts: RawAlerts,
    #[serde(default)]
    pub status: RawStatus,
}

fn invalid(key: &str, msg: impl std::fmt::Display) -> Error {
    Error::config(key, msg)
}

impl RawConfig {
    /// Parses TOML text (no path: the caller attaches it to errors). An
    /// error names the key by its whole path and gives the line.
    pub fn parse(text: &str) -> Result<RawConfig> {
        serde_path_to_error::deserialize(toml::Deserializer::new(text)).map_err(|e| {
            let key = e.path().to_string();
            let inner = e.into_inner();
            let line = inner
                .span()
                .map(|sp| text[..sp.start.min(text.len())].matches('\n').count() + 1);
            let mut message = inner.message().trim_end().to_string();
            if message.starts_with("unknown field") {
                message = format!("unknown key ({message})");
            }
            if let Some(line) = line {
                message.push_str(&format!(" (line {line})"));
            }
            // The parser's own path for a syntax error is ".": no key.
            let key = if key == "." { String::new() } else { key };
            Error::config(key, message)
        })
    }

    /// Checks every value and fills in defaults.
    pub fn resolve(self) -> Result<Config> {
        let d = DecodeLimits::default();
        let f = self.frames;
        let limits = DecodeLimits {
            max_width: f.max_width.unwrap_or(d.max_width),
            max_height: f.max_height.unwrap_or(d.max_height),
            png_threshold: f.png_threshold.unwrap_or(d.png_threshold),
            png_invert: f.png_invert.unwrap_or(d.png_invert),
        };
        if limits.max_width == 0 || limits.max_height == 0 {
            return Err(invalid(
                "frames.max_width / frames.max_height",
                "must be at least 1",
            ));
        }
        let t = self.training;
        let dt = TrainParams::default();
        let window = match t.window {
            None => dt.window,
            Some(s) => Window::new(s).ok_or_else(|| {
                invalid("training.window", format!("{s} is not 3, 5, 7, 9 or 11"))
            })?,
        };
        let criterion = match t.criterion.as_deref() {
            None => dt.criterion,
            Some(c) => Criterion::parse(c).ok_or_else(|| {
                invalid(
                    "training.criterion",
                    format!("{c:?} is not \"gini\", \"entropy\" or \"gain-ratio\""),
                )
            })?,
        };
        let class_weight = match t.class_weight.as_deref() {
            None => dt.class_weight,
            Some(c) => ClassWeight::parse(c).ok_or_else(|| {
                invalid(
                    "training.class_weight",
                    format!("{c:?} is not \"none\", \"balanced\" or \"CLEAR:TARGET\""),
                )
            })?,
        };
        let (symmetry, choose_symmetry) = match t.symmetry.as_deref() {
            None => (dt.symmetry, dt.choose_symmetry),
            Some(s) => Symmetry::parse_setting(s).ok_or_else(|| {
                invalid(
                    "training.symmetry",
                    format!("{s:?} is not \"none\", \"mirrors\", \"square\" or \"choose\""),
                )
            })?,
        };
        let memory_mb = t.memory_mb.unwrap_or(DEFAULT_MEMORY_MB);
        if !(MIN_MEMORY_MB..=MAX_MEMORY_MB).contains(&memory_mb) {
            return Err(invalid(
                "training.memory_mb",
                format!("{memory_mb} is outside {MIN_MEMORY_MB}..={MAX_MEMORY_MB}"),
            ));
        }
        let det = self.detection;
        let training = TrainParams {
            window,
            criterion,
            max_depth: t.max_depth.unwrap_or(dt.max_depth),
            min_leaf: t.min_leaf.unwrap_or(dt.min_leaf),
            min_gain: t.min_gain.unwrap_or(dt.min_gain),
            class_weight,
            holdout: t.holdout.unwrap_or(dt.holdout),
            refit: t.refit.unwrap_or(dt.refit),
            folds: t.folds.unwrap_or(dt.folds),
            smoothing: t.smoothing.unwrap_or(dt.smoothing),
            symmetry,
            choose_symmetry,
            memory_limit: Some(memory_mb << 20),
            ..dt
        };
        training
            .validate()
            .map_err(|e| invalid("training", e.kind()))?;
        if let Some(th) = det.threshold {
            if !(0.0..=1.0).contains(&th) {
                return Err(invalid(
                    "detection.threshold",
                    format!("{th} is outside [0, 1]"),
                ));
            }
        }
        if det.min_area == Some(0) {
            return Err(invalid("detection.min_area", "must be at least 1"));
        }
        if let Some(m) = det.merge_distance {
            if m > MAX_MERGE_DISTANCE {
                return Err(invalid(
                    "detection.merge_distance",
                    format!("{m} is over the limit of {}", MAX_MERGE_DISTANCE),
                ));
            }
        }
        let workers = det.workers.unwrap_or(0);
        if workers > 256 {
            return Err(invalid(
                "detection.workers",
                format!("{workers} is over the limit of 256"),
            ));
        }
        let max_pixels_at_once = det.max_pixels_at_once.unwrap_or(DEFAULT_PIXELS_AT_ONCE);
        if max_pixels_at_once < 65_536 {
            return Err(invalid(
                "detection.max_pixels_at_once",
                format!("{max_pixels_at_once} is under the least of 65536 (256 x 256)"),
            ));
        }
        let window = match det.window {
            None => None,
            Some(s) => Some(Window::new(s).ok_or_else(|| {
                invalid("detection.window", format!("{s} is not 3, 5, 7, 9 or 11"))
            })?),
        };
        let fo = self.folders;
        let var = PathBuf::from("var");
        let folders = Folders {
            inbox: fo.inbox.unwrap_or_else(|| var.join("inbox")),
            archive: fo.archive.unwrap_or_else(|| var.join("archive")),
            rejected: fo.rejected.unwrap_or_else(|| var.join("rejected")),
            corrections: fo.corrections.unwrap_or_else(|| var.join("corrections")),
            state: fo.state.unwrap_or_else(|| var.join("state")),
            logs: fo.logs.unwrap_or_else(|| var.join("logs")),
        };
        let all = folders.named();
        for (i, (key, path)) in all.iter().enumerate() {
            if path.as_os_str().is_empty() {
                return Err(invalid(key, "must not be empty"));
            }
            if let Some((other, _)) = all[..i].iter().find(|(_, p)| p == path) {
                return Err(invalid(
                    key,
                    format!(
                        "{} is also {other}; every folder must be its own",
                        path.display()
                    ),
                ));
            }
        }
        let w = self.watch;
        let formats: Vec<String> = match f.formats {
            None => vec!["pbm".into(), "png".into()],
            Some(v) => v
                .iter()
                .map(|f| f.trim_start_matches('.').to_ascii_lowercase())
                .collect(),
        };
        if formats.is_empty() {
            return Err(invalid(
                "frames.formats",
                "must list at least one of \"pbm\", \"png\"",
            ));
        }
        if let Some(f) = formats
            .iter()
            .find(|f| !["pbm", "png"].contains(&f.as_str()))
        {
            return Err(invalid(
                "frames.formats",
                format!("{f:?} is not \"pbm\" or \"png\""),
            ));
        }
        let settle_millis = w.settle_millis.unwrap_or(500);
        if settle_millis > 600_000 {
            return Err(invalid(
                "watch.settle_millis",
                "must be at most 600000 (10 minutes)",
            ));
        }
        let rescan_seconds = w.rescan_seconds.unwrap_or(5.0);
        if !(0.05..=3600.0).contains(&rescan_seconds) {
            return Err(invalid(
                "watch.rescan_seconds",
                format!("{rescan_seconds} is outside 0.05..=3600"),
            ));
        }
        let queue = w.queue.unwrap_or(16);
        if !(1..=4096).contains(&queue) {
            return Err(invalid(
                "watch.queue",
                format!("{queue} is outside 1..=4096"),
            ));
        }
        let l = self.log;
        let rotate_bytes = l.rotate_bytes.unwrap_or(64 << 20);
        if rotate_bytes < 4096 {
            return Err(invalid("log.rotate_bytes", "must be at least 4096"));
        }
        let keep_files = l.keep_files.unwrap_or(10);
        // Two at least: a restart reads back the newest rotated file too.
        if !(2..=100_000).contains(&keep_files) {
            return Err(invalid(
                "log.keep_files",
                format!("{keep_files} is outside 2..=100000"),
            ));
        }
        let sync_records = l.sync_records.unwrap_or(64);
        let sync_millis = l.sync_millis.unwrap_or(200);
        if sync_records == 0 || sync_records > 1_000_000 {
            return Err(invalid("log.sync_records", "must be between 1 and 1000000"));
        }
        if sync_millis > 60_000 {
            return Err(invalid("log.sync_millis", "must be at most 60000"));
        }
        let sync = match l.sync.as_deref() {
            None | Some("every-record") => SyncPolicy::EveryRecord,
            Some("batch") => SyncPolicy::Batch {
                records: sync_records,
                millis: sync_millis,
            },
            Some(o) => {
                return Err(invalid(
                    "log.sync",
                    format!("{o:?} is not \"every-record\" or \"batch\""),
                ))
            }
        };
        let summary_seconds = l.summary_seconds.unwrap_or(60);
        if summary_seconds > 86_400 {
            return Err(invalid(
                "log.summary_seconds",
                "must be at most 86400 (a day)",
            ));
        }
        let level = l.level.unwrap_or_else(|| "info".into());
        if !LEVELS.contains(&level.as_str()) {
            return Err(invalid(
                "log.level",
                format!("{level:?} is not one of {}", LEVELS.join(", ")),
            ));
        }
        let retrain = resolve_retrain(self.retrain)?;
        let (monitors, alerts) = resolve_drift(self.drift, self.alerts)?;
        let status = resolve_status(self.status)?;
        let a = self.archive;
        let overrides = Overrides {
            threshold: det.threshold,
            min_area: det.min_area,
            merge_distance: det.merge_distance,
        };
        Ok(Config {
            start: StartConfig {
                folders,
                workers,
                max_pixels_at_once,
                queue,
                settle_millis,
                events: w.events.unwrap_or(true),
                log: LogSettings {
                    rotate_bytes,
                    keep_files,
                    sync,
                    level,
                    summary_seconds,
                },
                monitors,
                alerts,
                status,
            },
            live: LiveConfig {
                limits,
                formats,
                overrides,
                window,
                seed_data: match t.seed_data {
                    None => Some(PathBuf::from("demo-frames/train")),
                    Some(p) if p.as_os_str().is_empty() => None,
                    Some(p) => Some(p),
                },
                training,
                rescan_seconds,
                retrain,
                retention: Retention {
                    keep_days: a.keep_days.unwrap_or(30),
                    keep_bytes: a.keep_bytes.unwrap_or(10 << 30),
                },
            },
        })
    }
}

/// Checks `[retrain]` and fills its defaults.
fn resolve_retrain(r: RawRetrain) -> Result<RetrainSettings> {
    let unit = |key: &str, v: f64| -> Result<f64> {
        if (0.0..=1.0).contains(&v) {
            Ok(v)
        } else {
            Err(invalid(key, format!("{v} is outside [0, 1]")))
        }
    };
    let check_minutes = r.check_minutes.unwrap_or(60.0);
    if !(0.001..=10_080.0).contains(&check_minutes) {
        return Err(invalid(
            "retrain.check_minutes",
            format!("{check_minutes} is outside 0.001..=10080 (a week)"),
        ));
    }
    let min_line_labels = r.min_line_labels.unwrap_or(8);
    if !(2..=1_000_000).contains(&min_line_labels) {
        return Err(invalid(
            "retrain.min_line_labels",
            format!("{min_line_labels} is outside 2..=1000000"),
        ));
    }
    let gate_share = r.gate_share.unwrap_or(0.3);
    if !(0.05..=0.9).contains(&gate_share) {
        return Err(invalid(
            "retrain.gate_share",
            format!("{gate_share} is outside 0.05..=0.9"),
        ));
    }
    let budget_seconds = r.budget_seconds.unwrap_or(600.0);
    if !(1.0..=86_400.0).contains(&budget_seconds) {
        return Err(invalid(
            "retrain.budget_seconds",
            format!("{budget_seconds} is outside 1..=86400"),
        ));
    }
    let quiet_hours = match r.quiet_hours.as_deref() {
        None | Some("") => None,
        Some(q) => Some(QuietHours::parse(q).ok_or_else(|| {
            invalid(
                "retrain.quiet_hours",
                format!("{q:?} is not \"HH:MM-HH:MM\""),
            )
        })?),
    };
    Ok(RetrainSettings {
        enabled: r.enabled.unwrap_or(true),
        check_every: std::time::Duration::from_secs_f64(check_minutes * 60.0),
        min_new_labels: r.min_new_labels.unwrap_or(5).max(1),
        min_line_labels,
        quiet_hours,
        gate_share,
        margin: unit("retrain.margin", r.margin.unwrap_or(0.0))?,
        tolerance: unit("retrain.tolerance", r.tolerance.unwrap_or(0.05))?,
        older_lines: r.older_lines.unwrap_or(true),
        budget: std::time::Duration::from_secs_f64(budget_seconds),
        on_error_drift: r.on_error_drift.unwrap_or(true),
    })
}

/// The status endpoint's default address: loopback only.
pub const STATUS_ADDRESS: &str = "127.0.0.1:9737";

/// Checks `[status]` and fills its defaults.
fn resolve_status(r: RawStatus) -> Result<Option<StatusSettings>> {
    if !r.enabled.unwrap_or(true) {
        return Ok(None);
    }
    let text = r.address.unwrap_or_else(|| STATUS_ADDRESS.into());
    let address: std::net::SocketAddr = text.parse().map_err(|_| {
        invalid(
            "status.address",
            format!("{text:?} is not an address and port such as \"127.0.0.1:9737\""),
        )
    })?;
    if !address.ip().is_loopback() && !r.allow_remote.unwrap_or(false) {
        return Err(invalid(
            "status.address",
            format!(
                "{address} can be reached from other hosts; use a loopback address (127.0.0.1), \
                 or set status.allow_remote = true to mean it"
            ),
        ));
    }
    let stall = r.stall_seconds.unwrap_or(60.0);
    if !(1.0..=86_400.0).contains(&stall) {
        return Err(invalid(
            "status.stall_seconds",
            format!("{stall} is outside 1..=86400"),
        ));
    }
    Ok(Some(StatusSettings {
        address,
        stall: std::time::Duration::from_secs_f64(stall),
    }))
}

/// Checks `[drift]` and `[alerts]` and fills their defaults.
fn resolve_drift(
    d: RawDrift,
    a: RawAlerts,
) -> Result<(Option<crate::monitor::MonitorSettings>, AlertSettings)> {
    let within = |key: &str, v: f64, lo: f64, hi: f64| -> Result<f64> {
        if v.is_finite() && (lo..=hi).contains(&v) {
            Ok(v)
        } else {
            Err(invalid(key, format!("{v} is outside {lo}..={hi}")))
        }
    };
    let base = crate::monitor::MonitorSettings::default();
    let window = d.window_frames.unwrap_or(base.window);
    if !(5..=100_000).contains(&window) {
        return Err(invalid(
            "drift.window_frames",
            format!("{window} is outside 5..=100000"),
        ));
    }
    let samples = d.leaf_samples.unwrap_or(base.samples);
    if !(1..=65_536).contains(&samples) {
        return Err(invalid(
            "drift.leaf_samples",
            format!("{samples} is outside 1..=65536"),
        ));
    }
    let psi_watch = within(
        "drift.psi_watch",
        d.psi_watch.unwrap_or(base.psi_watch),
        0.001,
        10.0,
    )?;
    let psi_alert = within(
        "drift.psi_alert",
        d.psi_alert.unwrap_or(base.psi_alert),
        0.001,
        10.0,
    )?;
    if psi_alert <= psi_watch {
        return Err(invalid(
            "drift.psi_alert",
            format!("{psi_alert} must be above drift.psi_watch ({psi_watch})"),
        ));
    }
    let clear = within(
        "drift.clear_fraction",
        d.clear_fraction.unwrap_or(base.clear),
        0.1,
        1.0,
    )?;
    let warmup = d.warmup_frames.unwrap_or(base.warmup);
    if !(10..=1_000_000).contains(&warmup) {
        return Err(invalid(
            "drift.warmup_frames",
            format!("{warmup} is outside 10..=1000000"),
        ));
    }
    let output_delta = within(
        "drift.output_delta",
        d.output_delta.unwrap_or(base.output_delta),
        0.0,
        10.0,
    )?;
    let output_threshold = within(
        "drift.output_threshold",
        d.output_threshold.unwrap_or(base.output_threshold),
        1.0,
        10_000.0,
    )?;
    let warm_start = d.error_warm_start.unwrap_or(base.ddm.warm_start);
    if !(5..=100_000).contains(&warm_start) {
        return Err(invalid(
            "drift.error_warm_start",
            format!("{warm_start} is outside 5..=100000"),
        ));
    }
    let timeout = within(
        "alerts.timeout_seconds",
        a.timeout_seconds.unwrap_or(10.0),
        0.1,
        3600.0,
    )?;
    let repeat = within(
        "alerts.repeat_minutes",
        a.repeat_minutes.unwrap_or(30.0),
        0.0,
        10_080.0,
    )?;
    let history = within(
        "drift.history_minutes",
        d.history_minutes.unwrap_or(5.0),
        0.0,
        1440.0,
    )?;
    let command = a.command.unwrap_or_default();
    if command.first().is_some_and(|c| c.is_empty()) {
        return Err(invalid(
            "alerts.command",
            "the program (its first word) is empty",
        ));
    }
    let monitors = d
        .enabled
        .unwrap_or(true)
        .then_some(crate::monitor::MonitorSettings {
            window,
            samples,
            psi_watch,
            psi_alert,
            clear,
            warmup,
            output_delta,
            output_threshold,
            ddm: crate::drift::DdmParams {
                warm_start,
                ..base.ddm
            },
            repeat_seconds: repeat * 60.0,
            ..base
        });
    Ok((
        monitors,
        AlertSettings {
            command,
            timeout: std::time::Duration::from_secs_f64(timeout),
            history: (history > 0.0).then(|| std::time::Duration::from_secs_f64(history * 60.0)),
        },
    ))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::from_str;

    #[test]
    fn the_status_endpoint_is_loopback_unless_told() {
        let e = from_str("[status]\naddress = \"0.0.0.0:9737\"\n")
            .unwrap_err()
            .to_string();
        assert!(
            e.contains("status.address") && e.contains("allow_remote"),
            "{e}"
        );
        let c = from_str("[status]\naddress = \"0.0.0.0:9737\"\nallow_remote = true\n").unwrap();
        assert_eq!(c.start.status.unwrap().address.to_string(), "0.0.0.0:9737");
        let c = from_str("").unwrap();
        assert_eq!(c.start.status.unwrap().address.to_string(), STATUS_ADDRESS);
        assert_eq!(
            from_str("[status]\nenabled = false\n")
                .unwrap()
                .start
                .status,
            None
        );
        let e = from_str("[status]\naddress = \"localhost\"\n")
            .unwrap_err()
            .to_string();
        assert!(e.contains("status.address"), "{e}");
    }

    #[test]
    fn drift_and_alert_settings_are_checked() {
        for (text, want) in [
            (
                "[drift]\npsi_watch = 0.3\npsi_alert = 0.2\n",
                "drift.psi_alert",
            ),
            ("[drift]\nwindow_frames = 2\n", "drift.window_frames"),
            ("[drift]\nclear_fraction = 1.5\n", "drift.clear_fraction"),
            ("[alerts]\ncommand = [\"\"]\n", "alerts.command"),
            ("[alerts]\ncommand = \"notify --all\"\n", "alerts.command"),
            ("[alerts]\ntimeout_seconds = 0\n", "alerts.timeout_seconds"),
            ("[drift]\nhistory_minutes = -1\n", "drift.history_minutes"),
        ] {
            let e = from_str(text).unwrap_err().to_string();
            assert!(e.contains(want), "{want:?} in {e:?}");
        }
        let c = from_str(
            "[drift]\nenabled = false\n[alerts]\ncommand = [\"/usr/bin/logger\", \"-t\", \"loom\"]\nrepeat_minutes = 0\n",
        )
        .unwrap();
        assert_eq!(c.start.monitors, None);
        assert_eq!(c.start.alerts.command, ["/usr/bin/logger", "-t", "loom"]);
        let c = from_str("[alerts]\nrepeat_minutes = 5\n").unwrap();
        assert_eq!(c.start.monitors.unwrap().repeat_seconds, 300.0);
        assert_eq!(
            c.start.alerts.history,
            Some(std::time::Duration::from_secs(300))
        );
        let c = from_str("[drift]\nhistory_minutes = 0\n").unwrap();
        assert_eq!(c.start.alerts.history, None);
    }

    #[test]
    fn unknown_keys_and_bad_values_are_named() {
        let e = from_str("[training]\ndepth = 3\n").unwrap_err().to_string();
        assert!(e.contains("training.depth") && e.contains("line 2"), "{e}");
        let e = from_str("[log]\nsync = \"batch\"\n\n[archive]\nkeep = 3\n")
            .unwrap_err()
            .to_string();
        assert!(
            e.contains("archive.keep: unknown key") && e.contains("line 5"),
            "{e}"
        );
        let e = from_str("[frames]\nmax_width = \"wide\"\n")
            .unwrap_err()
            .to_string();
        assert!(e.contains("max_width"), "{e}");
        let e = from_str("[training]\ncriterion = \"purity\"\n")
            .unwrap_err()
            .to_string();
        assert!(e.contains("training.criterion"), "{e}");
        let e = from_str("[training]\nsymmetry = \"round\"\n")
            .unwrap_err()
            .to_string();
        assert!(
            e.contains("training.symmetry") && e.contains("square"),
            "{e}"
        );
        // The memory bound: 2 GiB unless given, in MiB, within 16 MiB..1 TiB.
        assert_eq!(
            from_str("").unwrap().live.training.memory_limit,
            Some(2048 << 20)
        );
        assert_eq!(
            from_str("[training]\nmemory_mb = 512\n")
                .unwrap()
                .live
                .training
                .memory_limit,
            Some(512 << 20)
        );
        for bad in ["0", "8", "2000000"] {
            let e = from_str(&format!("[training]\nmemory_mb = {bad}\n"))
                .unwrap_err()
                .to_string();
            assert!(
                e.contains("training.memory_mb") && e.contains("16..=1048576"),
                "{e}"
            );
        }
        let e = from_str("[training]\nmemory_mb = -5\n")
            .unwrap_err()
            .to_string();
        assert!(e.contains("memory_mb"), "{e}");
        let c = from_str("[training]\nsymmetry = \"mirrors\"\n").unwrap();
        assert_eq!(
            c.live.training.symmetry,
            crate::learn::symmetry::Symmetry::Mirrors
        );
        assert!(!c.live.training.choose_symmetry);
        let c = from_str("[training]\nsymmetry = \"choose\"\n").unwrap();
        assert!(c.live.training.choose_symmetry);
        assert!(!from_str("").unwrap().live.training.choose_symmetry);
        let e = from_str("[detection]\nthreshold = 2.0\n")
            .unwrap_err()
            .to_string();
        assert!(e.contains("detection.threshold"), "{e}");
        // A misspelled section is named as written, with no stray dot
        // (issue "First run and everyday use", point 8).
        let e = from_str("[wacth]\nqueue = 4\n").unwrap_err().to_string();
        assert!(e.contains("configuration: wacth: unknown key"), "{e}");
        assert!(!e.contains(".wacth"), "{e}");
        let e = from_str("[camera]\n").unwrap_err().to_string();
        assert!(e.contains("camera"), "{e}");
        let e = from_str("[log]\nsync = \"sometimes\"\n")
            .unwrap_err()
            .to_string();
        assert!(e.contains("log.sync") && e.contains("every-record"), "{e}");
        let e = from_str("[folders]\ninbox = \"a\"\narchive = \"a\"\n")
            .unwrap_err()
            .to_string();
        assert!(
            e.contains("folders.archive") && e.contains("folders.inbox"),
            "{e}"
        );
        let e = from_str("[frames]\nformats = [\"jpg\"]\n")
            .unwrap_err()
            .to_string();
        assert!(e.contains("frames.formats"), "{e}");
        let e = from_str("[watch]\nqueue = \"big\"\n")
            .unwrap_err()
            .to_string();
        assert!(e.contains("queue"), "{e}");
        let c = from_str("[log]\nsync = \"batch\"\nsync_records = 8\n").unwrap();
        assert_eq!(
            c.start.log.sync,
            SyncPolicy::Batch {
                records: 8,
                millis: 200
            }
        );
        assert_eq!(from_str("").unwrap(), Config::default());
    }
}
