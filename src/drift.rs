//! Drift statistics: how far recent frames, detections and the operator's
//! corrections have moved from what the model was trained on. Pure: numbers
//! and bit frames in, numbers out; the daemon's monitors (which keep
//! windows, thresholds and alert states) are built on these.
//!
//! - [`psi`]: the Population Stability Index of two binned distributions,
//!   `sum (a - e) ln(a / e)`;
//! - [`js_divergence`]: the Jensen-Shannon divergence, base 2 (0 to 1);
//! - [`smoothed`]: bin counts to shares with an additive pseudo-count per
//!   bin ([`SMOOTHING`]), so an empty bin never gives a zero share, and
//!   neither statistic an infinity;
//! - [`pattern_histogram`]: how often each 2x2 pixel pattern occurs in a
//!   frame (16 bins), a few word operations per row: a cheap fingerprint of
//!   the fabric and the camera;
//! - [`PageHinkley`]: the Page-Hinkley test (Page, 1954) for a rise or fall
//!   in the mean of a stream (objects or detected pixels per frame);
//! - [`Ddm`]: the Drift Detection Method of Gama, Medas, Castillo and
//!   Rodrigues (2004) on a stream of errors, with its warning and drift
//!   levels;
//! - [`Hysteresis`]: levels (ok, watch, alert) from a statistic, raised at
//!   a threshold and lowered only well below it;
//! - [`HistogramWindow`]: the summed histograms of the last frames.
//!
//! The two detectors follow the published methods with the same parameters
//! and update rules as the `river` library's implementations, and the tests
//! check their detection indices against that library on fixed streams
//! (`tests/reference/drift.json`).

use serde::{Deserialize, Serialize};

use crate::frame::BitFrame;
use crate::model::{Node, Tree};

/// PSI at which a distribution is watched: common practice in credit
/// scoring and model monitoring (0.1 to 0.25 "moderate shift"), no single
/// published source.
pub const PSI_WATCH: f64 = 0.1;
/// PSI at which a distribution has moved ("significant shift"): common
/// practice as above, no single source.
pub const PSI_ALERT: f64 = 0.25;
/// The pseudo-count added to every bin before shares are taken (additive
/// smoothing): 0.5, the Jeffreys prior's, so a bin empty in one
/// distribution and not in the other counts as rare rather than impossible.
pub const SMOOTHING: f64 = 0.5;

/// Bin counts to shares with `eps` added to every bin:
/// `(c_i + eps) / (N + k eps)`. All zero counts give equal shares.
pub fn smoothed(counts: &[u64], eps: f64) -> Vec<f64> {
    let total: f64 = counts.iter().map(|&c| c as f64).sum::<f64>() + eps * counts.len() as f64;
    if total <= 0.0 {
        return vec![1.0 / counts.len().max(1) as f64; counts.len()];
    }
    counts.iter().map(|&c| (c as f64 + eps) / total).collect()
}

/// The Population Stability Index of `actual` against `expected` (shares
/// of the same bins, each summing to 1, none zero: see [`smoothed`]):
/// `sum (a_i - e_i) ln(a_i / e_i)`. Symmetric in its two arguments; 0 for
/// equal distributions.
///
/// # Panics
/// If the two have different numbers of bins.
pub fn psi(expected: &[f64], actual: &[f64]) -> f64 {
    assert_eq!(expected.len(), actual.len(), "histograms of different bins");
    expected
        .iter()
        .zip(actual)
        .map(|(&e, &a)| (a - e) * (a / e).ln())
        .sum()
}

/// The Jensen-Shannon divergence of two distributions (shares of the same
/// bins), base 2, so between 0 and 1: `(KL(p||m) + KL(q||m)) / 2` with
/// `m = (p + q) / 2`. Zero shares are fine here (`0 log 0 = 0`).
///
/// # Panics
/// If the two have different numbers of bins.
pub fn js_divergence(p: &[f64], q: &[f64]) -> f64 {
    assert_eq!(p.len(), q.len(), "histograms of different bins");
    let kl = |a: f64, m: f64| if a > 0.0 { a * (a / m).log2() } else { 0.0 };
    p.iter()
        .zip(q)
        .map(|(&a, &b)| {
            let m = (a + b) / 2.0;
            (kl(a, m) + kl(b, m)) / 2.0
        })
        .sum()
}

/// How often each 2x2 pattern of pixels occurs in `frame`, over every
/// position where the 2x2 block fits: bin `top-left + 2 top-right + 4
/// bottom-left + 8 bottom-right` (set = 1). Counted per row pair with word
/// operations: for each of the 16 patterns, the positions where all four
/// pixels match are one AND of four shifted words, and a population count.
pub fn pattern_histogram(frame: &BitFrame) -> [u64; 16] {
    pattern_histogram_rows(frame, 1, 0)
}

/// [`pattern_histogram`] over a sample of about one row pair in `step`,
/// drawn afresh for each `seed`: row pair `y` is counted when a hash of
/// `y` and `seed` is 0 modulo `step`. The rows are not evenly spaced on
/// purpose: a fixed stride that divides the fabric's thread period would
/// see the same rows of every thread in every frame, and its histogram
/// would differ from the whole frame's.
pub fn pattern_histogram_rows(frame: &BitFrame, step: usize, seed: u64) -> [u64; 16] {
    let mut h = [0u64; 16];
    let (w, rows) = (frame.width(), frame.height());
    if w < 2 || rows < 2 {
        return h;
    }
    let step = step.max(1) as u64;
    for y in 0..rows - 1 {
        if step > 1 {
            let mut state = seed ^ (y as u64).wrapping_mul(0x9e37_79b9_7f4a_7c15);
            if !splitmix64(&mut state).is_multiple_of(step) {
                continue;
            }
        }
        count_row_pair(frame.row(y), frame.row(y + 1), w, &mut h);
    }
    h
}

/// Adds the 2x2 patterns of one row pair (`w` pixels wide) to `h`: with
/// the processor's population-count instruction where it has one (found
/// at run time; the portable count costs about three times as much).
fn count_row_pair(top: &[u64], bottom: &[u64], w: usize, h: &mut [u64; 16]) {
    #[cfg(target_arch = "x86_64")]
    {
        if std::arch::is_x86_feature_detected!("popcnt") {
            // SAFETY: the processor has the instruction (checked above).
            unsafe { count_row_pair_popcnt(top, bottom, w, h) };
            return;
        }
    }
    count_row_pair_any(top, bottom, w, h);
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "popcnt")]
unsafe fn count_row_pair_popcnt(top: &[u64], bottom: &[u64], w: usize, h: &mut [u64; 16]) {
    count_row_pair_any(top, bottom, w, h);
}

#[inline(always)]
fn count_row_pair_any(top: &[u64], bottom: &[u64], w: usize, h: &mut [u64; 16]) {
    for k in 0..top.len() {
        // Pixel x and x + 1 of each row, for every x of this word.
        let next = |r: &[u64]| (r[k] >> 1) | r.get(k + 1).map_or(0, |n| n << 63);
        let (a, b, c, d) = (top[k], next(top), bottom[k], next(bottom));
        // Positions x where the block fits (x + 1 < w).
        let first = k * 64;
        let valid = if first + 64 < w {
            !0u64
        } else if first + 1 >= w {
            0
        } else {
            (1u64 << (w - 1 - first)) - 1
        };
        // The four patterns of each pixel pair, then their 16 products.
        let pairs = |p: u64, q: u64| [!p & !q, p & !q, !p & q, p & q];
        let (upper, lower) = (pairs(a, b), pairs(c, d));
        for (pattern, bin) in h.iter_mut().enumerate() {
            let m = upper[pattern & 3] & lower[pattern >> 2] & valid;
            *bin += m.count_ones() as u64;
        }
    }
}

/// Row step of the daemon's 2x2 pattern sample: about one row pair in 8,
/// drawn afresh for every frame. Measured (`cargo bench --bench drift`):
/// the whole-frame count costs 2.6% of the detection step on a 512x512
/// frame (4.2% without the population-count instruction), the 1-in-8
/// sample 0.5%, and over a window of frames it still counts millions of
/// positions.
pub const PATTERN_ROW_STEP: usize = 8;

/// Groups of leaves whose shares of pixels the input monitor compares.
pub const LEAF_GROUPS: usize = 16;

/// The tree's leaves in [`LEAF_GROUPS`] groups of about equal training
/// share, and each group's share of the training pixels: where pixels go
/// in the tree is what the tree's answers rest on, so a fabric or a camera
/// that sends pixels to other leaves than training did is what matters.
///
/// Leaves are taken in falling share (ties by index) and filled into the
/// groups in turn, a group closing once it holds its part of the share
/// left when it opened (`left / groups left`): a leaf holding more than
/// that stays alone, and the groups follow from the model alone, so its
/// references need no field of their own.
#[derive(Clone, Debug, PartialEq)]
pub struct LeafGroups {
    /// Group of each node (splits: 0, never used).
    group: Vec<u8>,
    reference: [f64; LEAF_GROUPS],
}

impl LeafGroups {
    pub fn new(tree: &Tree) -> LeafGroups {
        let mut leaves: Vec<(usize, f64)> = tree
            .nodes()
            .iter()
            .enumerate()
            .filter_map(|(i, n)| match n {
                Node::Leaf(l) => Some((i, l.share)),
                Node::Split { .. } => None,
            })
            .collect();
        leaves.sort_by(|a, b| b.1.total_cmp(&a.1).then(a.0.cmp(&b.0)));
        let total: f64 = leaves.iter().map(|l| l.1).sum();
        let mut group = vec![0u8; tree.nodes().len()];
        let mut reference = [0.0; LEAF_GROUPS];
        // A group closes once it holds its part of what was left when it
        // opened: a leaf larger than a part stays alone, and the groups
        // after it share the rest evenly.
        let (mut current, mut left) = (0usize, total);
        let mut part = left / LEAF_GROUPS as f64;
        for (i, share) in leaves {
            if reference[current] >= part && reference[current] > 0.0 && current + 1 < LEAF_GROUPS {
                left -= reference[current];
                current += 1;
                part = left / (LEAF_GROUPS - current) as f64;
            }
            group[i] = current as u8;
            reference[current] += share;
        }
        if total > 0.0 {
            for r in &mut reference {
                *r /= total;
            }
        }
        LeafGroups { group, reference }
    }

    /// Each group's share of the training pixels (summing to 1, or all 0
    /// for a tree that saw no pixels).
    pub fn reference(&self) -> &[f64; LEAF_GROUPS] {
        &self.reference
    }

    /// Walks `samples` pixels of `frame` at positions drawn from `seed`
    /// (uniform over the frame) and counts the groups their leaves are in.
    pub fn sample(
        &self,
        tree: &Tree,
        frame: &BitFrame,
        samples: usize,
        seed: u64,
    ) -> [u64; LEAF_GROUPS] {
        let mut counts = [0u64; LEAF_GROUPS];
        let (w, h) = (frame.width() as u64, frame.height() as u64);
        if w == 0 || h == 0 {
            return counts;
        }
        let window = tree.window();
        let mut state = seed;
        for _ in 0..samples {
            let r = splitmix64(&mut state);
            // The high and low halves of one draw: x and y (the bias of a
            // modulo of a 32-bit draw by a frame side is below 2^-19).
            let (x, y) = (((r >> 32) % w) as usize, ((r & 0xffff_ffff) % h) as usize);
            let leaf = tree.leaf_of(window.pattern_of(frame, x, y));
            counts[self.group[leaf] as usize] += 1;
        }
        counts
    }
}

/// SplitMix64 (Steele, Lea and Flood, 2014): a small, fast generator for
/// the sample positions.
fn splitmix64(state: &mut u64) -> u64 {
    *state = state.wrapping_add(0x9e37_79b9_7f4a_7c15);
    let mut z = *state;
    z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
    z ^ (z >> 31)
}

/// PSI and Jensen-Shannon divergence of a window's bin counts against
/// reference shares. Both sides are smoothed with the same pseudo-count
/// ([`SMOOTHING`]) at the window's size: the reference's shares are taken
/// as counts out of the window's total, so an empty bin on either side is
/// rare, never impossible, and neither value is infinite.
pub fn compare(reference: &[f64], counts: &[u64]) -> (f64, f64) {
    assert_eq!(
        reference.len(),
        counts.len(),
        "histograms of different bins"
    );
    let n: u64 = counts.iter().sum();
    let k = counts.len() as f64;
    let total = n as f64 + SMOOTHING * k;
    let expected: Vec<f64> = reference
        .iter()
        .map(|&r| (r * n as f64 + SMOOTHING) / total)
        .collect();
    let actual = smoothed(counts, SMOOTHING);
    (psi(&expected, &actual), js_divergence(&expected, &actual))
}

/// Takes a frame's [`FrameStats`]: the 1-in-[`PATTERN_ROW_STEP`] pattern
/// sample and `samples` pixels' leaf groups, at rows and positions drawn
/// from `seq` (the frame's place in the stream).
pub fn frame_stats(
    tree: &Tree,
    groups: &LeafGroups,
    frame: &BitFrame,
    detected: u64,
    seq: u64,
    samples: usize,
) -> FrameStats {
    FrameStats {
        patterns: pattern_histogram_rows(frame, PATTERN_ROW_STEP, seq ^ 0x726f_7773_6c6f_6f6d),
        leaves: groups.sample(tree, frame, samples, seq ^ 0x6c6f_6f6d_6672_616d),
        detected,
        pixels: (frame.width() * frame.height()) as u64,
    }
}

/// What the input monitors take from one frame (a worker computes it
/// beside detection): its sampled 2x2 pattern counts and leaf groups, and
/// its detected and total pixels.
#[derive(Clone, Copy, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct FrameStats {
    pub patterns: [u64; 16],
    pub leaves: [u64; LEAF_GROUPS],
    /// Pixels detected (in objects kept).
    pub detected: u64,
    pub pixels: u64,
}

/// Which way the mean moved, for [`PageHinkley`].
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub enum Direction {
    Up,
    Down,
    Both,
}

/// Parameters of the Page-Hinkley test.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
pub struct PageHinkleyParams {
    /// Values seen before a change can be signalled.
    pub min_instances: u64,
    /// The magnitude of change tolerated (`delta`).
    pub delta: f64,
    /// The detection threshold (`lambda`).
    pub threshold: f64,
    /// Forgetting factor applied to the cumulative sums each step.
    pub alpha: f64,
    pub direction: Direction,
}

impl Default for PageHinkleyParams {
    /// The defaults of the `river` library (min_instances 30, delta 0.005,
    /// threshold 50, alpha 1 - 0.0001, both directions).
    fn default() -> Self {
        PageHinkleyParams {
            min_instances: 30,
            delta: 0.005,
            threshold: 50.0,
            alpha: 1.0 - 0.0001,
            direction: Direction::Both,
        }
    }
}

/// The Page-Hinkley test (Page, 1954): cumulative deviations of each value
/// from the running mean, less (for a rise) or plus (for a fall) `delta`,
/// faded by `alpha`; a change when the sum has risen more than `threshold`
/// above its lowest (or fallen that much below its highest). After a
/// change it starts afresh.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct PageHinkley {
    params: PageHinkleyParams,
    n: u64,
    mean: f64,
    sum_up: f64,
    sum_down: f64,
    min_up: f64,
    max_down: f64,
    detected: bool,
}

impl PageHinkley {
    pub fn new(params: PageHinkleyParams) -> PageHinkley {
        let mut p = PageHinkley {
            params,
            n: 0,
            mean: 0.0,
            sum_up: 0.0,
            sum_down: 0.0,
            min_up: 0.0,
            max_down: 0.0,
            detected: false,
        };
        p.reset();
        p
    }

    fn reset(&mut self) {
        self.n = 0;
        self.mean = 0.0;
        self.sum_up = 0.0;
        self.sum_down = 0.0;
        // The largest finite number rather than an infinity, so the state
        // can be saved as JSON; the first value replaces it either way.
        self.min_up = f64::MAX;
        // As the reference implementation starts it.
        self.max_down = -1.0;
        self.detected = false;
    }

    /// Takes one value; true when it signals a change.
    pub fn update(&mut self, x: f64) -> bool {
        if self.detected {
            self.reset();
        }
        self.n += 1;
        self.mean += (x - self.mean) / self.n as f64;
        let dev = x - self.mean;
        let p = self.params;
        self.sum_up = p.alpha * self.sum_up + dev - p.delta;
        self.sum_down = p.alpha * self.sum_down + dev + p.delta;
        self.min_up = self.min_up.min(self.sum_up);
        self.max_down = self.max_down.max(self.sum_down);
        if self.n >= p.min_instances {
            let up = self.sum_up - self.min_up > p.threshold;
            let down = self.max_down - self.sum_down > p.threshold;
            self.detected = match p.direction {
                Direction::Up => up,
                Direction::Down => down,
                Direction::Both => up || down,
            };
        }
        self.detected
    }

    /// How far the rise and fall statistics are now (`sum - min`, `max -
    /// sum`), for reporting against the threshold.
    pub fn statistics(&self) -> (f64, f64) {
        (
            (self.sum_up - self.min_up).max(0.0),
            (self.max_down - self.sum_down).max(0.0),
        )
    }

    /// Values seen since the last start.
    pub fn seen(&self) -> u64 {
        self.n
    }
}

/// Where a [`Ddm`] stands.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub enum DdmState {
    Stable,
    /// The error rate rose past the warning level.
    Warning,
    /// Past the drift level: the detector starts afresh with the next value.
    Drift,
}

/// Parameters of the Drift Detection Method.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
pub struct DdmParams {
    /// Values seen before the minimum is tracked and levels are tested.
    pub warm_start: u64,
    /// Standard deviations above the minimum for a warning (2 in Gama et
    /// al., 2004).
    pub warning: f64,
    /// ... and for drift (3 in Gama et al., 2004).
    pub drift: f64,
    /// Estimate the error rate as `(errors + 1) / (n + 2)` (Laplace's rule
    /// of succession) instead of `errors / n`. With the plain rate, a
    /// stream that starts without errors has `p_min = s_min = 0`, and its
    /// first error passes `p_min + 3 s_min`: drift on one error. The
    /// published method and the `river` library use the plain rate
    /// (false, the default here); the monitors use this.
    #[serde(default)]
    pub laplace: bool,
}

impl Default for DdmParams {
    /// Gama et al. (2004): warning at 2, drift at 3 standard deviations;
    /// 30 values first (as the `river` library); the plain error rate.
    fn default() -> Self {
        DdmParams {
            warm_start: 30,
            warning: 2.0,
            drift: 3.0,
            laplace: false,
        }
    }
}

/// The Drift Detection Method (Gama, Medas, Castillo, Rodrigues, 2004):
/// the error rate `p` and its binomial standard deviation
/// `s = sqrt(p (1 - p) / n)` are tracked; the lowest `p + s` seen is kept
/// with its `p` and `s`; a warning when `p + s` passes `p_min + 2 s_min`,
/// drift when it passes `p_min + 3 s_min`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Ddm {
    params: DdmParams,
    n: u64,
    #[serde(default)]
    errors: u64,
    p: f64,
    p_min: f64,
    s_min: f64,
    ps_min: f64,
    state: DdmState,
}

impl Ddm {
    pub fn new(params: DdmParams) -> Ddm {
        Ddm {
            params,
            n: 0,
            errors: 0,
            p: 0.0,
            p_min: 0.0,
            s_min: 0.0,
            ps_min: f64::MAX,
            state: DdmState::Stable,
        }
    }

    /// Takes one outcome (true: an error) and says where the detector
    /// stands.
    pub fn update(&mut self, error: bool) -> DdmState {
        if self.state == DdmState::Drift {
            *self = Ddm::new(self.params);
        }
        self.n += 1;
        self.errors += error as u64;
        self.p += (error as u8 as f64 - self.p) / self.n as f64;
        let (p, s) = self.estimate();
        if self.n > self.params.warm_start {
            if p + s <= self.ps_min {
                self.p_min = p;
                self.s_min = s;
                self.ps_min = p + s;
            }
            self.state = if p + s > self.p_min + self.params.drift * self.s_min {
                DdmState::Drift
            } else if p + s > self.p_min + self.params.warning * self.s_min {
                DdmState::Warning
            } else {
                DdmState::Stable
            };
        }
        self.state
    }

    /// The rate as tested (plain or Laplace's) and its spread.
    fn estimate(&self) -> (f64, f64) {
        let p = if self.params.laplace {
            (self.errors + 1) as f64 / (self.n + 2) as f64
        } else {
            self.p
        };
        (p, (p * (1.0 - p) / self.n.max(1) as f64).sqrt())
    }

    /// The error rate since the last start, and how many outcomes.
    pub fn rate(&self) -> (f64, u64) {
        (self.p, self.n)
    }

    /// How many of its lowest standard deviations `s_min` the rate now
    /// stands above its lowest: `(p + s - p_min) / s_min`, the number the
    /// warning (2) and drift (3) levels are for; `None` until the warm
    /// start is over. (A lowest spread of 0, all outcomes alike so far,
    /// makes any rise infinitely many: the largest finite number.)
    pub fn sigmas(&self) -> Option<f64> {
        if self.n <= self.params.warm_start || self.ps_min == f64::MAX {
            return None;
        }
        let (p, s) = self.estimate();
        let rise = p + s - self.p_min;
        Some(if self.s_min > 0.0 {
            rise / self.s_min
        } else if rise > 0.0 {
            f64::MAX
        } else {
            0.0
        })
    }

    /// Where it stands after the last value.
    pub fn state(&self) -> DdmState {
        self.state
    }
}

/// A monitor's level.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, PartialOrd, Ord, Serialize, Deserialize)]
pub enum Level {
    #[default]
    Ok,
    Watch,
    Alert,
}

/// Levels from a statistic with hysteresis: a level is raised when the
/// statistic reaches its threshold, and lowered only when it falls below
/// `clear` times that threshold, so a statistic hovering at a threshold
/// does not flap.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
pub struct Hysteresis {
    pub watch: f64,
    pub alert: f64,
    /// Fraction of a threshold the statistic must fall below to lower the
    /// level (0 < clear <= 1).
    pub clear: f64,
    /// Updates in a row the statistic must stay low before the level is
    /// lowered (0: at once).
    #[serde(default)]
    pub dwell: u32,
    level: Level,
    /// Updates in a row that would have lowered the level so far.
    #[serde(default)]
    low: u32,
}

impl Hysteresis {
    /// Starts at [`Level::Ok`], lowering at once.
    pub fn new(watch: f64, alert: f64, clear: f64) -> Hysteresis {
        Hysteresis {
            watch,
            alert,
            clear,
            dwell: 0,
            level: Level::Ok,
            low: 0,
        }
    }

    /// The same, lowering only after `dwell` low updates in a row: a
    /// statistic that dips below the clearing level for a moment while it
    /// hovers keeps its level.
    pub fn with_dwell(self, dwell: u32) -> Hysteresis {
        Hysteresis { dwell, ..self }
    }

    /// The level now.
    pub fn level(&self) -> Level {
        self.level
    }

    /// Takes the statistic's new value; the new level when it changed.
    pub fn update(&mut self, value: f64) -> Option<Level> {
        let raised = if value >= self.alert {
            Level::Alert
        } else if value >= self.watch {
            Level::Watch
        } else {
            Level::Ok
        };
        let kept = match self.level {
            Level::Alert if value >= self.alert * self.clear => Level::Alert,
            Level::Alert | Level::Watch if value >= self.watch * self.clear => Level::Watch,
            _ => Level::Ok,
        };
        let next = raised.max(kept);
        if next < self.level {
            self.low += 1;
            if self.low <= self.dwell {
                return None;
            }
        }
        self.low = 0;
        (next != self.level).then(|| {
            self.level = next;
            next
        })
    }
}

/// The sum of the last `size` frames' histograms, kept as a ring.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct HistogramWindow {
    size: usize,
    ring: std::collections::VecDeque<Vec<u64>>,
    sum: Vec<u64>,
}

impl HistogramWindow {
    /// A window of `size` frames (at least 1) of `bins` bins.
    pub fn new(size: usize, bins: usize) -> Self {
        HistogramWindow {
            size: size.max(1),
            ring: std::collections::VecDeque::with_capacity(size.max(1)),
            sum: vec![0; bins],
        }
    }

    /// Adds one frame's histogram, dropping the oldest when full.
    ///
    /// # Panics
    /// If `h` has another number of bins.
    pub fn push(&mut self, h: &[u64]) {
        assert_eq!(h.len(), self.sum.len(), "histograms of different bins");
        if self.ring.len() >= self.size {
            let old = self.ring.pop_front().expect("full");
            for (s, o) in self.sum.iter_mut().zip(old) {
                *s -= o;
            }
        }
        for (s, v) in self.sum.iter_mut().zip(h) {
            *s += v;
        }
        self.ring.push_back(h.to_vec());
    }

    /// The summed counts of the frames in the window.
    pub fn sum(&self) -> &[u64] {
        &self.sum
    }

    /// Frames in the window now.
    pub fn len(&self) -> usize {
        self.ring.len()
    }

    pub fn is_empty(&self) -> bool {
        self.ring.is_empty()
    }

    /// Whether it holds `size` frames.
    pub fn is_full(&self) -> bool {
        self.ring.len() >= self.size
    }

    /// The window's size in frames.
    pub fn size(&self) -> usize {
        self.size
    }

    /// Empties it (a new model's references start a new window).
    pub fn clear(&mut self) {
        self.ring.clear();
        self.sum.iter_mut().for_each(|s| *s = 0);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn psi_worked_by_hand() {
        // Worked by hand (common practice, no single source): expected
        // shares 0.25 0.25 0.25 0.25, actual 0.10 0.20 0.30 0.40.
        // (0.10-0.25) ln(0.4)   = -0.15 x -0.916291 = 0.137444
        // (0.20-0.25) ln(0.8)   = -0.05 x -0.223144 = 0.011157
        // (0.30-0.25) ln(1.2)   =  0.05 x  0.182322 = 0.009116
        // (0.40-0.25) ln(1.6)   =  0.15 x  0.470004 = 0.070501
        // sum                                       = 0.228218
        let e = [0.25; 4];
        let a = [0.10, 0.20, 0.30, 0.40];
        assert!((psi(&e, &a) - 0.228218).abs() < 1e-6, "{}", psi(&e, &a));
        assert!((psi(&a, &e) - psi(&e, &a)).abs() < 1e-12);
        assert_eq!(psi(&e, &e), 0.0);
        // Empty bins: smoothing keeps the index finite.
        let s = smoothed(&[10, 0, 0, 10], SMOOTHING);
        assert!((s.iter().sum::<f64>() - 1.0).abs() < 1e-12);
        assert!((s[1] - 0.5 / 22.0).abs() < 1e-12);
        let t = smoothed(&[0, 10, 10, 0], SMOOTHING);
        assert!(psi(&s, &t).is_finite() && psi(&s, &t) > PSI_ALERT);
        assert_eq!(smoothed(&[0, 0], 0.0), [0.5, 0.5]);
    }

    #[test]
    fn js_bounds() {
        // Disjoint distributions are 1 bit apart; equal ones 0.
        assert!((js_divergence(&[1.0, 0.0], &[0.0, 1.0]) - 1.0).abs() < 1e-12);
        assert_eq!(js_divergence(&[0.3, 0.7], &[0.3, 0.7]), 0.0);
    }

    /// The plain count, pixel by pixel.
    fn histogram_by_pixels(f: &BitFrame) -> [u64; 16] {
        let mut h = [0u64; 16];
        for y in 0..f.height().saturating_sub(1) {
            for x in 0..f.width().saturating_sub(1) {
                let b = f.get(x, y) as usize
                    | (f.get(x + 1, y) as usize) << 1
                    | (f.get(x, y + 1) as usize) << 2
                    | (f.get(x + 1, y + 1) as usize) << 3;
                h[b] += 1;
            }
        }
        h
    }

    #[test]
    fn pattern_histogram_matches_the_pixel_by_pixel_count() {
        for (w, h) in [
            (1, 5),
            (2, 2),
            (63, 3),
            (64, 4),
            (65, 5),
            (130, 7),
            (200, 9),
        ] {
            let f = BitFrame::from_fn(w, h, |x, y| (x * 7 + y * 13 + x * y) % 5 < 2);
            let got = pattern_histogram(&f);
            assert_eq!(got, histogram_by_pixels(&f), "{w}x{h}");
            let blocks = (w.saturating_sub(1) * h.saturating_sub(1)) as u64;
            assert_eq!(got.iter().sum::<u64>(), blocks);
        }
    }

    #[test]
    fn a_row_sample_counts_about_one_row_in_step_from_every_phase() {
        // A weave of period 8 whose rows differ by phase: only an
        // unaligned sample gets the whole frame's shares.
        let f = BitFrame::from_fn(256, 256, |x, y| (x + 3 * (y % 8)) % 8 < 3);
        let full = pattern_histogram(&f);
        let mut sum = [0u64; 16];
        for seed in 0..20 {
            let h = pattern_histogram_rows(&f, PATTERN_ROW_STEP, seed);
            let n: u64 = h.iter().sum();
            // 255 row pairs of 255 positions; about 32 pairs a frame.
            assert!((16 * 255..=48 * 255).contains(&n), "{n}");
            for (s, c) in sum.iter_mut().zip(h) {
                *s += c;
            }
        }
        let (a, b) = (smoothed(&full, SMOOTHING), smoothed(&sum, SMOOTHING));
        assert!(psi(&a, &b) < 0.01, "{}", psi(&a, &b));
        assert_eq!(pattern_histogram_rows(&f, 1, 7), full);
    }

    #[test]
    fn hysteresis_does_not_flap_at_a_threshold() {
        let mut h = Hysteresis::new(PSI_WATCH, PSI_ALERT, 0.8);
        assert_eq!(h.update(0.05), None);
        assert_eq!(h.update(0.26), Some(Level::Alert));
        // Hovering just under the alert threshold keeps the alert.
        for v in [0.24, 0.26, 0.21, 0.25, 0.2] {
            assert_eq!(h.update(v), None, "{v}");
        }
        // Below 0.8 x 0.25: down to watch; hovering at the watch threshold
        // keeps it.
        assert_eq!(h.update(0.19), Some(Level::Watch));
        for v in [0.09, 0.11, 0.081] {
            assert_eq!(h.update(v), None, "{v}");
        }
        assert_eq!(h.update(0.07), Some(Level::Ok));
        assert_eq!(h.update(0.1), Some(Level::Watch));
        assert_eq!(h.level(), Level::Watch);
        // With a dwell of 2, a level is lowered on the third low value in
        // a row only; raising is never delayed.
        let mut h = Hysteresis::new(PSI_WATCH, PSI_ALERT, 0.8).with_dwell(2);
        assert_eq!(h.update(0.3), Some(Level::Alert));
        assert_eq!(h.update(0.01), None);
        assert_eq!(h.update(0.01), None);
        assert_eq!(h.update(0.3), None);
        assert_eq!(h.update(0.01), None);
        assert_eq!(h.update(0.01), None);
        assert_eq!(h.update(0.01), Some(Level::Ok));
    }

    #[test]
    fn a_histogram_window_sums_the_last_frames() {
        let mut w = HistogramWindow::new(3, 2);
        for k in 1..=5u64 {
            w.push(&[k, 10 * k]);
        }
        assert!(w.is_full());
        assert_eq!(w.sum(), &[3 + 4 + 5, 30 + 40 + 50]);
        w.clear();
        assert!(w.is_empty() && w.sum() == [0, 0]);
    }

    /// The 2x2 pattern histogram over 20 frames tells the loom's weaves
    /// apart, and two sets of the same weave not: PSI measured here, on
    /// the generator's frames.
    #[test]
    fn pattern_psi_separates_a_new_weave_from_the_same_one() {
        use crate::synth::{self, LoomParams};
        let window = |p: &LoomParams, seed: u64| {
            let mut w = HistogramWindow::new(20, 16);
            for g in synth::generate_set(p, seed, 20) {
                w.push(&pattern_histogram(&g.frame));
            }
            smoothed(w.sum(), SMOOTHING)
        };
        let reference = window(&LoomParams::standard(), 101);
        let same = psi(&reference, &window(&LoomParams::standard(), 202));
        let drifted = psi(&reference, &window(&LoomParams::drifted(), 303));
        let noisier = psi(
            &reference,
            &window(
                &LoomParams {
                    noise: 0.04,
                    ..LoomParams::standard()
                },
                404,
            ),
        );
        eprintln!("PSI of 2x2 patterns: same weave {same:.5}, drifted {drifted:.3}, 4x noise {noisier:.3}");
        // Measured when written: same weave 0.00003, drifted 0.27, four
        // times the camera noise 0.058. The noise stands far out of the
        // same weave's spread, but under the common PSI watch level of
        // 0.1: this statistic alone catches a new weave, not a noisier
        // camera at that level (the monitors need another for that).
        assert!(same < PSI_WATCH / 10.0, "{same}");
        assert!(drifted > PSI_ALERT, "{drifted}");
        assert!(noisier > 100.0 * same, "{noisier}");
    }

    #[test]
    fn ddm_warns_then_drifts_when_errors_rise() {
        let mut d = Ddm::new(DdmParams::default());
        let mut states = Vec::new();
        for i in 0..400u64 {
            // 10% errors, then 60%.
            let error = if i < 200 { i % 10 == 0 } else { i % 10 < 6 };
            states.push(d.update(error));
        }
        let warn = states.iter().position(|s| *s == DdmState::Warning).unwrap();
        let drift = states.iter().position(|s| *s == DdmState::Drift).unwrap();
        assert!(warn >= 200 && warn < drift, "warning {warn}, drift {drift}");
        assert!(states[..200].iter().all(|s| *s == DdmState::Stable));
    }
}
