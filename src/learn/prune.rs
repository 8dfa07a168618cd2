//! Minimal cost-complexity pruning (Breiman, Friedman, Olshen and Stone,
//! *Classification and Regression Trees*, 1984, chapter 3).
//!
//! The cost of a node is `R(t) = W(t) / W(root) * I(t)`: its share of the
//! weighted training pixels times its impurity under the growth criterion
//! (entropy for gain ratio). For an internal node the weakest-link value is
//! `g(t) = (R(t) - R(T_t)) / (|leaves(T_t)| - 1)`; pruning collapses the node
//! with the smallest `g`, updates its ancestors, and repeats until only the
//! root is left. Every internal node so gets the `alpha` at which it becomes
//! a leaf, and the tree pruned at strength `alpha` keeps exactly the nodes
//! whose value is greater than `alpha`.
//!
//! Design decision: a heap with lazy invalidation and ancestor updates,
//! O(n log n + n * depth), instead of recomputing every `g` per step, so
//! large grown trees prune in milliseconds. No recursion anywhere.

use std::cmp::Reverse;
use std::collections::BinaryHeap;

use super::criterion::Criterion;
use super::grow::GrownTree;

/// The pruning sequence of a grown tree.
#[derive(Clone, Debug)]
pub struct Pruning {
    /// Per node: the `alpha` at which it becomes a leaf (`INFINITY` for
    /// grown leaves, which are always leaves).
    pub collapse: Vec<f64>,
    /// The distinct `alpha` values of the sequence, ascending, starting at 0.
    pub alphas: Vec<f64>,
}

/// An `f64` ordered by `total_cmp`, for the heap.
struct Key(f64);
impl PartialEq for Key {
    fn eq(&self, o: &Self) -> bool {
        self.0.total_cmp(&o.0).is_eq()
    }
}
impl Eq for Key {}
impl PartialOrd for Key {
    fn partial_cmp(&self, o: &Self) -> Option<std::cmp::Ordering> {
        Some(self.cmp(o))
    }
}
impl Ord for Key {
    fn cmp(&self, o: &Self) -> std::cmp::Ordering {
        self.0.total_cmp(&o.0)
    }
}

/// Computes the weakest-link pruning sequence.
pub fn prune_sequence(tree: &GrownTree, criterion: Criterion, weights: [f64; 2]) -> Pruning {
    let n = tree.nodes.len();
    let w = |i: usize| {
        let c = tree.nodes[i].counts;
        [c[0] as f64 * weights[0], c[1] as f64 * weights[1]]
    };
    let root_w = {
        let r = w(0);
        (r[0] + r[1]).max(f64::MIN_POSITIVE)
    };
    let r_node: Vec<f64> = (0..n)
        .map(|i| {
            let wi = w(i);
            (wi[0] + wi[1]) / root_w * criterion.impurity(wi)
        })
        .collect();
    // Subtree cost and leaf count, bottom-up (children have larger ids).
    let mut r_sub = r_node.clone();
    let mut leaves = vec![1u64; n];
    for i in (0..n).rev() {
        if let Some(s) = tree.nodes[i].split {
            let (a, b) = (s.if_clear as usize, s.if_set as usize);
            r_sub[i] = r_sub[a] + r_sub[b];
            leaves[i] = leaves[a] + leaves[b];
        }
    }
    let g = |i: usize, r_sub: &[f64], leaves: &[u64]| {
        ((r_node[i] - r_sub[i]) / (leaves[i] - 1) as f64).max(0.0)
    };
    let mut collapse = vec![f64::INFINITY; n];
    let mut dead = vec![false; n];
    let mut version = vec![0u32; n];
    let mut heap = BinaryHeap::new();
    for i in 0..n {
        if tree.nodes[i].split.is_some() {
            heap.push(Reverse((Key(g(i, &r_sub, &leaves)), i, 0u32)));
        }
    }
    let mut last = 0.0f64;
    let mut stack = Vec::new();
    while let Some(Reverse((Key(gv), i, v))) = heap.pop() {
        if dead[i] || v != version[i] || collapse[i].is_finite() {
            continue;
        }
        let alpha = gv.max(last);
        last = alpha;
        collapse[i] = alpha;
        // Everything below is gone with it.
        if let Some(s) = tree.nodes[i].split {
            stack.push(s.if_clear as usize);
            stack.push(s.if_set as usize);
        }
        while let Some(d) = stack.pop() {
            if dead[d] {
                continue;
            }
            dead[d] = true;
            if let Some(s) = tree.nodes[d].split {
                if !collapse[d].is_finite() {
                    collapse[d] = alpha;
                }
                stack.push(s.if_clear as usize);
                stack.push(s.if_set as usize);
            }
        }
        let dr = r_node[i] - r_sub[i];
        let dl = leaves[i] - 1;
        r_sub[i] = r_node[i];
        leaves[i] = 1;
        let mut a = i;
        while a != 0 {
            a = tree.nodes[a].parent as usize;
            r_sub[a] += dr;
            leaves[a] -= dl;
            version[a] += 1;
            if leaves[a] > 1 {
                heap.push(Reverse((Key(g(a, &r_sub, &leaves)), a, version[a])));
            }
        }
    }
    let mut alphas: Vec<f64> = collapse.iter().copied().filter(|a| a.is_finite()).collect();
    alphas.push(0.0);
    alphas.sort_by(f64::total_cmp);
    alphas.dedup();
    Pruning { collapse, alphas }
}

impl Pruning {
    /// For every node of the grown tree, the node that acts as its leaf in
    /// the tree pruned at `alpha` (itself if it is a leaf or internal there).
    pub fn effective(&self, tree: &GrownTree, alpha: f64) -> Vec<u32> {
        let n = tree.nodes.len();
        let mut eff: Vec<u32> = (0..n as u32).collect();
        for i in 0..n {
            if let Some(s) = tree.nodes[i].split {
                let open = eff[i] as usize == i && self.collapse[i] > alpha;
                let to = if open { None } else { Some(eff[i]) };
                eff[s.if_clear as usize] = to.unwrap_or(s.if_clear);
                eff[s.if_set as usize] = to.unwrap_or(s.if_set);
            }
        }
        eff
    }

    /// Leaves of the tree pruned at `alpha`.
    pub fn leaves_at(&self, tree: &GrownTree, alpha: f64) -> usize {
        let eff = self.effective(tree, alpha);
        (0..tree.nodes.len())
            .filter(|&i| {
                eff[i] as usize == i && (tree.nodes[i].split.is_none() || self.collapse[i] <= alpha)
            })
            .count()
    }
}

#[cfg(test)]
mod tests {
    use super::super::grow::{grow, GrowParams};
    use super::*;
    use crate::learn::store::Counts;

    #[test]
    fn sequence_ends_at_root_and_shrinks() {
        let mut e: Vec<(u128, Counts)> = (0..256u128)
            .map(|p| (p, [3 + (p % 5) as u64, ((p * 7) % 11 < 3) as u64 * 2]))
            .collect();
        let t = grow(
            &mut e,
            8,
            &GrowParams {
                criterion: Criterion::Gini,
                max_depth: 8,
                min_leaf: 1.0,
                min_gain: 0.0,
                weights: [1.0, 1.0],
                max_nodes: 1 << 20,
            },
        );
        let p = prune_sequence(&t, Criterion::Gini, [1.0, 1.0]);
        assert_eq!(p.alphas[0], 0.0);
        assert!(p.leaves_at(&t, 0.0) <= t.leaves());
        assert_eq!(p.leaves_at(&t, f64::INFINITY), 1);
        let mut prev = usize::MAX;
        for &a in &p.alphas {
            let l = p.leaves_at(&t, a);
            assert!(l <= prev);
            prev = l;
        }
        assert_eq!(p.leaves_at(&t, *p.alphas.last().unwrap()), 1);
    }
}
