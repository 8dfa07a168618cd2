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
//! This module depends on the frozen [`Tree`] only, never on the learner.

use crate::detect::{FrameResult, Settings};
use crate::frame::BitFrame;
use crate::model::{Node, Tree};
use crate::window::Window;

/// Words walked together (32 x 64 = 2,048 pixels): wide enough to spread
/// each visit's fixed cost over many pixels, small enough that a block's
/// pixels skip most of the tree. Measured on the demo model and texture,
/// 32 words beat 16 by 4-9% and 64 lose.
pub const BLOCK: usize = 32;

const DROP: u32 = 0;
const DETECT: u32 = 1;
const SLOT0: u32 = 2;

/// Cost model, relative costs per block of [`BLOCK`] words, measured on
/// this project's build machine: a walk visit stores two child masks and
/// tests both for emptiness; a select instruction within a walked block
/// waits on the previous instruction's result; a whole-program select runs
/// each instruction over [`WIDE`] words at once, which hides that wait.
/// The values are tuned rather than measured ratios (a visit takes about
/// 17 ns and a whole-program select instruction about 8 ns per 2,048
/// pixels): visit costs from 2.5 to 3.5 give the same speed (within 3%) on
/// the demo model and on depth-14 and depth-16 models of the demo data,
/// while 4.5 turns the latter two into whole select programs that run 40%
/// slower.
const VISIT_COST: f64 = 3.5;
const SELECT_COST: f64 = 2.0;
const WIDE_SELECT_COST: f64 = 1.0;
/// Neighbouring pixels mostly take the same paths: a block of `BLOCK * 64`
/// pixels reaches about as many ops as `BLOCK * 64 / CORRELATION`
/// independent pixels would (measured on the demo texture with the demo
/// model: 453 ops reached per 1,024-pixel block, 425 predicted with this
/// factor; 582 per 2,048-pixel block, as [`Reach`] counts them, 595
/// predicted).
const CORRELATION: f64 = 4.0;
/// Extra cost of entering a selected subtree (the final `acc |= m & v`).
const SELECT_ROOT_COST: f64 = 1.0;

/// One split of the compiled program.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
struct Op {
    /// Index into `Program::planes`.
    plane: u16,
    /// Vertical offset of the tested pixel.
    dy: i8,
    /// Where the pixels with the tested bit set go: DROP, DETECT or
    /// SLOT0 + the index of the next op.
    on_set: u32,
    /// Where the pixels with the tested bit clear go.
    on_clear: u32,
}

/// One select instruction:
/// `slot[out] = (plane AND value_if_set) OR (NOT plane AND value_if_clear)`,
/// where each value is a constant (`Drop` = zeros, `Detect` = ones) or an
/// earlier result in a slot. The constants are folded into `form`, so an
/// instruction loads only the slots it needs.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
struct Select {
    /// The op whose plane is tested.
    op: u32,
    form: Form,
    set: u16,
    clear: u16,
    out: u16,
}

/// The shape of a select instruction once its constants are folded in
/// (`b` the plane, `s` and `c` the set and clear slots).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum Form {
    /// Set -> Detect, clear -> Drop: `b`.
    Plane,
    /// Set -> Drop, clear -> Detect: `!b`.
    NotPlane,
    /// Clear -> Drop: `b & s`.
    SetOnly,
    /// Clear -> Detect: `s | !b`.
    SetOrClear,
    /// Set -> Drop: `!b & c`.
    ClearOnly,
    /// Set -> Detect: `b | c`.
    PlaneOrClear,
    /// Both subtrees: `(b & s) | (!b & c)`.
    Both,
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

/// Which code path evaluates the program.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Backend {
    /// Plain code for any 64-bit machine (the compiler may still use the
    /// baseline vector unit: SSE2 on x86-64, NEON on 64-bit ARM).
    Portable,
    /// The same loop with AVX2 arithmetic (x86-64 only, chosen at run time).
    Avx2,
}

impl Backend {
    /// The best backend this processor supports.
    pub fn detect() -> Backend {
        #[cfg(target_arch = "x86_64")]
        {
            if std::arch::is_x86_feature_detected!("avx2") {
                return Backend::Avx2;
            }
        }
        Backend::Portable
    }

    pub fn name(self) -> &'static str {
        match self {
            Backend::Portable => {
                if cfg!(target_arch = "aarch64") {
                    "portable (NEON baseline)"
                } else if cfg!(target_arch = "x86_64") {
                    "portable (SSE2 baseline)"
                } else {
                    "portable"
                }
            }
            Backend::Avx2 => "avx2",
        }
    }

    /// Whether this processor can run the backend.
    pub fn available(self) -> bool {
        match self {
            Backend::Portable => true,
            Backend::Avx2 => {
                #[cfg(target_arch = "x86_64")]
                {
                    std::arch::is_x86_feature_detected!("avx2")
                }
                #[cfg(not(target_arch = "x86_64"))]
                {
                    false
                }
            }
        }
    }
}

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

/// `W` words of pixel bits, aligned for whole-vector access.
#[derive(Clone, Copy, Debug)]
#[repr(C, align(64))]
struct Lanes<const W: usize>([u64; W]);

impl<const W: usize> Default for Lanes<W> {
    fn default() -> Self {
        Lanes([0; W])
    }
}

/// One block's pixel bits.
type Mask = Lanes<BLOCK>;

/// Words per chunk when the whole program is one select program: several
/// blocks per instruction, so the chain from one instruction's result to
/// the next instruction's input overlaps with independent work.
pub const WIDE: usize = 64;

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

impl Program {
    /// Compiles a validated tree for a threshold.
    pub fn compile(tree: &Tree, threshold: f64) -> Program {
        Program::compile_with(tree, threshold, Plan::Auto)
    }

    /// Compiles with a chosen split between walking and selecting (for
    /// tests and measurements; [`Program::compile`] chooses by cost).
    pub fn compile_with(tree: &Tree, threshold: f64, plan: Plan) -> Program {
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
        assert!(out.same_size(frame), "output mask size");
        scratch.reach = Reach::default();
        if frame.is_empty() {
            return;
        }
        if let Some(c) = self.constant {
            out.words_mut().fill(if c { u64::MAX } else { 0 });
            out.clear_padding();
            return;
        }
        self.prepare(frame, scratch);
        match backend {
            #[cfg(target_arch = "x86_64")]
            Backend::Avx2 if backend.available() => {
                // SAFETY: the processor supports AVX2 (checked just above).
                unsafe { self.run_avx2(frame, scratch, out) }
            }
            _ => self.run(frame, scratch, out),
        }
    }

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

    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx2")]
    unsafe fn run_avx2(&self, frame: &BitFrame, s: &mut Scratch, out: &mut BitFrame) {
        self.run_body(Avx2Kernel(()), frame, s, out)
    }

    fn run(&self, frame: &BitFrame, s: &mut Scratch, out: &mut BitFrame) {
        self.run_body(PortableKernel, frame, s, out)
    }

    /// The evaluation loop, inlined into each backend so each is compiled
    /// with its own target features: every block of the frame from its
    /// root mask (the block's valid pixels) to its detections.
    #[inline(always)]
    fn run_body<K: Kernel>(
        &self,
        kernel: K,
        frame: &BitFrame,
        s: &mut Scratch,
        out: &mut BitFrame,
    ) {
        let total = frame.stride() * frame.height();
        let Scratch {
            planes,
            valid,
            steps,
            cur,
            next,
            slots,
            wide,
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
                    kernel.select(plane, wide, *ins);
                }
                for (k, d) in detected[start..start + len].iter_mut().enumerate() {
                    *d = wide[last].0[k] & valid[start + k];
                }
                start += len;
            }
            return;
        }
        // The walk reads the block of words at `start + offset` for block
        // starts below `total` and the steps' offsets: one check covers
        // every such read (`prepare` pads each plane by a chunk, so it
        // holds).
        let furthest = steps.iter().map(|st| st.offset as usize).max().unwrap_or(0);
        assert!(
            furthest + total + BLOCK <= planes.len(),
            "every plane is padded by at least a block"
        );
        let mut start = 0;
        while start < total {
            let len = BLOCK.min(total - start);
            let root: [u64; BLOCK] = valid[start..start + BLOCK].try_into().expect("padded");
            // The planes from this block's first word on: every step's
            // offset plus a block stays inside (checked for the frame
            // above).
            let planes = &planes[start..];
            // SAFETY: `prepare` made `steps` for this program, and `planes`
            // holds a block at every step's offset (checked above).
            let acc = unsafe { self.block(kernel, root, planes, steps, cur, next, slots, reach) };
            // The root mask excluded padding bits, so `acc` has none.
            detected[start..start + len].copy_from_slice(&acc[..len]);
            start += len;
        }
    }

    /// One block: level by level over the pending (op, mask) pairs. A walked
    /// op splits its mask and appends the children that received pixels to
    /// the next level's list (branch-free: both are written, only those
    /// wanted are counted); a select root adds its subtree's value, masked
    /// by the pixels that reached it.
    ///
    /// This is the evaluator's hot loop, so its bookkeeping is kept short:
    /// the bounds of a level are checked once, and the visits index the
    /// lists, the steps and the plane without checks.
    ///
    /// # Safety
    ///
    /// `steps` must be this program's steps as [`Program::prepare`] made
    /// them (one per op, each op outcome naming an op), and `planes` must
    /// hold [`BLOCK`] words from every step's offset on.
    #[allow(clippy::too_many_arguments)]
    #[inline(always)]
    unsafe fn block<K: Kernel>(
        &self,
        kernel: K,
        root: [u64; BLOCK],
        planes: &[u64],
        steps: &[Step],
        cur: &mut Pending,
        next: &mut Pending,
        slots: &mut [Mask],
        reach: &mut Reach,
    ) -> [u64; BLOCK] {
        // Plane words of this block at a step's offset (checked).
        let block = |offset: u32| -> &[u64; BLOCK] {
            let o = offset as usize;
            planes[o..o + BLOCK].try_into().expect("padded")
        };
        let mut acc = Mask::default();
        reach.blocks += 1;
        cur.list[0] = (0, 0);
        cur.masks[0] = Lanes(root);
        let mut pending = 1;
        while pending > 0 {
            reach.visits += pending as u64;
            // The level reads entries below `pending` and writes entries
            // and mask slots below `2 * pending` (a visit adds at most two
            // entries, so `n <= 2e` at visit `e`).
            assert!(
                pending <= cur.list.len()
                    && 2 * pending <= next.list.len()
                    && 2 * pending <= next.masks.len(),
                "a level's lists fit its buffers"
            );
            let list = next.list.as_mut_ptr();
            let masks = next.masks.as_mut_ptr();
            let mut n = 0;
            for e in 0..pending {
                // SAFETY: `e < pending`, checked above. The entries below
                // `pending` are the root or were counted by the previous
                // level, so each names an op (a pushed outcome of a step),
                // and there is one step per op (the caller's contract).
                let (i, slot, step) = unsafe {
                    let (i, slot) = *cur.list.get_unchecked(e);
                    (i, slot, *steps.get_unchecked(i as usize))
                };
                let m = &cur.masks[slot as usize];
                if step.flags & SELECTS != 0 {
                    let (a, b) = self.select_range[i as usize];
                    for ins in &self.select[a as usize..=b as usize] {
                        kernel.select(block(steps[ins.op as usize].offset), slots, *ins);
                    }
                    let v = &slots[self.select[b as usize].out as usize];
                    kernel.keep(&mut acc, m, v);
                    continue;
                }
                // SAFETY: slots `2e` and `2e + 1` are below `2 * pending`
                // (checked above) and in the other level's buffer, so they
                // overlap neither `m` nor anything else borrowed here; the
                // plane holds a block at every step's offset (the caller's
                // contract).
                let (kids, b) = unsafe {
                    (
                        &mut *(masks.add(2 * e) as *mut [Mask; 2]),
                        &*(planes.as_ptr().add(step.offset as usize) as *const [u64; BLOCK]),
                    )
                };
                let [any_set, any_clear] = kernel.split(m, b, kids);
                if step.flags & (DETECT_SET | DETECT_SET << 1) != 0 {
                    kernel.detect(&mut acc, kids, step);
                }
                // SAFETY: `n <= 2e`, so entries `n` and `n + 1` are below
                // `2 * pending` (checked above).
                unsafe {
                    *list.add(n) = (step.next[0], 2 * e as u32);
                    n += pushes(step, 0, any_set);
                    *list.add(n) = (step.next[1], 2 * e as u32 + 1);
                }
                n += pushes(step, 1, any_clear);
            }
            std::mem::swap(cur, next);
            pending = n;
        }
        acc.0
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
        let (form, set, clear, out) = match (s, c) {
            (Some(_), Some(_)) => {
                let (lower, upper) = (slot(depth - 2), slot(depth - 1));
                depth -= 1;
                let (set, clear) = if set_first {
                    (lower, upper)
                } else {
                    (upper, lower)
                };
                (Form::Both, set, clear, lower)
            }
            (Some(_), None) => {
                let top = slot(depth - 1);
                let form = if detects(op.on_clear) {
                    Form::SetOrClear
                } else {
                    Form::SetOnly
                };
                (form, top, 0, top)
            }
            (None, Some(_)) => {
                let top = slot(depth - 1);
                let form = if detects(op.on_set) {
                    Form::PlaneOrClear
                } else {
                    Form::ClearOnly
                };
                (form, 0, top, top)
            }
            (None, None) => {
                depth += 1;
                most = most.max(depth);
                let form = if detects(op.on_set) {
                    Form::Plane
                } else {
                    Form::NotPlane
                };
                (form, 0, 0, slot(depth - 1))
            }
        };
        select.push(Select {
            op: i as u32,
            form,
            set,
            clear,
            out,
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

/// The block arithmetic, in two implementations: plain arrays (which the
/// compiler vectorises for the baseline vector unit) and AVX2 intrinsics,
/// whose emptiness test is one `vptest` instead of a horizontal OR.
trait Kernel: Copy {
    /// A walk visit: writes `set = m & b` and `clear = m & !b` to `kids`
    /// and tells which of them has a pixel.
    fn split(self, m: &Mask, b: &[u64; BLOCK], kids: &mut [Mask; 2]) -> [bool; 2];

    /// Adds to `acc` the children of a visit whose outcome is `Detect`.
    #[inline(always)]
    fn detect(self, acc: &mut Mask, kids: &[Mask; 2], step: Step) {
        let (ds, dc) = (detect_word(step, 0), detect_word(step, 1));
        for k in 0..BLOCK {
            acc.0[k] |= (kids[0].0[k] & ds) | (kids[1].0[k] & dc);
        }
    }

    /// One select instruction over `W` words, `b` its plane.
    fn select<const W: usize>(self, b: &[u64; W], slots: &mut [Lanes<W>], ins: Select);

    /// `acc |= m & v`.
    #[inline(always)]
    fn keep(self, acc: &mut Mask, m: &Mask, v: &Mask) {
        for k in 0..BLOCK {
            acc.0[k] |= m.0[k] & v.0[k];
        }
    }
}

/// The all-ones word where a step's outcome `k` (0 set, 1 clear) is
/// `Detect`, else zero.
#[inline(always)]
fn detect_word(step: Step, k: usize) -> u64 {
    0u64.wrapping_sub((step.flags & (DETECT_SET << k) != 0) as u64)
}

#[inline(always)]
fn pushes(step: Step, k: usize, any: bool) -> usize {
    (any & (step.flags & (PUSH_SET << k) != 0)) as usize
}

#[derive(Clone, Copy)]
struct PortableKernel;

impl Kernel for PortableKernel {
    #[inline(always)]
    fn split(self, m: &Mask, b: &[u64; BLOCK], kids: &mut [Mask; 2]) -> [bool; 2] {
        // Written straight into the two slots, word by word: a block of
        // set and clear words held apart would not fit in the registers.
        let [Lanes(set), Lanes(clear)] = kids;
        let (mut any_set, mut any_clear) = (0, 0);
        for k in 0..BLOCK {
            set[k] = m.0[k] & b[k];
            clear[k] = m.0[k] & !b[k];
            any_set |= set[k];
            any_clear |= clear[k];
        }
        [any_set != 0, any_clear != 0]
    }

    #[inline(always)]
    fn select<const W: usize>(self, b: &[u64; W], slots: &mut [Lanes<W>], ins: Select) {
        let s = |slots: &[Lanes<W>]| slots[ins.set as usize].0;
        let c = |slots: &[Lanes<W>]| slots[ins.clear as usize].0;
        let v: [u64; W] = match ins.form {
            Form::Plane => *b,
            Form::NotPlane => b.map(|x| !x),
            Form::SetOnly => {
                let s = s(slots);
                std::array::from_fn(|k| b[k] & s[k])
            }
            Form::SetOrClear => {
                let s = s(slots);
                std::array::from_fn(|k| s[k] | !b[k])
            }
            Form::ClearOnly => {
                let c = c(slots);
                std::array::from_fn(|k| !b[k] & c[k])
            }
            Form::PlaneOrClear => {
                let c = c(slots);
                std::array::from_fn(|k| b[k] | c[k])
            }
            Form::Both => {
                let (s, c) = (s(slots), c(slots));
                std::array::from_fn(|k| (b[k] & s[k]) | (!b[k] & c[k]))
            }
        };
        slots[ins.out as usize] = Lanes(v);
    }
}

/// AVX2 arithmetic. Only [`Program::run_avx2`] makes one, after checking
/// that the processor has AVX2.
#[cfg(target_arch = "x86_64")]
#[derive(Clone, Copy)]
struct Avx2Kernel(());

#[cfg(target_arch = "x86_64")]
impl Kernel for Avx2Kernel {
    #[inline(always)]
    fn split(self, m: &Mask, b: &[u64; BLOCK], kids: &mut [Mask; 2]) -> [bool; 2] {
        use std::arch::x86_64::*;
        const V: usize = BLOCK / 4;
        // SAFETY: an Avx2Kernel exists only where AVX2 was detected; each
        // pointer covers a whole block of words, 4 at a time (BLOCK is a
        // multiple of 4); masks are 64-byte aligned, the plane need not be.
        unsafe {
            // Each vector is stored as soon as it is computed, so nothing
            // but the two emptiness accumulators lives across the loop: a
            // block's worth of set and clear vectors does not fit in the 16
            // registers, and spilling them to the stack and reloading them
            // cost a quarter of the walk's time.
            let [set, clear] = kids;
            let set_p = set.0.as_mut_ptr() as *mut __m256i;
            let clear_p = clear.0.as_mut_ptr() as *mut __m256i;
            let mp = m.0.as_ptr() as *const __m256i;
            let bp = b.as_ptr() as *const __m256i;
            let mut s_any = _mm256_setzero_si256();
            let mut c_any = _mm256_setzero_si256();
            for q in 0..V {
                let mv = _mm256_load_si256(mp.add(q));
                let bv = _mm256_loadu_si256(bp.add(q));
                let s = _mm256_and_si256(mv, bv);
                let c = _mm256_andnot_si256(bv, mv);
                _mm256_store_si256(set_p.add(q), s);
                _mm256_store_si256(clear_p.add(q), c);
                s_any = _mm256_or_si256(s_any, s);
                c_any = _mm256_or_si256(c_any, c);
            }
            [
                _mm256_testz_si256(s_any, s_any) == 0,
                _mm256_testz_si256(c_any, c_any) == 0,
            ]
        }
    }

    #[inline(always)]
    fn select<const W: usize>(self, b: &[u64; W], slots: &mut [Lanes<W>], ins: Select) {
        use std::arch::x86_64::*;
        let v_per = W / 4;
        let (set, clear, out) = (ins.set as usize, ins.clear as usize, ins.out as usize);
        assert!(set < slots.len() && clear < slots.len() && out < slots.len());
        // SAFETY: AVX2 was detected; the three slots are in bounds (checked
        // above) and aligned (`Mask` is 64-byte aligned); every input of a
        // vector is loaded before its output is stored, so the output may
        // be an input slot.
        unsafe {
            let base = slots.as_mut_ptr() as *mut __m256i;
            let ones = _mm256_set1_epi64x(-1);
            let (sp, cp, op) = (
                base.add(set * v_per),
                base.add(clear * v_per),
                base.add(out * v_per),
            );
            let bp = b.as_ptr() as *const __m256i;
            // One loop per form, so the form is decided once per instruction.
            macro_rules! each {
                (|$bv:ident, $q:ident| $e:expr) => {
                    for $q in 0..v_per {
                        let $bv = _mm256_loadu_si256(bp.add($q));
                        _mm256_store_si256(op.add($q), $e);
                    }
                };
            }
            match ins.form {
                Form::Plane => each!(|bv, q| bv),
                Form::NotPlane => each!(|bv, q| _mm256_andnot_si256(bv, ones)),
                Form::SetOnly => each!(|bv, q| _mm256_and_si256(bv, _mm256_load_si256(sp.add(q)))),
                Form::SetOrClear => each!(|bv, q| _mm256_or_si256(
                    _mm256_load_si256(sp.add(q)),
                    _mm256_andnot_si256(bv, ones)
                )),
                Form::ClearOnly => {
                    each!(|bv, q| _mm256_andnot_si256(bv, _mm256_load_si256(cp.add(q))))
                }
                Form::PlaneOrClear => {
                    each!(|bv, q| _mm256_or_si256(bv, _mm256_load_si256(cp.add(q))))
                }
                Form::Both => each!(|bv, q| _mm256_or_si256(
                    _mm256_and_si256(bv, _mm256_load_si256(sp.add(q))),
                    _mm256_andnot_si256(bv, _mm256_load_si256(cp.add(q)))
                )),
            }
        }
    }
}

const _: () = assert!(
    BLOCK.is_multiple_of(4)
        && WIDE.is_multiple_of(4)
        && WIDE >= BLOCK
        && std::mem::size_of::<Mask>() == BLOCK * 8
        && std::mem::size_of::<Lanes<WIDE>>() == WIDE * 8,
    "AVX2 kernel handles 4 words at a time over packed masks"
);

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
    let raw = program.detect(frame, scratch);
    crate::detect::finish(tree, settings, frame, raw)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::detect::walker;
    use crate::model::Leaf;
    use crate::window::Offset;

    fn leaf(score: f64) -> Node {
        Node::Leaf(Leaf {
            counts: [0, 0],
            score,
            share: 0.0,
        })
    }

    fn split(feature: u8, if_clear: u32, if_set: u32) -> Node {
        Node::Split {
            feature,
            if_clear,
            if_set,
        }
    }

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
            let i = nodes.len();
            nodes.push(Node::Split {
                feature: f(if k % 2 == 0 { -1 } else { 1 }),
                if_clear: (i + 1) as u32,
                if_set: (i + 2) as u32,
            });
            nodes.push(leaf(if k % 3 == 0 { 0.9 } else { 0.1 }));
        }
        nodes.push(leaf(0.8));
        let tree = Tree::new(w, nodes).unwrap();
        let frame = BitFrame::from_fn(200, 3, |x, y| (x * 7 + y) % 4 != 0);
        let mut s = Scratch::default();
        for plan in [Plan::Auto, Plan::Walk, Plan::Select] {
            let p = Program::compile_with(&tree, 0.5, plan);
            assert!(p.slots <= 2, "{} slots", p.slots);
            for b in [Backend::Portable, Backend::detect()] {
                assert_eq!(
                    p.detect_with(b, &frame, &mut s),
                    walker::detect(&tree, 0.5, &frame),
                    "{plan:?} {b:?}"
                );
            }
        }
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
        for b in [Backend::Portable, Backend::detect()] {
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

    #[test]
    fn matches_the_walker_on_a_small_tree() {
        let w = Window::new(5).unwrap();
        let f = |dx, dy| w.index(Offset { dx, dy }).unwrap() as u8;
        let tree = Tree::new(
            w,
            vec![
                Node::Split {
                    feature: f(0, 0),
                    if_clear: 1,
                    if_set: 2,
                },
                Node::Split {
                    feature: f(-2, 1),
                    if_clear: 3,
                    if_set: 4,
                },
                Node::Split {
                    feature: f(2, -2),
                    if_clear: 5,
                    if_set: 6,
                },
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
                for b in [Backend::Portable, Backend::detect()] {
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
