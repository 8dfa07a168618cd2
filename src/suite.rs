//! The evaluation suite: loom settings that differ the way real lines
//! differ (finer and coarser plain weave, a twill-like diagonal, thin
//! threads with a worse camera, uneven light, small defects, defects cut
//! off by the frame's edge), each trained and scored on its own frames.
//! The demo test set scores object F1 1.000 and cannot tell good from
//! better; this suite can, and it was not used to tune the defaults.
//!
//! A setting's training frames are generated from the suite's seed and its
//! test frames from the next seed, so the two never share a frame; both
//! are pure functions of `(setting, seed, count)` ([`crate::synth`]), so a
//! figure reported from the suite is reproduced bit for bit by the same
//! command. Pure computation: files are the command's business.

use std::time::Instant;

use serde::Serialize;

use crate::detect::Detector;
use crate::error::Result;
use crate::frame::{BitFrame, LabelledFrame};
use crate::learn::{self, TrainParams};
use crate::score::{self, Confusion};
use crate::synth::{self, LoomParams};

/// How much of each setting to generate.
#[derive(Clone, Copy, Debug)]
pub struct Sizes {
    pub train: usize,
    pub test: usize,
    /// Training frames from this seed, test frames from the next.
    pub seed: u64,
}

impl Default for Sizes {
    fn default() -> Sizes {
        Sizes {
            train: 20,
            test: 60,
            seed: 1,
        }
    }
}

/// One setting's result.
#[derive(Clone, Debug, Serialize)]
pub struct Outcome {
    pub setting: String,
    pub object: Confusion,
    pub pixel: Confusion,
    pub object_f1: f64,
    pub pixel_f1: f64,
    /// The model's size: nodes and depth.
    pub nodes: usize,
    pub depth: u32,
    /// Labelled pixels trained on, and the seconds training took.
    pub train_pixels: u64,
    pub train_seconds: f64,
    /// Test pixels the compiled detector went through per second (one
    /// thread, grouping included): the speed side of a model's size.
    pub detect_mpx_s: f64,
    /// The standard error of the object F1: the spread of the F1 of the
    /// test frames drawn again with replacement ([`BOOTSTRAP`] times; the
    /// bootstrap, Efron and Tibshirani 1993), so two figures closer than
    /// about twice this are not told apart by the suite.
    pub object_f1_se: f64,
    /// Where the object errors are (see [`Errors`]).
    pub errors: Errors,
}

/// The object-level errors of a setting, by kind.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Serialize)]
pub struct Errors {
    /// Defects no detected pixel touches.
    pub missed: u64,
    /// Defects detected pixels touch but no detection matches (found in
    /// fragments, or in a box too large or too small for IoU 0.5).
    pub unmatched: u64,
    /// Detections that touch a defect but match none (a fragment, or a
    /// defect merged with its surroundings).
    pub partial: u64,
    /// Detections that touch no defect pixel.
    pub false_alarms: u64,
}

pub use crate::learn::tune::BOOTSTRAP;

/// The settings, by name (the `generate --preset` names).
pub fn settings() -> Vec<(&'static str, LoomParams)> {
    LoomParams::suite()
}

/// `count` labelled frames of a setting, named `loom-NAME-NNNN.pbm`.
pub fn frames(name: &str, p: &LoomParams, seed: u64, count: usize) -> Vec<LabelledFrame> {
    synth::generate_set(p, seed, count)
        .into_iter()
        .enumerate()
        .map(|(i, g)| LabelledFrame::new(format!("loom-{name}-{i:04}.pbm"), g.frame, g.mask))
        .collect()
}

/// Trains a model on a setting's training frames with `params` and scores
/// it on its test frames.
pub fn evaluate(name: &str, p: &LoomParams, sizes: Sizes, params: &TrainParams) -> Result<Outcome> {
    let train = frames(name, p, sizes.seed, sizes.train);
    let test = frames(name, p, sizes.seed.wrapping_add(1), sizes.test);
    let started = Instant::now();
    let model = learn::train(&train, params, &mut |_| {})?;
    let train_seconds = started.elapsed().as_secs_f64();
    let (nodes, depth) = (model.tree.nodes().len(), model.tree.depth());
    let settings = model.settings();
    let detector = Detector::new(model, settings);
    // As `score::score_frame` counts (generated frames have no unknown
    // pixels), keeping each frame's matching for the error kinds.
    let mut scratch = crate::detect::compile::Scratch::default();
    let mut object = Confusion::default();
    let mut pixel = Confusion::default();
    let mut errors = Errors::default();
    let mut per_frame = Vec::with_capacity(test.len());
    let mut detecting = std::time::Duration::ZERO;
    for f in &test {
        let t0 = Instant::now();
        let r = detector.detect(&f.frame, &mut scratch);
        detecting += t0.elapsed();
        let truth = score::truth_objects(&f.mask);
        let claims = score::match_objects(&r.objects, &truth);
        let o = score::object_confusion(&r.objects, &truth);
        object.add(&o);
        pixel.add(&score::pixel_confusion(&r.mask, &f.mask));
        per_frame.push(o);
        let touches = |b: &crate::detect::group::BBox, a: &BitFrame, c: &BitFrame| {
            (b.y0..=b.y1).any(|y| {
                (b.x0..=b.x1)
                    .any(|x| a.get(x as usize, y as usize) && c.get(x as usize, y as usize))
            })
        };
        for (i, t) in truth.iter().enumerate() {
            if !claims.contains(&Some(i)) {
                if touches(&t.bbox, &f.mask, &r.mask) {
                    errors.unmatched += 1;
                } else {
                    errors.missed += 1;
                }
            }
        }
        for (d, claim) in r.objects.iter().zip(&claims) {
            if claim.is_none() {
                if touches(&d.bbox, &f.mask, &r.mask) {
                    errors.partial += 1;
                } else {
                    errors.false_alarms += 1;
                }
            }
        }
    }
    Ok(Outcome {
        setting: name.to_string(),
        object_f1: object.f1(),
        pixel_f1: pixel.f1(),
        object,
        pixel,
        object_f1_se: bootstrap_se(&per_frame, sizes.seed),
        detect_mpx_s: test.iter().map(|f| f.frame.len() as f64).sum::<f64>()
            / detecting.as_secs_f64().max(1e-9)
            / 1e6,
        errors,
        nodes,
        depth,
        train_pixels: train
            .iter()
            .map(|f| (f.frame.width() * f.frame.height()) as u64)
            .sum(),
        train_seconds,
    })
}

pub use crate::learn::tune::bootstrap_se;

/// The standard error of the macro object F1: the settings' frames are
/// independent, so their errors add in quadrature over the count.
pub fn macro_se(outcomes: &[Outcome]) -> f64 {
    if outcomes.is_empty() {
        return 0.0;
    }
    outcomes
        .iter()
        .map(|o| o.object_f1_se * o.object_f1_se)
        .sum::<f64>()
        .sqrt()
        / outcomes.len() as f64
}

/// The macro averages (each setting counts once) of object and pixel F1.
pub fn macro_f1(outcomes: &[Outcome]) -> (f64, f64) {
    if outcomes.is_empty() {
        return (0.0, 0.0);
    }
    let n = outcomes.len() as f64;
    (
        outcomes.iter().map(|o| o.object_f1).sum::<f64>() / n,
        outcomes.iter().map(|o| o.pixel_f1).sum::<f64>() / n,
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn training_and_test_frames_never_coincide() {
        let (name, p) = settings().remove(0);
        let p = LoomParams {
            width: 64,
            height: 64,
            ..p
        };
        let a = frames(name, &p, 1, 4);
        let b = frames(name, &p, 2, 4);
        for x in &a {
            assert!(b.iter().all(|y| y.frame != x.frame));
        }
        // The same seed gives the same frames.
        assert_eq!(frames(name, &p, 1, 4)[3].frame, a[3].frame);
    }

    #[test]
    fn the_macro_average_counts_each_setting_once() {
        let o = |f: f64, p: f64| Outcome {
            setting: String::new(),
            object: Confusion::default(),
            pixel: Confusion::default(),
            object_f1: f,
            pixel_f1: p,
            nodes: 0,
            depth: 0,
            train_pixels: 0,
            train_seconds: 0.0,
            object_f1_se: 0.0,
            detect_mpx_s: 0.0,
            errors: Errors::default(),
        };
        assert_eq!(macro_f1(&[o(1.0, 0.5), o(0.5, 0.25)]), (0.75, 0.375));
        assert_eq!(macro_f1(&[]), (0.0, 0.0));
    }

    #[test]
    fn the_bootstrap_error_shrinks_with_more_frames_and_is_zero_without_spread() {
        let c = |tp, fp, fn_| Confusion { tp, fp, fn_, tn: 0 };
        // Every frame alike: every resample has the same F1.
        assert_eq!(bootstrap_se(&vec![c(3, 1, 1); 10], 1), 0.0);
        // Frames that differ: a spread, smaller with four times the frames
        // (about half: the standard error falls as one over the square
        // root of the sample size, common practice).
        let few: Vec<Confusion> = (0..10)
            .map(|i| if i % 2 == 0 { c(4, 0, 0) } else { c(0, 2, 2) })
            .collect();
        let many: Vec<Confusion> = few.iter().cycle().take(40).copied().collect();
        let (a, b) = (bootstrap_se(&few, 1), bootstrap_se(&many, 1));
        assert!(a > 0.05 && b < a * 0.7 && b > a * 0.3, "{a} {b}");
        // Repeatable for a seed.
        assert_eq!(bootstrap_se(&few, 1), a);
    }
}
