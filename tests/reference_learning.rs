//! The learner against outside references: impurity and gain against the
//! published formulas and Mitchell's PlayTennis worked example, the grown
//! tree against `smartcore`'s decision tree on the UCI handwritten digits,
//! training determinism, and cost-complexity pruning against a hand-worked
//! example and a plain re-implementation of Breiman's weakest-link rule.
//!
//! The digits stand in for fabric patches here because they are the one
//! public binary-feature benchmark a dev-dependency ships: 8x8 patches whose
//! 64 thresholded pixels are exactly the kind of window features the loom
//! detector learns from.

use std::collections::BTreeMap;
use std::sync::OnceLock;

use serde_json::Value;
use smartcore::linalg::basic::arrays::MutArrayView1;
use smartcore::linalg::basic::matrix::DenseMatrix;
use smartcore::tree::decision_tree_classifier::{
    DecisionTreeClassifier, DecisionTreeClassifierParameters, SplitCriterion,
};

use burlwatch::detect::walker;
use burlwatch::learn::criterion::{entropy, gain, gini, Criterion};
use burlwatch::learn::grow::{grow, GrowParams, GrownTree};
use burlwatch::learn::prune::{prune_sequence, Pruning};
use burlwatch::learn::store::Counts;
use burlwatch::learn::{self, LabelledFrame, TrainParams};
use burlwatch::model::{Model, Node};
use burlwatch::synth::{self, LoomParams};

fn params(criterion: Criterion, max_depth: u32) -> GrowParams {
    GrowParams {
        criterion,
        max_depth,
        min_leaf: 1.0,
        min_gain: 0.0,
        weights: [1.0, 1.0],
        max_nodes: 1 << 20,
    }
}

/// Merges `(pattern, class)` observations into label-store-style entries
/// (one entry per distinct pattern, `[clear, target]` counts, ascending).
fn merge_entries(obs: impl IntoIterator<Item = (u128, usize)>) -> Vec<(u128, Counts)> {
    let mut map: BTreeMap<u128, Counts> = BTreeMap::new();
    for (p, class) in obs {
        map.entry(p).or_insert([0, 0])[class] += 1;
    }
    map.into_iter().collect()
}

fn close(a: f64, b: f64, tol: f64) -> bool {
    (a - b).abs() <= tol
}

/// `x` truncated (not rounded) to three decimals, as Mitchell prints gains.
fn truncated3(x: f64) -> f64 {
    (x * 1000.0).floor() / 1000.0
}

// ---------------------------------------------------------------------------
// 1. Impurity measures.

#[test]
fn entropy_of_a_two_to_one_node_is_0_918_bits() {
    // Shannon (1948): H = -sum p log2 p; for p = (2/3, 1/3) that is
    // log2(3) - 2/3 = 0.918296 bits (the 0.918 every textbook prints).
    let h = entropy([1.0, 2.0]);
    assert!(close(h, 3f64.log2() - 2.0 / 3.0, 1e-12), "{h}");
    assert!(close(h, 0.918, 5e-4), "{h}");
    // Symmetric in the classes, in weights rather than counts, and 1 bit
    // (its maximum) at an even split; 0 for a pure or empty node.
    assert_eq!(entropy([2.0, 1.0]), h);
    assert!(close(entropy([0.5, 1.0]), h, 1e-12));
    assert!(close(entropy([7.0, 7.0]), 1.0, 1e-12));
    assert_eq!(entropy([0.0, 5.0]), 0.0);
    assert_eq!(entropy([0.0, 0.0]), 0.0);
}

#[test]
fn gini_peaks_at_one_half_for_an_even_node() {
    // Breiman, Friedman, Olshen and Stone (1984): for two classes the Gini
    // index is 1 - p^2 - (1-p)^2 = 2p(1-p), largest (1/2) at p = 1/2.
    let at = |p: f64| gini([1.0 - p, p]);
    assert!(close(at(0.5), 0.5, 1e-15));
    for d in [0.001, 0.01, 0.1, 0.25, 0.4] {
        assert!(at(0.5 - d) < at(0.5) && at(0.5 + d) < at(0.5), "d = {d}");
        assert!(close(at(0.5 - d), 2.0 * (0.5 - d) * (0.5 + d), 1e-12));
    }
    assert_eq!(gini([3.0, 0.0]), 0.0);
    assert_eq!(gini([0.0, 0.0]), 0.0);
    // The criterion dispatches to the same functions.
    assert_eq!(Criterion::Gini.impurity([1.0, 3.0]), gini([1.0, 3.0]));
    assert_eq!(Criterion::Entropy.impurity([1.0, 3.0]), entropy([1.0, 3.0]));
}

// ---------------------------------------------------------------------------
// 2. PlayTennis (Quinlan 1986; Mitchell, Machine Learning, 1997, Table 3.2).

/// Day, Outlook, Temperature, Humidity, Wind, PlayTennis: Mitchell (1997),
/// Table 3.2, verbatim.
type Day = (
    &'static str,
    &'static str,
    &'static str,
    &'static str,
    &'static str,
    &'static str,
);

const PLAY_TENNIS: [Day; 14] = [
    ("D1", "Sunny", "Hot", "High", "Weak", "No"),
    ("D2", "Sunny", "Hot", "High", "Strong", "No"),
    ("D3", "Overcast", "Hot", "High", "Weak", "Yes"),
    ("D4", "Rain", "Mild", "High", "Weak", "Yes"),
    ("D5", "Rain", "Cool", "Normal", "Weak", "Yes"),
    ("D6", "Rain", "Cool", "Normal", "Strong", "No"),
    ("D7", "Overcast", "Cool", "Normal", "Strong", "Yes"),
    ("D8", "Sunny", "Mild", "High", "Weak", "No"),
    ("D9", "Sunny", "Cool", "Normal", "Weak", "Yes"),
    ("D10", "Rain", "Mild", "Normal", "Weak", "Yes"),
    ("D11", "Sunny", "Mild", "Normal", "Strong", "Yes"),
    ("D12", "Overcast", "Mild", "High", "Strong", "Yes"),
    ("D13", "Overcast", "Hot", "Normal", "Weak", "Yes"),
    ("D14", "Rain", "Mild", "High", "Strong", "No"),
];

/// Class of a day: 0 = No ("clear"), 1 = Yes ("target").
fn play(day: &Day) -> usize {
    usize::from(day.5 == "Yes")
}

/// `[no, yes]` counts of the days where `pick` holds.
fn tennis_counts(pick: impl Fn(&Day) -> bool) -> [f64; 2] {
    let mut c = [0.0, 0.0];
    for d in PLAY_TENNIS.iter().filter(|d| pick(d)) {
        c[play(d)] += 1.0;
    }
    c
}

#[test]
fn play_tennis_entropy_and_gains_match_mitchell() {
    let s = tennis_counts(|_| true);
    assert_eq!(s, [5.0, 9.0]); // [9+, 5-] in Mitchell's notation
    let high = tennis_counts(|d| d.3 == "High");
    let normal = tennis_counts(|d| d.3 == "Normal");
    let weak = tennis_counts(|d| d.4 == "Weak");
    let strong = tennis_counts(|d| d.4 == "Strong");
    assert_eq!((high, normal), ([4.0, 3.0], [1.0, 6.0]));
    assert_eq!((weak, strong), ([2.0, 6.0], [3.0, 3.0]));

    let h = entropy(s);
    let g_humidity = gain(Criterion::Entropy, s, normal, high);
    let g_wind = gain(Criterion::Entropy, s, weak, strong);
    // Mitchell (1997), section 3.4: Entropy(S) = 0.940, Gain(S, Humidity) =
    // .151, Gain(S, Wind) = .048, printed truncated to three decimals.
    assert_eq!(truncated3(h), 0.940);
    assert_eq!(truncated3(g_humidity), 0.151);
    assert_eq!(truncated3(g_wind), 0.048);
    // The same quantities to six decimals (computed from the formula).
    assert!(close(h, 0.940286, 1e-6), "{h}");
    assert!(close(g_humidity, 0.151836, 1e-6), "{g_humidity}");
    assert!(close(g_wind, 0.048127, 1e-6), "{g_wind}");
    // The left/right order of a binary split does not matter.
    assert_eq!(g_humidity, gain(Criterion::Entropy, s, high, normal));

    // The multi-valued attributes, through the entropy function: Mitchell
    // (1997), section 3.4.2: Gain(S, Outlook) = 0.246, Gain(S, Temperature)
    // = 0.029 (from memory; the counts below come from Table 3.2 above).
    let multiway = |values: &[&str], field: fn(&Day) -> &'static str| {
        let mut g = h;
        for v in values {
            let c = tennis_counts(|d| field(d) == *v);
            g -= (c[0] + c[1]) / 14.0 * entropy(c);
        }
        g
    };
    let g_outlook = multiway(&["Sunny", "Overcast", "Rain"], |d| d.1);
    let g_temperature = multiway(&["Hot", "Mild", "Cool"], |d| d.2);
    assert_eq!(truncated3(g_outlook), 0.246);
    assert_eq!(truncated3(g_temperature), 0.029);
}

/// Bit layout of a day's pattern for the learner.
const HUMIDITY_HIGH: u32 = 0;
const WIND_STRONG: u32 = 1;
const OUTLOOK_BITS: u32 = 2; // Sunny, Overcast, Rain: bits 2, 3, 4
const TEMPERATURE_BITS: u32 = 5; // Hot, Mild, Cool: bits 5, 6, 7

fn tennis_pattern(d: &Day, one_hot: bool) -> u128 {
    let mut p = 0u128;
    if d.3 == "High" {
        p |= 1 << HUMIDITY_HIGH;
    }
    if d.4 == "Strong" {
        p |= 1 << WIND_STRONG;
    }
    if one_hot {
        let o = ["Sunny", "Overcast", "Rain"]
            .iter()
            .position(|v| *v == d.1)
            .unwrap();
        let t = ["Hot", "Mild", "Cool"]
            .iter()
            .position(|v| *v == d.2)
            .unwrap();
        p |= 1 << (OUTLOOK_BITS + o as u32);
        p |= 1 << (TEMPERATURE_BITS + t as u32);
    }
    p
}

#[test]
fn play_tennis_learner_splits_on_humidity_first() {
    // Between Humidity and Wind, ID3 prefers Humidity (0.151 > 0.048,
    // Mitchell 1997, section 3.4); the Gini decrease (0.0918 > 0.0306) and
    // the gain ratio (0.152 > 0.049) agree (both computed here from the
    // counts of Table 3.2).
    for criterion in [Criterion::Entropy, Criterion::Gini, Criterion::GainRatio] {
        let mut e = merge_entries(
            PLAY_TENNIS
                .iter()
                .map(|d| (tennis_pattern(d, false), play(d))),
        );
        assert_eq!(e.len(), 4, "four Humidity x Wind combinations");
        let t = grow(&mut e, 2, &params(criterion, 1));
        let s = t.nodes[0].split.expect("the root splits");
        assert_eq!(s.feature as u32, HUMIDITY_HIGH, "{criterion:?}");
        assert_eq!(t.nodes[0].counts, [5, 9]);
        assert_eq!(t.nodes[s.if_clear as usize].counts, [1, 6], "Normal");
        assert_eq!(t.nodes[s.if_set as usize].counts, [4, 3], "High");
        assert_eq!(t.leaves(), 2);
    }
}

#[test]
fn play_tennis_one_hot_tree_separates_every_day() {
    // With Outlook and Temperature added as one bit per value, the best
    // binary question at the root is "Outlook = Overcast?": that branch is
    // all Yes (Mitchell's Figure 3.1 has the same pure Overcast leaf), and
    // its information gain is 0.940 - 10/14 * H(5,5) = 0.226 (computed here
    // from Table 3.2; Mitchell's 0.246 is the three-way Outlook split).
    let obs: Vec<(u128, usize)> = PLAY_TENNIS
        .iter()
        .map(|d| (tennis_pattern(d, true), play(d)))
        .collect();
    let mut e = merge_entries(obs.iter().copied());
    assert_eq!(e.len(), 14, "no two days look alike");
    let t = grow(&mut e.clone(), 8, &params(Criterion::Entropy, 1));
    let s = t.nodes[0].split.unwrap();
    assert_eq!(s.feature as u32, OUTLOOK_BITS + 1, "Overcast");
    assert_eq!(t.nodes[s.if_set as usize].counts, [0, 4]);
    assert!(close(
        gain(Criterion::Entropy, [5.0, 9.0], [5.0, 5.0], [0.0, 4.0]),
        0.226000,
        1e-6
    ));
    // Fully grown, the tree is consistent with all 14 days (the table has
    // no contradictory days, so ID3 reaches zero training error).
    let t = grow(&mut e, 8, &params(Criterion::Entropy, 10));
    for (p, class) in obs {
        let leaf = &t.nodes[t.leaf_of(p)];
        assert_eq!(leaf.counts[1 - class], 0, "pattern {p:#b}");
    }
    // And the Sunny/Rain side asks about Humidity next, as in Figure 3.1's
    // Sunny branch: gain 1 - H(4,1)/2 - H(1,4)/2 = 0.278 beats Wind's 0.125.
    let sunny_or_rain = t.nodes[0].split.unwrap().if_clear as usize;
    assert_eq!(t.nodes[sunny_or_rain].counts, [5, 5]);
    assert_eq!(
        t.nodes[sunny_or_rain].split.unwrap().feature as u32,
        HUMIDITY_HIGH
    );
}

// ---------------------------------------------------------------------------
// 3. The smartcore reference tree on the UCI handwritten digits.
//
// Data: "Optical Recognition of Handwritten Digits" (UCI Machine Learning
// Repository), the 1797 8x8 patches with pixel values 0..16 that smartcore
// 0.7 bundles as `dataset::digits`. Binarized at >= 8 (common practice:
// half the intensity range), one digit against the rest.
//
// How smartcore 0.7's `DecisionTreeClassifier` relates to our learner
// (verified by reading smartcore 0.7.0, src/tree/decision_tree_classifier.rs):
// - its `max_depth` counts levels with the root as level 1, so our depth d
//   is its `max_depth = d + 1`;
// - a split sends `x <= split_value` to `true_child`: for 0/1 features
//   (split_value 0.5) that is our `if_clear` child;
// - a leaf predicts the majority class and, on a count tie, the smallest
//   label (0 = rest); our leaf score t / (t + c) >= 0.5 would call a tie a
//   digit, so predictions are compared with `score > 0.5`;
// - features are tried in index order and a later one must be strictly
//   better, as in our learner;
// - BUT it evaluates a threshold only where the label changes between two
//   neighbouring samples of its (unstable) sort order of the feature:
//   `if prevx.is_none() || x_ij == prevx.unwrap() || visitor.y[*i] == prevy
//   { continue; }`. A 0/1 feature has one place where the value changes, so
//   smartcore ignores the feature entirely whenever the last 0-sample and
//   the first 1-sample of its sort order share a label. With a rare class
//   that happens for most features: at the root of "3 against the rest"
//   only 8 of the 64 features are looked at. Our learner searches every
//   feature. The tests below model that scan exactly and check that it
//   explains every difference at the root, pin the quirk on a three-row
//   example, assert identical trees where smartcore's scan happens to see
//   the best features, and elsewhere assert that at every node our split
//   is at least as good as the one smartcore picks from the same pixels.

struct Digits {
    /// Bit `j` = pixel `j` (row-major 8x8) is at least 8.
    rows: Vec<u64>,
    /// The digit of each row, 0..9.
    digit: Vec<u32>,
    /// smartcore's sort order of every feature column (`argsort_mut`, the
    /// same call its `fit` makes), for modelling its scan.
    order: Vec<Vec<usize>>,
}

fn digits() -> &'static Digits {
    static D: OnceLock<Digits> = OnceLock::new();
    D.get_or_init(|| {
        let ds = smartcore::dataset::digits::load_dataset();
        assert_eq!((ds.num_samples, ds.num_features), (1797, 64));
        assert_eq!(ds.data.len(), 1797 * 64);
        let rows: Vec<u64> = ds
            .data
            .chunks(64)
            .map(|px| {
                px.iter()
                    .enumerate()
                    .filter(|(_, &v)| v >= 8.0)
                    .fold(0u64, |p, (j, _)| p | 1 << j)
            })
            .collect();
        let digit: Vec<u32> = ds.target.iter().map(|&t| t as u32).collect();
        assert!(digit.iter().all(|&d| d <= 9));
        let order = (0..64)
            .map(|j| {
                let mut col: Vec<f64> = rows.iter().map(|r| bit(*r, j) as f64).collect();
                col.argsort_mut()
            })
            .collect();
        Digits { rows, digit, order }
    })
}

fn bit(row: u64, j: usize) -> usize {
    ((row >> j) & 1) as usize
}

/// Labels of one digit against the rest: 1 = the digit.
fn labels(d: &Digits, digit: u32) -> Vec<usize> {
    d.digit.iter().map(|&x| usize::from(x == digit)).collect()
}

fn grow_digits(d: &Digits, digit: u32, criterion: Criterion, depth: u32) -> GrownTree {
    let y = labels(d, digit);
    let mut e = merge_entries(d.rows.iter().zip(&y).map(|(&r, &c)| (r as u128, c)));
    grow(&mut e, 64, &params(criterion, depth))
}

fn smartcore_criterion(c: Criterion) -> SplitCriterion {
    match c {
        Criterion::Gini => SplitCriterion::Gini,
        Criterion::Entropy => SplitCriterion::Entropy,
        Criterion::GainRatio => unreachable!("smartcore has no gain ratio"),
    }
}

/// smartcore's tree on the given rows, as (predictions, serialised tree).
fn fit_smartcore(
    rows: &[u64],
    y: &[usize],
    criterion: Criterion,
    our_depth: u32,
) -> (Vec<i32>, Value) {
    let n = rows.len();
    let values: Vec<f64> = rows
        .iter()
        .flat_map(|&r| (0..64).map(move |j| bit(r, j) as f64))
        .collect();
    let x = DenseMatrix::new(n, 64, values, false).unwrap();
    let y: Vec<i32> = y.iter().map(|&c| c as i32).collect();
    let p = DecisionTreeClassifierParameters::default()
        .with_criterion(smartcore_criterion(criterion))
        .with_max_depth(our_depth as u16 + 1)
        .with_min_samples_leaf(1)
        .with_min_samples_split(2);
    let tree = DecisionTreeClassifier::fit(&x, &y, p).unwrap();
    let pred: Vec<i32> = tree.predict(&x).unwrap();
    (pred, serde_json::to_value(&tree).unwrap())
}

/// `[rest, digit]` counts of `members` whose feature `j` is clear / set.
fn split_counts(d: &Digits, y: &[usize], members: &[usize], j: usize) -> ([f64; 2], [f64; 2]) {
    let (mut clear, mut set) = ([0.0; 2], [0.0; 2]);
    for &i in members {
        if bit(d.rows[i], j) == 1 {
            set[y[i]] += 1.0;
        } else {
            clear[y[i]] += 1.0;
        }
    }
    (clear, set)
}

/// Every feature's gain over `members` (None where one side is empty),
/// counted directly from the rows, independently of the learner.
fn all_gains(d: &Digits, y: &[usize], members: &[usize], c: Criterion) -> Vec<Option<f64>> {
    (0..64)
        .map(|j| {
            let (clear, set) = split_counts(d, y, members, j);
            let parent = [clear[0] + set[0], clear[1] + set[1]];
            (clear[0] + clear[1] > 0.0 && set[0] + set[1] > 0.0)
                .then(|| gain(c, parent, clear, set))
        })
        .collect()
}

/// First feature with the largest gain among those `keep` allows.
fn argmax(gains: &[Option<f64>], keep: impl Fn(usize) -> bool) -> Option<(usize, f64)> {
    let mut best: Option<(usize, f64)> = None;
    for (j, g) in gains.iter().enumerate() {
        if let Some(g) = *g {
            if keep(j) && best.is_none_or(|(_, b)| g > b) {
                best = Some((j, g));
            }
        }
    }
    best
}

/// Whether smartcore 0.7's scan evaluates feature `j` at a node holding
/// `members`: only if the first 1-sample in its sort order has a label
/// different from the sample before it (see the module comment above).
fn smartcore_sees(d: &Digits, y: &[usize], member: &[bool], j: usize) -> bool {
    let mut prev: Option<usize> = None;
    for &i in d.order[j].iter().filter(|&&i| member[i]) {
        if bit(d.rows[i], j) == 1 {
            return prev.is_some_and(|p| y[p] != y[i]);
        }
        prev = Some(i);
    }
    false
}

fn sc_node(v: &Value, k: usize) -> &Value {
    &v["nodes"][k]
}

fn sc_child(node: &Value, key: &str) -> Option<usize> {
    node[key].as_u64().map(|c| c as usize)
}

/// Walks our tree and smartcore's side by side and reports the first
/// difference: same shape, same feature at every split, same sample counts.
fn compare_trees(ours: &GrownTree, sc: &Value) -> Result<(), String> {
    let mut stack = vec![(0usize, 0usize)];
    while let Some((o, s)) = stack.pop() {
        let on = &ours.nodes[o];
        let sn = sc_node(sc, s);
        let n = on.counts[0] + on.counts[1];
        if sn["n_node_samples"].as_u64() != Some(n) {
            return Err(format!(
                "node {o}: {n} samples, smartcore's node {s} has {}",
                sn["n_node_samples"]
            ));
        }
        match (
            on.split,
            sc_child(sn, "true_child"),
            sc_child(sn, "false_child"),
        ) {
            (None, None, None) => {}
            (Some(split), Some(t), Some(f)) => {
                let sf = sn["split_feature"].as_u64().unwrap() as usize;
                if split.feature as usize != sf {
                    return Err(format!(
                        "node {o} splits on {}, smartcore's on {sf}",
                        split.feature
                    ));
                }
                assert_eq!(sn["split_value"].as_f64(), Some(0.5));
                stack.push((split.if_clear as usize, t));
                stack.push((split.if_set as usize, f));
            }
            (a, _, _) => {
                return Err(format!(
                    "node {o}: ours split {:?}, smartcore's node {s} is {sn}",
                    a.map(|s| s.feature)
                ));
            }
        }
    }
    Ok(())
}

/// Our prediction for a row: strictly more digit than rest at its leaf
/// (smartcore calls a tie "rest", the smaller label).
fn our_prediction(t: &GrownTree, row: u64) -> i32 {
    let leaf = &t.nodes[t.leaf_of(row as u128)];
    let score = leaf.counts[1] as f64 / (leaf.counts[0] + leaf.counts[1]) as f64;
    i32::from(score > 0.5)
}

const DIGITS: [u32; 3] = [0, 3, 8];
const CRITERIA: [Criterion; 2] = [Criterion::Gini, Criterion::Entropy];

#[test]
fn digits_root_split_is_the_best_and_smartcore_picks_the_best_it_scans() {
    let d = digits();
    let all: Vec<usize> = (0..d.rows.len()).collect();
    let everyone = vec![true; d.rows.len()];
    for digit in DIGITS {
        let y = labels(d, digit);
        for c in CRITERIA {
            let what = format!("digit {digit}, {c:?}");
            let gains = all_gains(d, &y, &all, c);
            let (best, best_gain) = argmax(&gains, |_| true).unwrap();
            let (seen, seen_gain) =
                argmax(&gains, |j| smartcore_sees(d, &y, &everyone, j)).unwrap();
            // Ours: the exhaustive best.
            let ours = grow_digits(d, digit, c, 1);
            assert_eq!(
                ours.nodes[0].split.unwrap().feature as usize,
                best,
                "{what}"
            );
            // smartcore: the best among the features its scan evaluates.
            let (_, sc) = fit_smartcore(&d.rows, &y, c, 1);
            let root = sc_node(&sc, 0);
            assert_eq!(root["split_feature"].as_u64(), Some(seen as u64), "{what}");
            // Its own numbers agree with our criterion: the root impurity and
            // the gain of the feature it chose.
            let n1 = y.iter().sum::<usize>() as f64;
            let parent = [y.len() as f64 - n1, n1];
            assert!(
                close(
                    root["impurity"].as_f64().unwrap(),
                    c.impurity(parent),
                    1e-12
                ),
                "{what}"
            );
            assert!(
                close(root["split_score"].as_f64().unwrap(), seen_gain, 1e-12),
                "{what}"
            );
            assert!(best_gain >= seen_gain);
            if digit == 0 {
                // "0 against the rest": smartcore happens to see the best
                // pixel (36, row 4 column 4, the hole in the middle of a 0).
                assert_eq!((best, seen), (36, 36), "{what}");
            } else {
                // For 3 and 8 smartcore's scan skips the best pixel and
                // settles for a strictly worse one.
                assert!(!smartcore_sees(d, &y, &everyone, best), "{what}");
                assert!(best_gain > seen_gain + 1e-3, "{what}");
            }
        }
    }
}

#[test]
fn digits_trees_equal_smartcores_where_its_scan_sees_the_best_splits() {
    let d = digits();
    // (digit, criterion, our depths) at which the two trees are identical
    // node for node (found by running both; at the next depth smartcore's
    // scan skips the best feature of some node).
    let identical: [(u32, Criterion, &[u32]); 2] = [
        (0, Criterion::Entropy, &[1, 2, 3, 4]),
        (0, Criterion::Gini, &[1]),
    ];
    for (digit, c, depths) in identical {
        let y = labels(d, digit);
        for &depth in depths {
            let what = format!("digit {digit}, {c:?}, depth {depth}");
            let ours = grow_digits(d, digit, c, depth);
            let (pred, sc) = fit_smartcore(&d.rows, &y, c, depth);
            compare_trees(&ours, &sc).unwrap_or_else(|e| panic!("{what}: {e}"));
            for (i, &row) in d.rows.iter().enumerate() {
                assert_eq!(our_prediction(&ours, row), pred[i], "{what}, row {i}");
            }
        }
        // One level deeper the trees part (smartcore misses a split).
        let deeper = depths.last().unwrap() + 1;
        let ours = grow_digits(d, digit, c, deeper);
        let (_, sc) = fit_smartcore(&d.rows, &y, c, deeper);
        assert!(
            compare_trees(&ours, &sc).is_err(),
            "digit {digit}, {c:?}, depth {deeper}"
        );
    }
    // For 3 and 8 the roots differ (see the previous test), yet at depths 1
    // and 2 both trees still call every row "rest" (no leaf has a majority
    // of the digit), so the predictions agree row for row.
    for digit in [3, 8] {
        let y = labels(d, digit);
        for c in CRITERIA {
            for depth in [1, 2] {
                let ours = grow_digits(d, digit, c, depth);
                let (pred, _) = fit_smartcore(&d.rows, &y, c, depth);
                for (i, &row) in d.rows.iter().enumerate() {
                    assert_eq!(
                        our_prediction(&ours, row),
                        0,
                        "digit {digit} {c:?} depth {depth}"
                    );
                    assert_eq!(pred[i], 0, "digit {digit} {c:?} depth {depth}");
                }
            }
        }
    }
}

#[test]
fn digits_every_split_is_at_least_as_good_as_smartcores_on_the_same_pixels() {
    // At every internal node of our depth-5 trees: (a) the chosen feature
    // has the largest gain over all 64 features, counted directly from the
    // node's rows; (b) smartcore fitted to exactly those rows (one split)
    // finds no better split, its reported gain matches our criterion for
    // the feature it chose, and where its scan sees our feature it picks the
    // same one.
    let d = digits();
    let depth = 5;
    for digit in DIGITS {
        let y = labels(d, digit);
        for c in CRITERIA {
            let t = grow_digits(d, digit, c, depth);
            let mut members: Vec<Vec<usize>> = vec![Vec::new(); t.nodes.len()];
            for (i, &row) in d.rows.iter().enumerate() {
                let mut k = 0;
                loop {
                    members[k].push(i);
                    match t.nodes[k].split {
                        Some(s) => {
                            k = if bit(row, s.feature as usize) == 1 {
                                s.if_set
                            } else {
                                s.if_clear
                            } as usize
                        }
                        None => break,
                    }
                }
            }
            let mut strictly_better = 0;
            for (k, node) in t.nodes.iter().enumerate() {
                let Some(split) = node.split else { continue };
                let what = format!("digit {digit}, {c:?}, node {k}");
                let m = &members[k];
                assert_eq!(m.len() as u64, node.counts[0] + node.counts[1], "{what}");
                let gains = all_gains(d, &y, m, c);
                let (best, best_gain) = argmax(&gains, |_| true).unwrap();
                let ours_gain = gains[split.feature as usize].unwrap();
                assert!(
                    ours_gain >= best_gain - 1e-12,
                    "{what}: feature {} vs best {best}",
                    split.feature
                );
                let rows: Vec<u64> = m.iter().map(|&i| d.rows[i]).collect();
                let ym: Vec<usize> = m.iter().map(|&i| y[i]).collect();
                let (_, sc) = fit_smartcore(&rows, &ym, c, 1);
                let root = sc_node(&sc, 0);
                let Some(sc_gain) = root["split_score"].as_f64() else {
                    // smartcore's scan saw no feature at all: it makes a leaf.
                    strictly_better += 1;
                    continue;
                };
                let sf = root["split_feature"].as_u64().unwrap() as usize;
                assert!(close(sc_gain, gains[sf].unwrap(), 1e-12), "{what}");
                assert!(ours_gain >= sc_gain - 1e-12, "{what}");
                if sf == split.feature as usize {
                    assert!(close(ours_gain, sc_gain, 1e-12), "{what}");
                } else if ours_gain > sc_gain + 1e-12 {
                    strictly_better += 1;
                }
            }
            // Digit 0 with Entropy is identical to depth 4 (previous test)
            // but smartcore misses a better split somewhere at depth 5; every
            // other tree here differs earlier.
            assert!(strictly_better > 0, "digit {digit}, {c:?}");
        }
    }
}

#[test]
fn smartcore_skips_a_useful_feature_when_the_boundary_labels_agree() {
    // The quirk on three samples (smartcore 0.7's argsort_mut sorts up to 7
    // values by insertion, which keeps ties in row order). Rows (x, y): (0, 0),
    // (1, 0), (1, 1). Sorted by x the boundary pair is (0, 0) -> (1, 0):
    // same label, so smartcore never evaluates x <= 0.5 and makes a leaf,
    // although the split has a positive gain.
    let fit = |x: &[f64], y: &[i32]| {
        let m = DenseMatrix::new(x.len(), 1, x.to_vec(), false).unwrap();
        let tree = DecisionTreeClassifier::fit(
            &m,
            &y.to_vec(),
            DecisionTreeClassifierParameters::default(),
        )
        .unwrap();
        serde_json::to_value(&tree).unwrap()
    };
    let v = fit(&[0.0, 1.0, 1.0], &[0, 0, 1]);
    assert_eq!(
        v["nodes"].as_array().unwrap().len(),
        1,
        "smartcore makes no split"
    );
    // The same three samples in another row order: boundary (0, 0) ->
    // (1, 1), and smartcore splits.
    let v = fit(&[1.0, 0.0, 1.0], &[1, 0, 0]);
    assert_eq!(v["nodes"].as_array().unwrap().len(), 3);
    assert_eq!(v["nodes"][0]["split_value"].as_f64(), Some(0.5));
    // Ours splits either way: Gini decrease 4/9 - 2/3 * 1/2 = 1/9.
    let mut e = vec![(0u128, [1, 0]), (1u128, [1, 1])];
    let t = grow(&mut e, 1, &params(Criterion::Gini, 4));
    assert_eq!(t.nodes[0].split.map(|s| s.feature), Some(0));
    assert!(close(
        gain(Criterion::Gini, [2.0, 1.0], [1.0, 0.0], [1.0, 1.0]),
        1.0 / 9.0,
        1e-15
    ));
}

// ---------------------------------------------------------------------------
// 4. Determinism of training.

fn loom_frames(base_seed: u64, count: usize) -> Vec<LabelledFrame> {
    let p = LoomParams {
        width: 64,
        height: 64,
        ..LoomParams::standard()
    };
    (0..count)
        .map(|i| {
            let g = synth::generate(&p, synth::frame_seed(base_seed, i));
            LabelledFrame::new(format!("loom-{i:02}.pbm"), g.frame, g.mask)
        })
        .collect()
}

#[test]
fn training_is_deterministic_and_ignores_frame_order() {
    let frames = loom_frames(2024, 6);
    assert!(frames.iter().any(|f| f.mask.count_set() > 0));
    let p = TrainParams::default();
    let a = learn::train(&frames, &p, &mut |_| {}).unwrap();
    let b = learn::train(&frames, &p, &mut |_| {}).unwrap();
    let json = a.to_json();
    assert_eq!(json, b.to_json(), "two runs on the same frames");
    assert_eq!(a, b);
    // Any order of the same frames gives the same bytes: the holdout split
    // goes by content hash and the label store by pattern.
    let mut reversed = frames.clone();
    reversed.reverse();
    let mut rotated = frames.clone();
    rotated.rotate_left(2);
    for shuffled in [reversed, rotated] {
        let c = learn::train(&shuffled, &p, &mut |_| {}).unwrap();
        assert_eq!(json, c.to_json(), "shuffled frames");
    }
    // Cross-fitted (the default): every frame grows the final tree and is
    // held out once, by its share's tree.
    assert_eq!((a.data.frames, a.data.holdout_frames), (6, 6));
}

/// Distance in units in the last place between two non-negative floats.
fn ulps(a: f64, b: f64) -> u64 {
    assert!(a >= 0.0 && b >= 0.0, "{a} {b}");
    a.to_bits().abs_diff(b.to_bits())
}

/// Every field of the two models equal, floats to within `max_ulps`.
pub(crate) fn assert_models_match(a: &Model, b: &Model, max_ulps: u64) {
    let near = |x: f64, y: f64, what: &str| assert!(ulps(x, y) <= max_ulps, "{what}: {x} vs {y}");
    assert_eq!(a.tree.window(), b.tree.window());
    assert_eq!(a.tree.nodes().len(), b.tree.nodes().len());
    for (i, (x, y)) in a.tree.nodes().iter().zip(b.tree.nodes()).enumerate() {
        match (x, y) {
            (Node::Leaf(l), Node::Leaf(m)) => {
                assert_eq!(l.counts, m.counts, "leaf {i}");
                near(l.score, m.score, &format!("score of leaf {i}"));
                near(l.share, m.share, &format!("share of leaf {i}"));
            }
            _ => assert_eq!(x, y, "node {i}"),
        }
    }
    near(a.threshold, b.threshold, "threshold");
    assert_eq!((a.grouping, a.model_version), (b.grouping, b.model_version));
    assert_eq!(a.data, b.data);
    let (ta, tb) = (&a.training, &b.training);
    for (x, y, what) in [
        (ta.min_leaf, tb.min_leaf, "min_leaf"),
        (ta.min_gain, tb.min_gain, "min_gain"),
        (ta.holdout, tb.holdout, "holdout"),
        (ta.pruning_alpha, tb.pruning_alpha, "pruning_alpha"),
        (ta.class_weights[0], tb.class_weights[0], "clear weight"),
        (ta.class_weights[1], tb.class_weights[1], "target weight"),
    ] {
        near(x, y, what);
    }
    let mut tb = tb.clone();
    tb.min_leaf = ta.min_leaf;
    tb.min_gain = ta.min_gain;
    tb.holdout = ta.holdout;
    tb.pruning_alpha = ta.pruning_alpha;
    tb.class_weights = ta.class_weights;
    assert_eq!(ta, &tb);
    assert_eq!(a.holdout.is_some(), b.holdout.is_some());
    if let (Some(x), Some(y)) = (&a.holdout, &b.holdout) {
        for (p, q) in [(&x.pixel, &y.pixel), (&x.object, &y.object)] {
            near(p.precision, q.precision, "holdout precision");
            near(p.recall, q.recall, "holdout recall");
            near(p.f1, q.f1, "holdout f1");
        }
    }
    near(
        a.reference.set_density,
        b.reference.set_density,
        "set_density",
    );
    near(
        a.reference.detected_share,
        b.reference.detected_share,
        "detected_share",
    );
    near(
        a.reference.objects_per_frame,
        b.reference.objects_per_frame,
        "objects_per_frame",
    );
}

#[test]
fn model_file_loads_back_to_the_same_model() {
    // Exactly: `max_ulps` 0 (see the next test for why that needs care).
    for base in [2024, 7] {
        let a = learn::train(&loom_frames(base, 6), &TrainParams::default(), &mut |_| {}).unwrap();
        let back = Model::from_json(&a.to_json()).unwrap();
        assert_models_match(&a, &back, 0);
        assert_eq!(back, a);
        let again = Model::from_json(&back.to_json()).unwrap();
        assert_eq!(again, back);
    }
}

#[test]
fn model_file_round_trips_floats_exactly() {
    // Frames of base seed 7: the tuned threshold is a leaf score whose
    // shortest decimal form, 0.9402343750000001, serde_json's default
    // "best effort" float parser read back one ulp off; the crate is built
    // with its `float_roundtrip` feature, which makes f64 -> JSON -> f64
    // exact (serde_json documentation). A reloaded model must detect
    // exactly the pixels the trained one detects.
    let frames = loom_frames(7, 6);
    let a = learn::train(&frames, &TrainParams::default(), &mut |_| {}).unwrap();
    let json = a.to_json();
    let back = Model::from_json(&json).unwrap();
    let detected = |m: &Model| -> u64 {
        frames
            .iter()
            .map(|f| walker::detect(&m.tree, m.threshold, &f.frame).count_set())
            .sum()
    };
    assert_eq!(detected(&a), detected(&back), "detections change on reload");
    assert_eq!(back, a);
    assert_eq!(back.to_json(), json);
}

// ---------------------------------------------------------------------------
// 5. Minimal cost-complexity pruning (Breiman, Friedman, Olshen and Stone,
// Classification and Regression Trees, 1984, section 3.3).

#[test]
fn pruning_alphas_match_a_hand_worked_example() {
    // Two pixels. Entries (pattern: [clear, target]):
    //   00: [6, 0]   01: [1, 1]   11: [0, 2]      root [7, 3], 10 pixels.
    // Gini at the root 2 * 0.3 * 0.7 = 0.42. Bit 0 gains 0.42 - 0.4 * 0.375
    // = 0.27, bit 1 gains 0.42 - 0.8 * 0.21875 = 0.245: split on bit 0;
    // its set side [1, 3] splits on bit 1 into [1, 1] and [0, 2].
    // R(t) = share of pixels * Gini:
    //   R(root) = 0.42, R([6,0]) = 0, R([1,3]) = 0.4 * 0.375 = 0.15,
    //   R([1,1]) = 0.2 * 0.5 = 0.1, R([0,2]) = 0.
    // g(t) = (R(t) - R(T_t)) / (|leaves(T_t)| - 1):
    //   g([1,3]) = (0.15 - 0.1) / 1 = 0.05,  g(root) = (0.42 - 0.1) / 2 = 0.16.
    // The weakest link [1,3] goes first at alpha 0.05; then the root's
    // subtree costs 0 + 0.15 with 2 leaves: g(root) = (0.42 - 0.15) / 1 = 0.27.
    let mut e = vec![(0b00u128, [6, 0]), (0b01, [1, 1]), (0b11, [0, 2])];
    let t = grow(&mut e, 2, &params(Criterion::Gini, 8));
    let root = t.nodes[0].split.unwrap();
    assert_eq!(root.feature, 0);
    let inner = root.if_set as usize;
    assert_eq!(t.nodes[root.if_clear as usize].counts, [6, 0]);
    assert_eq!(t.nodes[inner].counts, [1, 3]);
    assert_eq!(t.nodes[inner].split.unwrap().feature, 1);
    assert_eq!(t.leaves(), 3);
    let p = prune_sequence(&t, Criterion::Gini, [1.0, 1.0]);
    assert!(close(p.collapse[inner], 0.05, 1e-12), "{:?}", p.collapse);
    assert!(close(p.collapse[0], 0.27, 1e-12), "{:?}", p.collapse);
    for (i, n) in t.nodes.iter().enumerate() {
        if n.split.is_none() {
            assert_eq!(p.collapse[i], f64::INFINITY);
        }
    }
    assert_eq!(p.alphas.len(), 3);
    assert_eq!(p.alphas[0], 0.0);
    assert!(close(p.alphas[1], 0.05, 1e-12) && close(p.alphas[2], 0.27, 1e-12));
    let leaves = |a: f64| p.leaves_at(&t, a);
    assert_eq!(leaves(0.0), 3);
    assert_eq!(leaves(0.049), 3);
    assert_eq!(leaves(p.alphas[1]), 2);
    assert_eq!(leaves(0.2), 2);
    assert_eq!(leaves(p.alphas[2]), 1);
    assert_eq!(leaves(f64::INFINITY), 1);
}

#[test]
fn pruning_collapses_a_weak_root_with_everything_below_it() {
    // Exclusive-or of two pixels, 2 pixels per pattern: the root split gains
    // nothing (both halves stay [2, 2]) but its children separate perfectly.
    // R(root) = 0.5, both children R = 0.5 * 0.5 = 0.25 with pure leaves:
    // g(child) = 0.25, g(root) = 0.5 / 3 = 1/6 < 0.25, so the root is the
    // weakest link and the whole tree collapses at once at alpha = 1/6.
    let mut e = vec![
        (0b00u128, [2, 0]),
        (0b01, [0, 2]),
        (0b10, [0, 2]),
        (0b11, [2, 0]),
    ];
    let t = grow(&mut e, 2, &params(Criterion::Gini, 8));
    assert_eq!(t.leaves(), 4);
    let p = prune_sequence(&t, Criterion::Gini, [1.0, 1.0]);
    for (i, n) in t.nodes.iter().enumerate() {
        if n.split.is_some() {
            assert!(
                close(p.collapse[i], 1.0 / 6.0, 1e-12),
                "node {i}: {:?}",
                p.collapse
            );
        }
    }
    assert_eq!(p.alphas.len(), 2);
    assert_eq!(p.leaves_at(&t, 0.16), 4);
    assert_eq!(p.leaves_at(&t, p.alphas[1]), 1);
}

/// Breiman's weakest-link pruning done the slow, obvious way: at each step
/// recompute g(t) of every internal node of the current tree, collapse every
/// node attaining the minimum, and record alpha = max(min g, previous).
fn naive_collapse(t: &GrownTree, c: Criterion, w: [f64; 2]) -> Vec<f64> {
    let n = t.nodes.len();
    let weigh = |i: usize| {
        [
            t.nodes[i].counts[0] as f64 * w[0],
            t.nodes[i].counts[1] as f64 * w[1],
        ]
    };
    let root_w = weigh(0)[0] + weigh(0)[1];
    let r: Vec<f64> = (0..n)
        .map(|i| (weigh(i)[0] + weigh(i)[1]) / root_w * c.impurity(weigh(i)))
        .collect();
    let mut leaf = vec![false; n]; // collapsed internal nodes act as leaves
    let mut collapse = vec![f64::INFINITY; n];
    let mut last = 0.0f64;
    let children = |i: usize| {
        t.nodes[i]
            .split
            .map(|s| [s.if_clear as usize, s.if_set as usize])
    };
    while collapse[0].is_infinite() {
        // Subtree cost and leaves under each live node (children after parents).
        let mut cost = r.clone();
        let mut leaves = vec![1u64; n];
        for i in (0..n).rev() {
            if let (Some([a, b]), false) = (children(i), leaf[i]) {
                cost[i] = cost[a] + cost[b];
                leaves[i] = leaves[a] + leaves[b];
            }
        }
        let mut live = vec![false; n];
        live[0] = true;
        let mut g = vec![f64::INFINITY; n];
        for i in 0..n {
            if let (true, Some([a, b]), false) = (live[i], children(i), leaf[i]) {
                live[a] = true;
                live[b] = true;
                g[i] = ((r[i] - cost[i]) / (leaves[i] - 1) as f64).max(0.0);
            }
        }
        let min = g.iter().copied().fold(f64::INFINITY, f64::min);
        let alpha = min.max(last);
        last = alpha;
        for i in 0..n {
            if g[i] <= min + 1e-15 && g[i].is_finite() {
                leaf[i] = true;
                let mut stack = vec![i];
                while let Some(k) = stack.pop() {
                    if let Some([a, b]) = children(k) {
                        if collapse[k].is_infinite() {
                            collapse[k] = alpha;
                        }
                        stack.extend([a, b]);
                    }
                }
            }
        }
    }
    collapse
}

fn check_sequence(t: &GrownTree, p: &Pruning) {
    assert_eq!(p.alphas[0], 0.0);
    assert!(
        p.alphas.windows(2).all(|w| w[0] < w[1]),
        "ascending, distinct"
    );
    let mut prev = usize::MAX;
    for &a in &p.alphas {
        let l = p.leaves_at(t, a);
        assert!(l <= prev, "leaves grow from {prev} to {l} at alpha {a}");
        prev = l;
    }
    assert_eq!(p.leaves_at(t, *p.alphas.last().unwrap()), 1);
    // Alpha 0 removes only splits that buy nothing (zero-gain splits).
    assert!(p.leaves_at(t, 0.0) <= t.leaves());
    // A child never outlives its parent.
    for (i, n) in t.nodes.iter().enumerate() {
        if let Some(s) = n.split {
            for c in [s.if_clear, s.if_set] {
                let cc = p.collapse[c as usize];
                assert!(
                    cc.is_infinite() || cc <= p.collapse[i],
                    "node {c} outlives its parent {i}"
                );
            }
        }
    }
}

#[test]
fn pruning_sequence_matches_the_plain_weakest_link_rule() {
    let d = digits();
    for (digit, c, w) in [
        (3, Criterion::Gini, [1.0, 1.0]),
        (8, Criterion::Entropy, [1.0, 1.0]),
        (0, Criterion::Gini, [0.2, 1.8]),
    ] {
        let y = labels(d, digit);
        let mut e = merge_entries(d.rows.iter().zip(&y).map(|(&r, &k)| (r as u128, k)));
        let gp = GrowParams {
            weights: w,
            ..params(c, 6)
        };
        let t = grow(&mut e, 64, &gp);
        assert!(t.leaves() > 10);
        let p = prune_sequence(&t, c, w);
        let want = naive_collapse(&t, c, w);
        for (i, (&got, &want)) in p.collapse.iter().zip(&want).enumerate() {
            assert!(
                got == want || close(got, want, 1e-12),
                "digit {digit} {c:?}: node {i} collapses at {got}, Breiman's rule says {want}"
            );
        }
        check_sequence(&t, &p);
    }
}
