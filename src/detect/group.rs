//! Grouping detected pixels into objects.
//!
//! Positive pixels form 8-connected components; then components whose
//! pixels come within `merge_distance` clear pixels of each other merge
//! (two pixels are joined when their Chebyshev distance is at most
//! `merge_distance + 1`, so distance 0 is plain 8-connectivity); finally
//! objects smaller than `min_area` pixels are dropped.
//!
//! Design decision: labelling works on horizontal runs of set pixels, found
//! with word operations, joined by union-find; a run looks back only at the
//! runs of the `merge_distance + 1` rows above. Cost and memory grow with
//! the number of runs, not with the frame size, which suits masks where
//! detections are rare. Object ids are 1..n in raster order of each
//! object's first pixel, so the same mask always gives the same ids.

use serde::{Deserialize, Serialize};

use crate::frame::BitFrame;

pub use crate::model::settings::{GroupParams, MAX_MERGE_DISTANCE};

/// An inclusive pixel rectangle.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct BBox {
    pub x0: u32,
    pub y0: u32,
    pub x1: u32,
    pub y1: u32,
}

impl BBox {
    pub fn area(&self) -> u64 {
        (self.x1 - self.x0 + 1) as u64 * (self.y1 - self.y0 + 1) as u64
    }

    /// Intersection over union of two boxes (pixel-inclusive).
    pub fn iou(&self, other: &BBox) -> f64 {
        let ix0 = self.x0.max(other.x0);
        let iy0 = self.y0.max(other.y0);
        let ix1 = self.x1.min(other.x1);
        let iy1 = self.y1.min(other.y1);
        if ix0 > ix1 || iy0 > iy1 {
            return 0.0;
        }
        let inter = (ix1 - ix0 + 1) as f64 * (iy1 - iy0 + 1) as f64;
        inter / (self.area() as f64 + other.area() as f64 - inter)
    }
}

/// One detected object.
#[derive(Clone, Debug, PartialEq)]
pub struct Object {
    /// 1..n in raster order of the object's first pixel.
    pub id: u32,
    pub bbox: BBox,
    /// Mean pixel position.
    pub centroid: (f64, f64),
    /// Number of pixels.
    pub area: u64,
    /// Mean score of its pixels (of an evenly spaced sample of
    /// [`MAX_SCORED`] of them for a larger object).
    pub score: f64,
}

struct UnionFind {
    parent: Vec<u32>,
}

impl UnionFind {
    fn push(&mut self) -> u32 {
        let id = self.parent.len() as u32;
        self.parent.push(id);
        id
    }

    fn find(&mut self, mut a: u32) -> u32 {
        while self.parent[a as usize] != a {
            let gp = self.parent[self.parent[a as usize] as usize];
            self.parent[a as usize] = gp;
            a = gp;
        }
        a
    }

    /// Joins two sets; the smaller id stays the root (keeps raster order).
    fn union(&mut self, a: u32, b: u32) {
        let (ra, rb) = (self.find(a), self.find(b));
        if ra != rb {
            let (lo, hi) = if ra < rb { (ra, rb) } else { (rb, ra) };
            self.parent[hi as usize] = lo;
        }
    }
}

/// A horizontal run of set pixels: row `y`, columns `x0..=x1`.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Run {
    pub y: u32,
    pub x0: u32,
    pub x1: u32,
}

/// Appends the runs of set pixels of row `y` to `out`, left to right, found
/// word by word with `trailing_zeros` / `trailing_ones`.
pub fn row_runs(mask: &BitFrame, y: usize, out: &mut Vec<Run>) {
    let row = mask.row(y);
    let mut open: Option<u32> = None;
    for (wi, &word) in row.iter().enumerate() {
        let base = (wi * 64) as u32;
        let mut bit = 0u32;
        while bit < 64 {
            let rest = word >> bit;
            match open {
                None => {
                    if rest == 0 {
                        break;
                    }
                    bit += rest.trailing_zeros();
                    open = Some(base + bit);
                }
                Some(x0) => {
                    let ones = rest.trailing_ones();
                    bit += ones;
                    if bit < 64 {
                        out.push(Run {
                            y: y as u32,
                            x0,
                            x1: base + bit - 1,
                        });
                        open = None;
                    }
                }
            }
        }
    }
    if let Some(x0) = open {
        out.push(Run {
            y: y as u32,
            x0,
            x1: mask.width() as u32 - 1,
        });
    }
}

/// Connected components of the set pixels, as runs: every run of the mask
/// in raster order with its component index (0-based, components numbered
/// in raster order of their first pixel), and the number of components.
/// Two pixels are joined when their Chebyshev distance is at most
/// `merge_distance + 1`.
///
/// Run-based labelling with union-find: a run is compared only with the
/// runs of the `merge_distance + 1` rows above it and with the run before it
/// in its own row (any earlier run close enough is also close to that one),
/// so the cost grows with the number of runs, not of pixels.
pub fn label(mask: &BitFrame, merge_distance: u32) -> (Vec<Run>, Vec<u32>, usize) {
    let reach = merge_distance.min(MAX_MERGE_DISTANCE) + 1;
    let mut runs: Vec<Run> = Vec::new();
    // Index in `runs` of the first run of each row.
    let mut row_start: Vec<usize> = Vec::with_capacity(mask.height() + 1);
    let mut uf = UnionFind { parent: Vec::new() };
    // Per look-back row, the first run that can still reach the current one;
    // runs of a row come left to right, so these only move forward and a
    // row pair costs O(runs in both rows).
    let mut cursor: Vec<usize> = Vec::with_capacity(reach as usize);
    for y in 0..mask.height() {
        row_start.push(runs.len());
        let first = runs.len();
        row_runs(mask, y, &mut runs);
        let top = y.saturating_sub(reach as usize);
        cursor.clear();
        cursor.extend((top..y).map(|yy| row_start[yy]));
        for i in first..runs.len() {
            let id = uf.push();
            debug_assert_eq!(id as usize, i);
            let r = runs[i];
            let lo = r.x0.saturating_sub(reach);
            let hi = r.x1 + reach;
            if i > first && runs[i - 1].x1 + reach >= r.x0 {
                uf.union(id, (i - 1) as u32);
            }
            for (k, yy) in (top..y).enumerate() {
                let end = row_start[yy + 1];
                let mut j = cursor[k];
                while j < end && runs[j].x1 < lo {
                    j += 1;
                }
                cursor[k] = j;
                while j < end && runs[j].x0 <= hi {
                    uf.union(id, j as u32);
                    j += 1;
                }
            }
        }
    }
    // Roots are the smallest run index of their set, and runs follow raster
    // order, so numbering roots by first appearance is raster order of the
    // components' first pixels.
    let mut comp_of_root = vec![u32::MAX; runs.len()];
    let mut n = 0usize;
    let mut comp = Vec::with_capacity(runs.len());
    for i in 0..runs.len() {
        let r = uf.find(i as u32) as usize;
        if comp_of_root[r] == u32::MAX {
            comp_of_root[r] = n as u32;
            n += 1;
        }
        comp.push(comp_of_root[r]);
    }
    (runs, comp, n)
}

/// Groups a detection mask into objects. `score(x, y)` gives the score of a
/// detected pixel (used for the objects' mean score).
pub fn group(
    mask: &BitFrame,
    params: GroupParams,
    score: impl FnMut(usize, usize) -> f64,
) -> Vec<Object> {
    let (runs, comp, n) = label(mask, params.merge_distance);
    objects_of(&runs, &comp, n, params.min_area, score)
}

/// The objects of a mask and the mask of their pixels (what `min_area`
/// kept), from one labelling.
pub fn group_and_keep(
    mask: &BitFrame,
    params: GroupParams,
    score: impl FnMut(usize, usize) -> f64,
) -> (Vec<Object>, BitFrame) {
    let (runs, comp, n) = label(mask, params.merge_distance);
    let objects = objects_of(&runs, &comp, n, params.min_area, score);
    let kept = if params.min_area > 1 {
        kept_of(
            &runs,
            &comp,
            n,
            params.min_area,
            mask.width(),
            mask.height(),
        )
    } else {
        mask.clone()
    };
    (objects, kept)
}

/// Pixels an object's score is the mean of, about: every pixel of an
/// object up to this size, a sample of a larger one. The sample takes
/// pixels in raster order with gaps drawn evenly from 1 to `2k - 1` (mean
/// `k`, the area over this) by a generator seeded per object: a fixed
/// every-k-th step would alias with the weave's period (a 300-pixel-wide
/// object sampled every 15th pixel sees only every 15th column). At most
/// twice this many are ever scored. Scoring walks the tree per pixel, so this bounds
/// the time a frame that is one huge object (blank, all ink, a lens cap)
/// takes: an 8192x8192 blank frame took 6.7 s with every pixel scored.
pub const MAX_SCORED: u64 = 4096;

/// Objects of at least `min_area` pixels from a labelling (as [`label`]
/// returns it), ids 1..n in raster order. `score` is asked only for the
/// pixels of objects kept, and at most [`MAX_SCORED`] of each.
pub fn objects_of(
    runs: &[Run],
    comp: &[u32],
    n: usize,
    min_area: u32,
    mut score: impl FnMut(usize, usize) -> f64,
) -> Vec<Object> {
    struct Acc {
        bbox: BBox,
        sx: u64,
        sy: u64,
        area: u64,
        score: f64,
        /// Scoring: the mean gap between pixels taken (0: not scored),
        /// the offset of the next one from the next run's start, the
        /// pixels scored, and the gaps' generator.
        stride: u64,
        next: u64,
        scored: u64,
        rng: u64,
    }
    let mut acc: Vec<Acc> = Vec::with_capacity(n);
    for (r, &c) in runs.iter().zip(comp) {
        if c as usize == acc.len() {
            acc.push(Acc {
                bbox: BBox {
                    x0: r.x0,
                    y0: r.y,
                    x1: r.x1,
                    y1: r.y,
                },
                sx: 0,
                sy: 0,
                area: 0,
                score: 0.0,
                stride: 0,
                next: 0,
                scored: 0,
                rng: 0x9E37_79B9_7F4A_7C15 ^ (c as u64).wrapping_mul(0xD1B5_4A32_D192_ED03),
            });
        }
        let a = &mut acc[c as usize];
        a.bbox.x0 = a.bbox.x0.min(r.x0);
        a.bbox.x1 = a.bbox.x1.max(r.x1);
        a.bbox.y0 = a.bbox.y0.min(r.y);
        a.bbox.y1 = a.bbox.y1.max(r.y);
        let len = (r.x1 - r.x0 + 1) as u64;
        a.sx += (r.x0 as u64 + r.x1 as u64) * len / 2;
        a.sy += r.y as u64 * len;
        a.area += len;
    }
    // Scored once the areas are known: objects too small to keep are not
    // scored at all, large ones on a sample.
    let keep = min_area.max(1) as u64;
    for a in acc.iter_mut() {
        if a.area >= keep {
            a.stride = a.area.div_ceil(MAX_SCORED);
        }
    }
    for (r, &c) in runs.iter().zip(comp) {
        let a = &mut acc[c as usize];
        if a.stride == 0 {
            continue;
        }
        let mut x = r.x0 as u64 + a.next;
        while x <= r.x1 as u64 && a.scored < 2 * MAX_SCORED {
            a.score += score(x as usize, r.y as usize);
            a.scored += 1;
            x += if a.stride == 1 {
                1
            } else {
                // xorshift64 (Marsaglia, 2003): a gap of 1..=2k-1.
                a.rng ^= a.rng << 13;
                a.rng ^= a.rng >> 7;
                a.rng ^= a.rng << 17;
                1 + a.rng % (2 * a.stride - 1)
            };
        }
        a.next = x.saturating_sub(r.x1 as u64 + 1);
    }
    acc.into_iter()
        .filter(|a| a.area >= keep)
        .enumerate()
        .map(|(i, a)| Object {
            id: i as u32 + 1,
            bbox: a.bbox,
            centroid: (a.sx as f64 / a.area as f64, a.sy as f64 / a.area as f64),
            area: a.area,
            score: a.score / a.scored.max(1) as f64,
        })
        .collect()
}

/// The pixels of object `id` (1-based) of a mask every component of which
/// is an object (a detection's kept mask): components numbered as
/// [`label`] numbers them, so ids match the objects [`group`] gave for
/// that mask. `None` when there is no such object.
pub fn component_pixels(mask: &BitFrame, merge_distance: u32, id: u32) -> Option<BitFrame> {
    let (runs, comp, n) = label(mask, merge_distance);
    if id == 0 || id as usize > n {
        return None;
    }
    let mut out = BitFrame::new(mask.width(), mask.height());
    for (r, &c) in runs.iter().zip(&comp) {
        if c + 1 == id {
            for x in r.x0..=r.x1 {
                out.set(x as usize, r.y as usize, true);
            }
        }
    }
    Some(out)
}

/// The mask of the components of at least `min_area` pixels.
fn kept_of(runs: &[Run], comp: &[u32], n: usize, min_area: u32, w: usize, h: usize) -> BitFrame {
    let mut area = vec![0u64; n];
    for (r, &c) in runs.iter().zip(comp) {
        area[c as usize] += (r.x1 - r.x0 + 1) as u64;
    }
    let mut out = BitFrame::new(w, h);
    for (r, &c) in runs.iter().zip(comp) {
        if area[c as usize] >= min_area.max(1) as u64 {
            let row = out.row_mut(r.y as usize);
            for x in r.x0..=r.x1 {
                row[x as usize / 64] |= 1 << (x % 64);
            }
        }
    }
    out
}

/// The straightforward pixel-by-pixel grouping: breadth-first flood fill
/// over every pixel within Chebyshev distance `merge_distance + 1`. Slow
/// (`O(pixels x reach^2)`); kept as the reference the run-based labelling is
/// tested against.
pub fn group_reference(mask: &BitFrame, params: GroupParams) -> Vec<Object> {
    let reach = params.merge_distance.min(MAX_MERGE_DISTANCE) as isize + 1;
    let (w, h) = (mask.width(), mask.height());
    let mut seen = vec![false; w * h];
    let mut out = Vec::new();
    let mut queue = std::collections::VecDeque::new();
    for (sx, sy) in mask.iter_set() {
        if seen[sy * w + sx] {
            continue;
        }
        seen[sy * w + sx] = true;
        queue.push_back((sx, sy));
        let mut bbox = BBox {
            x0: sx as u32,
            y0: sy as u32,
            x1: sx as u32,
            y1: sy as u32,
        };
        let (mut area, mut tx, mut ty) = (0u64, 0u64, 0u64);
        while let Some((x, y)) = queue.pop_front() {
            area += 1;
            tx += x as u64;
            ty += y as u64;
            bbox.x0 = bbox.x0.min(x as u32);
            bbox.x1 = bbox.x1.max(x as u32);
            bbox.y0 = bbox.y0.min(y as u32);
            bbox.y1 = bbox.y1.max(y as u32);
            for dy in -reach..=reach {
                for dx in -reach..=reach {
                    let (nx, ny) = (x as isize + dx, y as isize + dy);
                    if nx < 0 || ny < 0 || nx >= w as isize || ny >= h as isize {
                        continue;
                    }
                    let k = ny as usize * w + nx as usize;
                    if !seen[k] && mask.get(nx as usize, ny as usize) {
                        seen[k] = true;
                        queue.push_back((nx as usize, ny as usize));
                    }
                }
            }
        }
        if area >= params.min_area.max(1) as u64 {
            out.push(Object {
                id: out.len() as u32 + 1,
                bbox,
                centroid: (tx as f64 / area as f64, ty as f64 / area as f64),
                area,
                score: 1.0,
            });
        }
    }
    out
}

#[cfg(test)]
mod tests {

    #[test]
    fn a_huge_object_is_scored_on_a_bounded_even_sample() {
        // One 300x200 object (60,000 pixels) and a small one.
        let mask = BitFrame::from_fn(320, 220, |x, y| {
            (x < 300 && y < 200) || ((310..315).contains(&x) && (210..215).contains(&y))
        });
        let mut calls = 0u64;
        let (objects, _) = group_and_keep(
            &mask,
            GroupParams {
                min_area: 1,
                merge_distance: 0,
            },
            |x, _| {
                calls += 1;
                x as f64
            },
        );
        assert_eq!(objects.len(), 2);
        assert!(calls <= 2 * MAX_SCORED + 25, "{calls} pixels scored");
        assert!(calls >= MAX_SCORED / 2, "{calls} pixels scored");
        // The sample's mean x is the object's within half a percent (the
        // true mean is 149.5); the small object is scored on every pixel.
        assert!(
            (objects[0].score - 149.5).abs() < 0.75,
            "{}",
            objects[0].score
        );
        assert_eq!(objects[1].score, 312.0);
        // Objects too small to keep are not scored at all.
        let mut calls = 0;
        let (objects, _) = group_and_keep(
            &mask,
            GroupParams {
                min_area: 100,
                merge_distance: 0,
            },
            |_, _| {
                calls += 1;
                1.0
            },
        );
        assert_eq!(objects.len(), 1);
        assert_eq!(objects[0].score, 1.0);
        assert!(calls <= 2 * MAX_SCORED);
    }

    use super::*;

    fn objs(text: &str, md: u32, min_area: u32) -> Vec<Object> {
        let m = BitFrame::from_ascii(text);
        group(
            &m,
            GroupParams {
                min_area,
                merge_distance: md,
            },
            |_, _| 1.0,
        )
    }

    #[test]
    fn eight_connectivity_and_order() {
        let t = "#...#\n.#..#\n..#..\n.....\n#....\n";
        let o = objs(t, 0, 1);
        assert_eq!(o.len(), 3);
        // Diagonal chain from (0,0) is one object; (4,0)-(4,1) is second.
        assert_eq!(o[0].area, 3);
        assert_eq!(
            o[1].bbox,
            BBox {
                x0: 4,
                y0: 0,
                x1: 4,
                y1: 1
            }
        );
        assert_eq!(
            o[2].bbox,
            BBox {
                x0: 0,
                y0: 4,
                x1: 0,
                y1: 4
            }
        );
    }

    #[test]
    fn u_shape_joins_late() {
        // The two arms meet only at the bottom row: union must relabel.
        let o = objs("#.#\n#.#\n###\n", 0, 1);
        assert_eq!(o.len(), 1);
        assert_eq!(o[0].area, 7);
    }

    #[test]
    fn merge_distance_and_min_area() {
        let t = "#..#......#\n";
        assert_eq!(objs(t, 0, 1).len(), 3);
        assert_eq!(objs(t, 1, 1).len(), 3);
        assert_eq!(objs(t, 2, 1).len(), 2);
        assert_eq!(objs(t, 6, 1).len(), 1);
        assert_eq!(objs(t, 2, 2).len(), 1);
        assert_eq!(objs(t, 2, 2)[0].id, 1);
    }

    #[test]
    fn runs_match_the_pixel_reference() {
        // Pseudo-random masks of several densities and widths around the
        // word size; both groupings must give the same objects.
        let mut state = 12345u64;
        let mut next = || {
            state = state
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            (state >> 33) as u32
        };
        for &(w, h) in &[(1usize, 1usize), (63, 7), (64, 9), (65, 11), (130, 17)] {
            for density in [0u32, 5, 30, 60, 100] {
                let m = BitFrame::from_fn(w, h, |_, _| next() % 100 < density);
                for md in [0, 1, 2, 5] {
                    for min_area in [1, 3] {
                        let p = GroupParams {
                            min_area,
                            merge_distance: md,
                        };
                        let fast: Vec<_> = group(&m, p, |_, _| 1.0);
                        let slow = group_reference(&m, p);
                        assert_eq!(fast, slow, "{w}x{h} density {density} md {md}");
                    }
                }
            }
        }
    }

    #[test]
    fn iou_of_boxes() {
        let a = BBox {
            x0: 0,
            y0: 0,
            x1: 1,
            y1: 1,
        };
        let b = BBox {
            x0: 1,
            y0: 0,
            x1: 2,
            y1: 1,
        };
        assert!((a.iou(&b) - 2.0 / 6.0).abs() < 1e-12);
        assert_eq!(a.iou(&a), 1.0);
    }
}
