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
//!
//! One draw of frames is not enough to tell two trainings apart: with 20
//! training frames a setting's object F1 moves by up to 0.3 from one draw
//! to the next, more than its bootstrap standard error over the test
//! frames says, since that error holds the model fixed. [`draw_seeds`] and
//! [`summarise`] repeat the suite on independent draws (training and test
//! frames new each time, never shared between draws) and report the mean
//! and spread, so the spread of training itself is in the figure.
//! [`compare`] pairs two trainings on the same draws: a draw's luck is
//! shared by both, so the spread of their differences tells them apart
//! where the two spreads alone would not.

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
    /// The symmetry the model was trained under (`none`, `mirrors`,
    /// `square`): the configuration's, or the one training kept when it
    /// chose.
    pub symmetry: String,
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
    let symmetry = model
        .training
        .symmetry
        .clone()
        .unwrap_or_else(|| "none".into());
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
        symmetry,
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

/// The training seeds of `draws` independent draws from `seed`: draw `i`
/// trains on seed `seed + 2i` and tests on the next, so no two draws share
/// a frame, and draw 0 is the single-draw suite's.
pub fn draw_seeds(seed: u64, draws: usize) -> Vec<u64> {
    (0..draws as u64)
        .map(|i| seed.wrapping_add(2 * i))
        .collect()
}

/// Mean and spread of one figure over the draws.
#[derive(Clone, Copy, Debug, PartialEq, Serialize)]
pub struct Spread {
    pub mean: f64,
    /// The sample standard deviation (divisor n - 1); 0 for one value.
    pub sd: f64,
    /// The standard error of the mean: `sd` over the square root of the
    /// count (0 for one value).
    pub se: f64,
    pub min: f64,
    pub max: f64,
}

impl Spread {
    /// The spread of `values`; all zero when there are none.
    pub fn of(values: &[f64]) -> Spread {
        if values.is_empty() {
            return Spread {
                mean: 0.0,
                sd: 0.0,
                se: 0.0,
                min: 0.0,
                max: 0.0,
            };
        }
        let n = values.len() as f64;
        let mean = values.iter().sum::<f64>() / n;
        let sd = if values.len() > 1 {
            (values.iter().map(|v| (v - mean) * (v - mean)).sum::<f64>() / (n - 1.0)).sqrt()
        } else {
            0.0
        };
        Spread {
            mean,
            sd,
            se: sd / n.sqrt(),
            min: values.iter().copied().fold(f64::INFINITY, f64::min),
            max: values.iter().copied().fold(f64::NEG_INFINITY, f64::max),
        }
    }
}

/// One setting over the draws.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct SettingSpread {
    pub setting: String,
    pub object_f1: Spread,
    pub pixel_f1: Spread,
    /// The model's size and speed, and the training time: what a gain in
    /// F1 costs.
    pub nodes: Spread,
    pub detect_mpx_s: Spread,
    pub train_seconds: Spread,
    /// The object errors of a draw by kind, on average over the draws.
    pub errors: ErrorMeans,
}

/// [`Errors`] averaged over draws.
#[derive(Clone, Copy, Debug, Default, PartialEq, Serialize)]
pub struct ErrorMeans {
    pub missed: f64,
    pub unmatched: f64,
    pub partial: f64,
    pub false_alarms: f64,
}

impl ErrorMeans {
    /// The mean of each kind over `errors` (all zero for none).
    pub fn of(errors: &[Errors]) -> ErrorMeans {
        let n = errors.len().max(1) as f64;
        let mean = |f: fn(&Errors) -> u64| errors.iter().map(f).sum::<u64>() as f64 / n;
        ErrorMeans {
            missed: mean(|e| e.missed),
            unmatched: mean(|e| e.unmatched),
            partial: mean(|e| e.partial),
            false_alarms: mean(|e| e.false_alarms),
        }
    }
}

/// The suite over several draws.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Summary {
    pub draws: usize,
    /// Per setting, in the order of the first draw.
    pub settings: Vec<SettingSpread>,
    /// The macro object F1 of each draw, summarised (its `se` is the
    /// standard error of the mean over the draws).
    pub macro_object_f1: Spread,
    pub macro_pixel_f1: Spread,
}

/// Summarises the outcomes of several draws, each a run over the same
/// settings (a setting missing from a draw is summarised over the draws
/// that have it).
pub fn summarise(draws: &[Vec<Outcome>]) -> Summary {
    let first = draws.first().map(|d| d.as_slice()).unwrap_or(&[]);
    let settings = first
        .iter()
        .map(|o| {
            let have: Vec<&Outcome> = draws
                .iter()
                .filter_map(|d| d.iter().find(|x| x.setting == o.setting))
                .collect();
            let of =
                |f: fn(&Outcome) -> f64| Spread::of(&have.iter().map(|x| f(x)).collect::<Vec<_>>());
            SettingSpread {
                setting: o.setting.clone(),
                object_f1: of(|x| x.object_f1),
                pixel_f1: of(|x| x.pixel_f1),
                nodes: of(|x| x.nodes as f64),
                detect_mpx_s: of(|x| x.detect_mpx_s),
                train_seconds: of(|x| x.train_seconds),
                errors: ErrorMeans::of(&have.iter().map(|x| x.errors).collect::<Vec<_>>()),
            }
        })
        .collect();
    let macros: Vec<(f64, f64)> = draws.iter().map(|d| macro_f1(d)).collect();
    let object = Spread::of(&macros.iter().map(|m| m.0).collect::<Vec<_>>());
    Summary {
        draws: draws.len(),
        settings,
        macro_object_f1: object,
        macro_pixel_f1: Spread::of(&macros.iter().map(|m| m.1).collect::<Vec<_>>()),
    }
}

/// Two trainings on the same draws, one figure: each side's spread, and
/// the spread of their differences draw by draw (`compared - base`), whose
/// standard error is the paired one: the draws' own luck, which both sides
/// share, drops out of it.
#[derive(Clone, Copy, Debug, PartialEq, Serialize)]
pub struct PairedSpread {
    pub base: Spread,
    pub compared: Spread,
    pub difference: Spread,
    /// Draws where the compared training scored higher, and lower.
    pub gains: usize,
    pub losses: usize,
}

impl PairedSpread {
    /// The pairs `(base, compared)`, one per draw.
    pub fn of(pairs: &[(f64, f64)]) -> PairedSpread {
        let side = |f: fn(&(f64, f64)) -> f64| pairs.iter().map(f).collect::<Vec<f64>>();
        PairedSpread {
            base: Spread::of(&side(|p| p.0)),
            compared: Spread::of(&side(|p| p.1)),
            difference: Spread::of(&side(|p| p.1 - p.0)),
            gains: pairs.iter().filter(|p| p.1 > p.0).count(),
            losses: pairs.iter().filter(|p| p.1 < p.0).count(),
        }
    }
}

/// One setting's object F1 under two trainings, over the draws.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct SettingComparison {
    pub setting: String,
    pub object_f1: PairedSpread,
}

/// Two trainings compared on the same draws of frames.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Comparison {
    /// Draws compared: those both sides finished.
    pub draws: usize,
    /// Per setting, in the order of the base's first draw; a setting is
    /// compared over the draws where both sides have it.
    pub settings: Vec<SettingComparison>,
    pub macro_object_f1: PairedSpread,
    pub macro_pixel_f1: PairedSpread,
}

/// Compares two trainings draw by draw: `base[i]` and `compared[i]` are
/// the same draw's outcomes (extra draws on either side are left out).
pub fn compare(base: &[Vec<Outcome>], compared: &[Vec<Outcome>]) -> Comparison {
    let n = base.len().min(compared.len());
    let (base, compared) = (&base[..n], &compared[..n]);
    let settings = base
        .first()
        .map(|d| d.as_slice())
        .unwrap_or(&[])
        .iter()
        .map(|o| {
            let pairs: Vec<(f64, f64)> = base
                .iter()
                .zip(compared)
                .filter_map(|(b, c)| {
                    let find = |d: &[Outcome]| {
                        d.iter()
                            .find(|x| x.setting == o.setting)
                            .map(|x| x.object_f1)
                    };
                    Some((find(b)?, find(c)?))
                })
                .collect();
            SettingComparison {
                setting: o.setting.clone(),
                object_f1: PairedSpread::of(&pairs),
            }
        })
        .collect();
    let macros: Vec<((f64, f64), (f64, f64))> = base
        .iter()
        .zip(compared)
        .map(|(b, c)| (macro_f1(b), macro_f1(c)))
        .collect();
    Comparison {
        draws: n,
        settings,
        macro_object_f1: PairedSpread::of(
            &macros.iter().map(|(b, c)| (b.0, c.0)).collect::<Vec<_>>(),
        ),
        macro_pixel_f1: PairedSpread::of(
            &macros.iter().map(|(b, c)| (b.1, c.1)).collect::<Vec<_>>(),
        ),
    }
}

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

    /// An outcome with only its name and F1 figures set.
    fn outcome(setting: &str, object_f1: f64, pixel_f1: f64) -> Outcome {
        Outcome {
            setting: setting.to_string(),
            object: Confusion::default(),
            pixel: Confusion::default(),
            object_f1,
            pixel_f1,
            nodes: 0,
            depth: 0,
            train_pixels: 0,
            train_seconds: 0.0,
            object_f1_se: 0.0,
            detect_mpx_s: 0.0,
            errors: Errors::default(),
            symmetry: "none".into(),
        }
    }

    #[test]
    fn the_macro_average_counts_each_setting_once() {
        let o = |f: f64, p: f64| outcome("", f, p);
        assert_eq!(macro_f1(&[o(1.0, 0.5), o(0.5, 0.25)]), (0.75, 0.375));
        assert_eq!(macro_f1(&[]), (0.0, 0.0));
    }

    #[test]
    fn draws_never_share_frames_and_the_first_is_the_single_suite() {
        assert_eq!(draw_seeds(1, 3), vec![1, 3, 5]);
        assert_eq!(draw_seeds(7, 1), vec![7]);
        // Training seed s and test seed s + 1 of every draw are distinct
        // from every other draw's.
        let used: Vec<u64> = draw_seeds(1, 5).iter().flat_map(|&s| [s, s + 1]).collect();
        let mut sorted = used.clone();
        sorted.sort_unstable();
        sorted.dedup();
        assert_eq!(sorted.len(), used.len());
    }

    #[test]
    fn the_spread_is_the_sample_standard_deviation() {
        // The worked example of the standard deviation article of the
        // English Wikipedia ("Standard deviation", section "Population
        // standard deviation of grades of eight students", from memory):
        // 2, 4, 4, 4, 5, 5, 7, 9 have mean 5, population standard deviation
        // 2 and sample standard deviation sqrt(32 / 7) = 2.138 (the divisor
        // n - 1, as the NIST/SEMATECH e-Handbook of Statistical Methods,
        // section 1.3.5.6, defines it). The standard error of a mean is the
        // sample standard deviation over the square root of n (the same
        // handbook, section 1.3.5.2, from memory).
        let s = Spread::of(&[2.0, 4.0, 4.0, 4.0, 5.0, 5.0, 7.0, 9.0]);
        assert_eq!(s.mean, 5.0);
        assert!((s.sd - (32.0f64 / 7.0).sqrt()).abs() < 1e-12, "{}", s.sd);
        assert!(
            (s.se - (32.0f64 / 7.0 / 8.0).sqrt()).abs() < 1e-12,
            "{}",
            s.se
        );
        assert_eq!((s.min, s.max), (2.0, 9.0));
        assert_eq!((Spread::of(&[0.7]).sd, Spread::of(&[0.7]).se), (0.0, 0.0));
        assert_eq!(Spread::of(&[]).mean, 0.0);
    }

    #[test]
    fn a_summary_spreads_each_setting_and_the_macro_figure_over_the_draws() {
        let o = |name: &str, f: f64| outcome(name, f, f / 2.0);
        let draws = vec![
            vec![o("a", 0.9), o("b", 0.5)],
            vec![o("a", 0.7), o("b", 0.7)],
            vec![o("a", 0.8), o("b", 0.3)],
        ];
        let s = summarise(&draws);
        assert_eq!(s.draws, 3);
        assert_eq!(s.settings[0].setting, "a");
        assert!((s.settings[0].object_f1.mean - 0.8).abs() < 1e-12);
        assert!((s.settings[0].object_f1.sd - 0.1).abs() < 1e-12);
        assert!((s.settings[1].object_f1.sd - 0.2).abs() < 1e-12);
        assert!((s.settings[1].pixel_f1.mean - 0.25).abs() < 1e-12);
        // Macro per draw: 0.7, 0.7, 0.55; mean 0.65, squared deviations
        // 0.0025, 0.0025, 0.01: sd sqrt(0.015 / 2).
        assert!((s.macro_object_f1.mean - 0.65).abs() < 1e-12);
        let sd = (0.015f64 / 2.0).sqrt();
        assert!((s.macro_object_f1.sd - sd).abs() < 1e-12);
        assert!((s.macro_object_f1.se - sd / 3f64.sqrt()).abs() < 1e-12);
        assert_eq!((s.macro_object_f1.min, s.macro_object_f1.max), (0.55, 0.7));
        // One draw: no spread.
        let one = summarise(&draws[..1]);
        assert_eq!((one.macro_object_f1.sd, one.macro_object_f1.se), (0.0, 0.0));
        assert_eq!(summarise(&[]).settings, vec![]);
        // A setting missing from a draw is summarised over the draws that
        // have it.
        let gappy = summarise(&[vec![o("a", 0.9), o("b", 0.5)], vec![o("a", 0.7)]]);
        assert_eq!(gappy.settings[1].object_f1.mean, 0.5);
        assert_eq!(gappy.settings[1].object_f1.sd, 0.0);
        assert!((gappy.settings[0].object_f1.mean - 0.8).abs() < 1e-12);
    }

    #[test]
    fn a_summary_carries_size_speed_time_and_errors_over_the_draws() {
        let o = |nodes: usize, secs: f64, missed: u64, false_alarms: u64| Outcome {
            nodes,
            train_seconds: secs,
            detect_mpx_s: 100.0 * secs,
            errors: Errors {
                missed,
                unmatched: 1,
                partial: 0,
                false_alarms,
            },
            ..outcome("a", 0.5, 0.5)
        };
        let s = summarise(&[vec![o(100, 2.0, 3, 0)], vec![o(300, 4.0, 4, 1)]]);
        let a = &s.settings[0];
        assert_eq!(
            (a.nodes.mean, a.nodes.min, a.nodes.max),
            (200.0, 100.0, 300.0)
        );
        assert_eq!(a.train_seconds.mean, 3.0);
        assert_eq!(a.detect_mpx_s.mean, 300.0);
        assert_eq!(
            a.errors,
            ErrorMeans {
                missed: 3.5,
                unmatched: 1.0,
                partial: 0.0,
                false_alarms: 0.5
            }
        );
        assert_eq!(ErrorMeans::of(&[]), ErrorMeans::default());
    }

    #[test]
    fn a_paired_comparison_takes_the_spread_of_the_differences() {
        // Student's sleep data (Cushny and Peebles 1905, as "Student", "The
        // probable error of a mean", Biometrika 1908, analysed it; the
        // `sleep` dataset of R's datasets package, values from memory):
        // extra hours of sleep of ten patients under two drugs. The paired
        // differences have mean 1.58 and sample standard deviation 1.230,
        // so a standard error of 0.389 and t = 4.06 on 9 degrees of freedom
        // (R's `t.test(..., paired = TRUE)` on it, from memory); patient 5
        // slept the same under both.
        let one = [0.7, -1.6, -0.2, -1.2, -0.1, 3.4, 3.7, 0.8, 0.0, 2.0];
        let two = [1.9, 0.8, 1.1, 0.1, -0.1, 4.4, 5.5, 1.6, 4.6, 3.4];
        let pairs: Vec<(f64, f64)> = one.iter().copied().zip(two).collect();
        let p = PairedSpread::of(&pairs);
        assert!(
            (p.difference.mean - 1.58).abs() < 1e-12,
            "{}",
            p.difference.mean
        );
        assert!(
            (p.difference.sd - 1.229995).abs() < 1e-6,
            "{}",
            p.difference.sd
        );
        assert!(
            (p.difference.se - 0.3889587).abs() < 1e-6,
            "{}",
            p.difference.se
        );
        assert!((p.difference.mean / p.difference.se - 4.062128).abs() < 1e-5);
        assert_eq!((p.gains, p.losses), (9, 0));
        assert!((p.base.mean - 0.75).abs() < 1e-12);
        assert!((p.compared.mean - 2.33).abs() < 1e-12);
        // The unpaired standard errors are larger: the patients' own spread
        // is in them, and the pairing takes it out.
        let unpaired = (p.base.se.powi(2) + p.compared.se.powi(2)).sqrt();
        assert!(unpaired > 2.0 * p.difference.se, "{unpaired}");
    }

    #[test]
    fn a_comparison_pairs_each_draw_and_setting_with_its_own() {
        let o = |name: &str, f: f64| outcome(name, f, f);
        let base = vec![
            vec![o("a", 0.5), o("b", 0.7)],
            vec![o("a", 0.6), o("b", 0.9)],
        ];
        // The compared side lists its settings in another order, and has a
        // third draw with no base to pair with.
        let compared = vec![
            vec![o("b", 0.6), o("a", 0.7)],
            vec![o("b", 0.9), o("a", 0.7)],
            vec![o("a", 1.0), o("b", 1.0)],
        ];
        let c = compare(&base, &compared);
        assert_eq!(c.draws, 2);
        assert_eq!(c.settings[0].setting, "a");
        let a = &c.settings[0].object_f1;
        assert!((a.difference.mean - 0.15).abs() < 1e-12);
        assert_eq!((a.gains, a.losses), (2, 0));
        let b = &c.settings[1].object_f1;
        assert!((b.difference.mean + 0.05).abs() < 1e-12);
        assert_eq!((b.gains, b.losses), (0, 1));
        // Macro per draw: base 0.6, 0.75; compared 0.65, 0.8.
        let m = &c.macro_object_f1;
        assert!((m.difference.mean - 0.05).abs() < 1e-12);
        assert!(m.difference.sd < 1e-12);
        assert_eq!((m.gains, m.losses), (2, 0));
        assert_eq!(compare(&[], &compared).draws, 0);
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
