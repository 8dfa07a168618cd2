//! The model: an immutable decision tree over window features plus the
//! decision threshold, grouping parameters and what training knew.
//!
//! - [`Tree`] (`tree.rs`): the evaluator's flat node array, frozen once
//!   built (its invariants are in that file's docs);
//! - [`json`]: the model file, JSON (`format = "burlwatch-model"`,
//!   `format_version` 3, or 4 for a model with smoothing, a size rule's
//!   trade or a symmetry; version 2 files, without pattern references, are read too),
//!   whose serde structs are kept apart from the
//!   domain types so the file can stay stable while the code changes;
//!   loading validates every field and turns any inconsistency into an
//!   error naming it. A feature is written as its offset from the centre
//!   pixel, never as an index;
//! - [`settings`]: threshold and grouping, and the overrides of them;
//! - [`rules`]: the tree read as one rule per leaf.
//!
//! The model knows nothing of how it was learned beyond the summary it
//! carries: this module does not depend on the learner.

pub mod json;
pub mod rules;
pub mod settings;
mod tree;

use serde::{Deserialize, Serialize};

use crate::error::{Error, Result};
use crate::window::{Offset, Window};
pub use settings::{GroupParams, Overrides, Prf, Settings, Smoothing, MAX_MERGE_DISTANCE};
pub use tree::{leaf_score, Leaf, Node, Tree, MAX_NODES};

fn is_zero(v: &u32) -> bool {
    *v == 0
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
    /// Cross-fitted tuning: this many trees, each grown without one share
    /// of the frames, chose the settings on all frames (0: a holdout
    /// share did). Not written when 0, so earlier models keep their bytes
    /// and hashes.
    #[serde(default, skip_serializing_if = "is_zero")]
    pub folds: u32,
    /// The size rule's trade, when it kept a smaller tree than the
    /// best-scoring candidate (not written otherwise).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub smaller: Option<SizeTrade>,
    /// The fabric's symmetries the frames were also taken under
    /// (`mirrors` or `square`, `learn::symmetry`); not written when none.
    /// Under one, leaf counts (and `min_leaf`) count each training pixel
    /// once per transform, and the held-out scores (`holdout`,
    /// `smaller.best_object_f1`) are over each held-out frame and its
    /// transforms.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub symmetry: Option<String>,
    /// When training chose the symmetry (`training.symmetry = "choose"`):
    /// every candidate with its held-out score, the one kept marked. Not
    /// written otherwise.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub symmetry_tried: Vec<SymmetryTried>,
    /// Which of threshold / min_area / merge_distance the user fixed.
    #[serde(default)]
    pub overridden: Vec<String>,
}

/// One symmetry training tried when it chose the symmetry.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SymmetryTried {
    /// `none`, `mirrors` or `square`.
    pub symmetry: String,
    /// Held-out object F1 of its model's chosen settings on the held-out
    /// frames as they are (not transformed), so the candidates compare;
    /// absent when it was not trained.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub object_f1: Option<f64>,
    /// Bootstrap standard error of the difference between its object F1
    /// and the best candidate's, over the same frames (0 for the best).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub object_f1_se: Option<f64>,
    /// Whether this is the symmetry the model was trained under.
    pub kept: bool,
    /// Why it was not trained (over the memory limit).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub passed_over: Option<String>,
}

/// What the size rule gave up for speed: the best-scoring candidate it
/// passed over, whose held-out object F1 was within one standard error of
/// the kept one's.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SizeTrade {
    /// The best candidate's pruning strength, and the leaves the final
    /// tree would have kept at it.
    pub best_alpha: f64,
    pub best_leaves: u64,
    /// The best candidate's held-out object F1.
    pub best_object_f1: f64,
    /// Standard error of the difference in object F1 between the two.
    pub object_f1_se: f64,
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
    /// Distinct window patterns the final tree grew on (with their
    /// transforms, under a symmetry).
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
    /// Share of training pixels detected as the daemon counts them: score
    /// at or above the threshold, smoothed, in objects `min_area` kept.
    /// (Models written before counted every pixel at or above the
    /// threshold.)
    pub detected_share: f64,
    /// Target objects per training frame.
    pub objects_per_frame: f64,
    /// Share of each 2x2 pixel pattern in the training frames
    /// (`drift::pattern_histogram`'s 16 bins); empty in models written
    /// before the input monitors, whose pattern monitor then stays off.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub patterns: Vec<f64>,
}

/// A complete model.
#[derive(Clone, Debug, PartialEq)]
pub struct Model {
    pub tree: Tree,
    /// A pixel is a detection when its score reaches this.
    pub threshold: f64,
    pub grouping: GroupParams,
    /// Votes that smooth the detection mask before grouping (chosen by
    /// training; off in models trained before it).
    pub smoothing: Smoothing,
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
            smoothing: self.smoothing,
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
    fn smoothing_is_written_as_version_4_and_read_back() {
        let plain = Model::from_json(&edited(|_| {})).unwrap();
        assert!(!plain.to_json().contains("smoothing"));
        assert!(plain.to_json().contains("\"format_version\": 3"));
        let smoothed = Model {
            smoothing: Smoothing {
                radius: 1,
                votes: 5,
            },
            ..plain
        };
        let text = smoothed.to_json();
        assert!(text.contains("\"format_version\": 4"), "{text}");
        let back = Model::from_json(&text).unwrap();
        assert_eq!(back, smoothed);
        assert_eq!(
            back.settings().smoothing,
            Smoothing {
                radius: 1,
                votes: 5
            }
        );
    }

    /// A model whose symmetry training chose is a version 5 file that
    /// reads back with its record of the candidates.
    #[test]
    fn a_chosen_symmetry_is_written_as_version_5_and_read_back() {
        let plain = Model::from_json(&edited(|_| {})).unwrap();
        let mut chosen = plain.clone();
        chosen.training.symmetry = Some("mirrors".into());
        chosen.training.symmetry_tried = vec![
            SymmetryTried {
                symmetry: "none".into(),
                object_f1: Some(0.7),
                object_f1_se: Some(0.05),
                kept: false,
                passed_over: None,
            },
            SymmetryTried {
                symmetry: "mirrors".into(),
                object_f1: Some(0.8),
                object_f1_se: Some(0.0),
                kept: true,
                passed_over: None,
            },
            SymmetryTried {
                symmetry: "square".into(),
                object_f1: None,
                object_f1_se: None,
                kept: false,
                passed_over: Some("over the memory limit".into()),
            },
        ];
        let text = chosen.to_json();
        assert!(text.contains("\"format_version\": 5"), "{text}");
        assert_eq!(Model::from_json(&text).unwrap(), chosen);
        // Without a record, as before.
        assert!(!plain.to_json().contains("symmetry_tried"));
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
                edited(|v| v["format_version"] = 6.into()),
                "format_version 6 is not known",
            ),
            (
                edited(|v| {
                    v["format_version"] = 6.into();
                    v["new_thing"] = 1.into();
                    v.as_object_mut().unwrap().remove("reference");
                }),
                "format_version 6 is not known",
            ),
            (
                edited(|v| {
                    v["format_version"] = 4.into();
                    v["training"]["symmetry_tried"] =
                        serde_json::json!([{"symmetry": "none", "object_f1": 0.9, "kept": true}]);
                }),
                "training.symmetry_tried came with format_version 5, but the file says 4",
            ),
            (
                edited(|v| {
                    v["format_version"] = 5.into();
                    v["training"]["symmetry_tried"] =
                        serde_json::json!([{"symmetry": "round", "kept": true}]);
                }),
                "\"round\" is not none, mirrors or square",
            ),
            (
                edited(|v| {
                    v["format_version"] = 5.into();
                    v["training"]["symmetry_tried"] = serde_json::json!([
                        {"symmetry": "none", "object_f1": 0.8, "kept": false},
                        {"symmetry": "square", "object_f1": 0.9, "kept": true}
                    ]);
                }),
                "keeps [\"square\"], but the model was trained under \"none\"",
            ),
            (
                edited(|v| {
                    v["format_version"] = 5.into();
                    v["training"]["symmetry_tried"] = serde_json::json!([
                        {"symmetry": "none", "object_f1": 0.8, "kept": true},
                        {"symmetry": "none", "object_f1": 0.9, "kept": false}
                    ]);
                }),
                "\"none\" is listed twice",
            ),
            (
                edited(|v| {
                    v["format_version"] = 5.into();
                    v["training"]["symmetry_tried"] = serde_json::json!([
                        {"symmetry": "none", "object_f1": 1.5, "kept": true}
                    ]);
                }),
                "none's object_f1 1.5 is outside [0, 1]",
            ),
            (
                edited(|v| {
                    v["format_version"] = 3.into();
                    v["smoothing"] = serde_json::json!({"radius": 1, "votes": 5});
                }),
                "smoothing came with format_version 4, but the file says 3",
            ),
            (
                edited(|v| {
                    v["format_version"] = 3.into();
                    v["training"]["smaller"] = serde_json::json!({
                        "best_alpha": 0.0, "best_leaves": 9,
                        "best_object_f1": 1.0, "object_f1_se": 0.0
                    });
                }),
                "training.smaller came with format_version 4",
            ),
            (
                edited(|v| {
                    v["format_version"] = 3.into();
                    v["training"]["symmetry"] = "square".into();
                }),
                "training.symmetry came with format_version 4",
            ),
            (
                edited(|v| {
                    v["format_version"] = 4.into();
                    v["training"]["symmetry"] = "round".into();
                }),
                "training.symmetry \"round\" is not one of",
            ),
            (
                edited(|v| {
                    v["format_version"] = 4.into();
                    v["training"]["symmetry"] = "none".into();
                }),
                "training.symmetry \"none\" is not one of",
            ),
            (
                edited(|v| {
                    v["format_version"] = 4.into();
                    v["smoothing"] = serde_json::json!({"radius": 1, "votes": 10});
                }),
                "smoothing votes 10 must be 1 to 9 for radius 1",
            ),
            (
                edited(|v| {
                    v["format_version"] = 4.into();
                    v["smoothing"] = serde_json::json!({"radius": 3, "votes": 1});
                }),
                "smoothing radius 3 is over the limit of 2",
            ),
            (
                edited(|v| {
                    v["format_version"] = 2.into();
                    v["reference"]["patterns"] = serde_json::Value::from(vec![0.0625; 16]);
                }),
                "came with format_version 3",
            ),
            (
                edited(|v| {
                    v["format_version"] = 3.into();
                    v["reference"]["patterns"] = serde_json::json!([0.5, 0.5]);
                }),
                "reference.patterns must be 16 shares",
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
