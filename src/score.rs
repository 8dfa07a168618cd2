//! Scoring detections against labelled masks.
//!
//! Pixel level: the confusion counts of the detection mask against the
//! target mask. Object level: ground-truth objects are the 8-connected
//! components of the target mask; detections are matched one-to-one,
//! greedily in order of decreasing score, by the PASCAL VOC rule
//! (Everingham et al., 2010): each detection goes to the ground-truth object
//! of highest bounding-box IoU and counts only if that IoU is at least 0.5
//! and the object is still unclaimed.
//!
//! Counts add across frames ([`Confusion::add`]), so a data set's score is
//! computed from the summed counts, never by averaging per-frame ratios.
//! [`score_frames`] scores a [`Detector`] on a set of labelled frames this
//! way: `burlwatch eval` prints its [`Report`], and two detectors (a new
//! model and the one in service) compare on the same held-out frames.

use serde::{Deserialize, Serialize};

use crate::detect::compile::Scratch;
use crate::detect::group::{self, GroupParams, Object};
use crate::detect::Detector;
use crate::error::{Error, ErrorKind, Result};
use crate::frame::{BitFrame, LabelledFrame};

/// The IoU a detection must reach to match a ground-truth object.
pub const IOU_MATCH: f64 = 0.5;

/// True/false positives and negatives.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Serialize, Deserialize)]
pub struct Confusion {
    pub tp: u64,
    pub fp: u64,
    #[serde(rename = "fn")]
    pub fn_: u64,
    /// True negatives (pixel level only; 0 for objects, where it has no meaning).
    pub tn: u64,
}

impl Confusion {
    pub fn add(&mut self, o: &Confusion) {
        self.tp += o.tp;
        self.fp += o.fp;
        self.fn_ += o.fn_;
        self.tn += o.tn;
    }

    /// Precision, 1 when nothing was detected (no false alarm was raised).
    pub fn precision(&self) -> f64 {
        ratio(self.tp, self.tp + self.fp)
    }

    /// Recall, 1 when there was nothing to find.
    pub fn recall(&self) -> f64 {
        ratio(self.tp, self.tp + self.fn_)
    }

    /// Harmonic mean of precision and recall: 2TP / (2TP + FP + FN); 1 when
    /// there was nothing to find and nothing was detected.
    pub fn f1(&self) -> f64 {
        ratio(2 * self.tp, 2 * self.tp + self.fp + self.fn_)
    }

    pub fn prf(&self) -> Prf {
        Prf {
            precision: self.precision(),
            recall: self.recall(),
            f1: self.f1(),
        }
    }
}

fn ratio(a: u64, b: u64) -> f64 {
    if b == 0 {
        1.0
    } else {
        a as f64 / b as f64
    }
}

pub use crate::model::settings::Prf;

/// Pixel-level confusion of a detection mask against the target mask.
///
/// # Panics
/// If the masks differ in size: callers pair masks with their frames first
/// (`data::read_folder` reports a mismatch as an error naming the file).
pub fn pixel_confusion(detected: &BitFrame, truth: &BitFrame) -> Confusion {
    assert!(detected.same_size(truth), "masks of different sizes");
    let mut c = Confusion::default();
    for (d, t) in detected.words().iter().zip(truth.words()) {
        c.tp += (d & t).count_ones() as u64;
        c.fp += (d & !t).count_ones() as u64;
        c.fn_ += (!d & t).count_ones() as u64;
    }
    c.tn = detected.len() as u64 - c.tp - c.fp - c.fn_;
    c
}

/// The ground-truth objects of a target mask (8-connected, every size).
pub fn truth_objects(truth: &BitFrame) -> Vec<Object> {
    group::group(truth, GroupParams::default(), |_, _| 1.0)
}

/// Object-level confusion by the PASCAL VOC rule (Everingham et al., 2010,
/// section 4.2): detections are taken in order of decreasing score; each is
/// compared with *every* ground-truth object and assigned to the one of
/// highest IoU; it is a true positive if that IoU is at least 0.5 and the
/// object was not already claimed by a higher-scored detection, otherwise a
/// false positive. Unclaimed ground-truth objects are false negatives.
pub fn object_confusion(detected: &[Object], truth: &[Object]) -> Confusion {
    let claims = match_objects(detected, truth);
    let tp = claims.iter().filter(|c| c.is_some()).count() as u64;
    Confusion {
        tp,
        fp: detected.len() as u64 - tp,
        fn_: truth.len() as u64 - tp,
        tn: 0,
    }
}

/// The matching [`object_confusion`] counts: for each detection, in the
/// order given, the index of the ground-truth object it claimed, or `None`
/// (a false positive).
pub fn match_objects(detected: &[Object], truth: &[Object]) -> Vec<Option<usize>> {
    let mut order: Vec<usize> = (0..detected.len()).collect();
    // Highest score first; ties by id so the result is deterministic.
    order.sort_by(|&a, &b| {
        let (a, b) = (&detected[a], &detected[b]);
        b.score.total_cmp(&a.score).then(a.id.cmp(&b.id))
    });
    let mut taken = vec![false; truth.len()];
    let mut claims = vec![None; detected.len()];
    for k in order {
        let d = &detected[k];
        let mut best: Option<(usize, f64)> = None;
        for (i, t) in truth.iter().enumerate() {
            let iou = d.bbox.iou(&t.bbox);
            if best.is_none_or(|(_, b)| iou > b) {
                best = Some((i, iou));
            }
        }
        if let Some((i, iou)) = best {
            if iou >= IOU_MATCH && !taken[i] {
                taken[i] = true;
                claims[k] = Some(i);
            }
        }
    }
    claims
}

/// Pixel and object confusion together, for one frame or summed over many.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Serialize, Deserialize)]
pub struct Scores {
    pub pixel: Confusion,
    pub object: Confusion,
}

impl Scores {
    pub fn add(&mut self, o: &Scores) {
        self.pixel.add(&o.pixel);
        self.object.add(&o.object);
    }
}

/// One labelled frame's scores.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct FrameScores {
    /// The frame's name (in a data folder, its files' shared stem).
    pub name: String,
    pub scores: Scores,
}

/// What a detector scored on a set of labelled frames.
#[derive(Clone, Debug, Default, PartialEq, Eq)]
pub struct Report {
    /// Frames scored.
    pub frames: usize,
    /// Pixel and object counts summed over every frame.
    pub total: Scores,
    /// Each frame's scores in the order given, when asked for; else empty.
    pub per_frame: Vec<FrameScores>,
}

/// Runs `detector` (its compiled program with the settings it holds) over
/// `frames` and adds up pixel and object confusion against their masks;
/// with `per_frame`, also keeps every frame's own scores.
/// `progress(done, total)` is called before each frame and once at the end.
///
/// A frame whose mask differs from it in size is an error naming the frame
/// (`fileio::data::read_folder` never returns such a pair).
pub fn score_frames(
    detector: &Detector,
    frames: &[LabelledFrame],
    per_frame: bool,
    progress: &mut dyn FnMut(usize, usize),
) -> Result<Report> {
    if let Some(f) = frames.iter().find(|f| !f.sizes_agree()) {
        return Err(Error::new(ErrorKind::MaskSizeMismatch {
            width: f.frame.width(),
            height: f.frame.height(),
            mask_width: f.mask.width(),
            mask_height: f.mask.height(),
        })
        .with_path(&f.name));
    }
    let mut scratch = Scratch::default();
    let mut report = Report {
        frames: frames.len(),
        ..Report::default()
    };
    for (k, f) in frames.iter().enumerate() {
        progress(k, frames.len());
        let s = score_frame(detector, f, &mut scratch);
        report.total.add(&s);
        if per_frame {
            report.per_frame.push(FrameScores {
                name: f.name.clone(),
                scores: s,
            });
        }
    }
    progress(frames.len(), frames.len());
    Ok(report)
}

/// One labelled frame's scores. Pixels of unknown label are taken out of
/// both the detection and the truth before anything is counted: the
/// detection's remaining pixels are grouped again with the detector's
/// settings, so a detection inside a "don't know" region is neither right
/// nor wrong, and such pixels are not counted as true negatives either.
pub fn score_frame(detector: &Detector, f: &LabelledFrame, scratch: &mut Scratch) -> Scores {
    let r = detector.detect(&f.frame, scratch);
    let Some(unknown) = f.unknown.as_ref().filter(|u| u.count_set() > 0) else {
        return Scores {
            pixel: pixel_confusion(&r.mask, &f.mask),
            object: object_confusion(&r.objects, &truth_objects(&f.mask)),
        };
    };
    let detected = r.mask.and_not(unknown);
    let truth = f.mask.and_not(unknown);
    let tree = &detector.model().tree;
    let objects = group::group(&detected, detector.settings().grouping, |x, y| {
        tree.score_at(&f.frame, x, y)
    });
    let mut pixel = pixel_confusion(&detected, &truth);
    pixel.tn -= unknown.count_set();
    Scores {
        pixel,
        object: object_confusion(&objects, &truth_objects(&truth)),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::detect::group::BBox;
    use crate::model::{DataSummary, Leaf, Model, Node, Reference, TrainingInfo, Tree};
    use crate::window::Window;

    fn obj(id: u32, x0: u32, y0: u32, x1: u32, y1: u32, score: f64) -> Object {
        Object {
            id,
            bbox: BBox { x0, y0, x1, y1 },
            centroid: (0.0, 0.0),
            area: 1,
            score,
        }
    }

    #[test]
    fn pixel_counts() {
        let d = BitFrame::from_ascii("##..\n");
        let t = BitFrame::from_ascii("#.#.\n");
        let c = pixel_confusion(&d, &t);
        assert_eq!((c.tp, c.fp, c.fn_, c.tn), (1, 1, 1, 1));
        assert_eq!(c.f1(), 0.5);
    }

    #[test]
    fn one_to_one_matching() {
        let truth = vec![obj(1, 0, 0, 9, 9, 1.0)];
        // Two detections overlap the same object: only one can match.
        let det = vec![obj(1, 0, 0, 9, 8, 0.5), obj(2, 0, 0, 9, 9, 0.9)];
        let c = object_confusion(&det, &truth);
        assert_eq!((c.tp, c.fp, c.fn_), (1, 1, 0));
        // IoU just under 0.5 does not match: 10x10 against 10x4 = 0.4.
        let c = object_confusion(&[obj(1, 0, 0, 9, 3, 1.0)], &truth);
        assert_eq!((c.tp, c.fp, c.fn_), (0, 1, 1));
        // The VOC rule compares each detection with every object, claimed
        // or not (Everingham et al., 2010, section 4.2; boxes made up for
        // this test). A = x 0..9, B = x 2..11, both 10 rows. D1 = B (IoU 1
        // with B) takes B. D2 = x 2..10 has IoU 0.9 with B and 80/110 with
        // A: its best object is B, already taken, so it is a false
        // positive, although it overlaps A well enough.
        let truth = vec![obj(1, 0, 0, 9, 9, 1.0), obj(2, 2, 0, 11, 9, 1.0)];
        let det = vec![obj(1, 2, 0, 11, 9, 0.9), obj(2, 2, 0, 10, 9, 0.8)];
        assert!((det[1].bbox.iou(&truth[0].bbox) - 80.0 / 110.0).abs() < 1e-12);
        let c = object_confusion(&det, &truth);
        assert_eq!((c.tp, c.fp, c.fn_), (1, 1, 1));
        // Nothing to find and nothing found is a perfect score.
        assert_eq!(object_confusion(&[], &[]).f1(), 1.0);
    }

    /// A model that detects exactly the set pixels: one split on the
    /// centre pixel of a 3x3 window, leaves 0 (clear) and 1 (set).
    fn ink_detector(min_area: u32) -> Detector {
        let leaf = |score: f64| {
            Node::Leaf(Leaf {
                counts: [1, 1],
                score,
                share: 0.5,
            })
        };
        let tree = Tree::new(
            Window::new(3).unwrap(),
            vec![
                Node::Split {
                    feature: 4,
                    if_clear: 1,
                    if_set: 2,
                },
                leaf(0.0),
                leaf(1.0),
            ],
        )
        .unwrap();
        let model = Model {
            tree,
            threshold: 0.5,
            grouping: GroupParams {
                min_area,
                merge_distance: 0,
            },
            smoothing: crate::model::Smoothing::OFF,
            model_version: 1,
            training: TrainingInfo {
                criterion: "entropy".into(),
                max_depth: 1,
                min_leaf: 1.0,
                min_gain: 0.0,
                class_weight: "none".into(),
                class_weights: [1.0, 1.0],
                holdout: 0.0,
                pruning_alpha: 0.0,
                tuned: false,
                grown_leaves: 2,
                pruned_leaves: 2,
                refit: false,
                folds: 0,
                smaller: None,
                symmetry: None,
                symmetry_tried: Vec::new(),
                overridden: Vec::new(),
            },
            data: DataSummary::default(),
            holdout: None,
            reference: Reference::default(),
        };
        let settings = model.settings();
        Detector::new(model, settings)
    }

    fn labelled(name: &str, frame: &str, mask: &str) -> LabelledFrame {
        LabelledFrame::new(
            name,
            BitFrame::from_ascii(frame),
            BitFrame::from_ascii(mask),
        )
    }

    #[test]
    fn unknown_pixels_are_neither_right_nor_wrong() {
        // The lone pixel at (4, 3) is a false alarm, unless its label is
        // unknown: then it counts for nothing, not even as a true negative.
        let mut f = labelled(
            "a",
            "##....\n##....\n......\n....#.\n",
            "##....\n##....\n......\n......\n",
        );
        let d = ink_detector(1);
        let mut scratch = Scratch::default();
        let plain = score_frame(&d, &f, &mut scratch);
        assert_eq!((plain.object.tp, plain.object.fp), (1, 1));
        f.unknown = Some(BitFrame::from_ascii("......\n......\n......\n...##.\n"));
        let s = score_frame(&d, &f, &mut scratch);
        assert_eq!((s.object.tp, s.object.fp, s.object.fn_), (1, 0, 0));
        assert_eq!(
            (s.pixel.tp, s.pixel.fp, s.pixel.fn_, s.pixel.tn),
            (4, 0, 0, 18)
        );
        // An unknown region over a missed defect: no false negative either.
        f.frame = BitFrame::from_ascii("......\n......\n......\n......\n");
        f.unknown = Some(BitFrame::from_ascii("##....\n##....\n......\n......\n"));
        let s = score_frame(&d, &f, &mut scratch);
        assert_eq!((s.object.tp, s.object.fp, s.object.fn_), (0, 0, 0));
        assert_eq!(s.pixel.tn, 20);
    }

    #[test]
    fn frames_are_scored_and_summed() {
        // Frame a: a 2x2 blob that is a defect, and a lone pixel that is
        // not. Frame b: a defect the detector misses (its pixels are
        // clear), and one it finds only in part (IoU 2/8 < 0.5).
        let frames = [
            labelled(
                "a",
                "##....\n##....\n......\n....#.\n",
                "##....\n##....\n......\n......\n",
            ),
            labelled(
                "b",
                "......\n......\n....##\n......\n",
                "#.....\n......\n..####\n..####\n",
            ),
        ];
        let mut calls = Vec::new();
        let r = score_frames(&ink_detector(1), &frames, true, &mut |d, t| {
            calls.push((d, t))
        })
        .unwrap();
        assert_eq!(calls, [(0, 2), (1, 2), (2, 2)]);
        assert_eq!(r.frames, 2);
        let a = Scores {
            pixel: Confusion {
                tp: 4,
                fp: 1,
                fn_: 0,
                tn: 19,
            },
            object: Confusion {
                tp: 1,
                fp: 1,
                fn_: 0,
                tn: 0,
            },
        };
        let b = Scores {
            pixel: Confusion {
                tp: 2,
                fp: 0,
                fn_: 7,
                tn: 15,
            },
            object: Confusion {
                tp: 0,
                fp: 1,
                fn_: 2,
                tn: 0,
            },
        };
        assert_eq!(
            r.per_frame,
            [
                FrameScores {
                    name: "a".into(),
                    scores: a
                },
                FrameScores {
                    name: "b".into(),
                    scores: b
                }
            ]
        );
        let mut total = a;
        total.add(&b);
        assert_eq!(r.total, total);
        // Without per_frame: the same totals, no list.
        let quiet = score_frames(&ink_detector(1), &frames, false, &mut |_, _| {}).unwrap();
        assert_eq!((quiet.total, quiet.per_frame.len()), (total, 0));
        // The detector's settings are the ones used: min_area 2 drops the
        // lone pixel of frame a, so its false positives go.
        let r = score_frames(&ink_detector(2), &frames[..1], false, &mut |_, _| {}).unwrap();
        assert_eq!((r.total.pixel.fp, r.total.object.fp), (0, 0));
        assert_eq!(
            score_frames(&ink_detector(1), &[], true, &mut |_, _| {}).unwrap(),
            Report::default()
        );
    }

    #[test]
    fn a_mask_of_another_size_is_an_error_naming_the_frame() {
        let frames = [labelled("odd", "##\n##\n", "#\n")];
        let e = score_frames(&ink_detector(1), &frames, false, &mut |_, _| {}).unwrap_err();
        assert!(matches!(e.kind(), ErrorKind::MaskSizeMismatch { .. }));
        assert!(e.to_string().contains("odd"), "{e}");
    }
}
