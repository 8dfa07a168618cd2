//! Evaluation benchmark: `cargo bench --bench evaluate`.
//!
//! One thread, medians of several runs after a warm-up, all in one process
//! so ratios compare like with like:
//! 1. a 2048x2048 frame of the demo texture through a seeded random tree of
//!    depth 10 (about 600 nodes): compiled (best backend and portable) and
//!    the reference walker;
//! 2. the same for the default demo model (trained here on
//!    `demo-frames/train`);
//! 3. grouping a 2048x2048 mask of realistic sparse detections (the demo
//!    model's own detections on that frame);
//! 4. a whole 512x512 scan as `burlwatch scan` does it: decode, detect,
//!    group with scores, JSON record.
//!
//! Environment: `BURLWATCH_BENCH_RUNS` (default 9).

use std::path::Path;
use std::time::Instant;

use burlwatch::codec::{self, DecodeLimits};
use burlwatch::detect::compile::{Backend, Program, Scratch};
use burlwatch::detect::group::{self, GroupParams};
use burlwatch::detect::walker;
use burlwatch::detect::Detector;
use burlwatch::detect::Settings;
use burlwatch::frame::BitFrame;
use burlwatch::learn::{self, TrainParams};
use burlwatch::model::{Leaf, Node, Tree};
use burlwatch::synth::{self, LoomParams};
use burlwatch::window::Window;

fn median(mut v: Vec<f64>) -> f64 {
    v.sort_by(f64::total_cmp);
    v[v.len() / 2]
}

fn time(runs: usize, mut f: impl FnMut()) -> f64 {
    f();
    median(
        (0..runs)
            .map(|_| {
                let t = Instant::now();
                f();
                t.elapsed().as_secs_f64()
            })
            .collect(),
    )
}

/// A seeded random tree of depth 10: each node above depth 10 splits with
/// probability 17/20 (the root always), which gives about 600 nodes, on a random feature of the 11x11
/// window; leaf scores uniform.
fn random_tree(seed: u64) -> Tree {
    let window = Window::default();
    let mut rng = synth::Rng::new(seed);
    let mut nodes = vec![Node::Leaf(Leaf {
        counts: [0, 0],
        score: 0.0,
        share: 0.0,
    })];
    let mut depth = vec![0u32];
    let mut queue = std::collections::VecDeque::from([0usize]);
    while let Some(i) = queue.pop_front() {
        if depth[i] < 10 && (i == 0 || rng.range(0, 20) < 17) {
            let a = nodes.len();
            for _ in 0..2 {
                nodes.push(Node::Leaf(Leaf {
                    counts: [0, 0],
                    score: 0.0,
                    share: 0.0,
                }));
                depth.push(depth[i] + 1);
                queue.push_back(nodes.len() - 1);
            }
            nodes[i] = Node::Split {
                feature: rng.range(0, window.features()) as u8,
                if_clear: a as u32,
                if_set: a as u32 + 1,
            };
        } else {
            nodes[i] = Node::Leaf(Leaf {
                counts: [0, 0],
                score: rng.uniform(),
                share: 0.0,
            });
        }
    }
    Tree::new(window, nodes).expect("valid tree")
}

fn evaluators(name: &str, tree: &Tree, threshold: f64, frame: &BitFrame, runs: usize) {
    let mpx = frame.len() as f64 / 1e6;
    let program = Program::compile(tree, threshold);
    let mut scratch = Scratch::default();
    let mut out = BitFrame::new(frame.width(), frame.height());
    let best = Backend::detect();
    let compiled = time(runs, || {
        program.detect_into(best, frame, &mut scratch, &mut out)
    });
    let reach = scratch.reach();
    let portable = time(runs, || {
        program.detect_into(Backend::Portable, frame, &mut scratch, &mut out)
    });
    let mut walked = BitFrame::new(0, 0);
    let walker = time(3, || walked = walker::detect(tree, threshold, frame));
    assert_eq!(walked, out, "compiled and walker disagree");
    println!(
        "{name}: {} nodes -> {} ops ({} levels; walked, selected: {:?}; {}); \
         {:.0} Mpx/s compiled ({}), {:.0} Mpx/s portable, {:.1} Mpx/s walker; compiled / walker = {:.1}x",
        tree.nodes().len(),
        program.ops(),
        program.depth(),
        program.strategy(),
        if reach.blocks > 0 {
            format!("{:.1} ops reached per walked block", reach.per_block())
        } else {
            "no walk".to_string()
        },
        mpx / compiled,
        best.name(),
        mpx / portable,
        mpx / walker,
        walker / compiled
    );
}

fn main() {
    let runs: usize = std::env::var("BURLWATCH_BENCH_RUNS")
        .ok()
        .and_then(|s| s.parse().ok())
        .unwrap_or(9);
    let big = synth::generate(
        &LoomParams {
            width: 2048,
            height: 2048,
            ..LoomParams::standard()
        },
        2026,
    )
    .frame;

    // 1. Random depth-10 tree.
    let tree = random_tree(10);
    evaluators("random depth-10 tree, 2048x2048", &tree, 0.5, &big, runs);

    // 2. The demo model.
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-frames/train");
    let folder =
        burlwatch::fileio::data::read_folder(&dir, &DecodeLimits::default(), &mut |_, _| {})
            .expect("demo frames");
    let model = learn::train(&folder.frames, &TrainParams::default(), &mut |_| {}).expect("train");
    evaluators(
        "demo model, 2048x2048",
        &model.tree,
        model.threshold,
        &big,
        runs,
    );

    // 3. Grouping realistic sparse detections.
    let program = Program::compile(&model.tree, model.threshold);
    let mut scratch = Scratch::default();
    let mask = program.detect(&big, &mut scratch);
    let mut n = 0;
    let grouping = time(runs, || {
        n = group::group(&mask, model.grouping, |_, _| 1.0).len();
    });
    let merged = GroupParams {
        merge_distance: 6,
        ..model.grouping
    };
    let grouping6 = time(runs, || {
        std::hint::black_box(group::group(&mask, merged, |_, _| 1.0));
    });
    println!(
        "grouping 2048x2048, {} detected pixels -> {n} objects: {:.3} ms (merge distance {}), \
         {:.3} ms (merge distance 6)",
        mask.count_set(),
        grouping * 1e3,
        model.grouping.merge_distance,
        grouping6 * 1e3
    );

    // 4. Whole 512x512 scan.
    let small = synth::generate(
        &LoomParams {
            width: 512,
            height: 512,
            ..LoomParams::standard()
        },
        512,
    )
    .frame;
    let bytes = codec::encode_pbm(&small);
    let limits = DecodeLimits::default();
    let settings = Settings::of(&model);
    let detector = Detector::new(model, settings);
    let started = Instant::now();
    let mut clock = || {
        (
            std::time::SystemTime::now(),
            started.elapsed().as_secs_f64(),
        )
    };
    let whole = time(runs * 5, || {
        let d = detector
            .process("bench.pbm", &bytes, &limits, &mut scratch, &mut clock)
            .expect("decodes");
        std::hint::black_box(serde_json::to_string(&d.record).expect("serialises"));
    });
    println!(
        "whole scan of a 512x512 frame with the demo model (decode + detect + group + JSON): {:.3} ms",
        whole * 1e3
    );
}
