//! A tree read as rules: one rule per leaf, made of the conditions on the
//! path from the root to that leaf, with the leaf's score and training
//! counts. `burlwatch rules` prints them; they are how a person checks what
//! a model looks at.
//!
//! Design decision: paths are followed upwards through a parent table
//! built in one forward pass over the node array (every child has a larger
//! index than its parent), never by recursion, since the data decide how
//! deep a tree grows. Rules come in the order of their leaves in the array.
//! The JSON form ([`json`]) is kept apart from these types, so it can stay
//! as it is while they change.

use super::{Node, Tree};
use crate::window::Offset;

/// One test on the path to a leaf: the pixel at `offset` from the centre
/// is set (ink) or clear.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Condition {
    pub offset: Offset,
    pub set: bool,
}

/// A leaf as a rule: where every condition holds, the pixel gets `score`.
#[derive(Clone, Debug, PartialEq)]
pub struct Rule {
    /// The leaf's index in the tree's node array.
    pub leaf: usize,
    /// The tests from the root down to the leaf; empty for a tree that is
    /// one leaf.
    pub conditions: Vec<Condition>,
    /// The leaf's score.
    pub score: f64,
    /// Clear and target training pixels that reached the leaf.
    pub counts: [u64; 2],
    /// Whether the score reaches the threshold the rules were listed for.
    pub detects: bool,
}

/// The rules of `tree`, one per leaf in node order; a rule detects when its
/// score is at least `threshold`.
pub fn list(tree: &Tree, threshold: f64) -> Vec<Rule> {
    let nodes = tree.nodes();
    // The parent of every node and the branch taken to reach it.
    let mut up: Vec<Option<(usize, bool)>> = vec![None; nodes.len()];
    for (i, n) in nodes.iter().enumerate() {
        if let Node::Split {
            if_clear, if_set, ..
        } = n
        {
            up[*if_clear as usize] = Some((i, false));
            up[*if_set as usize] = Some((i, true));
        }
    }
    let mut rules = Vec::new();
    for (i, n) in nodes.iter().enumerate() {
        let Node::Leaf(l) = n else { continue };
        let mut conditions = Vec::new();
        let mut at = i;
        while let Some((parent, set)) = up[at] {
            if let Node::Split { feature, .. } = nodes[parent] {
                conditions.push(Condition {
                    offset: tree.offset(feature),
                    set,
                });
            }
            at = parent;
        }
        conditions.reverse();
        rules.push(Rule {
            leaf: i,
            conditions,
            score: l.score,
            counts: l.counts,
            detects: l.score >= threshold,
        });
    }
    rules
}

/// The JSON form of the rules, as `burlwatch rules --json` prints it: an
/// array of [`json::RuleJson`].
pub mod json {
    use serde::{Deserialize, Serialize};

    use super::Rule;

    /// One rule: `{"leaf", "conditions", "score", "clear", "target",
    /// "detects"}`.
    #[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
    pub struct RuleJson {
        /// The leaf's index in the model file's node array.
        pub leaf: usize,
        /// The tests from the root down, in order.
        pub conditions: Vec<ConditionJson>,
        pub score: f64,
        /// Clear training pixels that reached the leaf.
        pub clear: u64,
        /// Target training pixels that reached the leaf.
        pub target: u64,
        /// Whether the score reaches the model's threshold.
        pub detects: bool,
    }

    /// One test: the pixel at `(dx, dy)` from the centre (+x right, +y
    /// down) is set, or clear.
    #[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
    pub struct ConditionJson {
        pub dx: i8,
        pub dy: i8,
        pub set: bool,
    }

    impl From<&Rule> for RuleJson {
        fn from(r: &Rule) -> RuleJson {
            RuleJson {
                leaf: r.leaf,
                conditions: r
                    .conditions
                    .iter()
                    .map(|c| ConditionJson {
                        dx: c.offset.dx,
                        dy: c.offset.dy,
                        set: c.set,
                    })
                    .collect(),
                score: r.score,
                clear: r.counts[0],
                target: r.counts[1],
                detects: r.detects,
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::Leaf;
    use crate::window::Window;

    fn leaf(score: f64, counts: [u64; 2]) -> Node {
        Node::Leaf(Leaf {
            counts,
            score,
            share: 0.25,
        })
    }

    fn split(feature: u8, if_clear: u32, if_set: u32) -> Node {
        Node::Split {
            feature,
            if_clear,
            if_set,
        }
    }

    fn cond(dx: i8, dy: i8, set: bool) -> Condition {
        Condition {
            offset: Offset { dx, dy },
            set,
        }
    }

    #[test]
    fn a_small_tree_reads_as_its_paths() {
        // 3x3 window, features row by row from the top left: 4 is the
        // centre, 5 the pixel to its right, 1 the pixel above.
        //
        //   0: centre?  clear -> 1, set -> 2
        //   1: leaf 0.1                       (centre clear)
        //   2: right?   clear -> 3, set -> 4
        //   3: above?   clear -> 5, set -> 6
        //   4: leaf 0.9                       (centre set, right set)
        //   5: leaf 0.2                       (centre set, right clear, above clear)
        //   6: leaf 0.6                       (centre set, right clear, above set)
        let tree = Tree::new(
            Window::new(3).unwrap(),
            vec![
                split(4, 1, 2),
                leaf(0.1, [90, 10]),
                split(5, 3, 4),
                split(1, 5, 6),
                leaf(0.9, [1, 9]),
                leaf(0.2, [8, 2]),
                leaf(0.6, [4, 6]),
            ],
        )
        .unwrap();
        let rules = list(&tree, 0.5);
        let want = vec![
            Rule {
                leaf: 1,
                conditions: vec![cond(0, 0, false)],
                score: 0.1,
                counts: [90, 10],
                detects: false,
            },
            Rule {
                leaf: 4,
                conditions: vec![cond(0, 0, true), cond(1, 0, true)],
                score: 0.9,
                counts: [1, 9],
                detects: true,
            },
            Rule {
                leaf: 5,
                conditions: vec![cond(0, 0, true), cond(1, 0, false), cond(0, -1, false)],
                score: 0.2,
                counts: [8, 2],
                detects: false,
            },
            Rule {
                leaf: 6,
                conditions: vec![cond(0, 0, true), cond(1, 0, false), cond(0, -1, true)],
                score: 0.6,
                counts: [4, 6],
                detects: true,
            },
        ];
        assert_eq!(rules, want);
        // The threshold decides which rules detect, and nothing else.
        let strict = list(&tree, 0.9);
        assert_eq!(
            strict.iter().map(|r| r.detects).collect::<Vec<_>>(),
            [false, true, false, false]
        );
        // The JSON form names offsets and counts, never feature indices.
        let v = serde_json::to_value(json::RuleJson::from(&rules[2])).unwrap();
        assert_eq!(
            v,
            serde_json::json!({
                "leaf": 5,
                "conditions": [
                    {"dx": 0, "dy": 0, "set": true},
                    {"dx": 1, "dy": 0, "set": false},
                    {"dx": 0, "dy": -1, "set": false}
                ],
                "score": 0.2,
                "clear": 8,
                "target": 2,
                "detects": false
            })
        );
    }

    #[test]
    fn a_lone_leaf_is_one_unconditional_rule() {
        let tree = Tree::new(Window::new(5).unwrap(), vec![leaf(0.0, [7, 0])]).unwrap();
        let rules = list(&tree, 0.5);
        assert_eq!(rules.len(), 1);
        assert!(rules[0].conditions.is_empty());
        assert!(!rules[0].detects);
        // Threshold 0 detects everything, even a score of 0.
        assert!(list(&tree, 0.0)[0].detects);
    }

    #[test]
    fn a_deep_chain_gives_every_leaf_its_whole_path() {
        // Split k tests feature k % 9 and sends the set branch down the
        // chain; its clear branch is a leaf. Depth 2000.
        let depth = 2000u32;
        let mut nodes = Vec::new();
        for k in 0..depth {
            let here = nodes.len() as u32;
            nodes.push(split((k % 9) as u8, here + 1, here + 2));
            nodes.push(leaf(0.0, [1, 0]));
        }
        nodes.push(leaf(1.0, [0, 1]));
        let w = Window::new(3).unwrap();
        let tree = Tree::new(w, nodes).unwrap();
        let rules = list(&tree, 0.5);
        assert_eq!(rules.len(), depth as usize + 1);
        for (k, r) in rules.iter().enumerate() {
            let len = (k + 1).min(depth as usize);
            assert_eq!(r.conditions.len(), len, "rule {k}");
            for (j, c) in r.conditions.iter().enumerate() {
                assert_eq!(c.offset, w.offset(j % 9));
                // Every test on the way is passed as set, except a leaf's
                // own last one.
                assert_eq!(
                    c.set,
                    j + 1 < len || k == depth as usize,
                    "rule {k} test {j}"
                );
            }
        }
        assert!(rules.last().unwrap().detects);
    }
}
