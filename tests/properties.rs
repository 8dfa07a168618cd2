//! Property tests of the invariants the detector relies on: the label store
//! counts exactly the labelled pixels and merges order-independently, the
//! fast window extraction equals the pixel-by-pixel reference, and a trained
//! tree only ever scores pixels in [0, 1].
//!
//! Every property runs a fixed number of cases from a fixed seed, so a run
//! is repeatable and no failure files are written.

use std::collections::HashMap;

use proptest::collection::vec;
use proptest::prelude::*;
use proptest::sample::select;
use proptest::test_runner::RngSeed;

use burlwatch::detect::walker;
use burlwatch::frame::BitFrame;
use burlwatch::learn::grow::{grow, GrowParams};
use burlwatch::learn::prune::prune_sequence;
use burlwatch::learn::store::{Counts, LabelStore};
use burlwatch::learn::{self, ClassWeight, Criterion, LabelledFrame, TrainParams};
use burlwatch::model::{Model, Node};
use burlwatch::window::{self, Window};

fn config(cases: u32, seed: u64) -> ProptestConfig {
    ProptestConfig {
        cases,
        rng_seed: RngSeed::Fixed(seed),
        failure_persistence: None,
        ..ProptestConfig::default()
    }
}

/// A frame of the given size with random pixels of a random density.
fn frame_of(w: usize, h: usize) -> impl Strategy<Value = BitFrame> {
    (0.0..=1.0f64)
        .prop_flat_map(move |d| vec(prop::bool::weighted(d), w * h))
        .prop_map(move |bits| BitFrame::from_fn(w, h, |x, y| bits[y * w + x]))
}

/// A frame and a target mask of the same size, 1..40 x 1..40 pixels.
fn frame_and_mask(max: usize) -> impl Strategy<Value = (BitFrame, BitFrame)> {
    (1..max, 1..max).prop_flat_map(|(w, h)| (frame_of(w, h), frame_of(w, h)))
}

fn any_window() -> impl Strategy<Value = Window> {
    select(vec![3u8, 5, 7, 9, 11]).prop_map(|s| Window::new(s).unwrap())
}

fn any_criterion() -> impl Strategy<Value = Criterion> {
    select(vec![
        Criterion::Gini,
        Criterion::Entropy,
        Criterion::GainRatio,
    ])
}

fn sum(entries: &[(u128, Counts)]) -> Counts {
    entries
        .iter()
        .fold([0, 0], |a, (_, c)| [a[0] + c[0], a[1] + c[1]])
}

fn store_of(window: Window, frames: &[&(BitFrame, BitFrame)]) -> LabelStore {
    let mut s = LabelStore::new(window);
    for (f, m) in frames {
        s.add_frame(f, m).unwrap();
    }
    s
}

proptest! {
    #![proptest_config(config(32, 0x7ee_11e1))]

    #[test]
    fn store_counts_are_the_labelled_pixels((frame, mask) in frame_and_mask(40), window in any_window()) {
        let mut store = LabelStore::new(window);
        store.add_frame(&frame, &mask).unwrap();
        let target = mask.count_set();
        let pixels = frame.len() as u64;
        prop_assert_eq!(store.totals(), [pixels - target, target]);
        let entries = store.entries();
        prop_assert_eq!(sum(&entries), store.totals());
        prop_assert_eq!(store.frames(), 1);
        // Recount every pixel's pattern the slow way: the store must hold
        // exactly these patterns with exactly these counts.
        let mut want: HashMap<u128, Counts> = HashMap::new();
        for y in 0..frame.height() {
            for x in 0..frame.width() {
                let p = window.pattern_at(&frame, x, y);
                want.entry(p).or_insert([0, 0])[usize::from(mask.get(x, y))] += 1;
            }
        }
        prop_assert_eq!(entries.len(), want.len());
        prop_assert_eq!(store.unique(), want.len());
        for (i, (p, c)) in entries.iter().enumerate() {
            prop_assert_eq!(want.get(p), Some(c), "pattern {:#x}", p);
            prop_assert!(c[0] + c[1] > 0);
            prop_assert!(window.features() == 128 || p >> window.features() == 0);
            prop_assert!(i == 0 || entries[i - 1].0 < *p, "entries ascending");
            prop_assert_eq!(store.get(*p), Some(*c));
        }
    }

    #[test]
    fn merging_stores_does_not_depend_on_order(
        a in frame_and_mask(24),
        b in frame_and_mask(24),
        c in frame_and_mask(24),
        window in select(vec![3u8, 5, 11]).prop_map(|s| Window::new(s).unwrap()),
    ) {
        let (sa, sb, sc) = (store_of(window, &[&a]), store_of(window, &[&b]), store_of(window, &[&c]));
        let merged = |order: [&LabelStore; 3]| {
            let mut s = LabelStore::new(window);
            for x in order {
                s.merge(x).unwrap();
            }
            s
        };
        let abc = merged([&sa, &sb, &sc]);
        prop_assert_eq!(&abc, &merged([&sc, &sb, &sa]));
        prop_assert_eq!(&abc, &merged([&sb, &sc, &sa]));
        // Merging into an existing store, and adding the frames directly.
        let mut ab = sa.clone();
        ab.merge(&sb).unwrap();
        ab.merge(&sc).unwrap();
        prop_assert_eq!(&abc, &ab);
        let direct = store_of(window, &[&c, &a, &b]);
        prop_assert_eq!(&abc, &direct);
        prop_assert_eq!(abc.frames(), 3);
        prop_assert_eq!(sum(&abc.entries()), abc.totals());
        // Equal stores write equal bytes, and the bytes read back.
        let bytes = abc.to_bytes();
        prop_assert_eq!(&bytes, &direct.to_bytes());
        let back = LabelStore::from_bytes(&bytes).unwrap();
        prop_assert_eq!(&back, &abc);
        prop_assert_eq!(back.to_bytes(), bytes);
    }

    #[test]
    fn row_patterns_equal_pixel_patterns(
        frame in (1usize..140, 1usize..12).prop_flat_map(|(w, h)| frame_of(w, h)),
        window in any_window(),
    ) {
        let mut rows = 0;
        window::for_each_row(&frame, window, |y, pats| {
            assert_eq!(y, rows, "rows in order");
            rows += 1;
            assert_eq!(pats.len(), frame.width());
            for (x, &p) in pats.iter().enumerate() {
                assert_eq!(p, window.pattern_at(&frame, x, y), "{}x{} at ({x},{y})", window.size(), window.size());
            }
        });
        prop_assert_eq!(rows, frame.height());
    }
}

/// A leaf-free-of-surprises check of a frozen tree on some frames: every
/// leaf score and every pixel score lies in [0, 1].
fn check_scores(tree: &burlwatch::model::Tree, frames: &[&BitFrame]) -> Result<(), TestCaseError> {
    for n in tree.nodes() {
        if let Node::Leaf(l) = n {
            prop_assert!((0.0..=1.0).contains(&l.score), "leaf score {}", l.score);
            prop_assert!((0.0..=1.0).contains(&l.share), "leaf share {}", l.share);
        }
    }
    for f in frames {
        for y in 0..f.height() {
            for x in 0..f.width() {
                let s = walker::score_at(tree, f, x, y);
                prop_assert!((0.0..=1.0).contains(&s), "score {} at ({},{})", s, x, y);
            }
        }
    }
    Ok(())
}

fn class_weight() -> impl Strategy<Value = ClassWeight> {
    prop_oneof![
        Just(ClassWeight::None),
        Just(ClassWeight::Balanced),
        (-3.0..3.0f64, -3.0..3.0f64)
            .prop_map(|(a, b)| ClassWeight::Explicit([10f64.powf(a), 10f64.powf(b)])),
    ]
}

proptest! {
    #![proptest_config(config(24, 0x5c0_4e5))]

    #[test]
    fn grown_and_frozen_trees_score_within_zero_and_one(
        (frame, mask) in frame_and_mask(24),
        window in select(vec![3u8, 5]).prop_map(|s| Window::new(s).unwrap()),
        criterion in any_criterion(),
        weight in class_weight(),
        max_depth in 0u32..12,
        alpha_pick in 0.0..1.0f64,
    ) {
        let mut store = LabelStore::new(window);
        store.add_frame(&frame, &mask).unwrap();
        let weights = weight.weights(store.totals());
        let mut entries = store.entries();
        let gp = GrowParams {
            criterion,
            max_depth,
            min_leaf: 1.0,
            min_gain: 0.0,
            weights,
            max_nodes: 1 << 16,
        };
        let t = grow(&mut entries, window.features(), &gp);
        prop_assert!(t.nodes.iter().all(|n| n.depth <= max_depth));
        let pruning = prune_sequence(&t, criterion, weights);
        let k = ((pruning.alphas.len() as f64 * alpha_pick) as usize).min(pruning.alphas.len() - 1);
        let alpha = pruning.alphas[k];
        let tree = learn::freeze(&t, &pruning, alpha, window, weights).unwrap();
        prop_assert_eq!(tree.leaves(), pruning.leaves_at(&t, alpha));
        check_scores(&tree, &[&frame])?;
    }

    #[test]
    fn trained_models_score_within_zero_and_one_and_reload(
        frames in vec(frame_and_mask(20), 1..4),
        window in select(vec![3u8, 5]).prop_map(|s| Window::new(s).unwrap()),
        criterion in any_criterion(),
        weight in class_weight(),
        max_depth in 1u32..16,
        holdout in select(vec![0.0, 0.4]),
    ) {
        // Every mask gets at least one target pixel, so whichever frames the
        // holdout split leaves for growing, there is something to learn.
        let labelled: Vec<LabelledFrame> = frames
            .into_iter()
            .enumerate()
            .map(|(i, (frame, mut mask))| {
                mask.set(0, 0, true);
                LabelledFrame::new(format!("f{i}.pbm"), frame, mask)
            })
            .collect();
        let p = TrainParams {
            window,
            criterion,
            max_depth,
            class_weight: weight,
            holdout,
            ..TrainParams::default()
        };
        let model = learn::train(&labelled, &p, &mut |_| {}).unwrap();
        prop_assert!((0.0..=1.0).contains(&model.threshold));
        let frames: Vec<&BitFrame> = labelled.iter().map(|f| &f.frame).collect();
        check_scores(&model.tree, &frames)?;
        // The model file loads back to exactly the same model (serde_json
        // is built with `float_roundtrip`; see
        // reference_learning::model_file_round_trips_floats_exactly).
        let json = model.to_json();
        let back = Model::from_json(&json).unwrap();
        crate::reference_learning::assert_models_match(&model, &back, 0);
        prop_assert_eq!(&back, &model);
        check_scores(&back.tree, &frames)?;
    }
}
