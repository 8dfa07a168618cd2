//! Choosing the pruning strength, score threshold and grouping parameters
//! on held-out frames, by object-level F1.
//!
//! Every held-out pixel is walked once through the grown tree to its grown
//! leaf. A pruned tree maps each grown leaf to an ancestor, so its score for
//! any pixel is a table lookup: trying a pruning strength costs a pass over
//! the held-out pixels, not a new walk. For each strength the candidate
//! thresholds are the leaf scores that give the best pixel F1 plus a spread
//! over all leaf scores; for each threshold the masks are grouped once per
//! merge distance, and every minimum area is scored from those objects.
//!
//! Selection is deterministic: highest object F1, then highest pixel F1,
//! then the smaller tree, then the earlier candidate (smaller merge
//! distance, smaller minimum area, higher threshold). Then the size rule
//! (one standard error, Breiman et al. 1984) may keep a smaller tree, and
//! smoothing may be tried (see [`choose_folds`]).

use crate::detect::group::{self, GroupParams, Object};
use crate::detect::smooth::Smoothing;
use crate::frame::BitFrame;
use crate::score::{self, Confusion};
use crate::window::{self, Window};

use super::grow::GrownTree;
use super::on_two_threads;
use super::prune::Pruning;

/// The candidate values tried when the user fixes none.
pub const MERGE_DISTANCES: &[u32] = &[0, 1, 2, 3, 4, 6];
pub const MIN_AREAS: &[u32] = &[1, 2, 3, 4, 5, 6, 8, 10, 12, 16, 20, 25, 32];
/// At most this many pruning strengths are considered, spread over the
/// sequence; the coarse-to-fine search of [`choose_folds`] tries every other
/// one, then the neighbours of the best three.
pub const MAX_ALPHAS: usize = 24;
/// Thresholds detecting more than this many times the held-out target
/// pixels are grouped with the smallest merge distance only.
const MAX_DETECTED_RATIO: u64 = 8;
/// Thresholds tried per strength.
const BEST_PIXEL_THRESHOLDS: usize = 6;
const SPREAD_THRESHOLDS: usize = 6;

/// A held-out frame, prepared for tuning.
pub struct HoldoutFrame {
    width: usize,
    height: usize,
    /// Grown-tree leaf of every pixel, row-major.
    leaf: Vec<u32>,
    /// The target pixels whose label is known.
    truth_mask: BitFrame,
    truth: Vec<Object>,
    /// Pixels of unknown label: never counted, never detected.
    unknown: Option<BitFrame>,
    /// Frames of one group (a frame and its transforms, which are not
    /// independent) count as one frame in the standard errors; `None`:
    /// a group of its own. A group's frames stand next to each other.
    group: Option<u32>,
}

impl HoldoutFrame {
    /// Prepares a held-out frame; pixels set in `unknown` are left out, as
    /// if they were neither detected nor targets.
    pub fn new(
        tree: &GrownTree,
        win: Window,
        frame: &BitFrame,
        mask: &BitFrame,
        unknown: Option<&BitFrame>,
    ) -> HoldoutFrame {
        let mut leaf = vec![0u32; frame.len()];
        let w = frame.width();
        window::for_each_row(frame, win, |y, pats| {
            for (x, &p) in pats.iter().enumerate() {
                leaf[y * w + x] = tree.leaf_of(p) as u32;
            }
        });
        let truth_mask = match unknown {
            Some(u) => mask.and_not(u),
            None => mask.clone(),
        };
        HoldoutFrame {
            width: w,
            height: frame.height(),
            leaf,
            truth: score::truth_objects(&truth_mask),
            truth_mask,
            unknown: unknown.filter(|u| u.count_set() > 0).cloned(),
            group: None,
        }
    }

    /// The same frame as a member of group `g` (see [`HoldoutFrame`]).
    pub fn group(mut self, g: u32) -> HoldoutFrame {
        self.group = Some(g);
        self
    }

    /// The same frame with its leaf ids moved up by `by`: the frames of
    /// several trees (the folds of [`choose_folds`]) share one id space.
    pub fn offset(mut self, by: u32) -> HoldoutFrame {
        if by > 0 {
            for l in &mut self.leaf {
                *l += by;
            }
        }
        self
    }

    fn is_unknown(&self, x: usize, y: usize) -> bool {
        self.unknown.as_ref().is_some_and(|u| u.get(x, y))
    }

    /// Pixels whose label is known.
    fn known_pixels(&self) -> u64 {
        self.truth_mask.len() as u64 - self.unknown.as_ref().map_or(0, |u| u.count_set())
    }
}

/// What the user fixed; `None` lets tuning choose.
#[derive(Clone, Copy, Debug, Default)]
pub struct Fixed {
    pub threshold: Option<f64>,
    pub min_area: Option<u32>,
    pub merge_distance: Option<u32>,
}

/// What tuning may do beyond taking the best-scoring candidate.
#[derive(Clone, Copy, Debug, Default)]
pub struct Rules {
    /// The size rule: the smallest tree within one standard error.
    pub prefer_smaller: bool,
    /// Try smoothing the masks, kept when better by one standard error.
    pub smoothing: bool,
}

/// The chosen settings and their held-out scores.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Choice {
    pub alpha: f64,
    pub threshold: f64,
    pub grouping: GroupParams,
    pub smoothing: Smoothing,
    pub leaves: usize,
    pub pixel: Confusion,
    pub object: Confusion,
    /// The size rule's trade (see [`choose_folds`]): when it took a smaller
    /// tree than the best-scoring candidate, that candidate's leaves and
    /// held-out object F1, and the standard error that allowed it.
    pub passed_over: Option<PassedOver>,
}

/// The best-scoring candidate a smaller tree was preferred to.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct PassedOver {
    pub alpha: f64,
    pub leaves: usize,
    pub object: Confusion,
    /// Bootstrap standard error of its object F1 over the held-out frames.
    pub object_se: f64,
}

impl Choice {
    fn better_than(&self, o: &Choice) -> bool {
        let (a, b) = (self.object.f1(), o.object.f1());
        if a != b {
            return a > b;
        }
        let (a, b) = (self.pixel.f1(), o.pixel.f1());
        if a != b {
            return a > b;
        }
        self.leaves < o.leaves
    }
}

/// Orders choices best first ([`Choice::better_than`]); equal ones compare
/// equal, for the caller to break the tie.
fn best_first(a: &Choice, b: &Choice) -> std::cmp::Ordering {
    if a.better_than(b) {
        std::cmp::Ordering::Less
    } else if b.better_than(a) {
        std::cmp::Ordering::Greater
    } else {
        std::cmp::Ordering::Equal
    }
}

/// Picks up to `k` items spread evenly over `v` (always the first and last).
fn spread<T: Copy>(v: &[T], k: usize) -> Vec<T> {
    if v.len() <= k {
        return v.to_vec();
    }
    // Indices i * (len - 1) / (k - 1) are distinct because len > k.
    (0..k).map(|i| v[i * (v.len() - 1) / (k - 1)]).collect()
}

/// The minimum area in the middle of the longest run of best object F1.
/// Neighbouring areas that score the same on the holdout are equally
/// plausible; the middle of the run is the choice least likely to sit on
/// the edge of a cliff for new frames.
fn plateau_centre(row: &[Choice]) -> Choice {
    let best = row.iter().map(|c| c.object.f1()).fold(f64::MIN, f64::max);
    let (mut run_start, mut run_len) = (0, 0);
    let mut i = 0;
    while i < row.len() {
        if row[i].object.f1() == best {
            let start = i;
            while i < row.len() && row[i].object.f1() == best {
                i += 1;
            }
            if i - start > run_len {
                run_start = start;
                run_len = i - start;
            }
        } else {
            i += 1;
        }
    }
    row[run_start + (run_len - 1) / 2]
}

/// Score of each grown node under the class weights.
pub fn node_scores(tree: &GrownTree, weights: [f64; 2]) -> Vec<f64> {
    tree.nodes
        .iter()
        .map(|n| crate::model::leaf_score(n.counts, weights))
        .collect()
}

/// The folds' trees side by side in one id space (see [`choose_folds`]):
/// each grown node's node in the tree pruned at `alpha`, and the pruned
/// trees' leaves together.
fn effective(folds: &[(&GrownTree, &Pruning)], alpha: f64) -> (Vec<u32>, usize) {
    let mut eff: Vec<u32> = Vec::new();
    let mut leaves = 0;
    for (tree, pruning) in folds {
        let base = eff.len() as u32;
        eff.extend(pruning.effective(tree, alpha).into_iter().map(|e| e + base));
        leaves += pruning.leaves_at(tree, alpha);
    }
    (eff, leaves)
}

/// Pixels of each frame that reach `lowest`, with their score: detections
/// are rare, so masks are built from these lists. Pixels of unknown label
/// are listed too: they vote in smoothing, as in detection, and
/// [`masks_at`] takes them out after.
fn above(frames: &[HoldoutFrame], score: &dyn Fn(u32) -> f64, lowest: f64) -> Vec<Vec<(u32, f64)>> {
    frames
        .iter()
        .map(|f| {
            f.leaf
                .iter()
                .enumerate()
                .filter_map(|(i, &l)| {
                    let s = score(l);
                    (s >= lowest).then_some((i as u32, s))
                })
                .collect()
        })
        .collect()
}

/// Each frame's mask at threshold `thr`, smoothed, without the pixels of
/// unknown label: what detection gives and scoring counts
/// (`score::score_frame` smooths the whole mask, then leaves them out).
fn masks_at(
    frames: &[HoldoutFrame],
    above: &[Vec<(u32, f64)>],
    thr: f64,
    smoothing: Smoothing,
) -> Vec<BitFrame> {
    frames
        .iter()
        .zip(above)
        .map(|(f, cand)| {
            let mut m = BitFrame::new(f.width, f.height);
            for &(i, s) in cand {
                if s >= thr {
                    let (x, y) = (i as usize % f.width, i as usize / f.width);
                    m.row_mut(y)[x / 64] |= 1 << (x % 64);
                }
            }
            if !smoothing.is_off() {
                m = smoothing.apply(&m);
            }
            match &f.unknown {
                Some(u) => m.and_not(u),
                None => m,
            }
        })
        .collect()
}

/// The best grouping of one candidate's masks: for each merge distance,
/// every minimum area is scored from one labelling, and the row's plateau
/// centre competes. `base` carries the candidate's strength, threshold,
/// leaves and smoothing.
fn best_grouping(
    masks: &[BitFrame],
    frames: &[HoldoutFrame],
    score: &dyn Fn(u32) -> f64,
    fixed: &Fixed,
    base: Choice,
) -> Option<Choice> {
    let mds: Vec<u32> = fixed
        .merge_distance
        .map_or_else(|| MERGE_DISTANCES.to_vec(), |m| vec![m]);
    let areas: Vec<u32> = fixed
        .min_area
        .map_or_else(|| MIN_AREAS.to_vec(), |a| vec![a]);
    let truth_total: u64 = frames.iter().map(|f| f.truth_mask.count_set()).sum();
    // Merging is the costliest step on dense masks (many runs, each
    // joined to many within reach), and where a threshold detects many
    // times more pixels than there are targets, merging them further
    // cannot help: such masks are grouped with the smallest distance only.
    let detected: u64 = masks.iter().map(BitFrame::count_set).sum();
    let dense = detected > MAX_DETECTED_RATIO * truth_total.max(1) + 1000;
    let mds: &[u32] = if dense { &mds[..1] } else { &mds };
    let pixel_all = frames.iter().map(HoldoutFrame::known_pixels).sum::<u64>();
    let mut best: Option<Choice> = None;
    for &md in mds {
        // Objects (all sizes) and, per object, its area and how many of
        // its pixels are targets: enough to score every min_area.
        let grouped: Vec<(Vec<Object>, Vec<u64>)> = masks
            .iter()
            .zip(frames)
            .map(|(m, f)| {
                let (runs, comp, n) = group::label(m, md);
                let mut hits = vec![0u64; n];
                for (r, &c) in runs.iter().zip(&comp) {
                    let trow = f.truth_mask.row(r.y as usize);
                    for x in r.x0..=r.x1 {
                        hits[c as usize] += (trow[x as usize / 64] >> (x % 64)) & 1;
                    }
                }
                // With min_area 1 object k is component k, as `hits`.
                let objs =
                    group::objects_of(&runs, &comp, n, 1, |x, y| score(f.leaf[y * f.width + x]));
                (objs, hits)
            })
            .collect();
        let mut row: Vec<Choice> = Vec::with_capacity(areas.len());
        for &area in &areas {
            let mut object = Confusion::default();
            let mut pixel = Confusion::default();
            for ((objs, hits), f) in grouped.iter().zip(frames) {
                let kept: Vec<Object> = objs
                    .iter()
                    .filter(|o| o.area >= area as u64)
                    .cloned()
                    .collect();
                object.add(&score::object_confusion(&kept, &f.truth));
                for (o, &h) in objs.iter().zip(hits) {
                    if o.area >= area as u64 {
                        pixel.tp += h;
                        pixel.fp += o.area - h;
                    }
                }
            }
            pixel.fn_ = truth_total - pixel.tp;
            pixel.tn = pixel_all - pixel.tp - pixel.fp - pixel.fn_;
            row.push(Choice {
                grouping: GroupParams {
                    min_area: area,
                    merge_distance: md,
                },
                pixel,
                object,
                ..base
            });
        }
        let c = plateau_centre(&row);
        if best.as_ref().is_none_or(|b| c.better_than(b)) {
            best = Some(c);
        }
    }
    best
}

/// Each frame's object counts for one choice: the size rule's standard
/// error is over frames, the unit new data comes in.
/// `lists` are the frames' pixels at or above a threshold no higher than
/// the choice's ([`above`]).
fn per_frame(
    frames: &[HoldoutFrame],
    lists: &[Vec<(u32, f64)>],
    score: &dyn Fn(u32) -> f64,
    c: &Choice,
) -> Vec<Confusion> {
    let mut out: Vec<Confusion> = Vec::with_capacity(frames.len());
    let masks = masks_at(frames, lists, c.threshold, c.smoothing);
    for (k, (m, f)) in masks.iter().zip(frames).enumerate() {
        let objs = group::group(m, c.grouping, |x, y| score(f.leaf[y * f.width + x]));
        let counts = score::object_confusion(&objs, &f.truth);
        // A frame of the group before it adds to that group's counts.
        match out.last_mut() {
            Some(last) if k > 0 && f.group.is_some() && f.group == frames[k - 1].group => {
                last.add(&counts)
            }
            _ => out.push(counts),
        }
    }
    out
}

/// The folds' node scores in one id space (each tree's after the trees
/// before it), and their trees with their pruning sequences.
#[allow(clippy::type_complexity)]
fn side_by_side<'a>(
    folds: &[(&'a GrownTree, &'a Pruning, [f64; 2])],
) -> (Vec<f64>, Vec<(&'a GrownTree, &'a Pruning)>) {
    let scores = folds
        .iter()
        .flat_map(|(t, _, w)| node_scores(t, *w))
        .collect();
    (scores, folds.iter().map(|(t, p, _)| (*t, *p)).collect())
}

/// Each frame's object counts under a choice already made (its strength,
/// threshold, grouping and smoothing), on `frames` scored by the same
/// trees: how the choice does on some of the frames it was chosen on,
/// such as the untransformed ones under a symmetry.
pub fn counts_of(
    folds: &[(&GrownTree, &Pruning, [f64; 2])],
    frames: &[HoldoutFrame],
    c: &Choice,
) -> Vec<Confusion> {
    let (scores, trees) = side_by_side(folds);
    let (eff, _) = effective(&trees, c.alpha);
    let score = |l: u32| scores[eff[l as usize] as usize];
    let lists = above(frames, &score, c.threshold);
    per_frame(frames, &lists, &score, c)
}

/// What one pruning strength gave: its best choice, that choice's counts
/// per frame, and the best choice at each threshold tried.
struct Tried {
    best: Choice,
    per_frame: Vec<Confusion>,
    by_threshold: Vec<Choice>,
}

/// Evaluates one pruning strength without smoothing.
fn try_alpha(
    folds: &[(&GrownTree, &Pruning)],
    alpha: f64,
    scores: &[f64],
    frames: &[HoldoutFrame],
    fixed: &Fixed,
) -> Option<Tried> {
    let (eff, leaves) = effective(folds, alpha);
    // Held-out pixel histogram per effective leaf, for pixel F1 per threshold.
    let n = eff.len();
    let mut hist = vec![[0u64; 2]; n];
    for f in frames {
        for y in 0..f.height {
            let trow = f.truth_mask.row(y);
            for x in 0..f.width {
                if f.is_unknown(x, y) {
                    continue;
                }
                let t = (trow[x / 64] >> (x % 64)) & 1;
                hist[eff[f.leaf[y * f.width + x] as usize] as usize][t as usize] += 1;
            }
        }
    }
    let thresholds: Vec<f64> = match fixed.threshold {
        Some(t) => vec![t],
        None => {
            let mut used: Vec<(f64, [u64; 2])> = (0..n)
                .filter(|&i| hist[i][0] + hist[i][1] > 0)
                .map(|i| (scores[i], hist[i]))
                .collect();
            used.sort_by(|a, b| b.0.total_cmp(&a.0));
            // Sweep thresholds from high to low.
            let positives: u64 = used.iter().map(|u| u.1[1]).sum();
            let mut cand: Vec<(f64, f64)> = Vec::new(); // (threshold, pixel f1)
            let (mut tp, mut fp) = (0u64, 0u64);
            let mut i = 0;
            while i < used.len() {
                let s = used[i].0;
                while i < used.len() && used[i].0 == s {
                    tp += used[i].1[1];
                    fp += used[i].1[0];
                    i += 1;
                }
                if s <= 0.0 {
                    break;
                }
                let c = Confusion {
                    tp,
                    fp,
                    fn_: positives - tp,
                    tn: 0,
                };
                cand.push((s, c.f1()));
            }
            if cand.is_empty() {
                return None;
            }
            // Thresholds far from the best pixel F1 only flood the masks;
            // the spread covers those within half of it.
            let top = cand.iter().map(|c| c.1).fold(0.0, f64::max);
            let all: Vec<f64> = cand
                .iter()
                .filter(|c| c.1 >= 0.5 * top)
                .map(|c| c.0)
                .collect();
            let mut by_f1 = cand.clone();
            by_f1.sort_by(|a, b| b.1.total_cmp(&a.1).then(b.0.total_cmp(&a.0)));
            let mut t: Vec<f64> = by_f1
                .iter()
                .take(BEST_PIXEL_THRESHOLDS)
                .map(|c| c.0)
                .collect();
            t.extend(spread(&all, SPREAD_THRESHOLDS));
            t.sort_by(|a, b| b.total_cmp(a));
            t.dedup();
            t
        }
    };
    let score = |l: u32| scores[eff[l as usize] as usize];
    let lowest = thresholds.iter().copied().fold(f64::INFINITY, f64::min);
    let lists = above(frames, &score, lowest);
    let mut by_threshold = Vec::with_capacity(thresholds.len());
    for &thr in &thresholds {
        let masks = masks_at(frames, &lists, thr, Smoothing::OFF);
        let base = Choice {
            alpha,
            threshold: thr,
            grouping: GroupParams::default(),
            smoothing: Smoothing::OFF,
            leaves,
            pixel: Confusion::default(),
            object: Confusion::default(),
            passed_over: None,
        };
        if let Some(c) = best_grouping(&masks, frames, &score, fixed, base) {
            by_threshold.push(c);
        }
    }
    let mut best: Option<Choice> = None;
    for c in &by_threshold {
        if best.as_ref().is_none_or(|b| c.better_than(b)) {
            best = Some(*c);
        }
    }
    let best = best?;
    Some(Tried {
        per_frame: per_frame(frames, &lists, &score, &best),
        best,
        by_threshold,
    })
}

/// The smoothings tried: the 3x3 square at one to six votes (a dilation,
/// joins, the majority) and the 5x5 square at a few.
pub const SMOOTHINGS: &[Smoothing] = &[
    Smoothing {
        radius: 1,
        votes: 1,
    },
    Smoothing {
        radius: 1,
        votes: 2,
    },
    Smoothing {
        radius: 1,
        votes: 3,
    },
    Smoothing {
        radius: 1,
        votes: 4,
    },
    Smoothing {
        radius: 1,
        votes: 5,
    },
    Smoothing {
        radius: 1,
        votes: 6,
    },
    Smoothing {
        radius: 2,
        votes: 3,
    },
    Smoothing {
        radius: 2,
        votes: 6,
    },
    Smoothing {
        radius: 2,
        votes: 9,
    },
    Smoothing {
        radius: 2,
        votes: 13,
    },
];
/// Thresholds of the chosen strength that smoothing is tried at: its best
/// ones without smoothing.
const SMOOTHING_THRESHOLDS: usize = 4;

/// Tries smoothing the masks of the chosen strength at its best
/// thresholds, on two threads; returns the best smoothed choice if it
/// beats `chosen` (the unsmoothed best of `tried`).
fn try_smoothing(
    folds: &[(&GrownTree, &Pruning)],
    scores: &[f64],
    frames: &[HoldoutFrame],
    fixed: &Fixed,
    chosen: &Choice,
    tried: &Tried,
) -> Option<Choice> {
    let by_threshold = &tried.by_threshold;
    let (eff, _) = effective(folds, chosen.alpha);
    let score = |l: u32| scores[eff[l as usize] as usize];
    let mut ranked: Vec<&Choice> = by_threshold.iter().collect();
    ranked.sort_by(|a, b| best_first(a, b).then(b.threshold.total_cmp(&a.threshold)));
    let thresholds: Vec<f64> = ranked
        .iter()
        .take(SMOOTHING_THRESHOLDS)
        .map(|c| c.threshold)
        .collect();
    let lowest = thresholds.iter().copied().fold(chosen.threshold, f64::min);
    let lists = above(frames, &score, lowest);
    let jobs: Vec<(f64, Smoothing)> = thresholds
        .iter()
        .flat_map(|&t| SMOOTHINGS.iter().map(move |&s| (t, s)))
        .collect();
    let found: Vec<Option<Choice>> = on_two_threads(&jobs, |&(thr, sm)| {
        let masks = masks_at(frames, &lists, thr, sm);
        let base = Choice {
            threshold: thr,
            smoothing: sm,
            ..*chosen
        };
        best_grouping(&masks, frames, &score, fixed, base)
    });
    let mut best: Option<Choice> = None;
    for c in found.into_iter().flatten() {
        if best.as_ref().is_none_or(|b| c.better_than(b)) {
            best = Some(c);
        }
    }
    // Smoothing costs time on every frame: as with the tree's size, it is
    // kept only when it scores better than the unsmoothed choice by more
    // than one standard error of the difference.
    let best = best?;
    let se = paired_se(
        &per_frame(frames, &lists, &score, &best),
        &tried.per_frame,
        SE_SEED,
    );
    (best.object.f1() > chosen.object.f1() + se).then_some(best)
}

/// Tries the pruning strengths (spread over the sequence, at most
/// [`MAX_ALPHAS`]) on two threads and returns the best choice.
pub fn choose(
    tree: &GrownTree,
    pruning: &Pruning,
    weights: [f64; 2],
    frames: &[HoldoutFrame],
    fixed: &Fixed,
    rules: Rules,
) -> Option<Choice> {
    let size = |a: f64| pruning.leaves_at(tree, a);
    choose_folds(&[(tree, pruning, weights)], frames, fixed, rules, &size)
}

/// [`choose`] over several trees at once, each with its own held-out
/// frames (cross-fitting: each tree grown without its frames). Frames of
/// fold `k` carry leaf ids offset by the node counts of the folds before
/// it ([`HoldoutFrame::offset`]); a candidate's scores are summed over all
/// frames, so it is judged on every fold's frames together. `final_leaves`
/// gives the leaves of the tree that will be kept, pruned at a strength:
/// the size rule compares those.
pub fn choose_folds(
    folds: &[(&GrownTree, &Pruning, [f64; 2])],
    frames: &[HoldoutFrame],
    fixed: &Fixed,
    rules: Rules,
    final_leaves: &dyn Fn(f64) -> usize,
) -> Option<Choice> {
    let (scores, trees) = side_by_side(folds);
    let mut every: Vec<f64> = folds
        .iter()
        .flat_map(|(_, p, _)| p.alphas.iter().copied())
        .collect();
    every.sort_by(f64::total_cmp);
    every.dedup();
    let alphas = spread(&every, MAX_ALPHAS);
    // Strengths by index into `alphas`, two threads sharing them.
    let run = |idx: &[usize]| -> Vec<(usize, Option<Tried>)> {
        on_two_threads(idx, |&i| {
            (i, try_alpha(&trees, alphas[i], &scores, frames, fixed))
        })
    };
    // Coarse to fine: every other strength of the spread first (the
    // weakest and strongest included), then the untried neighbours of the
    // three best: the best of the whole spread is nearly always among
    // them, at two thirds of the cost.
    let n = alphas.len();
    let coarse: Vec<usize> = (0..n).filter(|&i| i % 2 == 0 || i + 1 == n).collect();
    let mut slots: Vec<Option<Option<Tried>>> = (0..n).map(|_| None).collect();
    for (i, t) in run(&coarse) {
        slots[i] = Some(t);
    }
    let mut ranked: Vec<(usize, &Choice)> = slots
        .iter()
        .enumerate()
        .filter_map(|(i, t)| t.as_ref().and_then(|t| t.as_ref()).map(|t| (i, &t.best)))
        .collect();
    // Best first; ties to the smaller tree (the larger index).
    ranked.sort_by(|a, b| best_first(a.1, b.1).then(b.0.cmp(&a.0)));
    let mut fine: Vec<usize> = ranked
        .iter()
        .take(3)
        .flat_map(|&(i, _)| [i.wrapping_sub(1), i + 1])
        .filter(|&j| j < n && slots[j].is_none())
        .collect();
    fine.sort_unstable();
    fine.dedup();
    for (i, t) in run(&fine) {
        slots[i] = Some(t);
    }
    let results: Vec<Option<Tried>> = slots.into_iter().flatten().collect();
    let results: Vec<Tried> = results.into_iter().flatten().collect();
    // Larger alpha (smaller tree) wins ties: visit from the largest.
    let mut best: Option<&Tried> = None;
    for r in results.iter().rev() {
        if best.is_none_or(|b| r.best.better_than(&b.best)) {
            best = Some(r);
        }
    }
    let top = best?;
    // The one-standard-error rule (Breiman et al. 1984, section 3.4.3):
    // a candidate whose object F1 is within one standard error of the
    // best's is taken as equally good, and the smallest tree among those is
    // kept. The candidates are scored on the same frames, so the error is
    // that of their difference, resampled in pairs (Efron & Tibshirani
    // 1993, chapter 6): a tree that is worse on every frame is not equal
    // however noisy the frames are.
    // The pruned trees are nested (each strength's tree is a subtree of the
    // weaker strengths' trees), so fewer leaves means the compiled program
    // evaluates a subset of the nodes: never slower, usually faster.
    let mut kept: (&Tried, Option<f64>) = (top, None);
    // Sizes are the kept tree's (the final one, with cross-fitting): two
    // strengths that prune it alike are the same tree, and then nothing is
    // given up for speed.
    if rules.prefer_smaller {
        let top_size = final_leaves(top.best.alpha);
        let mut kept_size = top_size;
        for r in &results {
            let c = &r.best;
            let size = final_leaves(c.alpha);
            if size >= top_size {
                continue;
            }
            let se = paired_se(&top.per_frame, &r.per_frame, SE_SEED);
            if c.object.f1() >= top.best.object.f1() - se
                && (size < kept_size || (size == kept_size && c.better_than(&kept.0.best)))
            {
                kept = (r, Some(se));
                kept_size = size;
            }
        }
    }
    let (tried, se) = kept;
    let mut choice = tried.best;
    if let Some(se) = se {
        choice.passed_over = Some(PassedOver {
            alpha: top.best.alpha,
            leaves: top.best.leaves,
            object: top.best.object,
            object_se: se,
        });
    }
    // Smoothing is tried on the kept strength only: it changes which
    // pixels form objects, not which tree is needed.
    if rules.smoothing {
        if let Some(smoothed) = try_smoothing(&trees, &scores, frames, fixed, &choice, tried) {
            choice = smoothed;
        }
    }
    Some(choice)
}

/// The bootstrap standard error of F1(a) - F1(b), where `a` and `b` are
/// two candidates' counts on the same frames: the frames are drawn with
/// replacement, the same draw for both.
pub fn paired_se(a: &[Confusion], b: &[Confusion], seed: u64) -> f64 {
    resampled_sd(a.len().min(b.len()), seed, |draw| {
        let (mut ca, mut cb) = (Confusion::default(), Confusion::default());
        for &k in draw {
            ca.add(&a[k]);
            cb.add(&b[k]);
        }
        ca.f1() - cb.f1()
    })
}

/// Resamples of [`bootstrap_se`].
pub const BOOTSTRAP: usize = 1000;
/// The size rule's resampling seed: training stays deterministic.
pub const SE_SEED: u64 = 0x5EED;

/// The bootstrap standard error (Efron & Tibshirani 1993, chapter 6) of
/// the F1 of summed counts: frames drawn with replacement, [`BOOTSTRAP`]
/// times, from a generator seeded by `seed` (so the figure is repeatable).
pub fn bootstrap_se(frames: &[Confusion], seed: u64) -> f64 {
    resampled_sd(frames.len(), seed, |draw| {
        let mut c = Confusion::default();
        for &k in draw {
            c.add(&frames[k]);
        }
        c.f1()
    })
}

/// The standard deviation of `stat` over [`BOOTSTRAP`] draws of `n` frame
/// indices with replacement, from a generator seeded by `seed`; 0 for
/// fewer than two frames.
fn resampled_sd(n: usize, seed: u64, mut stat: impl FnMut(&[usize]) -> f64) -> f64 {
    if n < 2 {
        return 0.0;
    }
    let mut rng = crate::synth::Rng::new(seed ^ 0x5EED_B007);
    let mut draw = vec![0usize; n];
    let values: Vec<f64> = (0..BOOTSTRAP)
        .map(|_| {
            for k in draw.iter_mut() {
                *k = rng.range(0, n);
            }
            stat(&draw)
        })
        .collect();
    let mean = values.iter().sum::<f64>() / values.len() as f64;
    (values.iter().map(|f| (f - mean) * (f - mean)).sum::<f64>() / (values.len() - 1) as f64).sqrt()
}

#[cfg(test)]
mod tests {

    /// Held-out frames of one group (a frame and its transforms) count as
    /// one frame in the per-frame counts the standard errors resample: the
    /// group's counts are the sum of its frames', and frames of different
    /// groups, or of none, stay apart.
    #[test]
    fn a_group_of_held_out_frames_counts_as_one_frame() {
        use super::{node_scores, try_alpha, Fixed, HoldoutFrame};
        use crate::learn::TrainParams;
        let lp = crate::synth::LoomParams {
            width: 64,
            height: 64,
            ..crate::synth::LoomParams::standard()
        };
        let frames = crate::suite::frames("f", &lp, 4, 8);
        let params = TrainParams::default();
        let (tree, pruning, weights) = crate::learn::tests::grown_on(&frames[..6], &params);
        let scores = node_scores(&tree, weights);
        let hold = |i: usize| {
            let f = &frames[i];
            HoldoutFrame::new(&tree, params.window, &f.frame, &f.mask, None)
        };
        let fixed = Fixed::default();
        let tried = |held: &[HoldoutFrame]| {
            try_alpha(&[(&tree, &pruning)], 0.0, &scores, held, &fixed).unwrap()
        };
        let apart = tried(&[hold(6), hold(6), hold(7)]);
        let grouped = tried(&[hold(6).group(6), hold(6).group(6), hold(7).group(7)]);
        assert_eq!(apart.per_frame.len(), 3);
        assert_eq!(grouped.per_frame.len(), 2);
        let mut twice = apart.per_frame[0];
        twice.add(&apart.per_frame[1]);
        assert_eq!(grouped.per_frame[0], twice);
        assert_eq!(grouped.per_frame[1], apart.per_frame[2]);
        // Grouping moves no choice: the summed counts are the same.
        assert_eq!(grouped.best.object, apart.best.object);
        // Equal ids merge only when side by side.
        let split = tried(&[hold(6).group(6), hold(7).group(7), hold(6).group(6)]);
        assert_eq!(split.per_frame.len(), 3);
    }

    #[test]
    fn paired_errors_vanish_for_equal_candidates_and_not_for_noisy_ones() {
        use super::{bootstrap_se, paired_se};
        use crate::score::Confusion;
        let c = |tp, fp, fn_| Confusion { tp, fp, fn_, tn: 0 };
        let a: Vec<Confusion> = (0..20).map(|i| c(3 + i % 3, i % 2, 1)).collect();
        assert_eq!(paired_se(&a, &a, 1), 0.0);
        // A candidate one object worse on every frame differs by a steady
        // amount: its paired error is below its own.
        let b: Vec<Confusion> = a.iter().map(|x| c(x.tp - 1, x.fp, x.fn_ + 1)).collect();
        let (pair, own) = (paired_se(&a, &b, 1), bootstrap_se(&a, 1));
        assert!(pair > 0.0 && pair < own, "{pair} {own}");
        assert_eq!(paired_se(&a, &b, 1), pair, "repeatable");
    }

    #[test]
    fn equal_proportions_score_equally() {
        let w = [0.5317823016202742, 8.366013071895425];
        use crate::model::leaf_score;
        let s = leaf_score([1, 1], w);
        for k in 2..200 {
            assert_eq!(leaf_score([k, k], w), s);
            assert_eq!(leaf_score([3 * k, k], w), leaf_score([3, 1], w));
        }
        assert_eq!(leaf_score([5, 0], w), 0.0);
        assert_eq!(leaf_score([0, 5], w), 1.0);
    }
}
