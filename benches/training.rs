//! Training benchmark and quality figures: `cargo bench --bench training`.
//!
//! 1. Speed: training with the default parameters on the first 30 frames of
//!    `demo-frames/train` (256x256, about 2 million labelled pixels); median
//!    wall time of each stage over several runs (the machine is shared and
//!    noisy, so medians, not means). With cross-fitting (the default) the
//!    four trees' stores and growth overlap on two threads: "store" is the
//!    time until the first tree starts growing, "grow" until the last one
//!    is grown and pruned.
//! 2. Label store: time per labelled pixel for 10, 30 and 60 frames (it
//!    should stay flat: building the store is linear in pixels).
//! 3. Quality: a model trained with the defaults on all of
//!    `demo-frames/train`, scored on `demo-frames/test` the way `burlwatch
//!    eval` scores (`score::score_frames`); and the same on a second loom
//!    setting (`alternate`: another thread period, width and noise level)
//!    generated in memory with the same frame counts.
//!
//! Environment: `BURLWATCH_BENCH_RUNS` (default 5) runs for the medians.

use std::path::Path;
use std::time::Instant;

use burlwatch::codec::DecodeLimits;
use burlwatch::detect::Detector;
use burlwatch::learn::store::LabelStore;
use burlwatch::learn::{self, LabelledFrame, Stage, TrainParams};
use burlwatch::score;
use burlwatch::synth::{self, LoomParams};

fn demo(set: &str) -> Vec<LabelledFrame> {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("demo-frames")
        .join(set);
    let folder =
        burlwatch::fileio::data::read_folder(&dir, &DecodeLimits::default(), &mut |_, _| {})
            .expect("demo frames");
    assert!(folder.problems.is_empty(), "{:?}", folder.problems);
    folder.frames
}

/// Frames as `burlwatch generate` writes them (same seeds, same bits).
fn generated(p: &LoomParams, seed: u64, n: usize) -> Vec<LabelledFrame> {
    synth::generate_set(p, seed, n)
        .into_iter()
        .enumerate()
        .map(|(i, f)| LabelledFrame::new(format!("loom-{i:04}"), f.frame, f.mask))
        .collect()
}

fn median(v: &mut [f64]) -> f64 {
    v.sort_by(f64::total_cmp);
    v[v.len() / 2]
}

fn quality(name: &str, train: &[LabelledFrame], test: &[LabelledFrame]) {
    let t0 = Instant::now();
    let m = learn::train(train, &TrainParams::default(), &mut |_| {}).expect("training");
    let secs = t0.elapsed().as_secs_f64();
    let settings = m.settings();
    let detector = Detector::new(m, settings);
    let s = score::score_frames(&detector, test, false, &mut |_, _| {})
        .expect("demo masks match their frames")
        .total;
    let m = detector.model();
    println!(
        "quality {name}: trained on {} frames in {secs:.2} s ({} leaves, depth {}, threshold {:.4}, \
         min_area {}, merge_distance {}); {} test frames: object F1 {:.3} (P {:.3} R {:.3}), \
         pixel F1 {:.3} (P {:.3} R {:.3})",
        train.len(),
        m.tree.leaves(),
        m.tree.depth(),
        m.threshold,
        m.grouping.min_area,
        m.grouping.merge_distance,
        test.len(),
        s.object.f1(),
        s.object.precision(),
        s.object.recall(),
        s.pixel.f1(),
        s.pixel.precision(),
        s.pixel.recall(),
    );
}

fn main() {
    let runs: usize = std::env::var("BURLWATCH_BENCH_RUNS")
        .ok()
        .and_then(|s| s.parse().ok())
        .unwrap_or(5);
    let train = demo("train");
    let test = demo("test");

    // 1. Speed on 30 frames.
    let thirty = &train[..30];
    let pixels: u64 = thirty.iter().map(|f| f.frame.len() as u64).sum();
    let params = TrainParams::default();
    let mut stages: Vec<Vec<f64>> = vec![Vec::new(); 5];
    for _ in 0..runs {
        let t0 = Instant::now();
        let mut marks = [0.0f64; 4];
        learn::train(thirty, &params, &mut |s| {
            let t = t0.elapsed().as_secs_f64();
            match s {
                Stage::Store { .. } => {}
                Stage::Grow => marks[0] = t,
                Stage::OneAtATime { .. } => {}
                Stage::Prune => marks[1] = t,
                Stage::Tune => marks[2] = t,
                Stage::Symmetry(_) => {}
            }
        })
        .expect("training");
        marks[3] = t0.elapsed().as_secs_f64();
        stages[0].push(marks[3]);
        stages[1].push(marks[0]);
        stages[2].push(marks[1] - marks[0]);
        stages[3].push(marks[2] - marks[1]);
        stages[4].push(marks[3] - marks[2]);
    }
    println!(
        "speed: 30 frames of 256x256 ({pixels} labelled pixels), median of {runs}: train {:.3} s \
         = store {:.3} + grow {:.3} + prune {:.3} + tune {:.3}",
        median(&mut stages[0]),
        median(&mut stages[1]),
        median(&mut stages[2]),
        median(&mut stages[3]),
        median(&mut stages[4]),
    );

    // 2. Label store: linear in pixels.
    for n in [10usize, 30, 60] {
        let mut t = Vec::new();
        let mut unique = 0;
        for _ in 0..runs {
            let t0 = Instant::now();
            let mut store = LabelStore::new(params.window);
            for f in &train[..n] {
                store.add_frame(&f.frame, &f.mask).unwrap();
            }
            t.push(t0.elapsed().as_secs_f64());
            unique = store.unique();
        }
        let px = (n * 256 * 256) as f64;
        let med = median(&mut t);
        println!(
            "store: {n} frames, {unique} distinct patterns, median {:.3} s = {:.1} ns per pixel",
            med,
            med / px * 1e9
        );
    }

    // 3. Quality with the defaults.
    quality("standard (demo-frames)", &train, &test);
    let alt = LoomParams::alternate();
    quality(
        "alternate (generated)",
        &generated(&alt, 1, train.len()),
        &generated(&alt, 2, test.len()),
    );
}
