//! `burlwatch bench`: how fast this box runs a model, so a user can tell
//! whether it keeps up with a camera.
//!
//! On one thread, over a seeded loom frame of the requested size (or a
//! given frame file), it measures the compiled evaluator (best backend and
//! the portable one), the reference walker, grouping, and a whole frame as
//! the daemon handles it (decode, detect, group with scores, JSON record).
//! Every figure is the median of several runs after a warm-up run.

use std::path::PathBuf;
use std::time::Instant;

use anyhow::{bail, Context, Result};
use serde::Serialize;

use burlwatch::codec::{self, DecodeLimits};
use burlwatch::detect::compile::{self, Backend, Program, Scratch};
use burlwatch::detect::group;
use burlwatch::detect::walker;
use burlwatch::detect::Detector;
use burlwatch::frame::BitFrame;
use burlwatch::synth::{self, LoomParams};

#[derive(clap::Args, Debug)]
pub struct BenchArgs {
    /// The model file.
    #[arg(long)]
    model: PathBuf,
    /// Frame size WIDTHxHEIGHT of the generated loom frame.
    #[arg(long, default_value = "2048x2048")]
    size: String,
    /// Measure on this frame file instead of a generated one.
    #[arg(long)]
    frame: Option<PathBuf>,
    /// Runs per figure (the median is reported).
    #[arg(long, default_value_t = 9)]
    runs: usize,
    /// Print the figures as JSON.
    #[arg(long)]
    json: bool,
}

#[derive(Serialize)]
struct Report {
    width: usize,
    height: usize,
    model_version: u64,
    tree_nodes: usize,
    program_ops: usize,
    program_levels: usize,
    program_planes: usize,
    /// Ops evaluated top down with skipping, and bottom up by select.
    program_walked_ops: usize,
    program_selected_ops: usize,
    /// Ops a walked block of 2,048 pixels reached on this frame, on
    /// average: what sets the speed of a large tree (0 for a program
    /// evaluated as one select program).
    walk_visits_per_block: f64,
    backend: String,
    cpu_features: Vec<String>,
    compiled_mpx_per_s: f64,
    portable_mpx_per_s: f64,
    walker_mpx_per_s: f64,
    speedup_over_walker: f64,
    detected_pixels: u64,
    objects: usize,
    grouping_ms: f64,
    frame_ms: f64,
    frames_per_s: f64,
}

fn median(mut v: Vec<f64>) -> f64 {
    v.sort_by(f64::total_cmp);
    v[v.len() / 2]
}

fn time(runs: usize, mut f: impl FnMut()) -> f64 {
    f();
    median(
        (0..runs.max(1))
            .map(|_| {
                let t = Instant::now();
                f();
                t.elapsed().as_secs_f64()
            })
            .collect(),
    )
}

fn cpu_features() -> Vec<String> {
    let mut v = Vec::new();
    #[cfg(target_arch = "x86_64")]
    {
        macro_rules! probe {
            ($($f:tt),*) => {$(
                if std::arch::is_x86_feature_detected!($f) {
                    v.push($f.to_string());
                }
            )*};
        }
        probe!("sse2", "sse4.2", "popcnt", "bmi2", "avx2", "avx512f");
    }
    #[cfg(target_arch = "aarch64")]
    {
        if std::arch::is_aarch64_feature_detected!("neon") {
            v.push("neon".to_string());
        }
    }
    v
}

fn parse_size(s: &str) -> Result<(usize, usize)> {
    let (w, h) = s
        .split_once(['x', 'X'])
        .with_context(|| format!("--size {s:?} must be WIDTHxHEIGHT"))?;
    let (w, h): (usize, usize) = (
        w.parse()
            .with_context(|| format!("--size {s:?}: bad width"))?,
        h.parse()
            .with_context(|| format!("--size {s:?}: bad height"))?,
    );
    if !(32..=8192).contains(&w) || !(32..=8192).contains(&h) {
        bail!("--size {s}: width and height must be between 32 and 8192");
    }
    Ok((w, h))
}

pub fn run(a: BenchArgs) -> Result<i32> {
    let m = super::load_model(&a.model)?;
    let frame: BitFrame = match &a.frame {
        Some(p) => burlwatch::fileio::data::read_frame(p, &DecodeLimits::default())
            .map_err(|e| anyhow::anyhow!("{e}"))?,
        None => {
            let (width, height) = parse_size(&a.size)?;
            let p = LoomParams {
                width,
                height,
                ..LoomParams::standard()
            };
            synth::generate(&p, 20261202).frame
        }
    };
    let (w, h) = (frame.width(), frame.height());
    let mpx = (w * h) as f64 / 1e6;
    let settings = m.settings();
    let program = Program::compile(&m.tree, m.threshold);
    let backend = Backend::detect();
    let mut scratch = Scratch::default();
    let mut out = BitFrame::new(w, h);
    let compiled = time(a.runs, || {
        program.detect_into(backend, &frame, &mut scratch, &mut out)
    });
    let reach = scratch.reach();
    let portable = time(a.runs, || {
        program.detect_into(Backend::Portable, &frame, &mut scratch, &mut out)
    });
    let walker_runs = a.runs.clamp(1, 3);
    let mut walked = BitFrame::new(0, 0);
    let walker = time(walker_runs, || {
        walked = walker::detect(&m.tree, m.threshold, &frame)
    });
    if walked != out {
        bail!("internal error: the compiled and reference evaluators disagree on this frame");
    }
    let mut objects = Vec::new();
    let grouping = time(a.runs, || {
        objects = group::group(&out, settings.grouping, |_, _| 1.0)
    });
    let bytes = codec::encode_pbm(&frame);
    let limits = DecodeLimits::default();
    // The whole frame exactly as the daemon's workers handle it.
    let detector = Detector::new(m.clone(), settings);
    let started = Instant::now();
    let mut clock = || {
        (
            std::time::SystemTime::now(),
            started.elapsed().as_secs_f64(),
        )
    };
    let whole = time(a.runs, || {
        let d = detector
            .process("bench.pbm", &bytes, &limits, &mut scratch, &mut clock)
            .expect("own encoding decodes");
        std::hint::black_box(serde_json::to_string(&d.record).expect("record serialises"));
    });
    let (walked, selected) = program.strategy();
    let report = Report {
        width: w,
        height: h,
        model_version: m.model_version,
        tree_nodes: m.tree.nodes().len(),
        program_ops: program.ops(),
        program_levels: program.depth(),
        program_planes: program.planes().len(),
        program_walked_ops: walked,
        program_selected_ops: selected,
        walk_visits_per_block: reach.per_block(),
        backend: backend.name().to_string(),
        cpu_features: cpu_features(),
        compiled_mpx_per_s: mpx / compiled,
        portable_mpx_per_s: mpx / portable,
        walker_mpx_per_s: mpx / walker,
        speedup_over_walker: walker / compiled,
        detected_pixels: out.count_set(),
        objects: objects.len(),
        grouping_ms: grouping * 1e3,
        frame_ms: whole * 1e3,
        frames_per_s: 1.0 / whole,
    };
    if a.json {
        out!("{}", serde_json::to_string_pretty(&report)?);
        return Ok(0);
    }
    out!(
        "frame {}x{} ({:.2} Mpx), model version {}: {} nodes -> {} ops on {} levels, {} shifted planes \
         ({} ops walked, {} selected)",
        w,
        h,
        mpx,
        report.model_version,
        report.tree_nodes,
        report.program_ops,
        report.program_levels,
        report.program_planes,
        report.program_walked_ops,
        report.program_selected_ops
    );
    if reach.blocks > 0 {
        out!(
            "walk: each block of {} pixels reached {:.1} ops on average ({:.3} per pixel of the frame)",
            compile::BLOCK * 64,
            report.walk_visits_per_block,
            reach.visits as f64 / (w * h) as f64
        );
    } else if program.ops() > 0 {
        out!("walk: none, every op runs on every pixel (one select program)");
    } else {
        out!("walk: none, the model decides every pixel alike (no ops)");
    }
    out!(
        "cpu features: {}; backend used: {}",
        report.cpu_features.join(" "),
        report.backend
    );
    out!(
        "compiled      {:>9.1} Mpx/s  ({:.2} ms)",
        report.compiled_mpx_per_s,
        compiled * 1e3
    );
    out!(
        "portable      {:>9.1} Mpx/s  ({:.2} ms)",
        report.portable_mpx_per_s,
        portable * 1e3
    );
    out!(
        "walker        {:>9.1} Mpx/s  ({:.2} ms)   compiled is {:.1}x faster",
        report.walker_mpx_per_s,
        walker * 1e3,
        report.speedup_over_walker
    );
    out!(
        "grouping      {:>9.3} ms     ({} detected pixels, {} objects)",
        report.grouping_ms,
        report.detected_pixels,
        report.objects
    );
    out!(
        "whole frame   {:>9.3} ms     (decode + detect + group + record) = {:.0} frames/s on one thread",
        report.frame_ms,
        report.frames_per_s
    );
    out!(
        "medians of {} runs ({} for the walker), one thread",
        a.runs,
        walker_runs
    );
    Ok(0)
}
