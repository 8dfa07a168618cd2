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
//! The model file is JSON (`format = "burlwatch-model"`, `format_version`
//! 1). Its serde structs ([`json`]) are kept apart from the domain types
//! so the file can stay stable while the code changes; loading validates
//! every field and turns any inconsistency into an error naming it. A
//! feature is written as its offset from the centre pixel, never as an
//! index. The model knows nothing of how it was learned beyond the
//! summary it carries: this module does not depend on the learner.

pub mod rules;
pub mod settings;

use serde::{Deserialize, Serialize};

use crate::error::{Error, Result};
use crate::window::{Offset, Window};
pub use settings::{GroupParams, Overrides, Prf, Settings, MAX_MERGE_DISTANCE};

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

/// How the model was trained (copied into the file for the record).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
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
    /// Whether pruning strength, threshold and grouping were chosen on
    /// held-out frames; false means no frame was held out (or none gave a
    /// usable threshold) and built-in settings were used.
    #[serde(default)]
    pub tuned: bool,
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
#[serde(deny_unknown_fields)]
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
#[serde(deny_unknown_fields)]
pub struct HoldoutMetrics {
    pub pixel: Prf,
    pub object: Prf,
}

/// Statistics of the training frames for the drift monitors.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Reference {
    /// Share of set pixels in the training frames.
    pub set_density: f64,
    /// Share of training pixels detected (score at or above the threshold).
    pub detected_share: f64,
    /// Target objects per training frame.
    pub objects_per_frame: f64,
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
        let mut s = serde_json::to_string_pretty(&json::ModelFile::from_model(self))
            .expect("model serialises");
        s.push('\n');
        s
    }

    /// Parses and validates a model file's text.
    pub fn from_json(text: &str) -> Result<Model> {
        // The format label and version first, so a file of another version
        // is named as such rather than as a field mismatch.
        let head: json::Head = serde_json::from_str(text)
            .map_err(|e| Error::bad_model(format!("not a valid model file: {e}")))?;
        head.check()?;
        let f: json::ModelFile = serde_json::from_str(text)
            .map_err(|e| Error::bad_model(format!("not a valid model file: {e}")))?;
        f.into_model()
    }

    /// The settings the model carries.
    pub fn settings(&self) -> Settings {
        Settings {
            threshold: self.threshold,
            grouping: self.grouping,
        }
    }
}

/// The model file's serde structs.
pub mod json {
    use super::*;

    pub const FORMAT: &str = "burlwatch-model";
    pub const FORMAT_VERSION: u32 = 2;
    /// The split criteria a model may name.
    pub const CRITERIA: [&str; 3] = ["gini", "entropy", "gain-ratio"];
    const MAX_RADIUS: u8 = crate::window::MAX_SIZE / 2;

    /// Leaf scores must follow from their counts and the class weights, and
    /// leaf shares from their counts: the drift monitors rely on both.
    fn check_leaves(nodes: &[Node], weights: [f64; 2]) -> Result<()> {
        let total: u128 = nodes
            .iter()
            .map(|n| match n {
                Node::Leaf(l) => l.counts[0] as u128 + l.counts[1] as u128,
                Node::Split { .. } => 0,
            })
            .sum();
        for (i, n) in nodes.iter().enumerate() {
            let Node::Leaf(l) = n else { continue };
            let want = leaf_score(l.counts, weights);
            if !(l.score - want).abs().le(&1e-9) {
                return Err(Error::bad_model(format!(
                    "node {i}: score {} does not follow from its counts {:?} and the class weights (expected {want})",
                    l.score, l.counts
                )));
            }
            let share = if total == 0 {
                0.0
            } else {
                (l.counts[0] as u128 + l.counts[1] as u128) as f64 / total as f64
            };
            if !(l.share - share).abs().le(&1e-9) {
                return Err(Error::bad_model(format!(
                    "node {i}: share {} does not match its {} of {total} training pixels",
                    l.share,
                    l.counts[0] as u128 + l.counts[1] as u128
                )));
            }
        }
        Ok(())
    }

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

    /// Just the format label and version, read before anything else.
    #[derive(Deserialize)]
    pub struct Head {
        pub format: Option<String>,
        pub format_version: Option<u32>,
    }

    impl Head {
        pub fn check(&self) -> Result<()> {
            match self.format.as_deref() {
                Some(FORMAT) => {}
                Some(other) => {
                    return Err(Error::bad_model(format!(
                        "format is {other:?}, expected {FORMAT:?}"
                    )))
                }
                None => {
                    return Err(Error::bad_model(format!(
                        "no \"format\" field: not a {FORMAT} file"
                    )))
                }
            }
            match self.format_version {
                Some(FORMAT_VERSION) => Ok(()),
                Some(v) => Err(Error::bad_model(format!(
                    "format_version {v} is not known (this build reads {FORMAT_VERSION})"
                ))),
                None => Err(Error::bad_model("no \"format_version\" field")),
            }
        }
    }

    /// A node: either a split (`test`, `if_clear`, `if_set`) or a leaf
    /// (`clear`, `target`, `score`, `share`), never a mix.
    #[derive(Serialize, Deserialize, Default)]
    #[serde(deny_unknown_fields)]
    pub struct NodeFile {
        /// The tested pixel as `[dx, dy]` from the centre.
        #[serde(skip_serializing_if = "Option::is_none")]
        pub test: Option<[i64; 2]>,
        #[serde(skip_serializing_if = "Option::is_none")]
        pub if_clear: Option<u64>,
        #[serde(skip_serializing_if = "Option::is_none")]
        pub if_set: Option<u64>,
        #[serde(skip_serializing_if = "Option::is_none")]
        pub clear: Option<u64>,
        #[serde(skip_serializing_if = "Option::is_none")]
        pub target: Option<u64>,
        #[serde(skip_serializing_if = "Option::is_none")]
        pub score: Option<f64>,
        #[serde(skip_serializing_if = "Option::is_none")]
        pub share: Option<f64>,
    }

    impl NodeFile {
        fn split(o: Offset, if_clear: u32, if_set: u32) -> NodeFile {
            NodeFile {
                test: Some([o.dx as i64, o.dy as i64]),
                if_clear: Some(if_clear as u64),
                if_set: Some(if_set as u64),
                ..NodeFile::default()
            }
        }

        fn leaf(l: &Leaf) -> NodeFile {
            NodeFile {
                clear: Some(l.counts[0]),
                target: Some(l.counts[1]),
                score: Some(l.score),
                share: Some(l.share),
                ..NodeFile::default()
            }
        }

        /// The node this record describes, with errors naming node `i`.
        fn node(&self, i: usize, window: Window) -> Result<Node> {
            let bad = |msg: String| Error::bad_model(format!("node {i}: {msg}"));
            let is_split = self.test.is_some() || self.if_clear.is_some() || self.if_set.is_some();
            let is_leaf = self.clear.is_some()
                || self.target.is_some()
                || self.score.is_some()
                || self.share.is_some();
            match (is_split, is_leaf) {
                (true, true) => Err(bad("has both split and leaf fields".into())),
                (false, false) => Err(bad("is neither a split nor a leaf".into())),
                (true, false) => {
                    let (Some(t), Some(c), Some(s)) = (self.test, self.if_clear, self.if_set)
                    else {
                        return Err(bad("a split needs test, if_clear and if_set".into()));
                    };
                    let in_range = |v: i64| (-(MAX_RADIUS as i64)..=MAX_RADIUS as i64).contains(&v);
                    let off = if in_range(t[0]) && in_range(t[1]) {
                        Some(Offset {
                            dx: t[0] as i8,
                            dy: t[1] as i8,
                        })
                    } else {
                        None
                    };
                    let Some(feature) = off.and_then(|o| window.index(o)) else {
                        return Err(bad(format!(
                            "tests pixel [{}, {}], outside the {2}x{2} window",
                            t[0],
                            t[1],
                            window.size()
                        )));
                    };
                    let child = |v: u64, name: &str| {
                        u32::try_from(v).map_err(|_| bad(format!("{name} {v} is out of range")))
                    };
                    Ok(Node::Split {
                        feature: feature as u8,
                        if_clear: child(c, "if_clear")?,
                        if_set: child(s, "if_set")?,
                    })
                }
                (false, true) => {
                    let (Some(clear), Some(target), Some(score), Some(share)) =
                        (self.clear, self.target, self.score, self.share)
                    else {
                        return Err(bad("a leaf needs clear, target, score and share".into()));
                    };
                    Ok(Node::Leaf(Leaf {
                        counts: [clear, target],
                        score,
                        share,
                    }))
                }
            }
        }
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
                        } => NodeFile::split(w.offset(*feature as usize), *if_clear, *if_set),
                        Node::Leaf(l) => NodeFile::leaf(l),
                    })
                    .collect(),
            }
        }

        pub fn into_model(self) -> Result<Model> {
            Head {
                format: Some(self.format.clone()),
                format_version: Some(self.format_version),
            }
            .check()?;
            let window = Window::new(self.window).ok_or_else(|| {
                Error::bad_model(format!(
                    "window {} is not one of 3, 5, 7, 9, 11",
                    self.window
                ))
            })?;
            if self.nodes.len() > MAX_NODES {
                return Err(Error::bad_model(format!(
                    "the tree has {} nodes, over the limit of {MAX_NODES}",
                    self.nodes.len()
                )));
            }
            if !CRITERIA.contains(&self.training.criterion.as_str()) {
                return Err(Error::bad_model(format!(
                    "training.criterion {:?} is not one of {CRITERIA:?}",
                    self.training.criterion
                )));
            }
            let weights = self.training.class_weights;
            if !weights.iter().all(|w| w.is_finite() && *w > 0.0) {
                return Err(Error::bad_model(format!(
                    "training.class_weights {weights:?} must be two positive numbers"
                )));
            }
            let nodes = self
                .nodes
                .iter()
                .enumerate()
                .map(|(i, n)| n.node(i, window))
                .collect::<Result<Vec<Node>>>()?;
            check_leaves(&nodes, weights)?;
            let tree = Tree::new(window, nodes)?;
            let grouping = GroupParams {
                min_area: self.min_area,
                merge_distance: self.merge_distance,
            };
            Settings {
                threshold: self.threshold,
                grouping,
            }
            .validate()
            .map_err(|e| Error::bad_model(e.kind().to_string()))?;
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

    /// The committed model with one edit applied to its JSON value.
    fn edited(f: impl FnOnce(&mut serde_json::Value)) -> String {
        let mut v: serde_json::Value =
            serde_json::from_str(include_str!("../../tests/data/model-v2.json")).unwrap();
        f(&mut v);
        v.to_string()
    }

    fn error_of(text: &str) -> String {
        Model::from_json(text).unwrap_err().to_string()
    }

    #[test]
    fn damaged_model_files_say_what_is_wrong() {
        assert!(Model::from_json(&edited(|_| {})).is_ok());
        let first_leaf = |v: &serde_json::Value| {
            v["nodes"]
                .as_array()
                .unwrap()
                .iter()
                .position(|n| n.get("clear").is_some())
                .unwrap()
        };
        let cases: Vec<(String, &str)> = vec![
            (
                edited(|v| v["training"]["colour"] = 1.into()),
                "unknown field `colour`",
            ),
            (
                edited(|v| v["reference"]["extra"] = 1.into()),
                "unknown field `extra`",
            ),
            (
                edited(|v| v["training"]["criterion"] = "bogus".into()),
                "training.criterion",
            ),
            (
                edited(|v| v["format_version"] = 3.into()),
                "format_version 3 is not known",
            ),
            (
                edited(|v| {
                    v["format_version"] = 3.into();
                    v["new_thing"] = 1.into();
                    v.as_object_mut().unwrap().remove("reference");
                }),
                "format_version 3 is not known",
            ),
            (
                edited(|v| v["format"] = "other".into()),
                "expected \"burlwatch-model\"",
            ),
            (
                edited(|v| v["nodes"][0]["if_clear"] = (-1).into()),
                "invalid model",
            ),
            (
                edited(|v| v["nodes"][0]["if_set"] = (1u64 << 40).into()),
                "node 0: if_set",
            ),
            (
                edited(|v| v["nodes"][0]["test"] = serde_json::json!([200, 0])),
                "node 0: tests pixel [200, 0]",
            ),
            (
                edited(|v| v["nodes"][0]["clear"] = 3.into()),
                "node 0: has both split and leaf fields",
            ),
            (
                edited(|v| v["nodes"][0]["colour"] = 3.into()),
                "unknown field `colour`",
            ),
            (
                edited(|v| {
                    let i = first_leaf(v);
                    v["nodes"][i]["score"] = 0.123.into();
                }),
                "does not follow from its counts",
            ),
            (
                edited(|v| {
                    let i = first_leaf(v);
                    v["nodes"][i]["share"] = 1.0.into();
                }),
                "does not match its",
            ),
            (
                edited(|v| v["nodes"][0]["if_clear"] = 0.into()),
                "not a later node",
            ),
            (edited(|v| v["threshold"] = 1.5.into()), "threshold 1.5"),
            (edited(|v| v["window"] = 4.into()), "window 4"),
            ("{".to_string(), "not a valid model file"),
        ];
        for (text, want) in cases {
            let e = error_of(&text);
            assert!(e.contains(want), "expected {want:?} in {e:?}");
        }
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
