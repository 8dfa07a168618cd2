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
use crate::frame::LabelledFrame;
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
            test: 20,
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
}

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
    let report = score::score_frames(&detector, &test, false, &mut |_, _| {})?;
    Ok(Outcome {
        setting: name.to_string(),
        object_f1: report.total.object.f1(),
        pixel_f1: report.total.pixel.f1(),
        object: report.total.object,
        pixel: report.total.pixel,
        nodes,
        depth,
        train_pixels: train
            .iter()
            .map(|f| (f.frame.width() * f.frame.height()) as u64)
            .sum(),
        train_seconds,
    })
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
        };
        assert_eq!(macro_f1(&[o(1.0, 0.5), o(0.5, 0.25)]), (0.75, 0.375));
        assert_eq!(macro_f1(&[]), (0.0, 0.0));
    }
}
