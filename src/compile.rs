//! The compiled evaluator: a frozen tree and its threshold turned into a
//! word-parallel bit program.
//!
//! A tree whose tests are single pixels of a binary frame can be evaluated
//! for 64 pixels at once per machine word. Every node has a *mask*: the
//! pixels that reach it. The root's mask is every pixel; a split's children
//! get `mask AND plane` and `mask AND NOT plane`, where the plane is the
//! frame shifted by the tested offset; the detection mask is the OR of the
//! masks that reach leaves scoring at or above the threshold.
//!
//! [`Program`] invariants (established by [`Program::compile`], relied on by
//! the evaluator):
//! - subtrees whose leaves all fall on one side of the threshold are single
//!   decisions: an op's outcome is `Drop` (no detection), `Detect`, or a
//!   later op, never a leaf that needs its score;
//! - ops are in breadth-first order, so every op's children come after it
//!   and each level's ops are contiguous (`level_starts`); each op is the
//!   child of exactly one outcome of exactly one op (the root excepted);
//! - `planes` lists the distinct horizontal offsets the program uses, and
//!   every op's `plane` indexes it; every op's `dy` is within the window.
//!
//! Evaluation pads the frame with zero rows above and below and builds, once
//! per frame, one horizontally shifted copy per distinct `dx`, all with the
//! frame's row stride (plus a block of zero words at the end). Because every
//! copy shares that stride, the test of offset `(dx, dy)` for word `i` of the
//! frame is word `i + dy * stride` of copy `dx`: one aligned whole-block
//! load, whatever the row. The program then runs over blocks of [`BLOCK`]
//! consecutive words in one of two ways:
//! - **level sweep** (programs of at most [`SWEEP_MAX_OPS`] ops): level by
//!   level, two mask buffers alternate; the ops of a level that some pixel
//!   of the block reaches are listed, each reads its mask from the current
//!   buffer and writes its children's into the next (listing those that
//!   receive pixels). Best when the masks of a whole level fit in cache.
//! - **live-op walk** (larger programs): depth first from the root, an op is
//!   visited only when some pixel of the block reaches it, so the cost
//!   follows the paths the block's pixels take, not the size of the tree.
//!
//! Scores are not computed here: detections are rare, so the caller finds
//! the leaf (and score) of detected pixels with the reference walker.
//!
//! This module depends on the frozen [`Tree`] only, never on the learner.

use crate::evaluate::{FrameResult, Settings};
use crate::frame::BitFrame;
use crate::model::{Node, Tree};
use crate::window::Window;

/// Words evaluated together (16 x 64 = 1024 pixels): wide enough for the
/// compiler to use full vector registers, small enough to stay in L1.
pub const BLOCK: usize = 16;

const DROP: u32 = 0;
const DETECT: u32 = 1;
const SLOT0: u32 = 2;
/// Programs with at most this many ops are evaluated by the level sweep.
pub const SWEEP_MAX_OPS: usize = 1024;

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
    /// Index of the first op of each level, plus `ops.len()` at the end:
    /// breadth-first order puts each level's ops together.
    level_starts: Vec<usize>,
    /// Most ops on one level.
    widest: usize,
    /// When the whole tree is one decision: the root's outcome.
    constant: Option<bool>,
}

/// Which code path evaluates the program.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Backend {
    /// Plain code for any 64-bit machine (the compiler may still use the
    /// baseline vector unit: SSE2 on x86-64, NEON on 64-bit ARM).
    Portable,
    /// The same code compiled for AVX2 (x86-64 only, chosen at run time).
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

/// Per-worker buffers, reused from frame to frame: after the first frame
/// of a size, evaluation allocates nothing.
#[derive(Default, Debug)]
pub struct Scratch {
    planes: Vec<u64>,
    valid: Vec<u64>,
    /// Depth-first work list of (op, mask of the pixels that reach it).
    stack: Vec<(u32, [u64; BLOCK])>,
    /// Level sweep: masks (and whether any bit is set) of the current and
    /// the next level's ops.
    cur: Vec<[u64; BLOCK]>,
    next: Vec<[u64; BLOCK]>,
    /// Per op, where its tested plane row starts relative to a block.
    offsets: Vec<usize>,
    /// Level sweep: the ops of the current and the next level that some
    /// pixel of the block reaches.
    cur_ops: Vec<u32>,
    next_ops: Vec<u32>,
}

impl Program {
    /// Compiles a validated tree for a threshold.
    pub fn compile(tree: &Tree, threshold: f64) -> Program {
        let nodes = tree.nodes();
        let n = nodes.len();
        // Decide every subtree that cannot change the outcome: bottom-up
        // (children have larger indices), Some(outcome) if all its leaves
        // agree.
        let mut decided: Vec<Option<bool>> = vec![None; n];
        for i in (0..n).rev() {
            decided[i] = match &nodes[i] {
                Node::Leaf(l) => Some(l.score >= threshold),
                Node::Split {
                    if_clear, if_set, ..
                } => match (decided[*if_clear as usize], decided[*if_set as usize]) {
                    (Some(a), Some(b)) if a == b => Some(a),
                    _ => None,
                },
            };
        }
        let window = tree.window();
        if let Some(c) = decided[0] {
            return Program {
                window,
                planes: Vec::new(),
                ops: Vec::new(),
                levels: 0,
                level_starts: vec![0],
                widest: 0,
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
        let mut level_starts = vec![0usize];
        for l in 1..levels {
            level_starts.push(depth.partition_point(|&d| d <= l));
        }
        level_starts.push(ops.len());
        let widest = level_starts
            .windows(2)
            .map(|w| w[1] - w[0])
            .max()
            .unwrap_or(0);
        Program {
            window,
            planes,
            levels,
            level_starts,
            widest,
            ops,
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

    /// Builds the padded, shifted planes and sizes the buffers.
    fn prepare(&self, frame: &BitFrame, s: &mut Scratch) {
        let stride = frame.stride();
        let r = self.window.radius() as usize;
        let padded_rows = frame.height() + 2 * r;
        // A block's worth of zero words after each plane, so every load is a
        // whole block, even the frame's last one.
        let plane_words = padded_rows * stride + BLOCK;
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
        s.valid.resize(stride * frame.height() + BLOCK, 0);
        let last = frame.last_word_mask();
        for y in 0..frame.height() {
            s.valid[y * stride + stride - 1] = last;
        }
        // A depth-first walk keeps at most one pending sibling per level.
        s.stack.clear();
        s.stack.reserve(self.levels + 2);
        if self.sweeps() {
            for v in [&mut s.cur, &mut s.next] {
                v.resize(self.widest.max(1), [0; BLOCK]);
            }
            for v in [&mut s.cur_ops, &mut s.next_ops] {
                v.clear();
                v.reserve(self.widest.max(1));
            }
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

    /// Per op, where its tested plane row starts relative to a block.
    fn fill_offsets(&self, offsets: &mut Vec<usize>, plane_words: usize, stride: usize) {
        let r = self.window.radius() as isize;
        offsets.clear();
        offsets.extend(
            self.ops
                .iter()
                .map(|op| op.plane as usize * plane_words + (r + op.dy as isize) as usize * stride),
        );
    }

    /// Whether the level sweep evaluates this program (small programs, whose
    /// level buffers stay in cache) rather than the depth-first walk, whose
    /// stack stays small whatever the tree (large programs; measured on the
    /// demo model, the walk is about 2.5x faster there).
    pub fn sweeps(&self) -> bool {
        self.ops.len() <= SWEEP_MAX_OPS
    }

    /// The evaluation loop, inlined into each backend so each is compiled
    /// with its own target features: the per-op offsets once per frame,
    /// then every block of the frame from its root mask (the block's valid
    /// pixels) to its detections, by one of the two strategies.
    #[inline(always)]
    fn run_body<K: Kernel>(
        &self,
        kernel: K,
        frame: &BitFrame,
        s: &mut Scratch,
        out: &mut BitFrame,
    ) {
        let stride = frame.stride();
        let plane_words = (frame.height() + 2 * self.window.radius() as usize) * stride + BLOCK;
        let total = stride * frame.height();
        let Scratch {
            planes,
            valid,
            stack,
            cur,
            next,
            offsets,
            cur_ops,
            next_ops,
        } = s;
        self.fill_offsets(offsets, plane_words, stride);
        let sweeps = self.sweeps();
        let detected = out.words_mut();
        let mut start = 0;
        while start < total {
            let len = BLOCK.min(total - start);
            let root: [u64; BLOCK] = valid[start..start + BLOCK].try_into().expect("padded");
            // Plane words of this block: `block(offset)` is the tested row.
            let block = |offset: usize| -> &[u64; BLOCK] {
                planes[offset + start..offset + start + BLOCK]
                    .try_into()
                    .expect("padded")
            };
            let acc = if sweeps {
                self.sweep_block(kernel, root, &block, offsets, cur, next, cur_ops, next_ops)
            } else {
                self.walk_block(kernel, root, &block, offsets, stack)
            };
            // The root mask excluded padding bits, so `acc` has none.
            detected[start..start + len].copy_from_slice(&acc[..len]);
            start += len;
        }
    }

    /// One block, level by level over the listed (reached) ops: each reads
    /// its mask from the current buffer and writes its children's into the
    /// next.
    #[allow(clippy::too_many_arguments)]
    #[inline(always)]
    fn sweep_block<'p, K: Kernel>(
        &self,
        kernel: K,
        root: [u64; BLOCK],
        block: &impl Fn(usize) -> &'p [u64; BLOCK],
        offsets: &[usize],
        cur: &mut Vec<[u64; BLOCK]>,
        next: &mut Vec<[u64; BLOCK]>,
        cur_ops: &mut Vec<u32>,
        next_ops: &mut Vec<u32>,
    ) -> [u64; BLOCK] {
        let mut acc = [0u64; BLOCK];
        cur[0] = root;
        cur_ops.clear();
        cur_ops.push(0);
        for l in 0..self.levels {
            if cur_ops.is_empty() {
                break;
            }
            let (lo, hi) = (self.level_starts[l], self.level_starts[l + 1]);
            let next_lo = hi as u32 + SLOT0;
            next_ops.clear();
            for &i in cur_ops.iter() {
                let i = i as usize;
                let op = self.ops[i];
                let mut set = [0u64; BLOCK];
                let mut clear = [0u64; BLOCK];
                let (any_set, any_clear) =
                    kernel.split(&cur[i - lo], block(offsets[i]), &mut set, &mut clear);
                emit(op.on_set, any_set, next_lo, next, next_ops, &mut acc, &set);
                emit(
                    op.on_clear,
                    any_clear,
                    next_lo,
                    next,
                    next_ops,
                    &mut acc,
                    &clear,
                );
            }
            std::mem::swap(cur, next);
            std::mem::swap(cur_ops, next_ops);
        }
        acc
    }

    /// One block, depth first over live ops only: an op is visited only if
    /// some pixel of the block reaches it.
    #[inline(always)]
    fn walk_block<'p, K: Kernel>(
        &self,
        kernel: K,
        root: [u64; BLOCK],
        block: &impl Fn(usize) -> &'p [u64; BLOCK],
        offsets: &[usize],
        stack: &mut Vec<(u32, [u64; BLOCK])>,
    ) -> [u64; BLOCK] {
        let mut acc = [0u64; BLOCK];
        stack.push((0, root));
        while let Some((i, m)) = stack.pop() {
            let op = self.ops[i as usize];
            let mut set = [0u64; BLOCK];
            let mut clear = [0u64; BLOCK];
            let (any_set, any_clear) =
                kernel.split(&m, block(offsets[i as usize]), &mut set, &mut clear);
            for (target, any, mask) in [(op.on_clear, any_clear, clear), (op.on_set, any_set, set)]
            {
                match target {
                    DROP => {}
                    DETECT => {
                        for k in 0..BLOCK {
                            acc[k] |= mask[k];
                        }
                    }
                    // Pixels reach the child only if the mask has any:
                    // empty subtrees are never visited.
                    t if any => stack.push((t - SLOT0, mask)),
                    _ => {}
                }
            }
        }
        acc
    }
}

/// Sends the pixels `value` of a block to an op's outcome: nowhere, the
/// detections, or the mask of an op of the next level, which joins that
/// level's list of ops to visit only if some pixel arrived (`any`).
#[inline(always)]
fn emit(
    target: u32,
    any: bool,
    next_lo: u32,
    next: &mut [[u64; BLOCK]],
    next_ops: &mut Vec<u32>,
    acc: &mut [u64; BLOCK],
    value: &[u64; BLOCK],
) {
    match target {
        DROP => {}
        DETECT => {
            for k in 0..BLOCK {
                acc[k] |= value[k];
            }
        }
        t if any => {
            next[(t - next_lo) as usize] = *value;
            next_ops.push(t - SLOT0);
        }
        _ => {}
    }
}

/// The block arithmetic of one op: `set = m & b`, `clear = m & !b`, and
/// whether each has any pixel. Two implementations: plain arrays (which the
/// compiler vectorises for the baseline vector unit) and AVX2 intrinsics,
/// whose emptiness test is one `vptest` instead of a horizontal OR.
trait Kernel: Copy {
    fn split(
        self,
        m: &[u64; BLOCK],
        b: &[u64; BLOCK],
        set: &mut [u64; BLOCK],
        clear: &mut [u64; BLOCK],
    ) -> (bool, bool);
}

#[derive(Clone, Copy)]
struct PortableKernel;

impl Kernel for PortableKernel {
    #[inline(always)]
    fn split(
        self,
        m: &[u64; BLOCK],
        b: &[u64; BLOCK],
        set: &mut [u64; BLOCK],
        clear: &mut [u64; BLOCK],
    ) -> (bool, bool) {
        let (mut any_set, mut any_clear) = (0, 0);
        for k in 0..BLOCK {
            set[k] = m[k] & b[k];
            clear[k] = m[k] & !b[k];
            any_set |= set[k];
            any_clear |= clear[k];
        }
        (any_set != 0, any_clear != 0)
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
    fn split(
        self,
        m: &[u64; BLOCK],
        b: &[u64; BLOCK],
        set: &mut [u64; BLOCK],
        clear: &mut [u64; BLOCK],
    ) -> (bool, bool) {
        use std::arch::x86_64::*;
        // SAFETY: an Avx2Kernel exists only where AVX2 was detected, and
        // every pointer covers 4 of the block's words (BLOCK is a multiple
        // of 4); unaligned loads and stores are used.
        unsafe {
            let mut s_any = _mm256_setzero_si256();
            let mut c_any = _mm256_setzero_si256();
            for q in 0..BLOCK / 4 {
                let mv = _mm256_loadu_si256(m.as_ptr().add(4 * q) as *const __m256i);
                let bv = _mm256_loadu_si256(b.as_ptr().add(4 * q) as *const __m256i);
                let sv = _mm256_and_si256(mv, bv);
                let cv = _mm256_andnot_si256(bv, mv);
                _mm256_storeu_si256(set.as_mut_ptr().add(4 * q) as *mut __m256i, sv);
                _mm256_storeu_si256(clear.as_mut_ptr().add(4 * q) as *mut __m256i, cv);
                s_any = _mm256_or_si256(s_any, sv);
                c_any = _mm256_or_si256(c_any, cv);
            }
            (
                _mm256_testz_si256(s_any, s_any) == 0,
                _mm256_testz_si256(c_any, c_any) == 0,
            )
        }
    }
}

const _: () = assert!(
    BLOCK.is_multiple_of(4),
    "AVX2 kernel handles 4 words at a time"
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
    crate::evaluate::finish(tree, settings, frame, raw)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::evaluate;
    use crate::model::Leaf;
    use crate::window::Offset;

    fn leaf(score: f64) -> Node {
        Node::Leaf(Leaf {
            counts: [0, 0],
            score,
            share: 0.0,
        })
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
            let p = Program::compile(&tree, thr);
            for b in [Backend::Portable, Backend::detect()] {
                assert_eq!(
                    p.detect_with(b, &frame, &mut s),
                    evaluate::detect(&tree, thr, &frame),
                    "threshold {thr}, {b:?}"
                );
            }
        }
    }
}
