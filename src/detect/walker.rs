//! The per-pixel reference walker.
//!
//! For every pixel the window pattern is assembled and the tree walked from
//! the root to a leaf; the pixel is a detection when the leaf's score
//! reaches the threshold. This is deliberately the plainest possible
//! evaluator: it is the reference any faster evaluator must match bit for
//! bit, so it shares no code with them beyond [`Tree::leaf_of`].
//!
//! Scores of detected pixels are recomputed on demand ([`score_at`]):
//! detections are rare, so the walker never stores a per-pixel score map.

use crate::detect::{finish, FrameResult, Settings};
use crate::frame::BitFrame;
use crate::model::Tree;
use crate::window;

/// The detection mask: pixels whose score is at least `threshold`.
pub fn detect(tree: &Tree, threshold: f64, frame: &BitFrame) -> BitFrame {
    let mut mask = BitFrame::new(frame.width(), frame.height());
    // Leaves at or above the threshold, looked up by index.
    let positive: Vec<bool> = tree
        .nodes()
        .iter()
        .map(|n| matches!(n, crate::model::Node::Leaf(l) if l.score >= threshold))
        .collect();
    window::for_each_row(frame, tree.window(), |y, pats| {
        let row = mask.row_mut(y);
        for (x, &p) in pats.iter().enumerate() {
            if positive[tree.leaf_of(p)] {
                row[x / 64] |= 1 << (x % 64);
            }
        }
    });
    mask
}

/// Score of the pixel at `(x, y)`.
pub fn score_at(tree: &Tree, frame: &BitFrame, x: usize, y: usize) -> f64 {
    tree.score_at(frame, x, y)
}

/// Detection and grouping of one frame.
pub fn run(tree: &Tree, settings: &Settings, frame: &BitFrame) -> FrameResult {
    let raw = detect(tree, settings.threshold, frame);
    // Smoothing pixel by pixel: the reference for the word-parallel votes.
    let raw = crate::detect::smooth::apply_naive(&settings.smoothing, &raw);
    finish(tree, settings, frame, raw)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::{Leaf, Node};
    use crate::window::{Offset, Window};

    #[test]
    fn centre_pixel_tree_copies_the_frame() {
        let w = Window::new(3).unwrap();
        let leaf = |s| {
            Node::Leaf(Leaf {
                counts: [0, 0],
                score: s,
                share: 0.5,
            })
        };
        let c = w.index(Offset { dx: 0, dy: 0 }).unwrap() as u8;
        let tree = Tree::new(
            w,
            vec![
                Node::Split {
                    feature: c,
                    if_clear: 1,
                    if_set: 2,
                },
                leaf(0.0),
                leaf(1.0),
            ],
        )
        .unwrap();
        let f = BitFrame::from_fn(67, 5, |x, y| (x ^ y) % 3 == 0);
        assert_eq!(detect(&tree, 0.5, &f), f);
        // Left neighbour: the mask is the frame shifted right by one.
        let l = w.index(Offset { dx: -1, dy: 0 }).unwrap() as u8;
        let tree = Tree::new(
            w,
            vec![
                Node::Split {
                    feature: l,
                    if_clear: 1,
                    if_set: 2,
                },
                leaf(0.0),
                leaf(1.0),
            ],
        )
        .unwrap();
        let m = detect(&tree, 0.5, &f);
        for y in 0..5 {
            for x in 0..67 {
                assert_eq!(m.get(x, y), x > 0 && f.get(x - 1, y));
            }
        }
    }
}
