//! Grouping detected pixels into objects.
//!
//! Positive pixels form 8-connected components; then components whose
//! pixels come within `merge_distance` clear pixels of each other merge
//! (two pixels are joined when their Chebyshev distance is at most
//! `merge_distance + 1`, so distance 0 is plain 8-connectivity); finally
//! objects smaller than `min_area` pixels are dropped.
//!
//! Design decision: one union-find pass over the set pixels in raster order,
//! looking back only at the `merge_distance + 1` rows above through a ring of
//! label rows, so memory is `O(width * (merge_distance + 2))` plus the set
//! pixels, whatever the frame size. Object ids are 1..n in raster order of
//! each object's first pixel, so the same mask always gives the same ids.

use serde::{Deserialize, Serialize};

use crate::frame::BitFrame;

/// Largest accepted merge distance (keeps the look-back bounded).
pub const MAX_MERGE_DISTANCE: u32 = 64;

/// How detections become objects.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct GroupParams {
    /// Objects with fewer pixels are dropped.
    pub min_area: u32,
    /// Components separated by at most this many clear pixels merge.
    pub merge_distance: u32,
}

impl Default for GroupParams {
    fn default() -> Self {
        GroupParams {
            min_area: 1,
            merge_distance: 0,
        }
    }
}

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
    /// Mean score of its pixels.
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

/// Component index (0-based, raster order of first pixel) of every set
/// pixel, in raster order, plus the number of components. Pixels joined at
/// Chebyshev distance <= `merge_distance + 1`.
pub fn label(mask: &BitFrame, merge_distance: u32) -> (Vec<(u32, u32)>, Vec<u32>, usize) {
    let md = merge_distance.min(MAX_MERGE_DISTANCE) as usize;
    let reach = md + 1;
    let w = mask.width();
    let ring_rows = reach + 1;
    // label + 1 of the pixel at (x, y) for the last `reach + 1` rows; 0 = clear.
    let mut ring = vec![0u32; w * ring_rows];
    let mut uf = UnionFind { parent: Vec::new() };
    let mut pixels: Vec<(u32, u32)> = Vec::new();
    let mut nodes: Vec<u32> = Vec::new();
    for y in 0..mask.height() {
        let slot = y % ring_rows;
        ring[slot * w..(slot + 1) * w].fill(0);
        for (wi, &word) in mask.row(y).iter().enumerate() {
            let mut bits = word;
            while bits != 0 {
                let x = wi * 64 + bits.trailing_zeros() as usize;
                bits &= bits - 1;
                let id = uf.push();
                ring[slot * w + x] = id + 1;
                let xa = x.saturating_sub(reach);
                let xb = (x + reach).min(w - 1);
                // Rows above, within reach.
                for dy in 1..=reach.min(y) {
                    let s = (y - dy) % ring_rows;
                    for &l in &ring[s * w + xa..=s * w + xb] {
                        if l != 0 {
                            uf.union(id, l - 1);
                        }
                    }
                }
                // Same row, to the left.
                for &l in &ring[slot * w + xa..slot * w + x] {
                    if l != 0 {
                        uf.union(id, l - 1);
                    }
                }
                pixels.push((x as u32, y as u32));
                nodes.push(id);
            }
        }
    }
    // Number components by the first pixel's raster position (roots are the
    // smallest id in their set, and ids follow raster order).
    let mut comp_of_root = vec![u32::MAX; nodes.len()];
    let mut n = 0usize;
    let mut comp = Vec::with_capacity(nodes.len());
    for &id in &nodes {
        let r = uf.find(id) as usize;
        if comp_of_root[r] == u32::MAX {
            comp_of_root[r] = n as u32;
            n += 1;
        }
        comp.push(comp_of_root[r]);
    }
    (pixels, comp, n)
}

/// Groups a detection mask into objects. `score(x, y)` gives the score of a
/// detected pixel (used for the objects' mean score).
pub fn group(
    mask: &BitFrame,
    params: GroupParams,
    mut score: impl FnMut(usize, usize) -> f64,
) -> Vec<Object> {
    let (pixels, comp, n) = label(mask, params.merge_distance);
    struct Acc {
        bbox: BBox,
        sx: u64,
        sy: u64,
        area: u64,
        score: f64,
    }
    let mut acc: Vec<Acc> = Vec::with_capacity(n);
    for (&(x, y), &c) in pixels.iter().zip(&comp) {
        let s = score(x as usize, y as usize);
        if c as usize == acc.len() {
            acc.push(Acc {
                bbox: BBox {
                    x0: x,
                    y0: y,
                    x1: x,
                    y1: y,
                },
                sx: 0,
                sy: 0,
                area: 0,
                score: 0.0,
            });
        }
        let a = &mut acc[c as usize];
        a.bbox.x0 = a.bbox.x0.min(x);
        a.bbox.x1 = a.bbox.x1.max(x);
        a.bbox.y0 = a.bbox.y0.min(y);
        a.bbox.y1 = a.bbox.y1.max(y);
        a.sx += x as u64;
        a.sy += y as u64;
        a.area += 1;
        a.score += s;
    }
    acc.into_iter()
        .filter(|a| a.area >= params.min_area.max(1) as u64)
        .enumerate()
        .map(|(i, a)| Object {
            id: i as u32 + 1,
            bbox: a.bbox,
            centroid: (a.sx as f64 / a.area as f64, a.sy as f64 / a.area as f64),
            area: a.area,
            score: a.score / a.area as f64,
        })
        .collect()
}

#[cfg(test)]
mod tests {
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
        assert_eq!(o[1].bbox, BBox { x0: 4, y0: 0, x1: 4, y1: 1 });
        assert_eq!(o[2].bbox, BBox { x0: 0, y0: 4, x1: 0, y1: 4 });
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
    fn iou_of_boxes() {
        let a = BBox { x0: 0, y0: 0, x1: 1, y1: 1 };
        let b = BBox { x0: 1, y0: 0, x1: 2, y1: 1 };
        assert!((a.iou(&b) - 2.0 / 6.0).abs() < 1e-12);
        assert_eq!(a.iou(&a), 1.0);
    }
}
