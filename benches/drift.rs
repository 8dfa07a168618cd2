//! Drift monitor benchmark: `cargo bench --bench drift`.
//!
//! What the drift monitors add to the daemon's per-frame work, against the
//! detection step itself, on 512x512 frames of the standard weave (40
//! distinct frames, generated here) with the default demo model (trained
//! here on `demo-frames/train`) and the default monitor settings. One
//! thread, all in one process:
//! 1. the detection step as a worker runs it (`Detector::process`: decode,
//!    detect, group, record), without the monitors (A) and with them (B):
//!    the worker's `drift::frame_stats` (2x2 patterns on about one row
//!    pair in 8, the default number of sampled pixels (32) walked down the
//!    tree, the detected pixels) and the writer's `Monitors::frame` under
//!    its lock, plus the monitors' state saved as JSON once every 500
//!    frames (measured on its own and added as a 500th). Rounds alternate
//!    A and B over the same frames (which goes first alternates too); each round gives the mean time per frame of
//!    each, and the figures are the medians over the rounds. The monitors
//!    are warmed up first (windows full, output levels learnt), as they are
//!    in a daemon that has been running a while.
//! 2. each part of that on its own (medians of per-round means), and, for
//!    comparison, the 2x2 pattern count over every row of the frame.
//!
//! The target: all monitors together under 2% of the detection step.
//!
//! Environment: `BURLWATCH_BENCH_ROUNDS` (default 25).

use std::path::Path;
use std::sync::Mutex;
use std::time::{Instant, SystemTime};

mod support;
use support::percentile;

use burlwatch::codec::{self, DecodeLimits};
use burlwatch::detect::compile::Scratch;
use burlwatch::detect::Detector;
use burlwatch::drift::{self, FrameStats, LeafGroups};
use burlwatch::frame::BitFrame;
use burlwatch::learn::{self, TrainParams};
use burlwatch::monitor::{ModelRef, MonitorSettings, Monitors};
use burlwatch::synth::{self, LoomParams};

/// Base seed of the benchmark's frames (no other set uses it).
const SEED: u64 = 91_000_000;
/// Distinct frames per round.
const FRAMES: usize = 40;
/// The writer saves the monitors at least once in this many frames.
const SAVE_FRAMES: f64 = 500.0;

fn median(v: &[f64]) -> f64 {
    percentile(&mut v.to_vec(), 0.5)
}

/// Mean seconds per call of `f(i)` over `i` in `0..n`.
fn per_call(n: usize, mut f: impl FnMut(usize)) -> f64 {
    let t = Instant::now();
    for i in 0..n {
        f(i);
    }
    t.elapsed().as_secs_f64() / n as f64
}

/// Median over `rounds` of the mean seconds per call of `f` on each of
/// the frames, after one untimed call.
fn part(rounds: usize, mut f: impl FnMut(usize)) -> f64 {
    f(0);
    let v: Vec<f64> = (0..rounds).map(|_| per_call(FRAMES, &mut f)).collect();
    median(&v)
}

fn main() {
    let rounds: usize = std::env::var("BURLWATCH_BENCH_ROUNDS")
        .ok()
        .and_then(|s| s.parse().ok())
        .unwrap_or(25)
        .max(1);
    let repo = Path::new(env!("CARGO_MANIFEST_DIR"));
    let folder = burlwatch::fileio::data::read_folder(
        &repo.join("demo-frames/train"),
        &DecodeLimits::default(),
        &mut |_, _| {},
    )
    .expect("demo frames");
    let model = learn::train(&folder.frames, &TrainParams::default(), &mut |_| {}).expect("train");
    let det = Detector::new(model.clone(), model.settings());
    let tree = &model.tree;
    let groups = LeafGroups::new(tree);
    let settings = MonitorSettings::default();
    let samples = settings.samples;
    let limits = DecodeLimits::default();

    let params = LoomParams {
        width: 512,
        height: 512,
        ..LoomParams::standard()
    };
    let files: Vec<(String, Vec<u8>)> = (0..FRAMES)
        .map(|i| {
            let f = synth::generate(&params, synth::frame_seed(SEED, i)).frame;
            (format!("drift{i:03}.pbm"), codec::encode_pbm(&f))
        })
        .collect();

    let mut scratch = Scratch::default();
    let started = Instant::now();
    let mut clock = || (SystemTime::now(), started.elapsed().as_secs_f64());

    // The decoded frames, their masks, objects and statistics, for the
    // parts on their own and to warm the monitors up.
    let mut frames: Vec<BitFrame> = Vec::new();
    let mut detected: Vec<u64> = Vec::new();
    let mut objects: Vec<usize> = Vec::new();
    for (name, bytes) in &files {
        let d = det
            .process(name, bytes, &limits, &mut scratch, &mut clock)
            .expect("decodes");
        objects.push(d.record.objects.len());
        frames.push(d.frame);
        detected.push(d.result.objects.iter().map(|o| o.area).sum());
    }
    let stats: Vec<FrameStats> = (0..FRAMES)
        .map(|i| drift::frame_stats(tree, &groups, &frames[i], detected[i], i as u64, samples))
        .collect();
    let hash = det.hash().to_string();
    let mut warm = Monitors::new(settings.clone(), ModelRef::of(&det));
    let mut seq = 0u64;
    let mut alerts = 0usize;
    for _ in 0..5 {
        for i in 0..FRAMES {
            alerts += warm
                .frame(&stats[i], objects[i], &hash, SystemTime::now())
                .len();
            seq += 1;
        }
    }
    let monitors = Mutex::new(warm.clone());

    // 1. A (without) and B (with), interleaved.
    let mut run_a = |scratch: &mut Scratch| {
        per_call(FRAMES, |i| {
            let (name, bytes) = &files[i];
            let d = det
                .process(name, bytes, &limits, scratch, &mut clock)
                .expect("decodes");
            std::hint::black_box(&d);
        })
    };
    let mut clock_b = || (SystemTime::now(), started.elapsed().as_secs_f64());
    let mut run_b = |scratch: &mut Scratch, seq: &mut u64, alerts: &mut usize| {
        per_call(FRAMES, |i| {
            let (name, bytes) = &files[i];
            let d = det
                .process(name, bytes, &limits, scratch, &mut clock_b)
                .expect("decodes");
            // The worker, beside detection.
            let s = drift::frame_stats(
                tree,
                &groups,
                &d.frame,
                d.result.objects.iter().map(|o| o.area).sum(),
                *seq,
                samples,
            );
            *seq += 1;
            std::hint::black_box(&d);
            // The writer's sink.
            let raised = monitors.lock().unwrap().frame(
                &s,
                d.record.objects.len(),
                &d.record.model_hash,
                SystemTime::now(),
            );
            *alerts += raised.len();
            std::hint::black_box(raised);
        })
    };
    // One round of each first, untimed.
    run_a(&mut scratch);
    run_b(&mut scratch, &mut seq, &mut alerts);
    let (mut a, mut b, mut paired) = (Vec::new(), Vec::new(), Vec::new());
    for r in 0..rounds {
        let (ta, tb) = if r % 2 == 0 {
            let ta = run_a(&mut scratch);
            (ta, run_b(&mut scratch, &mut seq, &mut alerts))
        } else {
            let tb = run_b(&mut scratch, &mut seq, &mut alerts);
            (run_a(&mut scratch), tb)
        };
        a.push(ta);
        b.push(tb);
        paired.push(tb - ta);
    }

    // 2. The parts on their own.
    let mut n = 0u64;
    let stats_total = part(rounds, |i| {
        n += 1;
        std::hint::black_box(drift::frame_stats(
            tree,
            &groups,
            &frames[i],
            detected[i],
            n,
            samples,
        ));
    });
    // A new draw of rows for every frame, as the daemon's.
    let mut n = 0;
    let rows = part(rounds, |i| {
        n += 1;
        std::hint::black_box(drift::pattern_histogram_rows(
            &frames[i],
            drift::PATTERN_ROW_STEP,
            n,
        ));
    });
    let mut n = 0u64;
    let leaves = part(rounds, |i| {
        n += 1;
        std::hint::black_box(groups.sample(tree, &frames[i], samples, n));
    });
    let mut objects_of = Vec::new();
    for (name, bytes) in &files {
        let d = det
            .process(name, bytes, &limits, &mut scratch, &mut clock)
            .expect("decodes");
        objects_of.push(d.result.objects);
    }
    let count = part(rounds, |i| {
        std::hint::black_box(objects_of[i].iter().map(|o| o.area).sum::<u64>());
    });
    let mut sink = warm.clone();
    let sink_frame = part(rounds, |i| {
        std::hint::black_box(sink.frame(&stats[i], objects[i], &hash, SystemTime::now()));
    });
    let full = part(rounds, |i| {
        std::hint::black_box(drift::pattern_histogram(&frames[i]));
    });
    let saved = monitors.lock().unwrap().clone();
    let json_text = serde_json::to_string(&saved).expect("monitors serialise");
    let json_runs: Vec<f64> = (0..rounds.max(9))
        .map(|_| {
            per_call(1, |_| {
                let m = monitors.lock().unwrap().clone();
                std::hint::black_box(serde_json::to_string(&m).expect("monitors serialise"));
            })
        })
        .collect();
    let json = median(&json_runs);

    let us = 1e6;
    let (ma, mb) = (median(&a), median(&b) + json / SAVE_FRAMES);
    let diff = mb - ma;
    let pct = |x: f64| 100.0 * x / ma;
    let parts_sum = stats_total + sink_frame + json / SAVE_FRAMES;
    println!(
        "drift monitors on 512x512 frames: {FRAMES} frames x {rounds} rounds per variant, \
         medians of per-round means (microseconds per frame)"
    );
    let row = |label: &str, t: f64| {
        println!("  {label:<58} {:>9.2} us {:>7.2}%", t * us, pct(t));
    };
    println!("  {:<58} {:>12} {:>8}", "", "time", "of A");
    row("A  detection step (decode, detect, group, record)", ma);
    row("B  the same with the monitors", mb);
    row("B - A", diff);
    row(
        "B - A, median of paired per-round differences",
        median(&paired) + json / SAVE_FRAMES,
    );
    println!("  parts:");
    row("frame_stats (worker), total", stats_total);
    row("  1-in-8 row 2x2 pattern histogram", rows);
    row(&format!("  leaf group sample, {samples} pixels"), leaves);
    row("  detected pixels (sum of the objects' areas)", count);
    row("Monitors::frame (writer)", sink_frame);
    row(
        &format!("monitors to JSON ({} bytes), once", json_text.len()),
        json,
    );
    row("  the same per frame (once in 500)", json / SAVE_FRAMES);
    row("sum of the parts", parts_sum);
    row("for comparison: full-frame 2x2 pattern histogram", full);
    println!(
        "  spread over rounds (p10-p90): A {:.1}-{:.1} us, B {:.1}-{:.1} us; \
         alerts raised during the run: {alerts}",
        percentile(&mut a.clone(), 0.1) * us,
        percentile(&mut a.clone(), 0.9) * us,
        percentile(&mut b.clone(), 0.1) * us,
        percentile(&mut b.clone(), 0.9) * us
    );
    println!(
        "monitors cost: {:.1}% of the detection step (A = {:.1} us, B = {:.1} us per 512x512 frame; \
         sum of the parts {:.1}%)",
        pct(diff),
        ma * us,
        mb * us,
        pct(parts_sum)
    );
}
