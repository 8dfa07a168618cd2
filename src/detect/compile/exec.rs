//! Running a compiled program on frames: the per-frame shifted planes, the
//! per-worker [`Scratch`], the walk's block loop and the whole-program
//! select loop, and [`run`] (detection plus grouping of one frame).
//!
//! Invariants kept here: every load the loops make is a whole block (or
//! chunk) of words inside the shifted planes (`prepare` pads each plane
//! with a chunk of zero words and resolves each op to the offset of its
//! plane row); and the output has no padding bits set (every walk starts
//! from the block's valid pixels, and the select loop masks its result by
//! them). All indexing is checked: the checks are cheap where they stand
//! (see [`Program::block`]), and this module has no `unsafe` but the call
//! into the AVX2 build of the loop, made after AVX2 was detected.

use super::kernels::{self, Lanes, Mask};
use super::plan::{DETECT, DROP, SLOT0};
use super::{Backend, Program, BLOCK, WIDE};
use crate::detect::{FrameResult, Settings};
use crate::frame::BitFrame;
use crate::model::Tree;

// Planes and the valid mask are padded by a chunk of words, which must
// cover a block read from the frame's last word too.
const _: () = assert!(WIDE >= BLOCK, "a chunk of padding covers a block");

/// What the evaluation loop needs of one op, resolved for a frame's layout.
#[derive(Clone, Copy, Debug, Default)]
struct Step {
    /// Where the op's tested plane row starts, relative to a block.
    offset: u32,
    /// The ops its set and clear pixels go to (meaningful when pushed).
    next: [u32; 2],
    /// [`PUSH_SET`] `<< k`: outcome `k` (0 set, 1 clear) is an op to push;
    /// [`DETECT_SET`] `<< k`: it is `Detect`; [`SELECTS`]: this op's
    /// subtree is evaluated by select.
    flags: u8,
}

const PUSH_SET: u8 = 1;
const DETECT_SET: u8 = 4;
const SELECTS: u8 = 16;

/// A level's pending ops and the masks of the pixels that reach them. The
/// visit of entry `e` writes its two children's masks to slots `2e` and
/// `2e + 1` of the next level, whatever their fate, and lists only those
/// that are pending: the big stores never wait for the list's length.
#[derive(Default, Debug)]
struct Pending {
    /// (op, index of its mask in `masks`).
    list: Vec<(u32, u32)>,
    masks: Vec<Mask>,
}

/// Per-worker buffers, reused from frame to frame: after the first frame
/// of a size, evaluation allocates nothing.
#[derive(Default, Debug)]
pub struct Scratch {
    planes: Vec<u64>,
    valid: Vec<u64>,
    steps: Vec<Step>,
    cur: Pending,
    next: Pending,
    /// Select values of one block.
    slots: Vec<Mask>,
    /// Select values of one chunk (whole-program select).
    wide: Vec<Lanes<WIDE>>,
    /// The detections of one block.
    acc: Mask,
    /// What the last frame cost the walk (see [`Scratch::reach`]).
    reach: Reach,
}

/// How much of a walked program the blocks of one frame reached: the
/// figure that sets the speed of a large tree, because every visit pays
/// for a whole block whatever number of its pixels reach the op.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub struct Reach {
    /// Blocks of [`BLOCK`] words walked (0 for a whole select program or
    /// a constant one).
    pub blocks: u64,
    /// (block, op) pairs visited: split ops and select roots that
    /// received pixels, summed over the blocks.
    pub visits: u64,
}

impl Reach {
    /// Average visits per block (0 when nothing was walked).
    pub fn per_block(&self) -> f64 {
        if self.blocks == 0 {
            0.0
        } else {
            self.visits as f64 / self.blocks as f64
        }
    }
}

impl Scratch {
    /// What the walk of the last frame evaluated with this scratch cost.
    pub fn reach(&self) -> Reach {
        self.reach
    }
}

/// [`Program::detect_into`]: the detection mask of `frame` into `out`.
pub(super) fn detect_into(
    program: &Program,
    backend: Backend,
    frame: &BitFrame,
    scratch: &mut Scratch,
    out: &mut BitFrame,
) {
    assert!(out.same_size(frame), "output mask size");
    scratch.reach = Reach::default();
    if frame.is_empty() {
        return;
    }
    if let Some(c) = program.constant {
        out.words_mut().fill(if c { u64::MAX } else { 0 });
        out.clear_padding();
        return;
    }
    program.prepare(frame, scratch);
    match backend {
        #[cfg(target_arch = "x86_64")]
        Backend::Avx2 if backend.available() => {
            // SAFETY: `run_avx2` is compiled for AVX2 and this processor
            // has it (checked just above).
            unsafe { program.run_avx2(frame, scratch, out) }
        }
        _ => program.run(frame, scratch, out),
    }
}

impl Program {
    /// Builds the padded, shifted planes, resolves every op's plane offset
    /// and sizes the buffers.
    fn prepare(&self, frame: &BitFrame, s: &mut Scratch) {
        let stride = frame.stride();
        let r = self.window.radius() as usize;
        let padded_rows = frame.height() + 2 * r;
        // A chunk's worth of zero words after each plane, so every load is a
        // whole block or chunk, even the frame's last one.
        let plane_words = padded_rows * stride + WIDE;
        assert!(
            plane_words * self.planes.len() <= u32::MAX as usize,
            "frame too large for 32-bit plane offsets"
        );
        s.planes.clear();
        s.planes.resize(plane_words * self.planes.len(), 0);
        for (p, &dx) in self.planes.iter().enumerate() {
            let base = p * plane_words + r * stride;
            for y in 0..frame.height() {
                let row = frame.row(y);
                let dst = &mut s.planes[base + y * stride..base + (y + 1) * stride];
                shift_row(row, dx, dst);
            }
        }
        // Valid bits of every word of the frame.
        s.valid.clear();
        s.valid.resize(stride * frame.height(), u64::MAX);
        s.valid.resize(stride * frame.height() + WIDE, 0);
        let last = frame.last_word_mask();
        for y in 0..frame.height() {
            s.valid[y * stride + stride - 1] = last;
        }
        s.steps.clear();
        s.steps.extend(self.ops.iter().enumerate().map(|(i, op)| {
            let offset =
                op.plane as usize * plane_words + (r as isize + op.dy as isize) as usize * stride;
            let mut flags = 0;
            let mut next = [0u32; 2];
            for (k, t) in [op.on_set, op.on_clear].into_iter().enumerate() {
                match t {
                    DROP => {}
                    DETECT => flags |= DETECT_SET << k,
                    t => {
                        flags |= PUSH_SET << k;
                        next[k] = t - SLOT0;
                    }
                }
            }
            if self.select_root[i] {
                flags |= SELECTS;
            }
            Step {
                offset: offset as u32,
                next,
                flags,
            }
        }));
        // A level's pending list holds at most its ops, and at most one per
        // pixel of the block (the masks of a level are disjoint and not
        // empty), so at most `cap`; a level of `pending` visits writes list
        // entries and mask slots below `2 * pending`. Every entry and slot
        // is written before it is read, so buffers only grow: no clearing
        // per frame (they hold megabytes).
        let cap = self.widest.clamp(1, BLOCK * 64);
        for v in [&mut s.cur, &mut s.next] {
            if v.list.len() < 2 * cap {
                v.list.resize(2 * cap, (0, 0));
            }
            if v.masks.len() < 2 * cap {
                v.masks.resize(2 * cap, Mask::default());
            }
        }
        if s.slots.len() < self.slots.max(1) {
            s.slots.resize(self.slots.max(1), Mask::default());
        }
        if self.select_root[0] && s.wide.len() < self.slots.max(1) {
            s.wide.resize(self.slots.max(1), Lanes::default());
        }
    }

    /// The evaluation loop compiled with AVX2: the same code as
    /// [`Program::run`], vectorised for 256-bit registers. Callers must
    /// check that the processor has AVX2.
    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx2")]
    fn run_avx2(&self, frame: &BitFrame, s: &mut Scratch, out: &mut BitFrame) {
        self.run_body(frame, s, out)
    }

    /// The evaluation loop for the baseline target.
    fn run(&self, frame: &BitFrame, s: &mut Scratch, out: &mut BitFrame) {
        self.run_body(frame, s, out)
    }

    /// The evaluation loop, inlined into each backend so each is compiled
    /// with its own target features: every block of the frame from its
    /// root mask (the block's valid pixels) to its detections.
    #[inline(always)]
    fn run_body(&self, frame: &BitFrame, s: &mut Scratch, out: &mut BitFrame) {
        let total = frame.stride() * frame.height();
        let Scratch {
            planes,
            valid,
            steps,
            cur,
            next,
            slots,
            wide,
            acc,
            reach,
        } = s;
        let detected = out.words_mut();
        if self.select_root[0] {
            // One straight select program, a chunk of words at a time.
            let last = self.select.last().expect("a program has ops").out as usize;
            let mut start = 0;
            while start < total {
                let len = WIDE.min(total - start);
                for ins in &self.select {
                    let o = steps[ins.op as usize].offset as usize + start;
                    let plane: &[u64; WIDE] = planes[o..o + WIDE].try_into().expect("padded");
                    kernels::select(plane, wide, *ins);
                }
                for (k, d) in detected[start..start + len].iter_mut().enumerate() {
                    *d = wide[last].0[k] & valid[start + k];
                }
                start += len;
            }
            return;
        }
        let mut start = 0;
        while start < total {
            let len = BLOCK.min(total - start);
            let root: [u64; BLOCK] = valid[start..start + BLOCK].try_into().expect("padded");
            // The planes from this block's first word on: `prepare` padded
            // them so that a block at every step's offset stays inside.
            let planes = &planes[start..];
            self.block(root, planes, steps, cur, next, slots, acc, reach);
            // The root mask excluded padding bits, so `acc` has none.
            detected[start..start + len].copy_from_slice(&acc.0[..len]);
            start += len;
        }
    }

    /// One block, into `acc`: level by level over the pending (op, mask)
    /// pairs. A walked op splits its mask and appends the children that
    /// received pixels to the next level's list (branch-free: both are
    /// written, only those wanted are counted); a select root adds its
    /// subtree's value, masked by the pixels that reached it.
    ///
    /// This is the evaluator's hot loop. Its reads are bounds-checked: the
    /// checks are well-predicted branches, and unchecked reads measured
    /// no faster than noise. What matters is where they stand: a visit
    /// checks everything it will touch before the split, and uses the
    /// children's emptiness (for the list) before anything else. A check
    /// between the split and that use kept a block of child vectors alive
    /// across it, spilled to the stack, and cost a quarter of the walk.
    /// For the same reason the block's detections stay in `acc`, in the
    /// [`Scratch`], and not in a local array that the compiler may keep in
    /// registers across visits.
    #[allow(clippy::too_many_arguments)]
    #[inline(always)]
    fn block(
        &self,
        root: [u64; BLOCK],
        planes: &[u64],
        steps: &[Step],
        cur: &mut Pending,
        next: &mut Pending,
        slots: &mut [Mask],
        acc: &mut Mask,
        reach: &mut Reach,
    ) {
        // Plane words of this block at a step's offset.
        let block = |offset: u32| -> &[u64; BLOCK] {
            let o = offset as usize;
            planes[o..o + BLOCK].try_into().expect("padded")
        };
        *acc = Mask::default();
        reach.blocks += 1;
        cur.list[0] = (0, 0);
        cur.masks[0] = Lanes(root);
        let mut pending = 1;
        while pending > 0 {
            reach.visits += pending as u64;
            // The level reads entries below `pending` and writes entries
            // and mask slots below `2 * pending` (a visit adds at most two
            // entries, so `n <= 2e` at visit `e`). Checked once here, which
            // lets the compiler drop most checks of the visits.
            assert!(
                pending <= cur.list.len()
                    && 2 * pending <= next.list.len()
                    && 2 * pending <= next.masks.len(),
                "a level's lists fit its buffers"
            );
            let mut n = 0;
            for e in 0..pending {
                let (i, slot) = cur.list[e];
                let step = steps[i as usize];
                let m = &cur.masks[slot as usize];
                if step.flags & SELECTS != 0 {
                    let (a, b) = self.select_range[i as usize];
                    for ins in &self.select[a as usize..=b as usize] {
                        kernels::select(block(steps[ins.op as usize].offset), slots, *ins);
                    }
                    let v = &slots[self.select[b as usize].out as usize];
                    kernels::keep(acc, m, v);
                    continue;
                }
                // Slots `2e` and `2e + 1` of the other level's buffer, and
                // list entries `n` and `n + 1`: both below `2 * pending`.
                let kids: &mut [Mask; 2] = (&mut next.masks[2 * e..2 * e + 2])
                    .try_into()
                    .expect("two slots");
                let entries: &mut [(u32, u32); 2] =
                    (&mut next.list[n..n + 2]).try_into().expect("two entries");
                let [any_set, any_clear] = kernels::split(m, block(step.offset), kids);
                entries[0] = (step.next[0], 2 * e as u32);
                let p = pushes(step, 0, any_set);
                entries[p] = (step.next[1], 2 * e as u32 + 1);
                n += p + pushes(step, 1, any_clear);
                if step.flags & (DETECT_SET | DETECT_SET << 1) != 0 {
                    kernels::detect(acc, kids, [detect_word(step, 0), detect_word(step, 1)]);
                }
            }
            std::mem::swap(cur, next);
            pending = n;
        }
    }
}

/// The all-ones word where a step's outcome `k` (0 set, 1 clear) is
/// `Detect`, else zero.
#[inline(always)]
fn detect_word(step: Step, k: usize) -> u64 {
    0u64.wrapping_sub((step.flags & (DETECT_SET << k) != 0) as u64)
}

/// 1 if a step's outcome `k` (0 set, 1 clear) is an op and `any` of the
/// block's pixels go there, else 0.
#[inline(always)]
fn pushes(step: Step, k: usize, any: bool) -> usize {
    (any & (step.flags & (PUSH_SET << k) != 0)) as usize
}

/// `dst[x] = src[x + dx]` for one packed row (bits outside the row read 0).
fn shift_row(src: &[u64], dx: i8, dst: &mut [u64]) {
    let n = src.len();
    let get = |i: isize| -> u64 {
        if i < 0 || i >= n as isize {
            0
        } else {
            src[i as usize]
        }
    };
    let d = dx as isize;
    let (wshift, bshift) = (d.div_euclid(64), d.rem_euclid(64) as u32);
    for (i, out) in dst.iter_mut().enumerate() {
        let i = i as isize + wshift;
        *out = if bshift == 0 {
            get(i)
        } else {
            (get(i) >> bshift) | (get(i + 1) << (64 - bshift))
        };
    }
}

/// Detection and grouping of one frame with the compiled program; scores of
/// detected pixels come from the reference walker on `tree`.
pub fn run(
    program: &Program,
    tree: &Tree,
    settings: &Settings,
    frame: &BitFrame,
    scratch: &mut Scratch,
) -> FrameResult {
    let mut raw = program.detect(frame, scratch);
    if !settings.smoothing.is_off() {
        raw = settings.smoothing.apply(&raw);
    }
    crate::detect::finish(tree, settings, frame, raw)
}

#[cfg(test)]
mod tests {
    use super::super::testing::{backends, leaf, split};
    use super::*;
    use crate::detect::compile::Plan;
    use crate::detect::walker;
    use crate::model::{Leaf, Node};
    use crate::window::{Offset, Window};

    #[test]
    fn shift_row_moves_bits() {
        let src = [0b1011u64, 1u64 << 63];
        let mut dst = [0u64; 2];
        shift_row(&src, 1, &mut dst);
        assert_eq!(dst, [0b101, 1 << 62]);
        shift_row(&src, -1, &mut dst);
        assert_eq!(dst, [0b10110, 0]);
        shift_row(&src, 64, &mut dst);
        assert_eq!(dst, [1 << 63, 0]);
    }

    #[test]
    fn reach_counts_the_ops_each_block_visits() {
        // Root tests the centre: clear -> Drop, set -> a second split on the
        // right neighbour (set -> Detect, clear -> Drop). A block visits the
        // root, and the second split only if one of its pixels is set.
        let w = Window::new(3).unwrap();
        let f = |dx| w.index(Offset { dx, dy: 0 }).unwrap() as u8;
        let tree = Tree::new(
            w,
            vec![
                split(f(0), 1, 2),
                leaf(0.1),
                split(f(1), 3, 4),
                leaf(0.1),
                leaf(0.9),
            ],
        )
        .unwrap();
        // 2,048 pixels wide: a row is exactly one block of 32 words.
        let walk = Program::compile_with(&tree, 0.5, Plan::Walk);
        let mut s = reach_on_one_set_pixel(&walk, &tree);
        assert_eq!(
            s.reach(),
            Reach {
                blocks: 3,
                visits: 4
            }
        );
        assert_eq!(s.reach().per_block(), 4.0 / 3.0);
        // A whole select program walks nothing (and the scratch forgets
        // the walked frame before).
        Program::compile_with(&tree, 0.5, Plan::Select).detect(&BitFrame::new(2048, 3), &mut s);
        assert_eq!(s.reach(), Reach::default());
        assert_eq!(s.reach().per_block(), 0.0);
    }

    #[test]
    fn reach_counts_a_select_root_as_one_visit() {
        // Root tests the centre: clear -> Drop (a million training pixels),
        // set -> a chain of three rare splits (each: clear -> Detect, set ->
        // the next split, the last one's set -> Drop). The cost model walks
        // the root and selects the whole chain: a block visits the root,
        // and the chain's first op, once, only if one of its pixels is set.
        let w = Window::new(3).unwrap();
        let f = |dx| w.index(Offset { dx, dy: 0 }).unwrap() as u8;
        let counted = |counts: [u64; 2], score: f64| {
            Node::Leaf(Leaf {
                counts,
                score,
                share: 0.0,
            })
        };
        let tree = Tree::new(
            w,
            vec![
                split(f(0), 1, 2),
                counted([1_000_000, 0], 0.0),
                split(f(1), 3, 4),
                counted([0, 10], 0.9),
                split(f(-1), 5, 6),
                counted([0, 10], 0.9),
                split(f(1), 7, 8),
                counted([0, 10], 0.9),
                counted([10, 0], 0.1),
            ],
        )
        .unwrap();
        let p = Program::compile(&tree, 0.5);
        assert_eq!(p.strategy(), (1, 3));
        assert_eq!(
            reach_on_one_set_pixel(&p, &tree).reach(),
            Reach {
                blocks: 3,
                visits: 4
            }
        );
    }

    /// Runs `p` on a 2048x3 frame (each row one block) whose only set
    /// pixel is (100, 1), on every backend, checks it against the walker
    /// and that every backend reached the same ops, and returns the scratch.
    fn reach_on_one_set_pixel(p: &Program, tree: &Tree) -> Scratch {
        let mut frame = BitFrame::new(2048, 3);
        frame.set(100, 1, true);
        let mut s = Scratch::default();
        let mut reached = Vec::new();
        for b in backends() {
            assert_eq!(
                p.detect_with(b, &frame, &mut s),
                walker::detect(tree, 0.5, &frame),
                "{b:?}"
            );
            reached.push(s.reach());
        }
        assert!(reached.windows(2).all(|r| r[0] == r[1]), "{reached:?}");
        s
    }
}
