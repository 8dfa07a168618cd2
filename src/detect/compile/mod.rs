//! The compiled evaluator: a frozen tree and its threshold turned into a
//! word-parallel bit program.
//!
//! A tree whose tests are single pixels of a binary frame can be evaluated
//! for 64 pixels at once per machine word. Two formulations are used, and
//! the program mixes them subtree by subtree:
//!
//! - **Walk** (top down, with skipping). Every op has a *mask*: the pixels
//!   that reach it. A split's children get `mask AND plane` and
//!   `mask AND NOT plane`, where the plane is the frame shifted by the
//!   tested offset; a child is visited only if its mask has a pixel. The
//!   cost follows the paths the pixels take, not the size of the tree, but
//!   every visit pays for the masks it stores and the emptiness tests.
//! - **Select** (bottom up, no skipping). A subtree is a Boolean function of
//!   the planes: `value = (plane AND value_if_set) OR (NOT plane AND
//!   value_if_clear)`, with `Drop` = all zeros and `Detect` = all ones.
//!   Evaluated in post-order over a small stack of values, it has no
//!   data-dependent branches and stores one value per op: less than a walk
//!   visit per op (about half when the whole program is one select
//!   program), but it pays for every op of the subtree.
//!
//! [`Program::compile`] decides per op which one evaluates its subtree, from
//! a cost model over the tree's own training counts (the share of training
//! pixels reaching each node gives the chance that a block of pixels
//! reaches it): a subtree becomes a *select root* when selecting it costs
//! less than the expected walk below it. Small, dense trees thus become one
//! straight select program; large trees with rare deep paths are walked at
//! the top and selected near the leaves.
//!
//! [`Program`] invariants (established by [`Program::compile`], relied on by
//! the evaluator):
//! - subtrees whose leaves all fall on one side of the threshold are single
//!   decisions: an op's outcome is `Drop` (no detection), `Detect`, or a
//!   later op, never a leaf that needs its score;
//! - ops are in breadth-first order (op 0 is the root), so every op's
//!   children come after it; each op is the child of exactly one outcome of
//!   exactly one op (the root excepted);
//! - `select` lists every op once in post-order, the larger child subtree
//!   first: the subtree of op `i` is the contiguous range `select_range[i]`,
//!   whose last instruction is `i` itself and writes the subtree's value;
//!   instruction slots stay below `slots` (about log2 of the ops);
//! - if op 0 is a select root, the whole program is one select program.
//! - `planes` lists the distinct horizontal offsets the program uses, and
//!   every op's `plane` indexes it; every op's `dy` is within the window.
//!
//! Evaluation pads the frame with zero rows above and below and builds, once
//! per frame, one horizontally shifted copy per distinct `dx`, all with the
//! frame's row stride (plus a chunk of zero words at the end). Because every
//! copy shares that stride, the test of offset `(dx, dy)` for word `i` of the
//! frame is word `i + dy * stride` of copy `dx`: one aligned whole-block
//! load, whatever the row. A walked program runs over blocks of [`BLOCK`]
//! consecutive words, level by level: each level's pending (op, mask) pairs
//! are visited in turn, and a visit writes both child masks to fixed slots
//! and lists the ones that received pixels by advancing a counter, without
//! branching, so consecutive visits do not wait on each other. A whole
//! select program runs over chunks of [`WIDE`] words instead.
//!
//! Scores are not computed here: detections are rare, so the caller finds
//! the leaf (and score) of detected pixels with the reference walker.
//!
//! The work is split in three parts, each keeping its own part of the
//! contract:
//! - `plan`: the tree to ops, the post-order select lists and the cost
//!   model's choice of select roots (establishes the invariants above);
//! - `exec`: per-frame state ([`Scratch`], [`Reach`], the shifted planes)
//!   and the block loop (relies on them);
//! - `kernels`: the arithmetic on one block or chunk of words, and the
//!   choice of [`Backend`] at run time.
//!
//! This module depends on the frozen [`Tree`] only, never on the learner.
//!
//! # Why deep trees run slower
//!
//! The demo model's 2,000 Mpx/s target cannot be met on this machine by the walk as it is built,
//! whatever its block size. The figures behind that (`cargo bench --bench evaluate`, the demo model
//! on the 2048x2048 demo texture; user-level figures are in README.md):
//! - `burlwatch bench` reports how many ops a block of 2,048 pixels reaches. On the demo texture
//!   the demo model's blocks reach 582 ops on average (0.28 per pixel; every pixel passes through
//!   about 11 ops, but neighbouring pixels take different paths through the weave).
//! - Each op a block reaches costs a visit: 8 vector loads of the mask, 8 of the shifted frame, and
//!   16 vector stores of the two child masks. This machine's core (AMD EPYC, AVX2, about 3.3 GHz
//!   as a chain of dependent adds measures it) is assumed to store one 32-byte vector per cycle
//!   (our reading of AMD's optimization guide for this core family, from memory), so the stores
//!   alone take 16 cycles a visit: 4.5 cycles a pixel, or about 730 Mpx/s at best. A visit
//!   measured 17 ns with the earlier hand-written AVX2 kernel (about 57 cycles, 121 instructions
//!   as cachegrind counts them): the masks of the busiest levels do not fit in the first-level
//!   cache.
//! - Smaller blocks reach fewer ops each but more per pixel (257 per 256 pixels, 132 per 64), and
//!   the floor set by their stores stays above 2 cycles a pixel (below 1,650 Mpx/s). Selecting
//!   every op instead of walking costs 6,601 instructions per 256 pixels.
//! - 2,000 Mpx/s would need 1.65 cycles a pixel. Grouping the pixels of 2,048-pixel blocks by the
//!   weave's phase (rows and columns one thread period apart) would cut their visits by about 1.6
//!   (0.18 instead of 0.28 a pixel, measured on the demo texture): a store floor near 2.9 cycles a
//!   pixel, and the real cost several times higher. Smaller trees are much faster (above), but the
//!   demo model's pixel F1 needs its depth: the depth-14 model that still reaches pixel F1 0.82
//!   runs at about 250 Mpx/s.

mod exec;
mod kernels;
mod plan;

pub use exec::{run, Reach, Scratch};
pub use kernels::Backend;
pub use plan::Plan;

use crate::frame::BitFrame;
use crate::model::Tree;
use crate::window::Window;
use plan::{Op, Select, SLOT0};

/// Words walked together (32 x 64 = 2,048 pixels): wide enough to spread
/// each visit's fixed cost over many pixels, small enough that a block's
/// pixels skip most of the tree. Measured on the demo model and texture,
/// 32 words beat 16 by 4-9% and 64 lose.
pub const BLOCK: usize = 32;

/// Words per chunk when the whole program is one select program: several
/// blocks per instruction, so the chain from one instruction's result to
/// the next instruction's input overlaps with independent work.
pub const WIDE: usize = 64;

/// An immutable, shareable bit program for one tree and threshold.
#[derive(Clone, Debug, PartialEq)]
pub struct Program {
    window: Window,
    /// Distinct horizontal offsets in use, ascending.
    planes: Vec<i8>,
    /// Split ops in breadth-first order; op 0 is the root.
    ops: Vec<Op>,
    /// Levels of the program (longest chain of ops).
    levels: usize,
    /// Most ops on one level.
    widest: usize,
    /// Every op once, in post-order, as select instructions.
    select: Vec<Select>,
    /// Per op: the first and last index in `select` of its subtree.
    select_range: Vec<(u32, u32)>,
    /// Per op: whether the walk evaluates its subtree by select.
    select_root: Vec<bool>,
    /// Select value slots in use.
    slots: usize,
    /// When the whole tree is one decision: the root's outcome.
    constant: Option<bool>,
}

impl Program {
    /// Compiles a validated tree for a threshold.
    pub fn compile(tree: &Tree, threshold: f64) -> Program {
        Program::compile_with(tree, threshold, Plan::Auto)
    }

    /// Compiles with a chosen split between walking and selecting (for
    /// tests and measurements; [`Program::compile`] chooses by cost).
    pub fn compile_with(tree: &Tree, threshold: f64, plan: Plan) -> Program {
        plan::compile(tree, threshold, plan)
    }

    /// Number of split ops in the program.
    pub fn ops(&self) -> usize {
        self.ops.len()
    }

    /// Number of levels (the longest chain of ops).
    pub fn depth(&self) -> usize {
        self.levels
    }

    /// The distinct horizontal offsets the program shifts the frame by.
    pub fn planes(&self) -> &[i8] {
        &self.planes
    }

    /// How the program evaluates: `(walked ops, selected ops)`. A program
    /// with no walked op is one straight select program.
    pub fn strategy(&self) -> (usize, usize) {
        let mut selected = 0;
        let mut stack = if self.ops.is_empty() {
            vec![]
        } else {
            vec![0u32]
        };
        let mut walked = 0;
        while let Some(i) = stack.pop() {
            let i = i as usize;
            if self.select_root[i] {
                let (a, b) = self.select_range[i];
                selected += (b - a + 1) as usize;
                continue;
            }
            walked += 1;
            for t in [self.ops[i].on_set, self.ops[i].on_clear] {
                if t >= SLOT0 {
                    stack.push(t - SLOT0);
                }
            }
        }
        (walked, selected)
    }

    /// The detection mask of a frame, with the best backend available.
    pub fn detect(&self, frame: &BitFrame, scratch: &mut Scratch) -> BitFrame {
        self.detect_with(Backend::detect(), frame, scratch)
    }

    /// The detection mask of a frame with a chosen backend (falls back to
    /// the portable one if the processor lacks it).
    pub fn detect_with(
        &self,
        backend: Backend,
        frame: &BitFrame,
        scratch: &mut Scratch,
    ) -> BitFrame {
        let mut out = BitFrame::new(frame.width(), frame.height());
        self.detect_into(backend, frame, scratch, &mut out);
        out
    }

    /// Writes the detection mask into `out` (same size as `frame`).
    pub fn detect_into(
        &self,
        backend: Backend,
        frame: &BitFrame,
        scratch: &mut Scratch,
        out: &mut BitFrame,
    ) {
        exec::detect_into(self, backend, frame, scratch, out)
    }
}

/// Small trees and the backends to run them on, for the unit tests of
/// every part.
#[cfg(test)]
mod testing {
    use super::Backend;
    use crate::model::{Leaf, Node};

    pub fn leaf(score: f64) -> Node {
        Node::Leaf(Leaf {
            counts: [0, 0],
            score,
            share: 0.0,
        })
    }

    pub fn split(feature: u8, if_clear: u32, if_set: u32) -> Node {
        Node::Split {
            feature,
            if_clear,
            if_set,
        }
    }

    /// The portable backend and, where it differs, the best one here.
    pub fn backends() -> Vec<Backend> {
        let mut v = vec![Backend::Portable];
        if Backend::detect() != Backend::Portable {
            v.push(Backend::detect());
        }
        v
    }
}

#[cfg(test)]
mod tests {
    use super::testing::{backends, leaf, split};
    use super::*;
    use crate::detect::walker;
    use crate::window::Offset;

    #[test]
    fn matches_the_walker_on_a_small_tree() {
        let w = Window::new(5).unwrap();
        let f = |dx, dy| w.index(Offset { dx, dy }).unwrap() as u8;
        let tree = Tree::new(
            w,
            vec![
                split(f(0, 0), 1, 2),
                split(f(-2, 1), 3, 4),
                split(f(2, -2), 5, 6),
                leaf(0.1),
                leaf(0.9),
                leaf(0.7),
                leaf(0.2),
            ],
        )
        .unwrap();
        let frame = BitFrame::from_fn(130, 9, |x, y| (x * 13 + y * 7) % 5 < 2);
        let mut s = Scratch::default();
        for thr in [0.0, 0.15, 0.5, 0.8, 0.95] {
            for plan in [Plan::Auto, Plan::Walk, Plan::Select] {
                let p = Program::compile_with(&tree, thr, plan);
                for b in backends() {
                    assert_eq!(
                        p.detect_with(b, &frame, &mut s),
                        walker::detect(&tree, thr, &frame),
                        "threshold {thr}, {plan:?}, {b:?}"
                    );
                }
            }
        }
    }
}
