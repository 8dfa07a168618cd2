//! Greedy top-down induction of a binary-feature tree over label-store
//! entries.
//!
//! A node owns a contiguous range of the entry array; splitting partitions
//! that range in place (entries with the tested bit clear first). For every
//! node the learner keeps, per feature, the class counts of the entries that
//! have that bit set; with the node's totals this gives both children of
//! every candidate split, so one split search costs O(features) after the
//! counts are known. The counts of the smaller child are gathered by one
//! pass over its entries (O(entries x set bits)) and the larger child's
//! follow by subtraction from the parent's, so an entry is scanned only when
//! it lands in the smaller half: the "histogram subtraction" trick.
//!
//! Invariants: integer counts everywhere (the chosen split depends only on
//! the data, never on summation order); ties between features go to the
//! lowest feature index; children always get larger node ids than their
//! parent; growth uses an explicit stack, never recursion.

use super::criterion::{self, Criterion};
use crate::learn::store::Counts;

/// Parameters of growth.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct GrowParams {
    pub criterion: Criterion,
    /// Splits stop at this depth (the root has depth 0; depth 0 = one leaf).
    pub max_depth: u32,
    /// Each child of a split must carry at least this much weight.
    pub min_leaf: f64,
    /// A split must decrease the weighted impurity of the whole tree by at
    /// least this much: `W_node / W_root * gain >= min_gain`.
    pub min_gain: f64,
    /// Weights of the clear and target classes.
    pub weights: [f64; 2],
    /// Growth stops adding splits once the tree has this many nodes.
    pub max_nodes: usize,
}

/// A split of the grown tree.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct GrownSplit {
    pub feature: u8,
    pub if_clear: u32,
    pub if_set: u32,
}

/// A node of the grown (not yet pruned or frozen) tree.
#[derive(Clone, Debug, PartialEq)]
pub struct GrownNode {
    /// Unweighted clear and target counts of the node.
    pub counts: Counts,
    pub split: Option<GrownSplit>,
    /// Depth, root = 0.
    pub depth: u32,
    /// Parent index; the root is its own parent.
    pub parent: u32,
}

/// The learner's tree: mutable statistics, before pruning and freezing.
#[derive(Clone, Debug, PartialEq)]
pub struct GrownTree {
    pub nodes: Vec<GrownNode>,
    pub n_features: usize,
}

impl GrownTree {
    /// The leaf a pattern reaches.
    pub fn leaf_of(&self, pattern: u128) -> usize {
        let mut i = 0;
        while let Some(s) = self.nodes[i].split {
            i = if (pattern >> s.feature) & 1 == 1 {
                s.if_set
            } else {
                s.if_clear
            } as usize;
        }
        i
    }

    pub fn leaves(&self) -> usize {
        self.nodes.iter().filter(|n| n.split.is_none()).count()
    }
}

/// Per-feature class counts of the entries whose bit is set.
struct Hist {
    set: Vec<[u64; 2]>,
}

impl Hist {
    fn gather(entries: &[(u128, Counts)], n_features: usize) -> Hist {
        let mut s0 = [0u64; 128];
        let mut s1 = [0u64; 128];
        for (p, c) in entries {
            let mut bits = *p;
            if c[1] == 0 {
                // The common case: background-only patterns.
                let c0 = c[0];
                while bits != 0 {
                    s0[bits.trailing_zeros() as usize] += c0;
                    bits &= bits - 1;
                }
            } else {
                while bits != 0 {
                    let f = bits.trailing_zeros() as usize;
                    s0[f] += c[0];
                    s1[f] += c[1];
                    bits &= bits - 1;
                }
            }
        }
        Hist {
            set: (0..n_features).map(|f| [s0[f], s1[f]]).collect(),
        }
    }

    fn minus(&self, other: &Hist) -> Hist {
        Hist {
            set: self
                .set
                .iter()
                .zip(&other.set)
                .map(|(a, b)| [a[0] - b[0], a[1] - b[1]])
                .collect(),
        }
    }
}

fn total(entries: &[(u128, Counts)]) -> Counts {
    entries
        .iter()
        .fold([0, 0], |a, (_, c)| [a[0] + c[0], a[1] + c[1]])
}

fn weigh(c: Counts, w: [f64; 2]) -> [f64; 2] {
    [c[0] as f64 * w[0], c[1] as f64 * w[1]]
}

/// The best split of a node, if any passes the parameters.
fn best_split(
    counts: Counts,
    hist: &Hist,
    root_weight: f64,
    p: &GrowParams,
) -> Option<(usize, f64)> {
    let parent = weigh(counts, p.weights);
    let wn = parent[0] + parent[1];
    if parent[0] <= 0.0 || parent[1] <= 0.0 {
        return None; // pure
    }
    let mut best: Option<(usize, f64)> = None;
    for (f, s) in hist.set.iter().enumerate() {
        let set = weigh(*s, p.weights);
        let clear = [parent[0] - set[0], parent[1] - set[1]];
        let (ws, wc) = (set[0] + set[1], clear[0] + clear[1]);
        if s[0] + s[1] == 0 || s[0] + s[1] == counts[0] + counts[1] {
            continue; // one side empty
        }
        if ws < p.min_leaf || wc < p.min_leaf {
            continue;
        }
        let g = criterion::gain(p.criterion, parent, clear, set);
        // A split never raises impurity; tiny negatives are rounding. Zero
        // gain is accepted when `min_gain` is 0 (it can enable later splits,
        // as for exclusive-or); pruning removes what does not pay off.
        if g < -1e-12 || wn / root_weight * g < p.min_gain {
            continue;
        }
        let score = match p.criterion {
            Criterion::GainRatio => criterion::split_score(p.criterion, parent, clear, set),
            _ => g,
        };
        if best.is_none_or(|(_, b)| score > b) {
            best = Some((f, score));
        }
    }
    best
}

/// Grows a tree over `entries` (reordered in place).
pub fn grow(entries: &mut [(u128, Counts)], n_features: usize, p: &GrowParams) -> GrownTree {
    grow_until(entries, n_features, p, &|| false).expect("never stopped")
}

/// [`grow`], asking `stop` before each split; `None` when it said stop
/// (a time budget ran out).
pub fn grow_until(
    entries: &mut [(u128, Counts)],
    n_features: usize,
    p: &GrowParams,
    stop: &dyn Fn() -> bool,
) -> Option<GrownTree> {
    assert!(n_features <= 128);
    let root_counts = total(entries);
    let root_weight = {
        let w = weigh(root_counts, p.weights);
        (w[0] + w[1]).max(f64::MIN_POSITIVE)
    };
    let mut nodes = vec![GrownNode {
        counts: root_counts,
        split: None,
        depth: 0,
        parent: 0,
    }];
    struct Pending {
        id: usize,
        lo: usize,
        hi: usize,
        hist: Hist,
    }
    let root_hist = Hist::gather(entries, n_features);
    let mut stack = vec![Pending {
        id: 0,
        lo: 0,
        hi: entries.len(),
        hist: root_hist,
    }];
    let mut splits = 0u32;
    while let Some(job) = stack.pop() {
        splits = splits.wrapping_add(1);
        if splits.is_multiple_of(64) && stop() {
            return None;
        }
        let node = &nodes[job.id];
        if node.depth >= p.max_depth || nodes.len() + 2 > p.max_nodes {
            continue;
        }
        let Some((f, _)) = best_split(node.counts, &job.hist, root_weight, p) else {
            continue;
        };
        let depth = node.depth;
        // Partition: bit clear first.
        let range = &mut entries[job.lo..job.hi];
        let mut mid = 0;
        for i in 0..range.len() {
            if (range[i].0 >> f) & 1 == 0 {
                range.swap(i, mid);
                mid += 1;
            }
        }
        let (clear_part, set_part) = range.split_at(mid);
        let set_counts = job.hist.set[f];
        let clear_counts = [
            nodes[job.id].counts[0] - set_counts[0],
            nodes[job.id].counts[1] - set_counts[1],
        ];
        let (clear_hist, set_hist) = if clear_part.len() <= set_part.len() {
            let h = Hist::gather(clear_part, n_features);
            let o = job.hist.minus(&h);
            (h, o)
        } else {
            let h = Hist::gather(set_part, n_features);
            let o = job.hist.minus(&h);
            (o, h)
        };
        let if_clear = nodes.len();
        let if_set = if_clear + 1;
        for counts in [clear_counts, set_counts] {
            nodes.push(GrownNode {
                counts,
                split: None,
                depth: depth + 1,
                parent: job.id as u32,
            });
        }
        nodes[job.id].split = Some(GrownSplit {
            feature: f as u8,
            if_clear: if_clear as u32,
            if_set: if_set as u32,
        });
        stack.push(Pending {
            id: if_set,
            lo: job.lo + mid,
            hi: job.hi,
            hist: set_hist,
        });
        stack.push(Pending {
            id: if_clear,
            lo: job.lo,
            hi: job.lo + mid,
            hist: clear_hist,
        });
    }
    Some(GrownTree { nodes, n_features })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn params() -> GrowParams {
        GrowParams {
            criterion: Criterion::Gini,
            max_depth: 10,
            min_leaf: 1.0,
            min_gain: 0.0,
            weights: [1.0, 1.0],
            max_nodes: 1 << 20,
        }
    }

    #[test]
    fn learns_xor_of_two_bits() {
        // Target = bit0 xor bit1; bit 2 is noise-free but useless.
        let mut e: Vec<(u128, Counts)> = (0..8u128)
            .map(|p| {
                let t = ((p & 1) ^ ((p >> 1) & 1)) as usize;
                let mut c = [0, 0];
                c[t] = 5;
                (p, c)
            })
            .collect();
        let t = grow(&mut e, 3, &params());
        for p in 0..8u128 {
            let leaf = &t.nodes[t.leaf_of(p)];
            let want = ((p & 1) ^ ((p >> 1) & 1)) as usize;
            assert_eq!(leaf.counts[1 - want], 0, "pattern {p}");
        }
        // Children ids after parents.
        for (i, n) in t.nodes.iter().enumerate() {
            if let Some(s) = n.split {
                assert!(s.if_clear as usize > i && s.if_set as usize > i);
            }
        }
    }

    #[test]
    fn respects_depth_and_min_leaf() {
        let mut e: Vec<(u128, Counts)> =
            (0..64u128).map(|p| (p, [1, (p % 3 == 0) as u64])).collect();
        let t = grow(
            &mut e.clone(),
            6,
            &GrowParams {
                max_depth: 2,
                ..params()
            },
        );
        assert!(t.nodes.iter().all(|n| n.depth <= 2));
        let t = grow(
            &mut e,
            6,
            &GrowParams {
                min_leaf: 20.0,
                ..params()
            },
        );
        for n in &t.nodes {
            assert!((n.counts[0] + n.counts[1]) as f64 >= 20.0);
        }
    }
}
