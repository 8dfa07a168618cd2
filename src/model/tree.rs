//! The frozen tree: the evaluator's flat node array. Node 0 is the root,
//! every split's children have larger indices than the split itself, and
//! every node but the root has exactly one parent. These three facts,
//! checked by [`Tree::new`], make the array a tree (no cycles, no shared
//! subtrees) and let any pass run as a plain loop over indices, never as
//! recursion.

use crate::error::{Error, Result};
use crate::window::{Offset, Window};

/// Largest node count a model may have.
pub const MAX_NODES: usize = 1 << 22;

/// One node of the frozen tree.
#[derive(Clone, Debug, PartialEq)]
pub enum Node {
    /// Tests one feature; goes to `if_clear` or `if_set`.
    Split {
        feature: u8,
        if_clear: u32,
        if_set: u32,
    },
    /// A leaf with the training pixels that reached it.
    Leaf(Leaf),
}

/// A leaf: its counts, its score, and its share of training pixels.
#[derive(Clone, Debug, PartialEq)]
pub struct Leaf {
    /// Clear and target training pixels that reached this leaf.
    pub counts: [u64; 2],
    /// Weighted target fraction, in [0, 1].
    pub score: f64,
    /// Share of all (unweighted) training pixels that reached this leaf;
    /// the drift monitors compare live traffic against it.
    pub share: f64,
}

/// A validated, immutable decision tree.
#[derive(Clone, Debug, PartialEq)]
pub struct Tree {
    window: Window,
    nodes: Vec<Node>,
}

impl Tree {
    /// Validates and freezes a node array.
    pub fn new(window: Window, nodes: Vec<Node>) -> Result<Tree> {
        if nodes.is_empty() {
            return Err(Error::bad_model("the tree has no nodes"));
        }
        if nodes.len() > MAX_NODES {
            return Err(Error::bad_model(format!(
                "the tree has {} nodes, over the limit of {MAX_NODES}",
                nodes.len()
            )));
        }
        let mut parents = vec![0u8; nodes.len()];
        for (i, n) in nodes.iter().enumerate() {
            match n {
                Node::Split {
                    feature,
                    if_clear,
                    if_set,
                } => {
                    if *feature as usize >= window.features() {
                        return Err(Error::bad_model(format!(
                            "node {i} tests a pixel outside the {0}x{0} window",
                            window.size()
                        )));
                    }
                    for &c in [if_clear, if_set] {
                        let c = c as usize;
                        if c <= i || c >= nodes.len() {
                            return Err(Error::bad_model(format!(
                                "node {i} points to node {c}, which is not a later node of the tree"
                            )));
                        }
                        parents[c] += 1;
                        if parents[c] > 1 {
                            return Err(Error::bad_model(format!(
                                "node {c} has more than one parent"
                            )));
                        }
                    }
                }
                Node::Leaf(l) => {
                    if !(0.0..=1.0).contains(&l.score) {
                        return Err(Error::bad_model(format!(
                            "leaf {i} has score {} outside [0, 1]",
                            l.score
                        )));
                    }
                    if !(0.0..=1.0).contains(&l.share) {
                        return Err(Error::bad_model(format!(
                            "leaf {i} has share {} outside [0, 1]",
                            l.share
                        )));
                    }
                }
            }
        }
        if let Some(i) = parents.iter().skip(1).position(|&p| p == 0) {
            return Err(Error::bad_model(format!(
                "node {} is not reachable from the root",
                i + 1
            )));
        }
        Ok(Tree { window, nodes })
    }

    pub fn window(&self) -> Window {
        self.window
    }

    pub fn nodes(&self) -> &[Node] {
        &self.nodes
    }

    /// Index of the leaf a window pattern reaches.
    #[inline]
    pub fn leaf_of(&self, pattern: u128) -> usize {
        let mut i = 0usize;
        loop {
            match &self.nodes[i] {
                Node::Split {
                    feature,
                    if_clear,
                    if_set,
                } => {
                    i = if (pattern >> feature) & 1 == 1 {
                        *if_set
                    } else {
                        *if_clear
                    } as usize
                }
                Node::Leaf(_) => return i,
            }
        }
    }

    /// The leaf at index `i` (panics if `i` is a split).
    pub fn leaf(&self, i: usize) -> &Leaf {
        match &self.nodes[i] {
            Node::Leaf(l) => l,
            Node::Split { .. } => panic!("node {i} is not a leaf"),
        }
    }

    /// Score of a window pattern.
    #[inline]
    pub fn score(&self, pattern: u128) -> f64 {
        self.leaf(self.leaf_of(pattern)).score
    }

    /// Score of the pixel at `(x, y)` of `frame` (one walk from the root).
    pub fn score_at(&self, frame: &crate::frame::BitFrame, x: usize, y: usize) -> f64 {
        self.score(self.window.pattern_of(frame, x, y))
    }

    pub fn leaves(&self) -> usize {
        self.nodes
            .iter()
            .filter(|n| matches!(n, Node::Leaf(_)))
            .count()
    }

    /// Depth of every node (root 0), in one forward pass.
    pub fn depths(&self) -> Vec<u32> {
        let mut d = vec![0u32; self.nodes.len()];
        for (i, n) in self.nodes.iter().enumerate() {
            if let Node::Split {
                if_clear, if_set, ..
            } = n
            {
                d[*if_clear as usize] = d[i] + 1;
                d[*if_set as usize] = d[i] + 1;
            }
        }
        d
    }

    /// Longest root-to-leaf path (0 for a lone leaf).
    pub fn depth(&self) -> u32 {
        self.depths().into_iter().max().unwrap_or(0)
    }

    /// The offset a split node tests.
    pub fn offset(&self, feature: u8) -> Offset {
        self.window.offset(feature as usize)
    }
}

/// Score of a leaf with these counts: its weighted target fraction
/// `w1 c1 / (w0 c0 + w1 c1)`, computed as `w1 / (w1 + w0 (c0 / c1))` so that
/// leaves with the same class proportions get bit-identical scores (IEEE
/// division is correctly rounded, so equal ratios give equal quotients).
pub fn leaf_score(counts: [u64; 2], weights: [f64; 2]) -> f64 {
    if counts[1] == 0 {
        return 0.0;
    }
    let ratio = counts[0] as f64 / counts[1] as f64;
    weights[1] / (weights[1] + weights[0] * ratio)
}
