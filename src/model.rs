//! The model: an immutable decision tree over window features plus the
//! decision threshold, grouping parameters and what training knew.
//!
//! [`Tree`] is the evaluator's flat node array, frozen once built: node 0 is
//! the root, every split's children have larger indices than the split
//! itself, and every node but the root has exactly one parent. These three
//! facts, checked by [`Tree::new`], make the array a tree (no cycles, no
//! shared subtrees) and let any pass run as a plain loop over indices,
//! never as recursion.
//!
//! The model file is JSON (`format = "treeline-model"`, `format_version`
//! 1). Its serde structs ([`file`]) are kept apart from the domain types
//! so the file can stay stable while the code changes; loading validates
//! every field and turns any inconsistency into an error naming it. A
//! feature is written as its offset from the centre pixel, never as an
//! index. The model knows nothing of how it was learned beyond the
//! summary it carries: this module does not depend on the learner.

use serde::{Deserialize, Serialize};

use crate::error::{Error, Result};
use crate::group::{GroupParams, MAX_MERGE_DISTANCE};
use crate::score::Prf;
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

/// How the model was trained (copied into the file for the record).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct TrainingInfo {
    /// `gini`, `entropy` or `gain-ratio`.
    pub criterion: String,
    pub max_depth: u32,
    pub min_leaf: f64,
    pub min_gain: f64,
    /// `none`, `balanced`, or `explicit`.
    pub class_weight: String,
    /// Weights of the clear and target classes actually used.
    pub class_weights: [f64; 2],
    /// Share of frames held out for pruning and tuning.
    pub holdout: f64,
    /// Cost-complexity pruning strength chosen on the holdout.
    pub pruning_alpha: f64,
    /// Leaves before and after pruning.
    pub grown_leaves: u64,
    pub pruned_leaves: u64,
    /// Whether the final tree was grown again on all frames, holdout
    /// included, after the holdout chose the settings.
    #[serde(default)]
    pub refit: bool,
    /// Which of threshold / min_area / merge_distance the user fixed.
    #[serde(default)]
    pub overridden: Vec<String>,
}

/// What the training data looked like.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct DataSummary {
    /// Frames used to grow the final tree.
    pub frames: u64,
    /// Frames held out to choose pruning strength, threshold and grouping.
    pub holdout_frames: u64,
    /// Labelled pixels in the growing set.
    pub pixels: u64,
    /// Distinct window patterns in the growing set.
    pub unique_patterns: u64,
    pub clear_pixels: u64,
    pub target_pixels: u64,
}

/// Scores on the held-out frames with the chosen settings, of the tree grown
/// without them (with `refit`, the final tree has also seen them).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct HoldoutMetrics {
    pub pixel: Prf,
    pub object: Prf,
}

/// Statistics of the training frames for the drift monitors.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct Reference {
    /// Share of set pixels in the training frames.
    pub set_density: f64,
    /// Share of training pixels detected (score at or above the threshold).
    pub detected_share: f64,
    /// Target objects per training frame.
    pub objects_per_frame: f64,
}

/// A complete model.
#[derive(Clone, Debug, PartialEq)]
pub struct Model {
    pub tree: Tree,
    /// A pixel is a detection when its score reaches this.
    pub threshold: f64,
    pub grouping: GroupParams,
    /// Increases by one with each model a box adopts; detection records carry it.
    pub model_version: u64,
    pub training: TrainingInfo,
    pub data: DataSummary,
    pub holdout: Option<HoldoutMetrics>,
    pub reference: Reference,
}

impl Model {
    /// Pretty JSON; the same model always gives the same bytes.
    pub fn to_json(&self) -> String {
        let mut s = serde_json::to_string_pretty(&file::ModelFile::from_model(self))
            .expect("model serialises");
        s.push('\n');
        s
    }

    /// Parses and validates a model file's text.
    pub fn from_json(text: &str) -> Result<Model> {
        let f: file::ModelFile = serde_json::from_str(text)
            .map_err(|e| Error::bad_model(format!("not a valid model file: {e}")))?;
        f.into_model()
    }

    /// Checks the parameters a user may override.
    pub fn validate_settings(&self) -> Result<()> {
        validate_settings(self.threshold, self.grouping)
    }
}

/// Checks a threshold and grouping parameters.
pub fn validate_settings(threshold: f64, grouping: GroupParams) -> Result<()> {
    if !(0.0..=1.0).contains(&threshold) {
        return Err(Error::bad_model(format!(
            "threshold {threshold} is outside [0, 1]"
        )));
    }
    if grouping.min_area == 0 {
        return Err(Error::bad_model("min_area must be at least 1"));
    }
    if grouping.merge_distance > MAX_MERGE_DISTANCE {
        return Err(Error::bad_model(format!(
            "merge_distance {} is over the limit of {MAX_MERGE_DISTANCE}",
            grouping.merge_distance
        )));
    }
    Ok(())
}

/// The model file's serde structs.
pub mod file {
    use super::*;

    pub const FORMAT: &str = "treeline-model";
    pub const FORMAT_VERSION: u32 = 1;

    #[derive(Serialize, Deserialize)]
    #[serde(deny_unknown_fields)]
    pub struct ModelFile {
        pub format: String,
        pub format_version: u32,
        pub model_version: u64,
        /// Window side in pixels.
        pub window: u8,
        pub threshold: f64,
        pub min_area: u32,
        pub merge_distance: u32,
        pub training: TrainingInfo,
        pub data: DataSummary,
        pub holdout: Option<HoldoutMetrics>,
        pub reference: Reference,
        pub nodes: Vec<NodeFile>,
    }

    /// A node: either a split (`test`, `if_clear`, `if_set`) or a leaf
    /// (`clear`, `target`, `score`, `share`).
    #[derive(Serialize, Deserialize)]
    #[serde(untagged, deny_unknown_fields)]
    pub enum NodeFile {
        Split {
            /// The tested pixel as `[dx, dy]` from the centre.
            test: [i8; 2],
            if_clear: u32,
            if_set: u32,
        },
        Leaf {
            clear: u64,
            target: u64,
            score: f64,
            share: f64,
        },
    }

    impl ModelFile {
        pub fn from_model(m: &Model) -> ModelFile {
            let w = m.tree.window();
            ModelFile {
                format: FORMAT.into(),
                format_version: FORMAT_VERSION,
                model_version: m.model_version,
                window: w.size(),
                threshold: m.threshold,
                min_area: m.grouping.min_area,
                merge_distance: m.grouping.merge_distance,
                training: m.training.clone(),
                data: m.data.clone(),
                holdout: m.holdout.clone(),
                reference: m.reference.clone(),
                nodes: m
                    .tree
                    .nodes()
                    .iter()
                    .map(|n| match n {
                        Node::Split {
                            feature,
                            if_clear,
                            if_set,
                        } => {
                            let o = w.offset(*feature as usize);
                            NodeFile::Split {
                                test: [o.dx, o.dy],
                                if_clear: *if_clear,
                                if_set: *if_set,
                            }
                        }
                        Node::Leaf(l) => NodeFile::Leaf {
                            clear: l.counts[0],
                            target: l.counts[1],
                            score: l.score,
                            share: l.share,
                        },
                    })
                    .collect(),
            }
        }

        pub fn into_model(self) -> Result<Model> {
            if self.format != FORMAT {
                return Err(Error::bad_model(format!(
                    "format is {:?}, expected {FORMAT:?}",
                    self.format
                )));
            }
            if self.format_version != FORMAT_VERSION {
                return Err(Error::bad_model(format!(
                    "format_version {} is not known (this build reads {FORMAT_VERSION})",
                    self.format_version
                )));
            }
            let window = Window::new(self.window).ok_or_else(|| {
                Error::bad_model(format!(
                    "window {} is not one of 3, 5, 7, 9, 11",
                    self.window
                ))
            })?;
            let mut nodes = Vec::with_capacity(self.nodes.len().min(MAX_NODES));
            for (i, n) in self.nodes.into_iter().enumerate() {
                nodes.push(match n {
                    NodeFile::Split {
                        test,
                        if_clear,
                        if_set,
                    } => {
                        let off = Offset {
                            dx: test[0],
                            dy: test[1],
                        };
                        let feature = window.index(off).ok_or_else(|| {
                            Error::bad_model(format!(
                                "node {i} tests pixel {off}, outside the {0}x{0} window",
                                window.size()
                            ))
                        })?;
                        Node::Split {
                            feature: feature as u8,
                            if_clear,
                            if_set,
                        }
                    }
                    NodeFile::Leaf {
                        clear,
                        target,
                        score,
                        share,
                    } => Node::Leaf(Leaf {
                        counts: [clear, target],
                        score,
                        share,
                    }),
                });
            }
            let tree = Tree::new(window, nodes)?;
            let grouping = GroupParams {
                min_area: self.min_area,
                merge_distance: self.merge_distance,
            };
            validate_settings(self.threshold, grouping)?;
            Ok(Model {
                tree,
                threshold: self.threshold,
                grouping,
                model_version: self.model_version,
                training: self.training,
                data: self.data,
                holdout: self.holdout,
                reference: self.reference,
            })
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn leaf(score: f64) -> Node {
        Node::Leaf(Leaf {
            counts: [1, 1],
            score,
            share: 0.5,
        })
    }

    #[test]
    fn validation_rejects_bad_shapes() {
        let w = Window::new(3).unwrap();
        let split = |f, a, b| Node::Split {
            feature: f,
            if_clear: a,
            if_set: b,
        };
        assert!(Tree::new(w, vec![split(4, 1, 2), leaf(0.0), leaf(1.0)]).is_ok());
        // Child pointing backwards (a cycle).
        assert!(Tree::new(w, vec![split(4, 0, 1), leaf(0.0)]).is_err());
        // Feature outside a 3x3 window.
        assert!(Tree::new(w, vec![split(9, 1, 2), leaf(0.0), leaf(1.0)]).is_err());
        // Shared child.
        assert!(Tree::new(w, vec![split(4, 1, 1), leaf(0.0)]).is_err());
        // Unreachable node.
        assert!(Tree::new(w, vec![leaf(0.0), leaf(1.0)]).is_err());
        // Score out of range.
        assert!(Tree::new(w, vec![leaf(1.5)]).is_err());
        assert!(Tree::new(w, vec![]).is_err());
    }
}
