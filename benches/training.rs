//! Training benchmark and quality check: `cargo bench --bench training`.
//!
//! Generates seeded loom frames in memory (no files), trains with the
//! default parameters, and reports the median wall time of each stage over
//! several runs, plus the object and pixel F1 on separately seeded test
//! frames, for the standard and the alternate loom settings. Medians, not
//! means: the machine is shared and noisy.

use std::time::Instant;

use treeline::evaluate::{self, Settings};
use treeline::learn::{self, LabelledFrame, Stage, TrainParams};
use treeline::score::{self, Scores};
use treeline::synth::{self, LoomParams};

fn frames(p: &LoomParams, seed: u64, n: usize) -> Vec<LabelledFrame> {
    (0..n)
        .map(|i| {
            let f = synth::generate(p, seed.wrapping_mul(1_000_003).wrapping_add(i as u64));
            LabelledFrame {
                name: format!("f{i:04}"),
                frame: f.frame,
                mask: f.mask,
            }
        })
        .collect()
}

fn median(v: &mut [f64]) -> f64 {
    v.sort_by(f64::total_cmp);
    v[v.len() / 2]
}

fn main() {
    let runs: usize = std::env::var("TREELINE_BENCH_RUNS")
        .ok()
        .and_then(|s| s.parse().ok())
        .unwrap_or(5);
    let train_frames: usize = std::env::var("TREELINE_BENCH_FRAMES")
        .ok()
        .and_then(|s| s.parse().ok())
        .unwrap_or(30);
    for (name, p) in [("standard", LoomParams::standard()), ("alternate", LoomParams::alternate())] {
        let train = frames(&p, 1, train_frames);
        let test = frames(&p, 2, 30);
        let params = TrainParams {
            refit: std::env::var("TREELINE_BENCH_REFIT").is_ok_and(|v| v == "1"),
            max_depth: std::env::var("TREELINE_BENCH_DEPTH").ok().and_then(|v| v.parse().ok()).unwrap_or(TrainParams::default().max_depth),
            ..TrainParams::default()
        };
        let mut total = Vec::new();
        let mut stages: Vec<Vec<f64>> = vec![Vec::new(); 4];
        let mut model = None;
        for _ in 0..runs {
            let t0 = Instant::now();
            let mut marks = Vec::new();
            let m = learn::train(&train, &params, &mut |s| {
                if !matches!(s, Stage::Store { done, total } if done < total) {
                    marks.push(t0.elapsed().as_secs_f64());
                }
            })
            .expect("training");
            let end = t0.elapsed().as_secs_f64();
            total.push(end);
            marks.push(end);
            // marks: store done, grow start, prune start, tune start, end.
            for k in 0..4 {
                stages[k].push(marks[k + 1] - marks[k.min(marks.len() - 1)]);
            }
            stages[0].last_mut().map(|v| *v = marks[0]);
            model = Some(m);
        }
        let m = model.unwrap();
        let settings = Settings::of(&m);
        let mut s = Scores::default();
        for f in &test {
            let r = evaluate::run(&m.tree, &settings, &f.frame);
            s.pixel.add(&score::pixel_confusion(&r.mask, &f.mask));
            s.object.add(&score::object_confusion(&r.objects, &score::truth_objects(&f.mask)));
        }
        let pixels: u64 = train.iter().map(|f| f.frame.len() as u64).sum();
        println!(
            "{name}: {train_frames} frames ({pixels} px), median of {runs}: train {:.3} s \
             [store {:.3}, grow {:.3}, prune {:.3}, tune {:.3}]; leaves {}, depth {}; \
             test object F1 {:.3} (P {:.3} R {:.3}), pixel F1 {:.3} (P {:.3} R {:.3})",
            median(&mut total),
            median(&mut stages[0]),
            median(&mut stages[1]),
            median(&mut stages[2]),
            median(&mut stages[3]),
            m.tree.leaves(),
            m.tree.depth(),
            s.object.f1(),
            s.object.precision(),
            s.object.recall(),
            s.pixel.f1(),
            s.pixel.precision(),
            s.pixel.recall(),
        );
    }
}
