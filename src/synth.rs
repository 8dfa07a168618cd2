//! Synthetic loom frames with exact ground truth, for training and testing
//! the defect detector without a camera on the loom.
//!
//! A generated frame imitates a binarized camera picture of plain-woven
//! fabric: vertical warp threads and horizontal weft threads (ink = set
//! pixel = thread), each slightly off its nominal position and wandering
//! slowly along its length, optionally with plain-weave crossing marks.
//! Holes, knots and broken threads are painted in, a mask frame marks
//! exactly their pixels, and salt-and-pepper sensor noise is applied last to
//! the frame (never to the mask). The evaluation suite's settings
//! ([`LoomParams::suite`]) add a twill-like diagonal of crossing marks,
//! smaller or larger defects, defects cut off by the frame's edge, and
//! uneven light that thickens or thins the threads in broad patches.
//! Options that are off draw no random number, so frames made without them
//! keep their bits.
//!
//! Key design decision: a frame is a pure function of its parameters and
//! seed. The random numbers come from a hand-written PRNG ([`Rng`]:
//! xoshiro256** seeded by SplitMix64) rather than an external crate whose
//! streams may change between versions, and all geometry is integer
//! arithmetic (no trigonometry, whose last bits differ between math
//! libraries). So `(params, seed)` gives the same bits on every platform and
//! in every future version of burlwatch, and stored test sets and benchmark
//! numbers never shift silently.

use crate::frame::BitFrame;

/// Least number of clear pixel columns or rows between the bounding boxes of
/// two defects, so that ground-truth objects never touch.
pub const DEFECT_GAP: usize = 12;
/// Least distance between any defect pixel and the frame border.
pub const DEFECT_MARGIN: usize = 4;
/// Pixels on each side of a broken thread's bed that belong to its defect region.
pub const BED_MARGIN: usize = 2;
/// Least pixels of a defect cut off by the frame's edge.
pub const EDGE_DEFECT_PIXELS: usize = 8;
/// Placement attempts per defect before it is left out of the frame.
const PLACEMENT_TRIES: usize = 64;
/// SplitMix64's increment (2^64 divided by the golden ratio).
const GOLDEN: u64 = 0x9E37_79B9_7F4A_7C15;
/// "No thread here" in the per-pixel thread ownership tables.
const NONE: u32 = u32::MAX;

/// One step of SplitMix64, exactly as in Sebastiano Vigna's public-domain
/// reference `splitmix64.c` (<https://prng.di.unimi.it/splitmix64.c>).
fn splitmix64(state: &mut u64) -> u64 {
    *state = state.wrapping_add(GOLDEN);
    let mut z = *state;
    z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    z ^ (z >> 31)
}

/// Deterministic PRNG: xoshiro256** 1.0 by David Blackman and Sebastiano
/// Vigna (public-domain reference `xoshiro256starstar.c`,
/// <https://prng.di.unimi.it/>), its state filled from the seed by
/// SplitMix64 as the authors recommend. Not cryptographic.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Rng {
    s: [u64; 4],
}

impl Rng {
    /// A generator for `seed`. Four consecutive SplitMix64 outputs are never
    /// all zero (it is a bijection of distinct states), so the xoshiro state
    /// is always valid.
    pub fn new(seed: u64) -> Rng {
        let mut sm = seed;
        Rng {
            s: std::array::from_fn(|_| splitmix64(&mut sm)),
        }
    }

    /// Next 64 random bits.
    pub fn next_u64(&mut self) -> u64 {
        let s = &mut self.s;
        let result = s[1].wrapping_mul(5).rotate_left(7).wrapping_mul(9);
        let t = s[1] << 17;
        s[2] ^= s[0];
        s[3] ^= s[1];
        s[1] ^= s[2];
        s[0] ^= s[3];
        s[2] ^= t;
        s[3] = s[3].rotate_left(45);
        result
    }

    /// Uniform `f64` in `[0, 1)` with 53 random bits.
    pub fn uniform(&mut self) -> f64 {
        (self.next_u64() >> 11) as f64 * (1.0 / (1u64 << 53) as f64)
    }

    /// Uniform integer in `lo..hi` (multiply-shift; bias below 2^-50 for
    /// frame-sized ranges). Panics if the range is empty.
    pub fn range(&mut self, lo: usize, hi: usize) -> usize {
        assert!(lo < hi, "empty range {lo}..{hi}");
        let span = (hi - lo) as u128;
        lo + ((u128::from(self.next_u64()) * span) >> 64) as usize
    }

    /// True with probability `p` (never for `p <= 0`, always for `p >= 1`).
    pub fn chance(&mut self, p: f64) -> bool {
        self.uniform() < p
    }

    /// Uniform signed offset in `-max..=max`.
    fn offset(&mut self, max: usize) -> isize {
        self.range(0, 2 * max + 1) as isize - max as isize
    }
}

/// Multiplier of a set's seed in [`frame_seed`]: over a million, so two
/// sets of at most a million frames each, whose different seeds are below
/// 2^44, never share a frame seed.
const SET_STRIDE: u64 = 1_000_003;

/// The seed of frame `index` of the set seeded `base_seed`:
/// `base_seed * 1_000_003 + index`, wrapping. Every generated set uses it:
/// `burlwatch generate --seed S` writes frame `i` from `frame_seed(S, i)`
/// (the committed `demo-frames/` were made so), and so does
/// [`generate_set`]. Single frames of a set can be regenerated on their
/// own. Neighbouring seeds give unrelated frames all the same, since
/// [`Rng::new`] scrambles its seed through SplitMix64.
pub fn frame_seed(base_seed: u64, index: usize) -> u64 {
    base_seed
        .wrapping_mul(SET_STRIDE)
        .wrapping_add(index as u64)
}

/// How a loom frame looks. All lengths are in pixels.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LoomParams {
    /// Frame width.
    pub width: usize,
    /// Frame height.
    pub height: usize,
    /// Thread spacing: nominal distance between the centres of neighbouring
    /// warp threads (and of neighbouring weft threads).
    pub period: usize,
    /// Thickness of a thread; at least 1 and less than `period`.
    pub thread_width: usize,
    /// Largest offset of a thread's centre from its nominal position; the
    /// bound holds along the whole wandering path.
    pub jitter: usize,
    /// Probability per pixel step along a thread that its centre moves by
    /// one pixel (reflected back at +-`jitter`); 0 gives straight threads.
    pub waviness: f64,
    /// Salt-and-pepper noise: probability that a pixel is flipped, applied
    /// after the defects to the whole frame (the mask is not noised).
    pub noise: f64,
    /// Inclusive range of the number of defects in a frame that is not
    /// clean. Fewer appear only when they do not fit (tiny frames).
    pub defects_per_frame: (usize, usize),
    /// Share of frames with no defect at all.
    pub clean_frame_share: f64,
    /// Plain-weave hint: at each crossing where the weft passes under the
    /// warp (every other crossing, checkerboard-wise), the one-pixel lines
    /// along the warp's edges are cleared.
    pub weave_marks: bool,
    /// A twill-like weave: with `weave_marks`, the marks fall at the
    /// crossings where (warp + weft) mod `twill` is 0, which lines them up
    /// in diagonals. 0 (or 1, 2): plain weave, as above.
    pub twill: usize,
    /// Inclusive range of a knot's radius, pixels (default 3 to 5).
    pub knot_radius: (usize, usize),
    /// Inclusive range of a hole's radius, pixels (default 4 to 8).
    pub hole_radius: (usize, usize),
    /// Inclusive range of a broken thread's gap length (default 12 to 30).
    pub break_length: (usize, usize),
    /// Defects may run into the frame's edge and be cut off by it (half of
    /// them are put across an edge), instead of keeping [`DEFECT_MARGIN`]
    /// pixels away from it.
    pub edge_defects: bool,
    /// Uneven light: this many broad light or dark patches, which the
    /// binarization turns into thinner or thicker threads (by one pixel at
    /// the patch's rim, two at its middle). 0: even light.
    pub light_patches: usize,
}

impl LoomParams {
    /// The reference setting: 256x256 frames of a medium plain weave.
    pub fn standard() -> LoomParams {
        LoomParams {
            width: 256,
            height: 256,
            period: 8,
            thread_width: 3,
            jitter: 1,
            waviness: 0.05,
            noise: 0.01,
            defects_per_frame: (1, 4),
            clean_frame_share: 0.15,
            weave_marks: true,
            twill: 0,
            knot_radius: (3, 5),
            hole_radius: (4, 8),
            break_length: (12, 30),
            edge_defects: false,
            light_patches: 0,
        }
    }

    /// The settings of the evaluation suite (`burlwatch suite`): fabrics
    /// and cameras that differ the way real lines differ, each 512 x 512.
    /// Names are the `generate --preset` names.
    pub fn suite() -> Vec<(&'static str, LoomParams)> {
        let base = LoomParams {
            width: 512,
            height: 512,
            ..LoomParams::standard()
        };
        vec![
            (
                "plain-fine",
                LoomParams {
                    period: 6,
                    thread_width: 2,
                    ..base
                },
            ),
            (
                "plain-coarse",
                LoomParams {
                    period: 13,
                    thread_width: 5,
                    jitter: 2,
                    ..base
                },
            ),
            (
                "twill",
                LoomParams {
                    period: 8,
                    thread_width: 4,
                    twill: 3,
                    ..base
                },
            ),
            (
                "thin-noisy",
                LoomParams {
                    thread_width: 2,
                    noise: 0.05,
                    ..base
                },
            ),
            (
                "patchy-light",
                LoomParams {
                    light_patches: 6,
                    ..base
                },
            ),
            (
                "small-defects",
                LoomParams {
                    knot_radius: (1, 2),
                    hole_radius: (2, 3),
                    break_length: (6, 8),
                    ..base
                },
            ),
            (
                "edge-defects",
                LoomParams {
                    edge_defects: true,
                    ..base
                },
            ),
        ]
    }

    /// A coarser, noisier fabric, for checking that detector defaults are
    /// not tuned to the standard setting only.
    pub fn alternate() -> LoomParams {
        LoomParams {
            period: 11,
            thread_width: 4,
            noise: 0.02,
            ..LoomParams::standard()
        }
    }

    /// A visibly different, finer and wavier weave with a worse camera, for
    /// drift experiments (a detector trained on `standard` should notice).
    pub fn drifted() -> LoomParams {
        LoomParams {
            period: 7,
            thread_width: 2,
            waviness: 0.15,
            noise: 0.04,
            ..LoomParams::standard()
        }
    }

    /// Panics on settings that cannot describe a fabric.
    fn check(&self) {
        assert!(self.width > 0 && self.height > 0, "empty frame");
        assert!(
            self.thread_width >= 1 && self.thread_width < self.period,
            "thread_width must be in 1..period"
        );
        let (lo, hi) = self.defects_per_frame;
        assert!(lo <= hi, "defects_per_frame range is reversed");
        for (lo, hi) in [self.knot_radius, self.hole_radius, self.break_length] {
            assert!(
                1 <= lo && lo <= hi,
                "a defect size range is empty or reversed"
            );
        }
        for p in [self.waviness, self.noise, self.clean_frame_share] {
            assert!((0.0..=1.0).contains(&p), "probability {p} out of [0, 1]");
        }
    }
}

/// The kinds of fabric defects the generator paints.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum DefectKind {
    /// Threads missing over a roughly round region (cleared disc).
    Hole,
    /// A small solid blob of ink (set disc with bumps).
    Knot,
    /// A gap along one warp or weft thread; crossing threads stay.
    BrokenThread,
}

/// One painted defect.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Defect {
    pub kind: DefectKind,
    /// Bounding box of the defect's mask pixels: x0, y0, x1, y1 inclusive.
    pub bbox: (usize, usize, usize, usize),
}

/// A generated frame with its ground truth.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct LoomFrame {
    /// The binarized camera frame (ink = thread), noise included.
    pub frame: BitFrame,
    /// Defect pixels: the union of all defect regions, one 8-connected
    /// component of at least 12 pixels per defect.
    pub mask: BitFrame,
    /// The defects in the order they were painted.
    pub defects: Vec<Defect>,
}

/// The thread layout of one frame before defects and noise.
struct Weave {
    width: usize,
    thread_width: usize,
    /// `warp_left[i][y]`: leftmost column of warp thread `i` in row `y`.
    warp_left: Vec<Vec<isize>>,
    /// `weft_top[j][x]`: topmost row of weft thread `j` in column `x`.
    weft_top: Vec<Vec<isize>>,
    /// Per pixel (row-major), the warp thread covering it, or `NONE`.
    warp_owner: Vec<u32>,
    /// Per pixel (row-major), the weft thread covering it, or `NONE`.
    weft_owner: Vec<u32>,
}

/// Wandering centre offset of one thread along `len` pixel steps.
fn walk(rng: &mut Rng, len: usize, jitter: usize, waviness: f64) -> Vec<isize> {
    let j = jitter as isize;
    let mut pos = rng.offset(jitter);
    (0..len)
        .map(|_| {
            if j > 0 && rng.chance(waviness) {
                let step = if rng.chance(0.5) { 1 } else { -1 };
                pos = if (pos + step).abs() <= j {
                    pos + step
                } else {
                    pos - step
                };
            }
            pos
        })
        .collect()
}

/// Leading-edge paths of parallel threads crossing `across` pixels, each
/// `along` pixels long, with a random phase so frames do not all align.
fn thread_paths(rng: &mut Rng, p: &LoomParams, across: usize, along: usize) -> Vec<Vec<isize>> {
    let period = p.period as isize;
    let phase = rng.range(0, p.period) as isize;
    let half = (p.thread_width as isize - 1) / 2;
    (0..across / p.period + 3)
        .map(|i| {
            let nominal = phase - period + i as isize * period;
            walk(rng, along, p.jitter, p.waviness)
                .into_iter()
                .map(|off| nominal + off - half)
                .collect()
        })
        .collect()
}

impl Weave {
    fn new(p: &LoomParams, rng: &mut Rng) -> Weave {
        let (w, h, tw) = (p.width, p.height, p.thread_width as isize);
        let warp_left = thread_paths(rng, p, w, h);
        let weft_top = thread_paths(rng, p, h, w);
        let mut warp_owner = vec![NONE; w * h];
        let mut weft_owner = vec![NONE; w * h];
        for (i, path) in warp_left.iter().enumerate() {
            for (y, &left) in path.iter().enumerate() {
                for x in (left.max(0)..(left + tw).min(w as isize)).map(|x| x as usize) {
                    warp_owner[y * w + x] = i as u32;
                }
            }
        }
        for (j, path) in weft_top.iter().enumerate() {
            for (x, &top) in path.iter().enumerate() {
                for y in (top.max(0)..(top + tw).min(h as isize)).map(|y| y as usize) {
                    weft_owner[y * w + x] = j as u32;
                }
            }
        }
        Weave {
            width: w,
            thread_width: p.thread_width,
            warp_left,
            weft_top,
            warp_owner,
            weft_owner,
        }
    }

    /// The clean fabric picture.
    fn render(&self, height: usize, weave_marks: bool, twill: usize) -> BitFrame {
        let w = self.width;
        let mut frame = BitFrame::from_fn(w, height, |x, y| {
            self.warp_owner[y * w + x] != NONE || self.weft_owner[y * w + x] != NONE
        });
        if weave_marks {
            let tw = self.thread_width as isize;
            for (i, path) in self.warp_left.iter().enumerate() {
                for (y, &left) in path.iter().enumerate() {
                    for x in [left - 1, left + tw] {
                        if x < 0 || x >= w as isize {
                            continue;
                        }
                        let k = y * w + x as usize;
                        let j = self.weft_owner[k];
                        let marked = if twill >= 3 {
                            (i + j as usize).is_multiple_of(twill)
                        } else {
                            (i + j as usize) & 1 == 0
                        };
                        if j != NONE && self.warp_owner[k] == NONE && marked {
                            frame.set(x as usize, y, false);
                        }
                    }
                }
            }
        }
        frame
    }
}

/// Filled ellipse around the origin with semi-axes `rx + 1/2`, `ry + 1/2`.
fn ellipse(rx: isize, ry: isize) -> Vec<(isize, isize)> {
    let (a, b) = (2 * rx + 1, 2 * ry + 1);
    let mut px = Vec::new();
    for dy in -ry..=ry {
        for dx in -rx..=rx {
            if 4 * dx * dx * b * b + 4 * dy * dy * a * a <= a * a * b * b {
                px.push((dx, dy));
            }
        }
    }
    px
}

/// Bounding box (x0, y0, x1, y1) of a non-empty pixel list.
fn bounds<T: Copy + Ord>(px: &[(T, T)]) -> (T, T, T, T) {
    let (x0, y0) = px[0];
    px.iter().fold((x0, y0, x0, y0), |(a, b, c, d), &(x, y)| {
        (a.min(x), b.min(y), c.max(x), d.max(y))
    })
}

/// True when at least [`DEFECT_GAP`] clear columns or rows lie between.
fn separated(a: (usize, usize, usize, usize), b: (usize, usize, usize, usize)) -> bool {
    a.2 + DEFECT_GAP < b.0
        || b.2 + DEFECT_GAP < a.0
        || a.3 + DEFECT_GAP < b.1
        || b.3 + DEFECT_GAP < a.1
}

/// Pixel offsets of a hole or knot shape around its centre.
fn blob(kind: DefectKind, p: &LoomParams, rng: &mut Rng) -> Vec<(isize, isize)> {
    if kind == DefectKind::Hole {
        let (lo, hi) = p.hole_radius;
        let r = rng.range(lo, hi + 1) as isize;
        let ry = (r + rng.offset(1)).clamp(lo as isize, hi as isize);
        return ellipse(r, ry);
    }
    // A knot: a disc with up to two small bumps centred on its rim.
    let r = rng.range(p.knot_radius.0, p.knot_radius.1 + 1) as isize;
    let d = (r * 707 + 500) / 1000; // r / sqrt(2), rounded
    let rim = [
        (r, 0),
        (d, d),
        (0, r),
        (-d, d),
        (-r, 0),
        (-d, -d),
        (0, -r),
        (d, -d),
    ];
    let mut px = ellipse(r, r);
    for _ in 0..rng.range(0, 3) {
        let (cx, cy) = rim[rng.range(0, rim.len())];
        let br = rng.range(1, 3) as isize;
        px.extend(ellipse(br, br).into_iter().map(|(x, y)| (cx + x, cy + y)));
    }
    px.sort_unstable();
    px.dedup();
    px
}

/// Proposes one defect: its pixels with the frame value each gets, or
/// `None` if the random position breaks the border margin.
fn candidate(
    kind: DefectKind,
    weave: &Weave,
    p: &LoomParams,
    rng: &mut Rng,
) -> Option<Vec<(usize, usize, Option<bool>)>> {
    let margin = if p.edge_defects { 0 } else { DEFECT_MARGIN };
    let (w, h, m) = (p.width as isize, p.height as isize, margin as isize);
    // (x, y, Some(value)) paints the frame and marks the mask; (x, y, None)
    // marks the mask only.
    let painted: Vec<(isize, isize, Option<bool>)> = if kind == DefectKind::BrokenThread {
        // The broken thread's own pixels vanish; crossing threads stay. The
        // defect region is the thread's bed widened by BED_MARGIN pixels on
        // each side (never into a parallel thread): the part of the opening
        // that a neighbourhood can place. The outer columns of the opening
        // look like an ordinary gap from close by, so they are not marked.
        let vertical = rng.chance(0.5);
        let paths = if vertical {
            &weave.warp_left
        } else {
            &weave.weft_top
        };
        let path = &paths[rng.range(0, paths.len())];
        let len = rng.range(p.break_length.0, p.break_length.1 + 1);
        let last = (path.len() + 1).checked_sub(len)?;
        // Across the frame's edge: the gap starts at the first or ends at
        // the last pixel of the thread.
        let start = if p.edge_defects && rng.chance(0.5) {
            if rng.chance(0.5) {
                0
            } else {
                last - 1
            }
        } else {
            rng.range(0, last)
        };
        let (crossing, parallel) = if vertical {
            (&weave.weft_owner, &weave.warp_owner)
        } else {
            (&weave.warp_owner, &weave.weft_owner)
        };
        let tw = weave.thread_width as isize;
        let reach = BED_MARGIN as isize;
        let at = |t: usize, c: isize| {
            if vertical {
                (c, t as isize)
            } else {
                (t as isize, c)
            }
        };
        let in_frame = |(x, y): (isize, isize)| (0..w).contains(&x) && (0..h).contains(&y);
        let index = |(x, y): (isize, isize)| y as usize * weave.width + x as usize;
        let mut px = Vec::with_capacity(len * (weave.thread_width + 2 * reach as usize));
        for (t, &edge) in path.iter().enumerate().skip(start).take(len) {
            for c in edge..edge + tw {
                let xy = at(t, c);
                let covered = in_frame(xy) && crossing[index(xy)] != NONE;
                px.push((xy.0, xy.1, Some(covered)));
            }
            // Out to the next parallel thread on each side.
            for (from, step) in [(edge - 1, -1), (edge + tw, 1)] {
                let mut c = from;
                while (c - from).abs() < reach {
                    let xy = at(t, c);
                    if !in_frame(xy) || parallel[index(xy)] != NONE {
                        break;
                    }
                    px.push((xy.0, xy.1, None));
                    c += step;
                }
            }
        }
        px
    } else {
        let shape = blob(kind, p, rng);
        let (x0, y0, x1, y1) = bounds(&shape);
        let (lo_x, hi_x, lo_y, hi_y) = (m - x0, w - 1 - m - x1, m - y0, h - 1 - m - y1);
        if lo_x > hi_x || lo_y > hi_y {
            return None;
        }
        let mut cx = lo_x + rng.range(0, (hi_x - lo_x + 1) as usize) as isize;
        let mut cy = lo_y + rng.range(0, (hi_y - lo_y + 1) as usize) as isize;
        // Across an edge: up to half the shape's extent outside the frame.
        if p.edge_defects && rng.chance(0.5) {
            let out_x = 1 + rng.range(0, ((x1 - x0 + 1) / 2).max(1) as usize) as isize;
            let out_y = 1 + rng.range(0, ((y1 - y0 + 1) / 2).max(1) as usize) as isize;
            match rng.range(0, 4) {
                0 => cx = -x0 - out_x,
                1 => cx = w - 1 - x1 + out_x,
                2 => cy = -y0 - out_y,
                _ => cy = h - 1 - y1 + out_y,
            }
        }
        let ink = kind == DefectKind::Knot;
        shape
            .into_iter()
            .map(|(x, y)| (cx + x, cy + y, Some(ink)))
            .collect()
    };
    if p.edge_defects {
        // Cut off by the frame's edge; what is left must still be a defect
        // a neighbourhood can see.
        let kept: Vec<(usize, usize, Option<bool>)> = painted
            .into_iter()
            .filter(|&(x, y, _)| (0..w).contains(&x) && (0..h).contains(&y))
            .map(|(x, y, v)| (x as usize, y as usize, v))
            .collect();
        return (kept.len() >= EDGE_DEFECT_PIXELS).then_some(kept);
    }
    let inside =
        |&(x, y, _): &(isize, isize, Option<bool>)| x >= m && y >= m && x < w - m && y < h - m;
    painted.iter().all(inside).then(|| {
        painted
            .iter()
            .map(|&(x, y, v)| (x as usize, y as usize, v))
            .collect()
    })
}

/// The frame as binarized under uneven light: `light_patches` round
/// patches, each light or dark, their strength falling off from the middle
/// as 1 - (d/r)^2 (integer arithmetic, in thousandths) and adding up where
/// they overlap. Where it is dark, threads grow by one pixel (on their
/// left and upper sides; on every side past twice the rim's strength);
/// where it is light, they shrink the same way. The mask is untouched:
/// lighting is not a defect.
fn uneven_light(frame: &BitFrame, p: &LoomParams, rng: &mut Rng) -> BitFrame {
    const RIM: i64 = 300;
    let (w, h) = (p.width as i64, p.height as i64);
    let side = w.min(h) as usize;
    let patches: Vec<(i64, i64, i64, i64)> = (0..p.light_patches)
        .map(|_| {
            let cx = rng.range(0, p.width) as i64;
            let cy = rng.range(0, p.height) as i64;
            let r = rng.range((side / 8).max(2), (side / 3).max(3)) as i64;
            let sign = if rng.chance(0.5) { 1 } else { -1 };
            (cx, cy, r, sign)
        })
        .collect();
    let strength = |x: i64, y: i64| -> i64 {
        patches
            .iter()
            .map(|&(cx, cy, r, sign)| {
                let d2 = (x - cx) * (x - cx) + (y - cy) * (y - cy);
                sign * ((r * r - d2).max(0) * 1000 / (r * r))
            })
            .sum()
    };
    let at = |x: i64, y: i64| frame.get_signed(x as isize, y as isize);
    BitFrame::from_fn(p.width, p.height, |x, y| {
        let (x, y) = (x as i64, y as i64);
        let s = strength(x, y);
        let here = at(x, y);
        if s > RIM {
            // Dark: ink spreads from the right and lower neighbours, and
            // from every side in the patch's middle.
            here || at(x + 1, y) || at(x, y + 1) || (s > 2 * RIM && (at(x - 1, y) || at(x, y - 1)))
        } else if s < -RIM {
            // Light: ink with clear on its left or upper side goes, and in
            // the middle with clear on any side.
            here && at(x - 1, y)
                && at(x, y - 1)
                && (s >= -2 * RIM || (at(x + 1, y) && at(x, y + 1)))
        } else {
            here
        }
    })
}

/// Generates one frame. Same `params` and `seed` give identical bits.
///
/// Texture, defects and noise draw from separate streams derived from the
/// seed, so changing only `noise` leaves texture, defects and mask as they
/// were.
///
/// # Panics
/// On impossible parameters: empty frame, `thread_width` not in
/// `1..period`, probabilities outside `[0, 1]`, reversed defect range.
pub fn generate(params: &LoomParams, seed: u64) -> LoomFrame {
    params.check();
    let mut master = Rng::new(seed);
    let mut texture_rng = Rng::new(master.next_u64());
    let mut defect_rng = Rng::new(master.next_u64());
    let mut noise_rng = Rng::new(master.next_u64());
    // Drawn after the others, so frames without uneven light keep the
    // bits they always had.
    let mut light_rng = Rng::new(master.next_u64());

    let weave = Weave::new(params, &mut texture_rng);
    let mut frame = weave.render(params.height, params.weave_marks, params.twill);
    let mut mask = BitFrame::new(params.width, params.height);
    let mut defects: Vec<Defect> = Vec::new();

    let (lo, hi) = params.defects_per_frame;
    let count = if defect_rng.chance(params.clean_frame_share) {
        0
    } else {
        defect_rng.range(lo, hi + 1)
    };
    let kinds = [DefectKind::Hole, DefectKind::Knot, DefectKind::BrokenThread];
    for _ in 0..count {
        let kind = kinds[defect_rng.range(0, kinds.len())];
        for _ in 0..PLACEMENT_TRIES {
            let Some(pixels) = candidate(kind, &weave, params, &mut defect_rng) else {
                continue;
            };
            let xy: Vec<(usize, usize)> = pixels.iter().map(|&(x, y, _)| (x, y)).collect();
            let bbox = bounds(&xy);
            if defects.iter().all(|d| separated(d.bbox, bbox)) {
                for &(x, y, value) in &pixels {
                    if let Some(v) = value {
                        frame.set(x, y, v);
                    }
                    mask.set(x, y, true);
                }
                defects.push(Defect { kind, bbox });
                break;
            }
        }
    }

    if params.light_patches > 0 {
        frame = uneven_light(&frame, params, &mut light_rng);
    }
    if params.noise > 0.0 {
        for y in 0..params.height {
            for x in 0..params.width {
                if noise_rng.chance(params.noise) {
                    frame.set(x, y, !frame.get(x, y));
                }
            }
        }
    }
    LoomFrame {
        frame,
        mask,
        defects,
    }
}

/// Generates `count` frames; frame `i` is `generate(params, frame_seed(base_seed, i))`.
pub fn generate_set(params: &LoomParams, base_seed: u64, count: usize) -> Vec<LoomFrame> {
    (0..count)
        .map(|i| generate(params, frame_seed(base_seed, i)))
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn presets() -> [LoomParams; 3] {
        [
            LoomParams::standard(),
            LoomParams::alternate(),
            LoomParams::drifted(),
        ]
    }

    /// 8-connected components of the set pixels, by flood fill.
    fn components(f: &BitFrame) -> Vec<Vec<(usize, usize)>> {
        let mut seen = BitFrame::new(f.width(), f.height());
        let mut out = Vec::new();
        for (sx, sy) in f.iter_set() {
            if seen.get(sx, sy) {
                continue;
            }
            seen.set(sx, sy, true);
            let (mut stack, mut comp) = (vec![(sx, sy)], Vec::new());
            while let Some((x, y)) = stack.pop() {
                comp.push((x, y));
                for (dx, dy) in (-1..=1).flat_map(|dx| (-1..=1).map(move |dy| (dx, dy))) {
                    let (nx, ny) = (x as isize + dx, y as isize + dy);
                    if f.get_signed(nx, ny) && !seen.get(nx as usize, ny as usize) {
                        seen.set(nx as usize, ny as usize, true);
                        stack.push((nx as usize, ny as usize));
                    }
                }
            }
            out.push(comp);
        }
        out
    }

    #[test]
    fn splitmix64_matches_published_outputs() {
        // Seed 1234567: the five values published on Rosetta Code
        // ("Pseudo-random numbers/Splitmix64"), also found in several
        // independent known-answer tests; seed 0's first output likewise.
        let mut state = 1234567;
        let want = [
            6457827717110365317,
            3203168211198807973,
            9817491932198370423,
            4593380528125082431,
            16408922859458223821,
        ];
        for w in want {
            assert_eq!(splitmix64(&mut state), w);
        }
        assert_eq!(splitmix64(&mut 0), 0xE220_A839_7B1D_CDAF);
    }

    #[test]
    fn xoshiro256starstar_matches_reference_for_state_1_2_3_4() {
        // The first two values follow by hand from the reference code
        // (rotl(2 * 5, 7) * 9 = 11520, then s[1] becomes 0); the rest are
        // from a third-party known-answer test of xoshiro256starstar.c.
        let mut rng = Rng { s: [1, 2, 3, 4] };
        let want = [
            11520,
            0,
            1509978240,
            1215971899390074240,
            1216172134540287360,
            607988272756665600,
        ];
        for w in want {
            assert_eq!(rng.next_u64(), w);
        }
    }

    #[test]
    fn rng_helpers_stay_in_range() {
        let mut rng = Rng::new(99);
        for _ in 0..10_000 {
            let u = rng.uniform();
            assert!((0.0..1.0).contains(&u));
            assert!((5..9).contains(&rng.range(5, 9)));
            assert!((-2..=2).contains(&rng.offset(2)));
            assert!(!rng.chance(0.0) && rng.chance(1.0));
        }
        let hits = (0..10_000).filter(|_| rng.chance(0.3)).count();
        assert!((2700..3300).contains(&hits), "{hits}");
    }

    #[test]
    fn frame_seeds_follow_the_set_scheme() {
        // The scheme `burlwatch generate` has always used, which the
        // committed demo frames depend on (tests/cli.rs regenerates them).
        assert_eq!(frame_seed(1, 0), 1_000_003);
        assert_eq!(frame_seed(2, 29), 2_000_035);
        assert_eq!(frame_seed(0, 7), 7);
        assert_eq!(frame_seed(u64::MAX, 1_000_003), 0);
    }

    #[test]
    fn generation_is_deterministic_by_seed() {
        for p in presets() {
            let a = generate(&p, 7);
            assert_eq!(a, generate(&p, 7));
            let b = generate(&p, 8);
            assert_ne!(a.frame, b.frame);
        }
        let p = LoomParams::standard();
        let set = generate_set(&p, 42, 5);
        for (i, f) in set.iter().enumerate() {
            assert_eq!(*f, generate(&p, frame_seed(42, i)));
        }
        assert_ne!(set[0].frame, set[1].frame);
    }

    #[test]
    fn masks_are_separated_connected_defect_regions() {
        for p in presets() {
            for f in generate_set(&p, 1, 40) {
                assert!(f.defects.len() <= p.defects_per_frame.1);
                let comps = components(&f.mask);
                assert_eq!(comps.len(), f.defects.len());
                for d in &f.defects {
                    let (x0, y0, x1, y1) = d.bbox;
                    assert!(x0 >= DEFECT_MARGIN && y0 >= DEFECT_MARGIN);
                    assert!(x1 + DEFECT_MARGIN < p.width && y1 + DEFECT_MARGIN < p.height);
                    // Exactly one component has exactly this bounding box.
                    let own: Vec<_> = comps.iter().filter(|c| bounds(c) == d.bbox).collect();
                    assert_eq!(own.len(), 1, "{d:?}");
                    assert!(own[0].len() >= 12, "{d:?}: {} px", own[0].len());
                }
                for (i, a) in f.defects.iter().enumerate() {
                    for b in &f.defects[i + 1..] {
                        let gap_x = b
                            .bbox
                            .0
                            .saturating_sub(a.bbox.2 + 1)
                            .max(a.bbox.0.saturating_sub(b.bbox.2 + 1));
                        let gap_y = b
                            .bbox
                            .1
                            .saturating_sub(a.bbox.3 + 1)
                            .max(a.bbox.1.saturating_sub(b.bbox.3 + 1));
                        assert!(gap_x.max(gap_y) >= DEFECT_GAP, "{a:?} {b:?}");
                    }
                }
            }
        }
    }

    /// The suite's settings keep the ground truth's promises: one
    /// 8-connected component per defect, separated by [`DEFECT_GAP`]; away
    /// from the edge unless the setting puts defects across it, and then
    /// some do touch it; small defects are small.
    #[test]
    fn the_suite_settings_keep_their_ground_truth() {
        for (name, p) in LoomParams::suite() {
            let mut touching = 0;
            for f in generate_set(&p, 2, 12) {
                let comps = components(&f.mask);
                assert_eq!(comps.len(), f.defects.len(), "{name}");
                for d in &f.defects {
                    let (x0, y0, x1, y1) = d.bbox;
                    let own: Vec<_> = comps.iter().filter(|c| bounds(c) == d.bbox).collect();
                    assert_eq!(own.len(), 1, "{name} {d:?}");
                    assert!(own[0].len() >= 5, "{name} {d:?}: {} px", own[0].len());
                    let edge = x0 == 0 || y0 == 0 || x1 + 1 == p.width || y1 + 1 == p.height;
                    touching += edge as usize;
                    if !p.edge_defects {
                        assert!(x0 >= DEFECT_MARGIN && y0 >= DEFECT_MARGIN, "{name}");
                        assert!(x1 + DEFECT_MARGIN < p.width && y1 + DEFECT_MARGIN < p.height);
                    }
                    if name == "small-defects" && d.kind != DefectKind::BrokenThread {
                        // Radius at most 2 plus bumps of radius at most 2.
                        assert!(x1 - x0 < 10 && y1 - y0 < 10, "{d:?}");
                    }
                }
                for (i, a) in f.defects.iter().enumerate() {
                    for b in &f.defects[i + 1..] {
                        assert!(separated(a.bbox, b.bbox), "{name}: {a:?} {b:?}");
                    }
                }
            }
            if p.edge_defects {
                assert!(
                    touching >= 5,
                    "{name}: only {touching} defects touch the edge"
                );
            } else {
                assert_eq!(touching, 0, "{name}");
            }
        }
    }

    #[test]
    fn twill_and_uneven_light_change_the_fabric_not_the_defects() {
        let plain = LoomParams {
            noise: 0.0,
            ..LoomParams::standard()
        };
        let twill = LoomParams { twill: 3, ..plain };
        let lit = LoomParams {
            light_patches: 6,
            ..plain
        };
        let (a, b, c) = (generate(&plain, 9), generate(&twill, 9), generate(&lit, 9));
        assert_ne!(a.frame, b.frame);
        assert_ne!(a.frame, c.frame);
        // Same defects and mask: the texture and defect streams are the
        // same, and lighting draws from its own stream after them.
        assert_eq!((&a.mask, &a.defects), (&c.mask, &c.defects));
        let ink = |f: &BitFrame| f.iter_set().count() as f64 / (f.width() * f.height()) as f64;
        // Dark patches thicken threads more than light ones thin them, or
        // the reverse; either way the ink share moves.
        assert!((ink(&a.frame) - ink(&c.frame)).abs() > 0.002);
    }

    #[test]
    fn defects_change_the_fabric_as_described() {
        let p = LoomParams {
            noise: 0.0,
            ..LoomParams::standard()
        };
        let mut seen = Vec::new();
        for f in generate_set(&p, 3, 30) {
            for d in &f.defects {
                let (x0, y0, x1, y1) = d.bbox;
                let region: Vec<_> = f
                    .mask
                    .iter_set()
                    .filter(|&(x, y)| x >= x0 && x <= x1 && y >= y0 && y <= y1)
                    .collect();
                let ink = region.iter().filter(|&&(x, y)| f.frame.get(x, y)).count();
                match d.kind {
                    DefectKind::Hole => assert_eq!(ink, 0),
                    DefectKind::Knot => assert_eq!(ink, region.len()),
                    // Only crossing threads remain inside a broken thread.
                    DefectKind::BrokenThread => {
                        assert!(ink * 2 < region.len(), "{ink}/{}", region.len())
                    }
                }
                seen.push(d.kind);
            }
        }
        for k in [DefectKind::Hole, DefectKind::Knot, DefectKind::BrokenThread] {
            assert!(seen.contains(&k), "{k:?} never generated");
        }
    }

    #[test]
    fn clean_fabric_has_plausible_ink_density() {
        for p in presets() {
            let clean = LoomParams {
                clean_frame_share: 1.0,
                ..p
            };
            for seed in 0..5 {
                let f = generate(&clean, seed);
                assert!(f.defects.is_empty() && f.mask.count_set() == 0);
                let d = f.frame.density();
                assert!((0.35..=0.75).contains(&d), "{p:?}: density {d}");
            }
        }
    }

    #[test]
    fn defects_are_a_small_share_of_pixels() {
        let frames = generate_set(&LoomParams::standard(), 2024, 50);
        let defect_px: u64 = frames.iter().map(|f| f.mask.count_set()).sum();
        let share = defect_px as f64 / (50.0 * 256.0 * 256.0);
        assert!(share > 0.0 && share < 0.01, "defect share {share}");
        let clean = frames.iter().filter(|f| f.defects.is_empty()).count();
        assert!((1..25).contains(&clean), "{clean} clean frames of 50");
    }

    #[test]
    fn noise_flips_about_the_requested_share() {
        for p in presets() {
            let quiet = generate(&LoomParams { noise: 0.0, ..p }, 11);
            let noisy = generate(&p, 11);
            assert_eq!(quiet.mask, noisy.mask);
            assert_eq!(quiet.defects, noisy.defects);
            let flipped = quiet.frame.not().and(&noisy.frame).count_set()
                + quiet.frame.and(&noisy.frame.not()).count_set();
            let share = flipped as f64 / quiet.frame.len() as f64;
            assert!(
                (share - p.noise).abs() < 0.15 * p.noise,
                "noise {} gave {share}",
                p.noise
            );
        }
    }
}
