//! explore
use smartcore::linalg::basic::matrix::DenseMatrix;
use smartcore::tree::decision_tree_classifier::{
    DecisionTreeClassifier, DecisionTreeClassifierParameters, SplitCriterion,
};
use std::collections::BTreeMap;
use treeline::learn::criterion::Criterion;
use treeline::learn::grow::{grow, GrowParams};

#[test]
fn explore_digits() {
    let ds = smartcore::dataset::digits::load_dataset();
    let n = ds.num_samples;
    assert_eq!(ds.num_features, 64);
    let rows: Vec<u64> = (0..n)
        .map(|i| {
            let mut p = 0u64;
            for j in 0..64 {
                if ds.data[i * 64 + j] >= 8.0 {
                    p |= 1 << j;
                }
            }
            p
        })
        .collect();
    for digit in [0u32, 3, 8] {
        let y: Vec<i32> = ds
            .target
            .iter()
            .map(|&t| (t as u32 == digit) as i32)
            .collect();
        let mut map: BTreeMap<u128, [u64; 2]> = BTreeMap::new();
        for i in 0..n {
            map.entry(rows[i] as u128).or_insert([0, 0])[y[i] as usize] += 1;
        }
        let rr = &rows;
        let vals: Vec<f64> = (0..n)
            .flat_map(|i| (0..64).map(move |j| ((rr[i] >> j) & 1) as f64))
            .collect::<Vec<_>>();
        let x = DenseMatrix::new(n, 64, vals, false).unwrap();
        for (crit, sc) in [
            (Criterion::Gini, SplitCriterion::Gini),
            (Criterion::Entropy, SplitCriterion::Entropy),
        ] {
            for depth in 1..=8u32 {
                let mut entries: Vec<(u128, [u64; 2])> =
                    map.iter().map(|(&p, &c)| (p, c)).collect();
                let t = grow(
                    &mut entries,
                    64,
                    &GrowParams {
                        criterion: crit,
                        max_depth: depth,
                        min_leaf: 1.0,
                        min_gain: 0.0,
                        weights: [1.0, 1.0],
                        max_nodes: 1 << 20,
                    },
                );
                let params = DecisionTreeClassifierParameters::default()
                    .with_criterion(sc.clone())
                    .with_max_depth(depth as u16 + 1)
                    .with_min_samples_leaf(1)
                    .with_min_samples_split(2);
                let tree = DecisionTreeClassifier::fit(&x, &y, params).unwrap();
                let pred: Vec<i32> = tree.predict(&x).unwrap();
                let v = serde_json::to_value(&tree).unwrap();
                let root = v["nodes"][0]["split_feature"].as_u64().unwrap();
                let mut agree = 0;
                let mut ours_ok = 0;
                let mut theirs_ok = 0;
                for i in 0..n {
                    let l = &t.nodes[t.leaf_of(rows[i] as u128)];
                    let ours = (l.counts[1] > l.counts[0]) as i32;
                    if ours == pred[i] {
                        agree += 1;
                    }
                    if ours == y[i] {
                        ours_ok += 1;
                    }
                    if pred[i] == y[i] {
                        theirs_ok += 1;
                    }
                }
                println!("digit {digit} {:?} depth {depth}: root ours {} theirs {root}; agree {agree}/{n}; acc ours {ours_ok} theirs {theirs_ok}; nodes ours {} theirs {}", crit, t.nodes[0].split.map(|s| s.feature as i64).unwrap_or(-1), t.nodes.len(), v["nodes"].as_array().unwrap().len());
            }
        }
    }
}

#[test]
fn explore_quirk() {
    use smartcore::linalg::basic::arrays::MutArrayView1;
    use treeline::learn::criterion::gain;
    let ds = smartcore::dataset::digits::load_dataset();
    let n = ds.num_samples;
    let rows: Vec<u64> = (0..n)
        .map(|i| {
            let mut p = 0u64;
            for j in 0..64 {
                if ds.data[i * 64 + j] >= 8.0 {
                    p |= 1 << j;
                }
            }
            p
        })
        .collect();
    let orders: Vec<Vec<usize>> = (0..64)
        .map(|j| {
            let mut c: Vec<f64> = rows.iter().map(|r| ((r >> j) & 1) as f64).collect();
            c.argsort_mut()
        })
        .collect();
    for digit in [0u32, 3, 8] {
        let y: Vec<usize> = ds
            .target
            .iter()
            .map(|&t| (t as u32 == digit) as usize)
            .collect();
        let mut tot = [0f64; 2];
        for i in 0..n {
            tot[y[i]] += 1.0;
        }
        for crit in [Criterion::Gini, Criterion::Entropy] {
            let mut best_all = (usize::MAX, f64::NEG_INFINITY);
            let mut best_seen = (usize::MAX, f64::NEG_INFINITY);
            let mut nseen = 0;
            for j in 0..64 {
                let mut set = [0f64; 2];
                for i in 0..n {
                    if (rows[i] >> j) & 1 == 1 {
                        set[y[i]] += 1.0;
                    }
                }
                let clear = [tot[0] - set[0], tot[1] - set[1]];
                if set[0] + set[1] == 0.0 || clear[0] + clear[1] == 0.0 {
                    continue;
                }
                let g = gain(crit, tot, clear, set);
                if g > best_all.1 {
                    best_all = (j, g);
                }
                let o = &orders[j];
                let k = o.iter().position(|&i| (rows[i] >> j) & 1 == 1).unwrap();
                let seen = k > 0 && y[o[k]] != y[o[k - 1]];
                if seen {
                    nseen += 1;
                    if g > best_seen.1 {
                        best_seen = (j, g);
                    }
                }
            }
            println!("digit {digit} {crit:?}: best all {best_all:?}, best seen {best_seen:?}, seen {nseen}");
        }
    }
}
