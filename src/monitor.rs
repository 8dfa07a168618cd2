//! The drift monitors' logic: what each monitor keeps, when its level
//! changes, and which changes are announced as alerts. Pure: frame
//! statistics, corrections' error indicators and times in, levels and
//! [`Alert`]s out. The daemon (`daemon::alerts`) feeds it, saves it, logs
//! the alerts and runs the alert command.
//!
//! Five statistics, three monitors:
//! - **input**: `pattern_psi`, the PSI of the window's 2x2 pixel patterns
//!   against the training frames' (the model's `reference.patterns`), and
//!   `leaf_psi`, the PSI of the share of sampled pixels reaching each
//!   group of leaves against the training pixels' ([`drift::LeafGroups`]). Both
//!   over the last `window` frames, evaluated on every frame once the
//!   window is full, with [`Hysteresis`] (watch at `psi_watch`, alert at
//!   `psi_alert`, lowered once below `clear` times a threshold for half a
//!   window of frames in a row). The Jensen-Shannon divergence of the same
//!   histograms is kept beside.
//! - **output**: `objects_per_frame` and `detected_share`, each with the
//!   Page-Hinkley test in both directions. The first `warmup` frames of a
//!   model give the level (mean) and the spread (standard deviation,
//!   floored so a quiet stream does not make every object a change); each
//!   later value is standardised and clipped to `clip` standard
//!   deviations, so one frame full of objects cannot alone raise an
//!   alert. Watch at half the test's threshold; alert when the test
//!   detects a change, which holds until the mean of the last `window`
//!   frames is back within `clear_band` standard deviations of the level.
//!   The level is the line's own, not the training frames': training sets
//!   are chosen rich in defects, production frames are mostly clean.
//! - **error**: `error_rate`, the Drift Detection Method on the
//!   corrections of the model's own records (an error when the operator
//!   reported a missed or a wrong object), its rate estimated by Laplace's
//!   rule (see [`drift::DdmParams::laplace`]). The value is how many of
//!   the detector's lowest standard deviations `p + s` stands above
//!   `p_min`: watch at the warning level (2), alert at drift (3); an alert
//!   holds until another model is put in service.
//!
//! Invariants: a monitor's level changes only here; every change of an
//! announced level is one [`Alert`] (`watch`, `alert`, `cleared`); a
//! raise no higher than the last one announced, less than
//! `repeat_seconds` after it (the level fell and came back), is held back
//! and counted, and announced once the interval has passed if the level
//! still stands (a raise above the last one is never held); frames and
//! corrections of another model than the monitors' are ignored; a new
//! model resets everything to its references, clearing what was raised.

use std::collections::VecDeque;
use std::time::SystemTime;

use serde::{Deserialize, Serialize};

use crate::drift::{
    self, Ddm, DdmParams, DdmState, FrameStats, HistogramWindow, Hysteresis, Level, PageHinkley,
    PageHinkleyParams, LEAF_GROUPS,
};
use crate::record::rfc3339;

/// The monitors' settings (`[drift]` and `[alerts]` in the configuration).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct MonitorSettings {
    /// Frames in the input windows and in the output monitors' recent mean.
    pub window: usize,
    /// Pixels per frame walked down the tree for the leaf groups.
    pub samples: usize,
    pub psi_watch: f64,
    pub psi_alert: f64,
    /// A raised level is lowered when its statistic falls below this
    /// fraction of the level's threshold.
    pub clear: f64,
    /// Frames of a new model that give the output monitors their level.
    pub warmup: u64,
    /// Page-Hinkley `delta` and `lambda`, in standard deviations.
    pub output_delta: f64,
    pub output_threshold: f64,
    /// Standardised values are clipped to this many standard deviations.
    pub clip: f64,
    /// An output alert clears when the recent mean is this close to the
    /// level, in standard deviations.
    pub clear_band: f64,
    pub ddm: DdmParams,
    /// Least time between two announcements of the same raise.
    pub repeat_seconds: f64,
}

impl Default for MonitorSettings {
    /// The documented defaults (README, "Drift monitors").
    fn default() -> Self {
        MonitorSettings {
            window: 50,
            samples: 32,
            psi_watch: drift::PSI_WATCH,
            psi_alert: drift::PSI_ALERT,
            clear: 0.8,
            warmup: 100,
            // Page-Hinkley on standardised values: a change of half a
            // standard deviation or more accumulates; 40 standard
            // deviations of accumulated change is a detection. For a
            // Gaussian stream the one-sided CUSUM with k = 0.25, h = 40
            // has an in-control run length beyond 10^9 values (Siegmund's
            // approximation), and finds a shift of one standard deviation
            // in about 55 values.
            output_delta: 0.25,
            output_threshold: 40.0,
            clip: 4.0,
            clear_band: 0.5,
            ddm: DdmParams {
                laplace: true,
                ..DdmParams::default()
            },
            repeat_seconds: 1800.0,
        }
    }
}

impl MonitorSettings {
    fn page_hinkley(&self) -> PageHinkleyParams {
        PageHinkleyParams {
            min_instances: 30,
            delta: self.output_delta,
            threshold: self.output_threshold,
            alpha: 1.0 - 0.0001,
            direction: drift::Direction::Both,
        }
    }
}

/// What the monitors compare with: the model in service and the
/// detection settings it runs with (another threshold or grouping changes
/// the output as much as another model).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct ModelRef {
    pub version: u64,
    pub hash: String,
    pub threshold: f64,
    pub min_area: u32,
    pub merge_distance: u32,
    /// `reference.patterns` (empty: the pattern monitor is off).
    pub patterns: Vec<f64>,
    /// The leaf groups' training shares.
    pub leaves: Vec<f64>,
    /// Objects per frame and the detected share on the training frames
    /// (`reference` in the model), shown beside the line's own level.
    #[serde(default)]
    pub trained: [f64; 2],
}

impl ModelRef {
    pub fn of(detector: &crate::detect::Detector) -> ModelRef {
        let (model, settings) = (detector.model(), detector.settings());
        ModelRef {
            version: model.model_version,
            hash: detector.hash().to_string(),
            threshold: settings.threshold,
            min_area: settings.grouping.min_area,
            merge_distance: settings.grouping.merge_distance,
            patterns: model.reference.patterns.clone(),
            leaves: drift::LeafGroups::new(&model.tree).reference().to_vec(),
            trained: [
                model.reference.objects_per_frame,
                model.reference.detected_share,
            ],
        }
    }
}

/// Thresholds of a statistic, in its own units.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
pub struct Thresholds {
    pub watch: f64,
    pub alert: f64,
}

/// One line of the alerts log (`alerts.jsonl`), and what the alert
/// command gets on its standard input.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Alert {
    /// RFC 3339, UTC.
    pub time: String,
    /// `input`, `output` or `error`.
    pub monitor: String,
    pub statistic: String,
    pub value: f64,
    pub thresholds: Thresholds,
    pub model_version: u64,
    pub model_hash: String,
    /// Frames (input, output) or corrections (error) the value is over.
    pub window: u64,
    /// `watch`, `alert` or `cleared`.
    pub state: String,
    pub message: String,
    /// Raises of this statistic held back since its last line, because
    /// they came less than the repeat interval after an earlier one.
    #[serde(default)]
    pub repeats: u64,
}

/// The statistics, with their monitor and a few words for messages.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub enum Statistic {
    PatternPsi,
    LeafPsi,
    ObjectsPerFrame,
    DetectedShare,
    ErrorRate,
}

impl Statistic {
    pub const ALL: [Statistic; 5] = [
        Statistic::PatternPsi,
        Statistic::LeafPsi,
        Statistic::ObjectsPerFrame,
        Statistic::DetectedShare,
        Statistic::ErrorRate,
    ];

    pub fn name(self) -> &'static str {
        match self {
            Statistic::PatternPsi => "pattern_psi",
            Statistic::LeafPsi => "leaf_psi",
            Statistic::ObjectsPerFrame => "objects_per_frame",
            Statistic::DetectedShare => "detected_share",
            Statistic::ErrorRate => "error_rate",
        }
    }

    pub fn monitor(self) -> &'static str {
        match self {
            Statistic::PatternPsi | Statistic::LeafPsi => "input",
            Statistic::ObjectsPerFrame | Statistic::DetectedShare => "output",
            Statistic::ErrorRate => "error",
        }
    }
}

/// The lowercase name of a level as alerts write it.
pub fn level_name(level: Level) -> &'static str {
    match level {
        Level::Ok => "ok",
        Level::Watch => "watch",
        Level::Alert => "alert",
    }
}

/// Which level changes are announced (see the module's invariants).
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
struct Announce {
    announced: Level,
    /// When a raise was last announced (seconds since 1970), and to what.
    last_raise: Option<(f64, Level)>,
    /// A raise is being held back.
    holding: bool,
    repeats: u64,
}

impl Announce {
    /// The level to announce now, with the raises held back before it. A
    /// raise no higher than the last one announced, less than `repeat`
    /// seconds after it, is held; a raise above it never is.
    fn update(&mut self, level: Level, now: f64, repeat: f64) -> Option<(Level, u64)> {
        if level == self.announced {
            self.holding = false;
            return None;
        }
        if level > self.announced {
            if let Some((t, raised)) = self.last_raise {
                if level <= raised && now >= t && now - t < repeat {
                    if !self.holding {
                        self.holding = true;
                        self.repeats += 1;
                    }
                    return None;
                }
            }
            self.last_raise = Some((now, level));
        }
        self.holding = false;
        self.announced = level;
        Some((level, std::mem::take(&mut self.repeats)))
    }
}

/// One input statistic: a window of histograms against reference shares.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
struct InputMonitor {
    window: HistogramWindow,
    hysteresis: Hysteresis,
    psi: f64,
    js: f64,
    announce: Announce,
}

impl InputMonitor {
    fn new(s: &MonitorSettings, bins: usize) -> InputMonitor {
        InputMonitor {
            window: HistogramWindow::new(s.window, bins),
            // Lowered only after half a window of low values in a row: a
            // statistic hovering at a threshold dips below it now and then.
            hysteresis: Hysteresis::new(s.psi_watch, s.psi_alert, s.clear)
                .with_dwell((s.window / 2) as u32),
            psi: 0.0,
            js: 0.0,
            announce: Announce::default(),
        }
    }

    fn push(&mut self, counts: &[u64], reference: &[f64]) {
        if reference.len() != counts.len() {
            return;
        }
        self.window.push(counts);
        if self.window.is_full() {
            (self.psi, self.js) = drift::compare(reference, self.window.sum());
            self.hysteresis.update(self.psi);
        }
    }
}

/// Running mean and variance (Welford, 1962).
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
struct Welford {
    n: u64,
    mean: f64,
    m2: f64,
}

impl Welford {
    fn add(&mut self, x: f64) {
        self.n += 1;
        let d = x - self.mean;
        self.mean += d / self.n as f64;
        self.m2 += d * (x - self.mean);
    }

    fn sd(&self) -> f64 {
        if self.n < 2 {
            0.0
        } else {
            (self.m2 / (self.n - 1) as f64).sqrt()
        }
    }
}

/// Which way an output statistic moved.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
enum Way {
    Rose,
    Fell,
}

/// One output statistic: Page-Hinkley on standardised values.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
struct OutputMonitor {
    /// The warm-up's mean and spread, then fixed.
    warm: Welford,
    level_mean: f64,
    sd: f64,
    ph: PageHinkley,
    hysteresis: Hysteresis,
    /// The last `window` raw values and their sum.
    recent: VecDeque<f64>,
    recent_sum: f64,
    /// Set while a detected change stands, with values since.
    change: Option<(Way, u64)>,
    value: f64,
    announce: Announce,
}

impl OutputMonitor {
    fn new(s: &MonitorSettings) -> OutputMonitor {
        OutputMonitor {
            warm: Welford::default(),
            level_mean: 0.0,
            sd: 0.0,
            ph: PageHinkley::new(s.page_hinkley()),
            hysteresis: Hysteresis::new(s.output_threshold / 2.0, f64::MAX, s.clear),
            recent: VecDeque::with_capacity(s.window),
            recent_sum: 0.0,
            change: None,
            value: 0.0,
            announce: Announce::default(),
        }
    }

    fn warmed(&self, s: &MonitorSettings) -> bool {
        self.warm.n >= s.warmup
    }

    fn recent_mean(&self) -> f64 {
        if self.recent.is_empty() {
            0.0
        } else {
            self.recent_sum / self.recent.len() as f64
        }
    }

    fn level(&self) -> Level {
        if self.change.is_some() {
            Level::Alert
        } else {
            self.hysteresis.level()
        }
    }

    /// `floor`: the least spread, in the statistic's units.
    fn push(&mut self, x: f64, s: &MonitorSettings, floor: f64) {
        self.recent.push_back(x);
        self.recent_sum += x;
        while self.recent.len() > s.window.max(1) {
            self.recent_sum -= self.recent.pop_front().unwrap_or(0.0);
        }
        if !self.warmed(s) {
            self.warm.add(x);
            if self.warmed(s) {
                self.level_mean = self.warm.mean;
                self.sd = self.warm.sd().max(floor).max(0.1 * self.warm.mean.abs());
            }
            return;
        }
        let back = (self.recent_mean() - self.level_mean).abs() <= s.clear_band * self.sd;
        match &mut self.change {
            None => {
                let z = ((x - self.level_mean) / self.sd).clamp(-s.clip, s.clip);
                let detected = self.ph.update(z);
                let (up, down) = self.ph.statistics();
                self.value = up.max(down);
                if detected {
                    let way = if up >= down { Way::Rose } else { Way::Fell };
                    self.change = Some((way, 0));
                } else {
                    self.hysteresis.update(self.value);
                }
            }
            Some((_, since)) => {
                *since += 1;
                if *since >= s.window as u64 && back {
                    self.change = None;
                    self.ph = PageHinkley::new(s.page_hinkley());
                    self.hysteresis = Hysteresis::new(s.output_threshold / 2.0, f64::MAX, s.clear);
                    self.value = 0.0;
                }
            }
        }
    }
}

/// The error monitor: DDM on the corrections' error indicators.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
struct ErrorMonitor {
    ddm: Ddm,
    hysteresis: Hysteresis,
    /// Drift was detected: the alert holds until another model.
    drifted: bool,
    seen: u64,
    errors: u64,
    value: f64,
    announce: Announce,
}

impl ErrorMonitor {
    fn new(s: &MonitorSettings) -> ErrorMonitor {
        ErrorMonitor {
            ddm: Ddm::new(s.ddm),
            // The drift level is the DDM's own detection, not this.
            hysteresis: Hysteresis::new(s.ddm.warning, f64::MAX, s.clear),
            drifted: false,
            seen: 0,
            errors: 0,
            value: 0.0,
            announce: Announce::default(),
        }
    }

    fn level(&self) -> Level {
        if self.drifted {
            Level::Alert
        } else {
            self.hysteresis.level()
        }
    }

    fn push(&mut self, error: bool) {
        self.seen += 1;
        self.errors += error as u64;
        if self.drifted {
            return;
        }
        let state = self.ddm.update(error);
        if let Some(sigmas) = self.ddm.sigmas() {
            self.value = sigmas;
        }
        if state == DdmState::Drift {
            self.drifted = true;
        } else {
            self.hysteresis.update(self.value);
        }
    }
}

/// A monitor's state now, for `burlwatch alerts` and the health report.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct MonitorState {
    pub monitor: String,
    pub statistic: String,
    /// `ok`, `watch`, `alert`, or `off` (no reference: a model written
    /// before the pattern references) or `warming` (not enough frames or
    /// corrections yet).
    pub level: String,
    pub value: f64,
    pub thresholds: Thresholds,
    /// Frames or corrections the value is over.
    pub window: u64,
    /// A sentence on what the value means now.
    pub detail: String,
}

/// Every statistic's value at one time, as kept in the drift history
/// (`logs/drift.jsonl`, one line every `drift.history_minutes`), which the
/// report charts against the thresholds.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct DriftSample {
    /// RFC 3339, UTC.
    pub time: String,
    pub model_version: u64,
    pub model_hash: String,
    /// Frames seen since the model was put in service.
    pub frames: u64,
    pub statistics: Vec<SampleValue>,
}

/// One statistic in a [`DriftSample`].
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct SampleValue {
    pub statistic: String,
    /// As [`MonitorState::level`].
    pub level: String,
    pub value: f64,
    pub watch: f64,
    pub alert: f64,
}

/// All monitors of the model in service.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Monitors {
    settings: MonitorSettings,
    model: ModelRef,
    /// Frames and corrections seen since the model was put in service.
    frames: u64,
    corrections: u64,
    patterns: InputMonitor,
    leaves: InputMonitor,
    objects: OutputMonitor,
    detected: OutputMonitor,
    errors: ErrorMonitor,
}

/// The least spread of objects per frame: half an object.
const OBJECTS_FLOOR: f64 = 0.5;
/// The least spread of the detected share: 1 pixel in 5,000.
const DETECTED_FLOOR: f64 = 2e-4;

impl Monitors {
    pub fn new(settings: MonitorSettings, model: ModelRef) -> Monitors {
        let s = &settings;
        Monitors {
            patterns: InputMonitor::new(s, 16),
            leaves: InputMonitor::new(s, LEAF_GROUPS),
            objects: OutputMonitor::new(s),
            detected: OutputMonitor::new(s),
            errors: ErrorMonitor::new(s),
            frames: 0,
            corrections: 0,
            model,
            settings,
        }
    }

    pub fn settings(&self) -> &MonitorSettings {
        &self.settings
    }

    pub fn model(&self) -> &ModelRef {
        &self.model
    }

    /// Frames seen since the model was put in service.
    pub fn frames(&self) -> u64 {
        self.frames
    }

    /// Corrections of its records seen since then.
    pub fn corrections(&self) -> u64 {
        self.corrections
    }

    /// Takes one logged frame (its statistics, its objects and the hash
    /// of the model that detected it); the alerts it raises or clears.
    pub fn frame(
        &mut self,
        stats: &FrameStats,
        objects: usize,
        model_hash: &str,
        now: SystemTime,
    ) -> Vec<Alert> {
        if model_hash != self.model.hash {
            return Vec::new();
        }
        self.frames += 1;
        let s = self.settings.clone();
        self.patterns.push(&stats.patterns, &self.model.patterns);
        self.leaves.push(&stats.leaves, &self.model.leaves);
        self.objects.push(objects as f64, &s, OBJECTS_FLOOR);
        let share = if stats.pixels == 0 {
            0.0
        } else {
            stats.detected as f64 / stats.pixels as f64
        };
        self.detected.push(share, &s, DETECTED_FLOOR);
        self.announce_all(now)
    }

    /// Takes one correction of a record of `model_hash`: whether the
    /// operator reported an error (a missed or a wrong object).
    pub fn correction(&mut self, error: bool, model_hash: &str, now: SystemTime) -> Vec<Alert> {
        if model_hash != self.model.hash {
            return Vec::new();
        }
        self.corrections += 1;
        self.errors.push(error);
        self.announce_all(now)
    }

    /// A new model (or new detection or monitor settings) is in service:
    /// every monitor starts afresh with its references; what was raised is
    /// cleared.
    pub fn reset(
        &mut self,
        settings: MonitorSettings,
        model: ModelRef,
        now: SystemTime,
    ) -> Vec<Alert> {
        if model == self.model && settings == self.settings {
            return Vec::new();
        }
        let before = self.clone();
        *self = Monitors::new(settings, model);
        let mut alerts = Vec::new();
        for stat in Statistic::ALL {
            let old = before.announce(stat);
            if old.announced > Level::Ok {
                let mut alert = before.alert(stat, Level::Ok, 0, now);
                alert.message = format!(
                    "cleared: {}: the monitors start again from the references of model {} ({}), put in service or run with other settings",
                    stat.name(),
                    self.model.version,
                    self.model.hash
                );
                alert.model_version = self.model.version;
                alert.model_hash = self.model.hash.clone();
                alerts.push(alert);
            }
        }
        alerts
    }

    /// Whether the error monitor has raised an alert (drift).
    pub fn error_drift(&self) -> bool {
        self.errors.drifted
    }

    fn announce(&self, stat: Statistic) -> &Announce {
        match stat {
            Statistic::PatternPsi => &self.patterns.announce,
            Statistic::LeafPsi => &self.leaves.announce,
            Statistic::ObjectsPerFrame => &self.objects.announce,
            Statistic::DetectedShare => &self.detected.announce,
            Statistic::ErrorRate => &self.errors.announce,
        }
    }

    fn level(&self, stat: Statistic) -> Level {
        match stat {
            Statistic::PatternPsi => self.patterns.hysteresis.level(),
            Statistic::LeafPsi => self.leaves.hysteresis.level(),
            Statistic::ObjectsPerFrame => self.objects.level(),
            Statistic::DetectedShare => self.detected.level(),
            Statistic::ErrorRate => self.errors.level(),
        }
    }

    fn announce_all(&mut self, now: SystemTime) -> Vec<Alert> {
        let secs = now
            .duration_since(SystemTime::UNIX_EPOCH)
            .map_or(0.0, |d| d.as_secs_f64());
        let repeat = self.settings.repeat_seconds;
        let mut alerts = Vec::new();
        for stat in Statistic::ALL {
            let level = self.level(stat);
            let announce = match stat {
                Statistic::PatternPsi => &mut self.patterns.announce,
                Statistic::LeafPsi => &mut self.leaves.announce,
                Statistic::ObjectsPerFrame => &mut self.objects.announce,
                Statistic::DetectedShare => &mut self.detected.announce,
                Statistic::ErrorRate => &mut self.errors.announce,
            };
            if let Some((level, repeats)) = announce.update(level, secs, repeat) {
                alerts.push(self.alert(stat, level, repeats, now));
            }
        }
        alerts
    }

    /// The statistic's value, thresholds and window now.
    fn reading(&self, stat: Statistic) -> (f64, Thresholds, u64) {
        let s = &self.settings;
        let psi = Thresholds {
            watch: s.psi_watch,
            alert: s.psi_alert,
        };
        let ph = Thresholds {
            watch: s.output_threshold / 2.0,
            alert: s.output_threshold,
        };
        match stat {
            Statistic::PatternPsi => (self.patterns.psi, psi, self.patterns.window.len() as u64),
            Statistic::LeafPsi => (self.leaves.psi, psi, self.leaves.window.len() as u64),
            Statistic::ObjectsPerFrame => {
                (self.objects.value, ph, self.objects.recent.len() as u64)
            }
            Statistic::DetectedShare => {
                (self.detected.value, ph, self.detected.recent.len() as u64)
            }
            Statistic::ErrorRate => (
                self.errors.value,
                Thresholds {
                    watch: s.ddm.warning,
                    alert: s.ddm.drift,
                },
                self.errors.seen,
            ),
        }
    }

    fn alert(&self, stat: Statistic, level: Level, repeats: u64, now: SystemTime) -> Alert {
        let (value, thresholds, window) = self.reading(stat);
        let state = if level == Level::Ok {
            "cleared"
        } else {
            level_name(level)
        };
        Alert {
            time: rfc3339(now),
            monitor: stat.monitor().into(),
            statistic: stat.name().into(),
            value,
            thresholds,
            model_version: self.model.version,
            model_hash: self.model.hash.clone(),
            window,
            state: state.into(),
            message: self.message(stat, level),
            repeats,
        }
    }

    /// What a person reading the alert should know and do.
    fn message(&self, stat: Statistic, level: Level) -> String {
        let what = self.describe(stat);
        let advice = match (stat.monitor(), level) {
            (_, Level::Ok) => "back within the limits".to_string(),
            ("input", _) => "if the fabric or the camera changed, record a changeover (burlwatch changeover) and label frames of it (burlwatch mark); the model is retrained only from labels".to_string(),
            ("output", _) => "check a few recent frames (burlwatch mark records what is right or wrong); a change of fabric or camera also shows here".to_string(),
            _ => "label more frames of this line (burlwatch mark); a retrain check is brought forward when the drift is confirmed".to_string(),
        };
        let state = if level == Level::Ok {
            "cleared"
        } else {
            level_name(level)
        };
        format!("{state}: {what}; {advice}")
    }

    /// The statistic now, in words.
    fn describe(&self, stat: Statistic) -> String {
        let (value, t, window) = self.reading(stat);
        let what = match stat {
            Statistic::PatternPsi => format!(
                "the frames' 2x2 pixel patterns over the last {window} frames against the training frames': PSI {value:.3} (watch {}, alert {}), Jensen-Shannon divergence {:.4}",
                t.watch, t.alert, self.patterns.js
            ),
            Statistic::LeafPsi => format!(
                "where the pixels of the last {window} frames go in the tree against where the training pixels went: PSI {value:.3} (watch {}, alert {}), Jensen-Shannon divergence {:.4}",
                t.watch, t.alert, self.leaves.js
            ),
            Statistic::ObjectsPerFrame | Statistic::DetectedShare => {
                let m = if stat == Statistic::ObjectsPerFrame {
                    &self.objects
                } else {
                    &self.detected
                };
                let noun = if stat == Statistic::ObjectsPerFrame {
                    "objects per frame"
                } else {
                    "share of pixels detected"
                };
                let way = match m.change {
                    Some((Way::Rose, _)) => "rose",
                    Some((Way::Fell, _)) => "fell",
                    None => "moved",
                };
                let trained = self.model.trained[(stat == Statistic::DetectedShare) as usize];
                format!(
                    "{noun} {way}: {:.4} over the last {window} frames against {:.4} (spread {:.4}) in this model's first {} frames and {trained:.4} on its training frames (Page-Hinkley {value:.1}; watch {}, alert {})",
                    m.recent_mean(),
                    m.level_mean,
                    m.sd,
                    self.settings.warmup,
                    t.watch,
                    t.alert
                )
            }
            Statistic::ErrorRate => {
                let (p, n) = self.errors.ddm.rate();
                format!(
                    "the operator reported errors in {} of {} corrections of this model's records (rate {p:.3} over the last {n}; {value:.1} standard deviations above its lowest; warning {}, drift {})",
                    self.errors.errors, self.errors.seen, t.watch, t.alert
                )
            }
        };
        what
    }

    /// Every statistic's value now, for the drift history.
    pub fn sample(&self, now: SystemTime) -> DriftSample {
        DriftSample {
            time: rfc3339(now),
            model_version: self.model.version,
            model_hash: self.model.hash.clone(),
            frames: self.frames,
            statistics: self
                .states()
                .into_iter()
                .map(|s| SampleValue {
                    statistic: s.statistic,
                    level: s.level,
                    value: s.value,
                    watch: s.thresholds.watch,
                    alert: s.thresholds.alert,
                })
                .collect(),
        }
    }

    /// Every statistic's state now.
    pub fn states(&self) -> Vec<MonitorState> {
        Statistic::ALL
            .iter()
            .map(|&stat| {
                let (value, thresholds, window) = self.reading(stat);
                let warming = match stat {
                    Statistic::PatternPsi => !self.patterns.window.is_full(),
                    Statistic::LeafPsi => !self.leaves.window.is_full(),
                    Statistic::ObjectsPerFrame => !self.objects.warmed(&self.settings),
                    Statistic::DetectedShare => !self.detected.warmed(&self.settings),
                    Statistic::ErrorRate => self.errors.ddm.sigmas().is_none() && !self.errors.drifted,
                };
                let off = stat == Statistic::PatternPsi && self.model.patterns.is_empty();
                let level = if off {
                    "off"
                } else if warming && self.level(stat) == Level::Ok {
                    "warming"
                } else {
                    level_name(self.level(stat))
                };
                let detail = if off {
                    "the model has no pattern references (trained before they were kept); retrain to turn this on".to_string()
                } else if self.level(stat) == Level::Ok {
                    self.describe(stat)
                } else {
                    self.message(stat, self.level(stat))
                };
                MonitorState {
                    monitor: stat.monitor().into(),
                    statistic: stat.name().into(),
                    level: level.into(),
                    value,
                    thresholds,
                    window,
                    detail,
                }
            })
            .collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::time::Duration;

    fn model(hash: &str) -> ModelRef {
        ModelRef {
            version: 1,
            hash: hash.into(),
            threshold: 0.5,
            min_area: 1,
            merge_distance: 0,
            patterns: vec![1.0 / 16.0; 16],
            leaves: vec![1.0 / LEAF_GROUPS as f64; LEAF_GROUPS],
            trained: [2.0, 0.003],
        }
    }

    fn at(seconds: u64) -> SystemTime {
        SystemTime::UNIX_EPOCH + Duration::from_secs(1_800_000_000 + seconds)
    }

    /// A frame whose pattern and leaf counts are `n` per bin (the
    /// reference's shape when `skew` is 0; one bin heavier otherwise).
    fn stats(skew: u64, detected: u64) -> FrameStats {
        let mut s = FrameStats {
            patterns: [100; 16],
            leaves: [4; LEAF_GROUPS],
            detected,
            pixels: 10_000,
        };
        s.patterns[0] += skew * 100;
        s.leaves[0] += skew * 4;
        s
    }

    #[test]
    fn a_repeat_within_the_interval_is_held_back_and_counted() {
        let mut a = Announce::default();
        let hour = 3600.0;
        assert_eq!(a.update(Level::Alert, 0.0, hour), Some((Level::Alert, 0)));
        assert_eq!(a.update(Level::Ok, 10.0, hour), Some((Level::Ok, 0)));
        // Raised again 20 s later, twice, with a fall between: held.
        assert_eq!(a.update(Level::Alert, 20.0, hour), None);
        assert_eq!(a.update(Level::Alert, 30.0, hour), None);
        assert_eq!(a.update(Level::Ok, 40.0, hour), None);
        assert_eq!(a.update(Level::Watch, 50.0, hour), None);
        // Still raised once the interval has passed: announced, with the
        // two raises held back before it.
        assert_eq!(
            a.update(Level::Watch, 3601.0, hour),
            Some((Level::Watch, 2))
        );
        // Escalation is never held.
        assert_eq!(
            a.update(Level::Alert, 3602.0, hour),
            Some((Level::Alert, 0))
        );
        // A watch cleared, then an alert within the interval: the alert is
        // above the last raise, so it is announced at once.
        let mut a = Announce::default();
        assert_eq!(a.update(Level::Watch, 0.0, hour), Some((Level::Watch, 0)));
        assert_eq!(a.update(Level::Ok, 10.0, hour), Some((Level::Ok, 0)));
        assert_eq!(a.update(Level::Alert, 20.0, hour), Some((Level::Alert, 0)));
        // Flapping between alert and watch: the watch is announced, the
        // alert again is held.
        assert_eq!(a.update(Level::Watch, 30.0, hour), Some((Level::Watch, 0)));
        assert_eq!(a.update(Level::Alert, 40.0, hour), None);
    }

    #[test]
    fn a_clean_start_does_not_make_the_first_error_a_drift() {
        // 40 corrections without an error, then one error in 50: the
        // plain rate's p_min = s_min = 0 would call the first error drift;
        // the monitors' Laplace estimate does not (a brief warning at
        // most).
        let mut m = Monitors::new(MonitorSettings::default(), model("a"));
        let mut states = Vec::new();
        for i in 0..1040u64 {
            let error = i >= 40 && (i - 40) % 50 == 0;
            for a in m.correction(error, "a", at(i)) {
                states.push(a.state);
            }
        }
        assert!(!m.error_drift(), "{states:?}");
        assert!(states.iter().all(|s| s != "alert"), "{states:?}");
        // The published method's plain rate would have drifted.
        let mut d = drift::Ddm::new(DdmParams::default());
        let drifted =
            (0..1040u64).any(|i| d.update(i >= 40 && (i - 40) % 50 == 0) == DdmState::Drift);
        assert!(drifted);
    }

    #[test]
    fn input_drift_raises_then_clears_with_hysteresis() {
        let s = MonitorSettings {
            window: 10,
            ..MonitorSettings::default()
        };
        let mut m = Monitors::new(s, model("a"));
        let mut alerts = Vec::new();
        for k in 0..30 {
            alerts.extend(m.frame(&stats(0, 10), 1, "a", at(k)));
        }
        assert!(alerts.is_empty(), "{alerts:?}");
        for k in 30..50 {
            alerts.extend(m.frame(&stats(8, 10), 1, "a", at(k)));
        }
        let raised: Vec<(&str, &str)> = alerts
            .iter()
            .map(|a| (a.statistic.as_str(), a.state.as_str()))
            .collect();
        assert!(raised.contains(&("pattern_psi", "alert")), "{raised:?}");
        assert!(raised.contains(&("leaf_psi", "alert")), "{raised:?}");
        let a = alerts.iter().find(|a| a.state == "alert").unwrap();
        assert!(a.value >= 0.25 && a.thresholds.alert == 0.25 && a.window == 10);
        assert!(a.message.contains("changeover"), "{}", a.message);
        alerts.clear();
        for k in 50..80 {
            alerts.extend(m.frame(&stats(0, 10), 1, "a", at(3600 + k)));
        }
        assert!(
            alerts.iter().filter(|a| a.state == "cleared").count() == 2,
            "{alerts:?}"
        );
        // Frames of another model are not counted.
        let before = m.frames();
        assert!(m.frame(&stats(9, 10), 1, "b", at(5000)).is_empty());
        assert_eq!(m.frames(), before);
    }

    #[test]
    fn output_monitors_catch_a_rise_and_clear_when_it_is_over() {
        let mut m = Monitors::new(MonitorSettings::default(), model("a"));
        let mut alerts = Vec::new();
        // Objects per frame 0..4 (mean 2), detected pixels 20..60.
        let mut k = 0u64;
        for _ in 0..3000 {
            let objects = (k * 7 % 5) as usize;
            alerts.extend(m.frame(&stats(0, 20 + k * 13 % 41), objects, "a", at(k)));
            k += 1;
        }
        assert!(alerts.is_empty(), "{alerts:?}");
        // Ten objects a frame from now on.
        let from = k;
        while k < from + 200 {
            alerts.extend(m.frame(&stats(0, 20 + k * 13 % 41), 10, "a", at(k)));
            k += 1;
        }
        let rose = alerts
            .iter()
            .find(|a| a.statistic == "objects_per_frame" && a.state == "alert")
            .expect("an alert");
        assert!(rose.message.contains("rose"), "{}", rose.message);
        alerts.clear();
        while k < from + 400 {
            let objects = (k * 7 % 5) as usize;
            alerts.extend(m.frame(&stats(0, 20 + k * 13 % 41), objects, "a", at(k + 7200)));
            k += 1;
        }
        assert!(
            alerts
                .iter()
                .any(|a| a.statistic == "objects_per_frame" && a.state == "cleared"),
            "{alerts:?}"
        );
    }

    #[test]
    fn error_drift_warns_then_alerts_and_a_new_model_clears_it() {
        let mut m = Monitors::new(MonitorSettings::default(), model("a"));
        let mut states = Vec::new();
        for i in 0..400u64 {
            let error = if i < 200 { i % 10 == 0 } else { i % 10 < 6 };
            for a in m.correction(error, "a", at(i)) {
                states.push((i, a.state));
            }
        }
        let watch = states.iter().find(|s| s.1 == "watch").expect("a warning");
        let alert = states.iter().find(|s| s.1 == "alert").expect("drift");
        assert!(watch.0 >= 200 && watch.0 <= alert.0, "{states:?}");
        assert!(m.error_drift());
        // The alert holds...
        for i in 400..500 {
            assert!(m.correction(false, "a", at(i)).is_empty());
        }
        // ...until another model is put in service.
        let s = m.settings().clone();
        let cleared = m.reset(s.clone(), model("b"), at(600));
        assert_eq!(cleared.len(), 1);
        assert_eq!(cleared[0].state, "cleared");
        assert_eq!(cleared[0].model_hash, "b");
        assert!(!m.error_drift());
        assert_eq!(m.reset(s, model("b"), at(601)), Vec::new());
    }

    #[test]
    fn the_state_survives_a_round_trip_through_json() {
        let mut m = Monitors::new(MonitorSettings::default(), model("a"));
        for k in 0..150 {
            m.frame(&stats(k % 3, 30 + k), (k % 4) as usize, "a", at(k));
            m.correction(k % 5 == 0, "a", at(k));
        }
        let text = serde_json::to_string(&m).unwrap();
        let back: Monitors = serde_json::from_str(&text).unwrap();
        assert_eq!(back, m);
        // And goes on the same way.
        let (mut a, mut b) = (m, back);
        for k in 150..300 {
            assert_eq!(
                a.frame(&stats(k % 3, 30 + k), 3, "a", at(k)),
                b.frame(&stats(k % 3, 30 + k), 3, "a", at(k))
            );
        }
        assert_eq!(a.states(), b.states());
    }

    #[test]
    fn a_model_without_pattern_references_turns_that_monitor_off() {
        let mut r = model("a");
        r.patterns.clear();
        let mut m = Monitors::new(MonitorSettings::default(), r);
        for k in 0..60 {
            m.frame(&stats(5, 10), 1, "a", at(k));
        }
        let st = m.states();
        assert_eq!(st[0].statistic, "pattern_psi");
        assert_eq!(st[0].level, "off");
        assert_eq!(st[1].level, "alert");
    }
}
