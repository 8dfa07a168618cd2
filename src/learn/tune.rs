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
//! distance, smaller minimum area, higher threshold).

use crate::detect::group::{self, GroupParams, Object};
use crate::frame::BitFrame;
use crate::score::{self, Confusion};
use crate::window::{self, Window};

use super::grow::GrownTree;
use super::prune::Pruning;

/// The candidate values tried when the user fixes none.
pub const MERGE_DISTANCES: &[u32] = &[0, 1, 2, 3, 4, 6];
pub const MIN_AREAS: &[u32] = &[1, 2, 3, 4, 5, 6, 8, 10, 12, 16, 20, 25, 32];
/// At most this many pruning strengths are tried, spread over the sequence.
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
        }
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

/// The chosen settings and their held-out scores.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Choice {
    pub alpha: f64,
    pub threshold: f64,
    pub grouping: GroupParams,
    pub leaves: usize,
    pub pixel: Confusion,
    pub object: Confusion,
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

/// Evaluates one pruning strength; returns its best choice.
fn try_alpha(
    folds: &[(&GrownTree, &Pruning)],
    alpha: f64,
    scores: &[f64],
    frames: &[HoldoutFrame],
    fixed: &Fixed,
) -> Option<Choice> {
    // The folds' trees side by side in one id space (see `choose_folds`).
    let mut eff: Vec<u32> = Vec::with_capacity(scores.len());
    let mut leaves = 0;
    for (tree, pruning) in folds {
        let base = eff.len() as u32;
        eff.extend(pruning.effective(tree, alpha).into_iter().map(|e| e + base));
        leaves += pruning.leaves_at(tree, alpha);
    }
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
    let mds: Vec<u32> = fixed
        .merge_distance
        .map_or_else(|| MERGE_DISTANCES.to_vec(), |m| vec![m]);
    let areas: Vec<u32> = fixed
        .min_area
        .map_or_else(|| MIN_AREAS.to_vec(), |a| vec![a]);
    // Pixels that reach the lowest candidate threshold, per frame, with
    // their score: detections are rare, so masks are built from this list.
    let lowest = thresholds.iter().copied().fold(f64::INFINITY, f64::min);
    let candidates: Vec<Vec<(u32, f64)>> = frames
        .iter()
        .map(|f| {
            f.leaf
                .iter()
                .enumerate()
                .filter_map(|(i, &l)| {
                    let s = scores[eff[l as usize] as usize];
                    let known = || !f.is_unknown(i % f.width, i / f.width);
                    (s >= lowest && known()).then_some((i as u32, s))
                })
                .collect()
        })
        .collect();
    let mut best: Option<Choice> = None;
    for &thr in &thresholds {
        let masks: Vec<BitFrame> = frames
            .iter()
            .zip(&candidates)
            .map(|(f, cand)| {
                let mut m = BitFrame::new(f.width, f.height);
                for &(i, s) in cand {
                    if s >= thr {
                        let (x, y) = (i as usize % f.width, i as usize / f.width);
                        m.row_mut(y)[x / 64] |= 1 << (x % 64);
                    }
                }
                m
            })
            .collect();
        let truth_total: u64 = frames.iter().map(|f| f.truth_mask.count_set()).sum();
        // Merging is the costliest step on dense masks (many runs, each
        // joined to many within reach), and where a threshold detects many
        // times more pixels than there are targets, merging them further
        // cannot help: such masks are grouped with the smallest distance only.
        let detected: u64 = masks.iter().map(BitFrame::count_set).sum();
        let dense = detected > MAX_DETECTED_RATIO * truth_total.max(1) + 1000;
        let mds: &[u32] = if dense { &mds[..1] } else { &mds };
        let pixel_all = frames.iter().map(HoldoutFrame::known_pixels).sum::<u64>();
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
                    let objs = group::objects_of(&runs, &comp, n, 1, |x, y| {
                        scores[eff[f.leaf[y * f.width + x] as usize] as usize]
                    });
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
                    alpha,
                    threshold: thr,
                    grouping: GroupParams {
                        min_area: area,
                        merge_distance: md,
                    },
                    leaves,
                    pixel,
                    object,
                });
            }
            let c = plateau_centre(&row);
            if best.as_ref().is_none_or(|b| c.better_than(b)) {
                best = Some(c);
            }
        }
    }
    best
}

/// Tries the pruning strengths (spread over the sequence, at most
/// [`MAX_ALPHAS`]) on two threads and returns the best choice.
pub fn choose(
    tree: &GrownTree,
    pruning: &Pruning,
    weights: [f64; 2],
    frames: &[HoldoutFrame],
    fixed: &Fixed,
) -> Option<Choice> {
    choose_folds(&[(tree, pruning, weights)], frames, fixed)
}

/// [`choose`] over several trees at once, each with its own held-out
/// frames (cross-fitting: each tree grown without its frames). Frames of
/// fold `k` carry leaf ids offset by the node counts of the folds before
/// it ([`HoldoutFrame::offset`]); a candidate's scores are summed over all
/// frames, so it is judged on every fold's frames together.
pub fn choose_folds(
    folds: &[(&GrownTree, &Pruning, [f64; 2])],
    frames: &[HoldoutFrame],
    fixed: &Fixed,
) -> Option<Choice> {
    let scores: Vec<f64> = folds
        .iter()
        .flat_map(|(t, _, w)| node_scores(t, *w))
        .collect();
    let trees: Vec<(&GrownTree, &Pruning)> = folds.iter().map(|(t, p, _)| (*t, *p)).collect();
    let mut every: Vec<f64> = folds
        .iter()
        .flat_map(|(_, p, _)| p.alphas.iter().copied())
        .collect();
    every.sort_by(f64::total_cmp);
    every.dedup();
    let alphas = spread(&every, MAX_ALPHAS);
    let results: Vec<Option<Choice>> = std::thread::scope(|s| {
        let handles: Vec<_> = (0..2)
            .map(|k| {
                let (alphas, scores, trees) = (&alphas, &scores, &trees);
                s.spawn(move || {
                    alphas
                        .iter()
                        .enumerate()
                        .filter(|(i, _)| i % 2 == k)
                        .map(|(_, &a)| (a, try_alpha(trees, a, scores, frames, fixed)))
                        .collect::<Vec<_>>()
                })
            })
            .collect();
        let mut all: Vec<(f64, Option<Choice>)> = handles
            .into_iter()
            .flat_map(|h| h.join().expect("tuning thread"))
            .collect();
        all.sort_by(|a, b| a.0.total_cmp(&b.0));
        all.into_iter().map(|x| x.1).collect()
    });
    // Larger alpha (smaller tree) wins ties: visit from the largest.
    let mut best: Option<Choice> = None;
    for c in results.into_iter().rev().flatten() {
        if best.as_ref().is_none_or(|b| c.better_than(b)) {
            best = Some(c);
        }
    }
    best
}

#[cfg(test)]
mod tests {

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
