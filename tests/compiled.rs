//! The compiled evaluator against the reference walker: bit for bit on
//! random trees and frames, on every backend, and on the committed golden
//! case.

use proptest::prelude::*;
use proptest::test_runner::Config as ProptestConfig;

use burlwatch::detect::compile::{self, Backend, Plan, Program, Scratch};
use burlwatch::detect::walker;
use burlwatch::model::{Leaf, Model, Node, Tree};
use burlwatch::window::Window;
use burlwatch::BitFrame;

/// A random tree of the given depth: every split tests a random feature of
/// the window, leaves get random scores. Built breadth-first so children
/// follow their parents, as `Tree::new` requires.
fn random_tree(window: Window, depth: u32, seed: u64, full: bool) -> Tree {
    let mut state = seed | 1;
    let mut next = move || {
        state ^= state << 13;
        state ^= state >> 7;
        state ^= state << 17;
        state
    };
    let mut nodes: Vec<Node> = Vec::new();
    let mut depths = vec![0u32];
    let mut queue = std::collections::VecDeque::from([0usize]);
    nodes.push(Node::Leaf(Leaf {
        counts: [0, 0],
        score: 0.0,
        share: 0.0,
    }));
    while let Some(i) = queue.pop_front() {
        let d = depths[i];
        let split = d < depth && (full || next() % 4 != 0);
        if split {
            let feature = (next() % window.features() as u64) as u8;
            let a = nodes.len();
            for _ in 0..2 {
                nodes.push(Node::Leaf(Leaf {
                    counts: [0, 0],
                    score: 0.0,
                    share: 0.0,
                }));
                depths.push(d + 1);
                queue.push_back(nodes.len() - 1);
            }
            nodes[i] = Node::Split {
                feature,
                if_clear: a as u32,
                if_set: a as u32 + 1,
            };
        } else {
            nodes[i] = Node::Leaf(Leaf {
                counts: [0, 0],
                score: (next() % 1001) as f64 / 1000.0,
                share: 0.0,
            });
        }
    }
    Tree::new(window, nodes).expect("random tree is valid")
}

fn random_frame(w: usize, h: usize, density: f64, seed: u64) -> BitFrame {
    let mut state = seed.wrapping_mul(0x9E37_79B9_7F4A_7C15) | 1;
    BitFrame::from_fn(w, h, |_, _| {
        state ^= state << 13;
        state ^= state >> 7;
        state ^= state << 17;
        (state >> 11) as f64 / (1u64 << 53) as f64 <= density && density > 0.0
    })
}

fn backends() -> Vec<Backend> {
    let mut v = vec![Backend::Portable];
    if Backend::Avx2.available() {
        v.push(Backend::Avx2);
    }
    v
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 48, failure_persistence: None, ..ProptestConfig::default() })]

    /// Compiled mask == walker mask, bit for bit (random trees of depth
    /// 0-14, every window size, thresholds, densities 0 / 0.05 / 0.5 / 1,
    /// sizes around the word width).
    #[test]
    fn compiled_equals_walker(
        size_i in 0usize..5,
        depth in 0u32..15,
        seed in any::<u64>(),
        full in any::<bool>(),
        thr_i in 0usize..5,
        wi in 0usize..7,
        hi in 0usize..5,
        di in 0usize..4,
    ) {
        let window = Window::new([3u8, 5, 7, 9, 11][size_i]).unwrap();
        let tree = random_tree(window, depth, seed, full);
        let threshold = [0.0, 0.25, 0.5, 0.9, 1.0][thr_i];
        let w = [1usize, 2, 63, 64, 65, 130, 300][wi];
        let h = [1usize, 2, 5, 63, 65][hi];
        let density = [0.0, 0.05, 0.5, 1.0][di];
        let frame = random_frame(w, h, density, seed ^ 0x5EED);
        let want = walker::detect(&tree, threshold, &frame);
        let mut scratch = Scratch::default();
        // Every split between walking and selecting, on every backend.
        for plan in [Plan::Auto, Plan::Walk, Plan::Select] {
            let program = Program::compile_with(&tree, threshold, plan);
            for b in backends() {
                let got = program.detect_with(b, &frame, &mut scratch);
                prop_assert_eq!(&got, &want, "{:?}, backend {:?}, {}x{}", plan, b, w, h);
            }
        }
        let program = Program::compile(&tree, threshold);
        // Reusing the scratch for another size gives the same answers.
        let other = random_frame(h, w, density, seed);
        prop_assert_eq!(
            program.detect(&other, &mut scratch),
            walker::detect(&tree, threshold, &other)
        );
    }
}

#[test]
fn wide_frames_and_deep_trees_agree() {
    // One larger case: 1000x70 at densities 0.05 and 0.5, depth 14.
    let window = Window::new(11).unwrap();
    for (k, density) in [0.05, 0.5].into_iter().enumerate() {
        let tree = random_tree(window, 14, 77 + k as u64, true);
        let frame = random_frame(1000, 70, density, 5 + k as u64);
        let mut s = Scratch::default();
        for plan in [Plan::Auto, Plan::Walk, Plan::Select] {
            let program = Program::compile_with(&tree, 0.5, plan);
            for b in backends() {
                assert_eq!(
                    program.detect_with(b, &frame, &mut s),
                    walker::detect(&tree, 0.5, &frame),
                    "{plan:?} {b:?} density {density}"
                );
            }
        }
    }
}

#[test]
fn golden_case_through_every_evaluator() {
    // The committed model and frame (see cli::committed_model_...): the
    // walker, the compiled program on each backend, all give the committed
    // objects.
    let data = crate::util::repo().join("tests").join("data");
    let model =
        Model::from_json(&std::fs::read_to_string(data.join("model-v2.json")).unwrap()).unwrap();
    let frame = burlwatch::fileio::data::read_frame(
        &data.join("golden-0000.pbm"),
        &burlwatch::codec::DecodeLimits::default(),
    )
    .unwrap();
    let want: Vec<burlwatch::record::ObjectRecord> = serde_json::from_str(
        &std::fs::read_to_string(data.join("golden-0000.objects.json")).unwrap(),
    )
    .unwrap();
    let settings = model.settings();
    let records = |r: &burlwatch::detect::FrameResult| -> Vec<burlwatch::record::ObjectRecord> {
        r.objects
            .iter()
            .map(burlwatch::record::ObjectRecord::from_object)
            .collect()
    };
    assert_eq!(records(&walker::run(&model.tree, &settings, &frame)), want);
    let mut s = Scratch::default();
    for plan in [Plan::Auto, Plan::Walk, Plan::Select] {
        let program = Program::compile_with(&model.tree, model.threshold, plan);
        for b in backends() {
            let mask = program.detect_with(b, &frame, &mut s);
            assert_eq!(
                mask,
                walker::detect(&model.tree, model.threshold, &frame),
                "{plan:?} {b:?}"
            );
        }
    }
    let program = Program::compile(&model.tree, model.threshold);
    assert_eq!(
        records(&compile::run(
            &program,
            &model.tree,
            &settings,
            &frame,
            &mut s
        )),
        want
    );
}

#[test]
fn constant_programs() {
    let window = Window::new(3).unwrap();
    let leaf = |score| {
        Tree::new(
            window,
            vec![Node::Leaf(Leaf {
                counts: [0, 0],
                score,
                share: 0.0,
            })],
        )
        .unwrap()
    };
    let frame = random_frame(70, 3, 0.5, 1);
    let mut s = Scratch::default();
    assert_eq!(
        Program::compile(&leaf(0.9), 0.5).detect(&frame, &mut s),
        BitFrame::from_fn(70, 3, |_, _| true)
    );
    assert_eq!(
        Program::compile(&leaf(0.1), 0.5).detect(&frame, &mut s),
        BitFrame::new(70, 3)
    );
}

#[test]
fn no_allocation_per_frame_after_warm_up() {
    // The per-worker scratch is reused: after one frame of a size, further
    // frames of that size allocate nothing, whatever mix of walking and
    // selecting the program uses.
    use crate::reference_images::counting::allocated_by;
    let window = Window::new(11).unwrap();
    for (depth, plan) in [(6u32, Plan::Auto), (14, Plan::Walk), (14, Plan::Select)] {
        let tree = random_tree(window, depth, 99, true);
        let program = Program::compile_with(&tree, 0.5, plan);
        let mut s = Scratch::default();
        let a = random_frame(300, 40, 0.5, 1);
        let b = random_frame(300, 40, 0.3, 2);
        let mut out = BitFrame::new(300, 40);
        for backend in backends() {
            program.detect_into(backend, &a, &mut s, &mut out);
            let ((), bytes) = allocated_by(|| program.detect_into(backend, &b, &mut s, &mut out));
            assert_eq!(
                bytes,
                0,
                "{backend:?}, {} ops (walked, selected: {:?})",
                program.ops(),
                program.strategy()
            );
            assert_eq!(out, walker::detect(&tree, 0.5, &b));
        }
    }
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 32, failure_persistence: None, ..ProptestConfig::default() })]

    /// The whole detection with smoothing: the compiled program and the
    /// word-parallel votes against the walker and the pixel-by-pixel votes
    /// (`walker::run`), mask and objects alike, for every smoothing
    /// training may choose and its extremes (one vote: dilation; all
    /// votes: erosion).
    #[test]
    fn smoothed_detection_equals_the_walkers(
        depth in 0u32..10,
        seed in any::<u64>(),
        wi in 0usize..5,
        hi in 0usize..4,
        si in 0usize..14,
        md in 0u32..4,
        area in 1u32..6,
    ) {
        use burlwatch::detect::smooth::Smoothing;
        use burlwatch::learn::tune::SMOOTHINGS;
        use burlwatch::model::{GroupParams, Settings};
        let window = Window::new(5).unwrap();
        let tree = random_tree(window, depth, seed, false);
        let w = [1usize, 63, 64, 65, 130][wi];
        let h = [1usize, 2, 17, 65][hi];
        let frame = random_frame(w, h, 0.4, seed ^ 0xF00D);
        let mut choices: Vec<Smoothing> = SMOOTHINGS.to_vec();
        choices.extend([
            Smoothing::OFF,
            Smoothing { radius: 1, votes: 9 },
            Smoothing { radius: 2, votes: 1 },
            Smoothing { radius: 2, votes: 25 },
        ]);
        let settings = Settings {
            threshold: 0.5,
            grouping: GroupParams { min_area: area, merge_distance: md },
            smoothing: choices[si],
        };
        let program = Program::compile(&tree, settings.threshold);
        let mut scratch = Scratch::default();
        let got = compile::run(&program, &tree, &settings, &frame, &mut scratch);
        let want = walker::run(&tree, &settings, &frame);
        prop_assert_eq!(&got.mask, &want.mask, "{:?} {}x{}", settings.smoothing, w, h);
        prop_assert_eq!(got.objects, want.objects);
    }
}
