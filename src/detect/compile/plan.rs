//! Compiling a frozen tree into the program's ops: constant folding,
//! breadth-first ops, the post-order select lists, and the cost model that
//! chooses which subtrees are selected rather than walked.
//!
//! Everything here runs once per model. It establishes the [`Program`]
//! invariants listed in the parent module's docs (single decisions folded,
//! ops breadth-first with children after parents, every op once in the
//! select list with its subtree a contiguous range ending at itself, slots
//! below `slots`, planes listing every `dx` in use); the evaluator in
//! `exec` relies on them without checking. The plan decides only the speed:
//! any choice of select roots gives the same output bits.

use super::{Program, BLOCK};
use crate::model::{Node, Tree};

/// Outcome: no detection.
pub(super) const DROP: u32 = 0;
/// Outcome: detection.
pub(super) const DETECT: u32 = 1;
/// Outcome `SLOT0 + i`: op `i`.
pub(super) const SLOT0: u32 = 2;

/// Cost model, relative costs per block of [`BLOCK`] words, measured on
/// this project's build machine: a walk visit stores two child masks and
/// tests both for emptiness; a select instruction within a walked block
/// waits on the previous instruction's result; a whole-program select runs
/// each instruction over [`WIDE`](super::WIDE) words at once, which hides that wait.
/// The values are tuned rather than measured ratios, and were tuned with
/// the hand-written AVX2 kernel this module used before (a visit took about
/// 17 ns and a whole-program select instruction about 8 ns per 2,048
/// pixels): visit costs from 2.5 to 3.5 gave the same speed (within 3%) on
/// the demo model and on depth-14 and depth-16 models of the demo data,
/// while 4.5 turned the latter two into whole select programs that ran 40%
/// slower. They have not been tuned again for the compiled-for-AVX2
/// portable kernel.
const VISIT_COST: f64 = 3.5;
const SELECT_COST: f64 = 2.0;
const WIDE_SELECT_COST: f64 = 1.0;
/// Neighbouring pixels mostly take the same paths: a block of `BLOCK * 64`
/// pixels reaches about as many ops as `BLOCK * 64 / CORRELATION`
/// independent pixels would (measured on the demo texture with the demo
/// model: 453 ops reached per 1,024-pixel block, 425 predicted with this
/// factor; 582 per 2,048-pixel block, as [`Reach`](super::Reach) counts
/// them, 595 predicted).
const CORRELATION: f64 = 4.0;
/// Extra cost of entering a selected subtree (the final `acc |= m & v`).
const SELECT_ROOT_COST: f64 = 1.0;

/// One split of the compiled program.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(super) struct Op {
    /// Index into `Program::planes`.
    pub(super) plane: u16,
    /// Vertical offset of the tested pixel.
    pub(super) dy: i8,
    /// Where the pixels with the tested bit set go: [`DROP`], [`DETECT`]
    /// or [`SLOT0`] + the index of the next op.
    pub(super) on_set: u32,
    /// Where the pixels with the tested bit clear go.
    pub(super) on_clear: u32,
}

/// One select instruction:
/// `value = (plane AND value_if_set) OR (NOT plane AND value_if_clear)`,
/// where each value is a constant (`Drop` = zeros, `Detect` = ones) or an
/// earlier result in a slot. The constants are folded into `form`, so an
/// instruction loads only the slots it needs. The value goes to slot
/// `out`, and a child subtree's value that the instruction reads is read
/// from `out` too (a subtree's value replaces its child's, as on a stack),
/// except the second one of [`Form::Both`] and [`Form::BothClearHere`],
/// read from `other`, a different slot.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(super) struct Select {
    /// The op whose plane is tested.
    pub(super) op: u32,
    pub(super) form: Form,
    pub(super) out: u16,
    pub(super) other: u16,
}

/// The shape of a select instruction once its constants are folded in
/// (`b` the plane, `v` the value in slot `out`, `w` the value in slot
/// `other`).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(super) enum Form {
    /// Set -> Detect, clear -> Drop: `b`.
    Plane,
    /// Set -> Drop, clear -> Detect: `!b`.
    NotPlane,
    /// Set -> the set subtree `v`, clear -> Drop: `b & v`.
    SetOnly,
    /// Set -> the set subtree `v`, clear -> Detect: `v | !b`.
    SetOrClear,
    /// Set -> Drop, clear -> the clear subtree `v`: `!b & v`.
    ClearOnly,
    /// Set -> Detect, clear -> the clear subtree `v`: `b | v`.
    PlaneOrClear,
    /// Set -> the set subtree `v`, clear -> the clear subtree `w`:
    /// `(b & v) | (!b & w)`.
    Both,
    /// Set -> the set subtree `w`, clear -> the clear subtree `v`:
    /// `(b & w) | (!b & v)`.
    BothClearHere,
}

/// How [`Program::compile_with`] splits the work between walking and
/// selecting. The output is the same bit for bit; only the speed differs.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Plan {
    /// Per op, whichever the cost model expects to be cheaper.
    Auto,
    /// Walk every op (no select roots).
    Walk,
    /// One select program for the whole tree.
    Select,
}

/// [`Program::compile_with`]: the program of a validated tree for a
/// threshold, with select roots as `plan` says.
pub(super) fn compile(tree: &Tree, threshold: f64, plan: Plan) -> Program {
    let nodes = tree.nodes();
    let n = nodes.len();
    // Decide every subtree that cannot change the outcome: bottom-up
    // (children have larger indices), Some(outcome) if all its leaves
    // agree. Training pixels per node feed the cost model.
    let mut decided: Vec<Option<bool>> = vec![None; n];
    let mut pixels: Vec<u64> = vec![0; n];
    for i in (0..n).rev() {
        (decided[i], pixels[i]) = match &nodes[i] {
            Node::Leaf(l) => (
                Some(l.score >= threshold),
                l.counts[0].saturating_add(l.counts[1]),
            ),
            Node::Split {
                if_clear, if_set, ..
            } => {
                let (c, s) = (*if_clear as usize, *if_set as usize);
                let d = match (decided[c], decided[s]) {
                    (Some(a), Some(b)) if a == b => Some(a),
                    _ => None,
                };
                (d, pixels[c].saturating_add(pixels[s]))
            }
        };
    }
    let window = tree.window();
    if let Some(c) = decided[0] {
        return Program {
            window,
            planes: Vec::new(),
            ops: Vec::new(),
            levels: 0,
            widest: 0,
            select: Vec::new(),
            select_range: Vec::new(),
            select_root: Vec::new(),
            slots: 0,
            constant: Some(c),
        };
    }
    // Distinct dx in use by undecided splits.
    let mut planes: Vec<i8> = nodes
        .iter()
        .enumerate()
        .filter_map(|(i, nd)| match nd {
            Node::Split { feature, .. } if decided[i].is_none() => {
                Some(window.offset(*feature as usize).dx)
            }
            _ => None,
        })
        .collect();
    planes.sort_unstable();
    planes.dedup();
    // Breadth-first over undecided splits: op k is the k-th undecided
    // split reached, so children always come after their parent.
    let mut order: Vec<usize> = vec![0];
    let mut ops: Vec<Op> = Vec::new();
    let mut depth: Vec<usize> = vec![1];
    let mut k = 0;
    while k < order.len() {
        let i = order[k];
        let Node::Split {
            feature,
            if_clear,
            if_set,
        } = nodes[i]
        else {
            unreachable!("undecided nodes are splits")
        };
        let mut outcome = |c: usize| -> u32 {
            match decided[c] {
                Some(true) => DETECT,
                Some(false) => DROP,
                None => {
                    order.push(c);
                    depth.push(depth[k] + 1);
                    SLOT0 + (order.len() - 1) as u32
                }
            }
        };
        let on_clear = outcome(if_clear as usize);
        let on_set = outcome(if_set as usize);
        let o = window.offset(feature as usize);
        ops.push(Op {
            plane: planes.binary_search(&o.dx).expect("plane listed") as u16,
            dy: o.dy,
            on_set,
            on_clear,
        });
        k += 1;
    }
    let levels = depth.iter().copied().max().unwrap_or(0);
    let mut per_level = vec![0usize; levels + 1];
    for &d in &depth {
        per_level[d] += 1;
    }
    let widest = per_level.iter().copied().max().unwrap_or(0);
    let (select, select_range, slots) = post_order(&ops);
    // Chance that a block's pixels reach each op, from the training
    // pixels that reached its node; trees without counts (made by
    // hand) assume every split halves the pixels.
    let total = pixels[0];
    let block_pixels = (BLOCK * 64) as f64 / CORRELATION;
    let reach: Vec<f64> = order
        .iter()
        .zip(&depth)
        .map(|(&node, &d)| {
            let p = if total > 0 {
                pixels[node] as f64 / total as f64
            } else {
                0.5f64.powi(d as i32 - 1)
            };
            1.0 - (1.0 - p).powf(block_pixels)
        })
        .collect();
    let select_root = match plan {
        Plan::Auto => choose_select_roots(&ops, &reach),
        Plan::Walk => vec![false; ops.len()],
        Plan::Select => {
            let mut v = vec![false; ops.len()];
            v[0] = true;
            v
        }
    };
    Program {
        window,
        planes,
        levels,
        widest,
        ops,
        select,
        select_range,
        select_root,
        slots,
        constant: None,
    }
}

/// Every op once in post-order, as select instructions over a stack of
/// values, with the larger child subtree first so the stack stays at most
/// about log2(ops) deep (Sethi and Ullman's order). Returns the
/// instructions, each op's subtree range in them, and the slots in use.
fn post_order(ops: &[Op]) -> (Vec<Select>, Vec<(u32, u32)>, usize) {
    let child = |t: u32| (t >= SLOT0).then(|| (t - SLOT0) as usize);
    // Subtree sizes: children come after their parents.
    let mut size = vec![1usize; ops.len()];
    for i in (0..ops.len()).rev() {
        for c in [ops[i].on_set, ops[i].on_clear]
            .into_iter()
            .filter_map(child)
        {
            size[i] += size[c];
        }
    }
    let slot = |k: usize| k as u16;
    let mut select = Vec::with_capacity(ops.len());
    let mut range = vec![(0u32, 0u32); ops.len()];
    let (mut depth, mut most) = (0usize, 0usize);
    // (op, children done): no recursion, whatever the tree's depth.
    let mut stack = vec![(0usize, false)];
    while let Some((i, done)) = stack.pop() {
        let op = ops[i];
        let (s, c) = (child(op.on_set), child(op.on_clear));
        // The set child is evaluated first when its subtree is larger.
        let set_first = match (s, c) {
            (Some(s), Some(c)) => size[s] >= size[c],
            _ => true,
        };
        if !done {
            range[i].0 = select.len() as u32;
            stack.push((i, true));
            let (first, second) = if set_first { (s, c) } else { (c, s) };
            // The stack pops the first child's subtree first.
            stack.extend(second.map(|k| (k, false)));
            stack.extend(first.map(|k| (k, false)));
            continue;
        }
        let detects = |t: u32| t == DETECT;
        let (form, out, other) = match (s, c) {
            (Some(_), Some(_)) => {
                // The first child's value is lower on the stack, and the
                // result replaces it.
                let (lower, upper) = (slot(depth - 2), slot(depth - 1));
                depth -= 1;
                let form = if set_first {
                    Form::Both
                } else {
                    Form::BothClearHere
                };
                (form, lower, upper)
            }
            (Some(_), None) => {
                let form = if detects(op.on_clear) {
                    Form::SetOrClear
                } else {
                    Form::SetOnly
                };
                (form, slot(depth - 1), 0)
            }
            (None, Some(_)) => {
                let form = if detects(op.on_set) {
                    Form::PlaneOrClear
                } else {
                    Form::ClearOnly
                };
                (form, slot(depth - 1), 0)
            }
            (None, None) => {
                depth += 1;
                most = most.max(depth);
                let form = if detects(op.on_set) {
                    Form::Plane
                } else {
                    Form::NotPlane
                };
                (form, slot(depth - 1), 0)
            }
        };
        select.push(Select {
            op: i as u32,
            form,
            out,
            other,
        });
        range[i].1 = select.len() as u32 - 1;
    }
    (select, range, most)
}

/// Chooses, per op, between walking and selecting its subtree by expected
/// cost per block: a walk visit costs [`VISIT_COST`] plus the expected cost
/// of each op child (weighted by the chance that the block reaches the
/// child, given that it reaches the op); selecting costs [`SELECT_COST`]
/// per op of the subtree ([`WIDE_SELECT_COST`] for the whole program).
/// `reach[i]` is the chance that a block reaches op `i`.
fn choose_select_roots(ops: &[Op], reach: &[f64]) -> Vec<bool> {
    let mut best = vec![0.0f64; ops.len()];
    let mut size = vec![1usize; ops.len()];
    let mut root = vec![false; ops.len()];
    for i in (0..ops.len()).rev() {
        let mut walk = VISIT_COST;
        for t in [ops[i].on_set, ops[i].on_clear] {
            if t >= SLOT0 {
                let c = (t - SLOT0) as usize;
                size[i] += size[c];
                let given = if reach[i] > 0.0 {
                    (reach[c] / reach[i]).min(1.0)
                } else {
                    0.0
                };
                walk += given * best[c];
            }
        }
        let select = SELECT_COST * size[i] as f64 + SELECT_ROOT_COST;
        root[i] = select <= walk;
        best[i] = walk.min(select);
    }
    // The root, when selected, runs as one wide select program.
    if let Some(first) = root.first_mut() {
        *first = WIDE_SELECT_COST * size[0] as f64 <= best[0];
    }
    root
}

#[cfg(test)]
mod tests {
    use super::super::testing::{backends, leaf, split};
    use super::super::Scratch;
    use super::*;
    use crate::detect::walker;
    use crate::frame::BitFrame;
    use crate::window::{Offset, Window};

    #[test]
    fn deep_chains_need_no_recursion_and_few_slots() {
        // A caterpillar of 5,000 splits: each tests the centre's left or
        // right neighbour in turn, its clear side a leaf, its set side the
        // next split. Post-order and evaluation are iterative, and the
        // select stack stays one value deep.
        let w = Window::new(3).unwrap();
        let f = |dx| w.index(Offset { dx, dy: 0 }).unwrap() as u8;
        let n = 5000usize;
        let mut nodes = Vec::new();
        for k in 0..n {
            let i = nodes.len() as u32;
            nodes.push(split(f(if k % 2 == 0 { -1 } else { 1 }), i + 1, i + 2));
            nodes.push(leaf(if k % 3 == 0 { 0.9 } else { 0.1 }));
        }
        nodes.push(leaf(0.8));
        let tree = Tree::new(w, nodes).unwrap();
        let frame = BitFrame::from_fn(200, 3, |x, y| (x * 7 + y) % 4 != 0);
        let mut s = Scratch::default();
        for plan in [Plan::Auto, Plan::Walk, Plan::Select] {
            let p = Program::compile_with(&tree, 0.5, plan);
            assert!(p.slots <= 2, "{} slots", p.slots);
            for b in backends() {
                assert_eq!(
                    p.detect_with(b, &frame, &mut s),
                    walker::detect(&tree, 0.5, &frame),
                    "{plan:?} {b:?}"
                );
            }
        }
    }

    #[test]
    fn select_lists_every_op_once_with_its_subtree_contiguous() {
        // A full tree of depth 4 over varied offsets, with leaves on both
        // sides of the threshold so that nothing folds.
        let w = Window::new(5).unwrap();
        let mut nodes = Vec::new();
        for i in 0..15u32 {
            nodes.push(split((i * 7 % 25) as u8, 2 * i + 1, 2 * i + 2));
        }
        for i in 0..16 {
            nodes.push(leaf(if i % 2 == 0 { 0.9 } else { 0.1 }));
        }
        let tree = Tree::new(w, nodes).unwrap();
        let p = Program::compile_with(&tree, 0.5, Plan::Walk);
        assert_eq!(p.ops.len(), 15);
        assert_eq!(p.select.len(), p.ops.len());
        let mut seen = vec![false; p.ops.len()];
        for ins in &p.select {
            assert!(!std::mem::replace(&mut seen[ins.op as usize], true));
            assert!((ins.out as usize) < p.slots);
            if let Form::Both | Form::BothClearHere = ins.form {
                assert!((ins.other as usize) < p.slots && ins.other != ins.out);
            }
        }
        for (i, op) in p.ops.iter().enumerate() {
            let (a, b) = p.select_range[i];
            assert_eq!(p.select[b as usize].op as usize, i);
            for t in [op.on_set, op.on_clear] {
                if t >= SLOT0 {
                    let c = (t - SLOT0) as usize;
                    assert!(c > i, "children come after their parent");
                    let (ca, cb) = p.select_range[c];
                    assert!(a <= ca && cb < b, "a child's subtree is inside");
                }
            }
        }
    }
}
