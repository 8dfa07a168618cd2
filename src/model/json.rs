//! The model file's serde structs: the JSON form of a [`Model`], kept
//! apart from the domain types. Reading checks the format label and
//! version first, then every field; any inconsistency is an error naming
//! it.

use super::*;

pub const FORMAT: &str = "burlwatch-model";
/// The version written for a model without smoothing. Version 3 added
/// `reference.patterns` (the 2x2 pattern shares of the training frames,
/// for the drift monitors).
pub const FORMAT_VERSION: u32 = 3;
/// The version written for a model with smoothing, a size rule's trade or
/// a symmetry (version 4 added `smoothing`, `training.smaller` and
/// `training.symmetry`); models with none of them are still written as
/// version 3, so builds that read version 3
/// keep reading them and their bytes (and hashes) stay as they were.
pub const SMOOTHING_VERSION: u32 = 4;
/// The version written for a model whose symmetry training chose
/// (version 5 added `training.symmetry_tried`).
pub const CHOSEN_SYMMETRY_VERSION: u32 = 5;
/// The versions read: version 2 files load with no pattern references.
pub const READS: [u32; 4] = [2, 3, 4, 5];
/// The split criteria a model may name.
pub const CRITERIA: [&str; 3] = ["gini", "entropy", "gain-ratio"];
/// The symmetries a model may record (`none` is never written).
const SYMMETRIES: [&str; 2] = ["mirrors", "square"];
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
    /// Neighbourhood votes on the detection mask; absent when off.
    #[serde(default, skip_serializing_if = "Smoothing::is_off")]
    pub smoothing: Smoothing,
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
            Some(v) if READS.contains(&v) => Ok(()),
            Some(v) => Err(Error::bad_model(format!(
                "format_version {v} is not known (this build reads {READS:?})"
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
                let (Some(t), Some(c), Some(s)) = (self.test, self.if_clear, self.if_set) else {
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
            format_version: if !m.training.symmetry_tried.is_empty() {
                CHOSEN_SYMMETRY_VERSION
            } else if m.smoothing.is_off()
                && m.training.smaller.is_none()
                && m.training.symmetry.is_none()
            {
                FORMAT_VERSION
            } else {
                SMOOTHING_VERSION
            },
            model_version: m.model_version,
            window: w.size(),
            threshold: m.threshold,
            min_area: m.grouping.min_area,
            merge_distance: m.grouping.merge_distance,
            smoothing: m.smoothing,
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
        if let Some(s) = &self.training.symmetry {
            if !SYMMETRIES.contains(&s.as_str()) {
                return Err(Error::bad_model(format!(
                    "training.symmetry {s:?} is not one of {SYMMETRIES:?}"
                )));
            }
        }
        let tried = &self.training.symmetry_tried;
        if !tried.is_empty() {
            if self.format_version < CHOSEN_SYMMETRY_VERSION {
                return Err(Error::bad_model(format!(
                    "training.symmetry_tried came with format_version {CHOSEN_SYMMETRY_VERSION}, but the file says {}",
                    self.format_version
                )));
            }
            for (i, t) in tried.iter().enumerate() {
                if t.symmetry != "none" && !SYMMETRIES.contains(&t.symmetry.as_str()) {
                    return Err(Error::bad_model(format!(
                        "training.symmetry_tried: {:?} is not none, mirrors or square",
                        t.symmetry
                    )));
                }
                if tried[..i].iter().any(|u| u.symmetry == t.symmetry) {
                    return Err(Error::bad_model(format!(
                        "training.symmetry_tried: {:?} is listed twice",
                        t.symmetry
                    )));
                }
                for (what, v) in [("object_f1", t.object_f1), ("object_f1_se", t.object_f1_se)] {
                    if v.is_some_and(|v| !(0.0..=1.0).contains(&v)) {
                        return Err(Error::bad_model(format!(
                            "training.symmetry_tried: {}'s {what} {} is outside [0, 1]",
                            t.symmetry,
                            v.unwrap_or_default()
                        )));
                    }
                }
            }
            let kept: Vec<&str> = tried
                .iter()
                .filter(|t| t.kept)
                .map(|t| t.symmetry.as_str())
                .collect();
            let trained = self.training.symmetry.as_deref().unwrap_or("none");
            if kept != [trained] {
                return Err(Error::bad_model(format!(
                    "training.symmetry_tried keeps {kept:?}, but the model was trained under {trained:?}"
                )));
            }
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
        if self.format_version < SMOOTHING_VERSION {
            let newer = if !self.smoothing.is_off() {
                Some("smoothing")
            } else if self.training.smaller.is_some() {
                Some("training.smaller")
            } else if self.training.symmetry.is_some() {
                Some("training.symmetry")
            } else {
                None
            };
            if let Some(what) = newer {
                return Err(Error::bad_model(format!(
                    "{what} came with format_version {SMOOTHING_VERSION}, but the file says {}",
                    self.format_version
                )));
            }
        }
        Settings {
            threshold: self.threshold,
            grouping,
            smoothing: self.smoothing,
        }
        .validate()
        .map_err(|e| Error::bad_model(e.kind().to_string()))?;
        let p = &self.reference.patterns;
        let sum: f64 = p.iter().sum();
        if self.format_version < 3 && !p.is_empty() {
            return Err(Error::bad_model(
                "reference.patterns came with format_version 3, but the file says 2",
            ));
        }
        if !p.is_empty()
            && (p.len() != 16
                || !p.iter().all(|v| (0.0..=1.0).contains(v))
                || (sum - 1.0).abs() > 1e-6 && sum != 0.0)
        {
            return Err(Error::bad_model(
                "reference.patterns must be 16 shares in [0, 1] summing to 1",
            ));
        }
        Ok(Model {
            tree,
            threshold: self.threshold,
            grouping,
            smoothing: self.smoothing,
            model_version: self.model_version,
            training: self.training,
            data: self.data,
            holdout: self.holdout,
            reference: self.reference,
        })
    }
}
