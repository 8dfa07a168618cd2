//! Square pixel neighbourhoods ("windows") as 128-bit patterns.
//!
//! A window of odd size `s` (3..=11) centred on a pixel has `s * s` binary
//! features. Feature `i` is the pixel at offset `(dx, dy)` with
//! `dy = i / s - r`, `dx = i % s - r`, `r = s / 2` (row-major, top-left
//! first); bit `i` of the pattern holds it. The default 11x11 window uses
//! 121 of the 128 bits. Pixels outside the frame read as clear.
//!
//! Design decision: feature indices are an internal numbering only. Every
//! file and message a user sees names a feature by its [`Offset`], so a
//! model stays readable and a change of numbering can never silently change
//! what a stored model means.

use std::fmt;

use crate::frame::BitFrame;

/// Smallest and largest window sizes.
pub const MIN_SIZE: u8 = 3;
pub const MAX_SIZE: u8 = 11;
/// The default window: 11x11 = 121 features.
pub const DEFAULT_SIZE: u8 = 11;

/// A pixel's position relative to the window's centre.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub struct Offset {
    pub dx: i8,
    pub dy: i8,
}

impl fmt::Display for Offset {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "({:+},{:+})", self.dx, self.dy)
    }
}

/// An odd square window size.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub struct Window {
    size: u8,
}

impl Default for Window {
    fn default() -> Self {
        Window { size: DEFAULT_SIZE }
    }
}

impl Window {
    /// A window of `size` x `size` pixels; `size` must be odd, 3..=11.
    pub fn new(size: u8) -> Option<Window> {
        (size % 2 == 1 && (MIN_SIZE..=MAX_SIZE).contains(&size)).then_some(Window { size })
    }

    pub fn size(self) -> u8 {
        self.size
    }

    pub fn radius(self) -> i8 {
        (self.size / 2) as i8
    }

    /// Number of features (`size * size`).
    pub fn features(self) -> usize {
        self.size as usize * self.size as usize
    }

    /// The offset of feature `index`.
    pub fn offset(self, index: usize) -> Offset {
        let s = self.size as usize;
        let r = self.radius();
        Offset {
            dx: (index % s) as i8 - r,
            dy: (index / s) as i8 - r,
        }
    }

    /// The feature index of an offset, if it lies inside the window.
    pub fn index(self, off: Offset) -> Option<usize> {
        let r = self.radius();
        if off.dx.abs() > r || off.dy.abs() > r {
            return None;
        }
        let s = self.size as usize;
        Some((off.dy + r) as usize * s + (off.dx + r) as usize)
    }

    /// Index of the centre pixel's feature.
    pub fn centre(self) -> usize {
        self.features() / 2
    }

    /// The pattern of the window centred on `(x, y)`, pixel by pixel. Slow;
    /// the reference for [`for_each_row`].
    pub fn pattern_at(self, frame: &BitFrame, x: usize, y: usize) -> u128 {
        let mut p = 0u128;
        for i in 0..self.features() {
            let o = self.offset(i);
            if frame.get_signed(x as isize + o.dx as isize, y as isize + o.dy as isize) {
                p |= 1 << i;
            }
        }
        p
    }
}

impl Window {
    /// The pattern of the window centred on `(x, y)`, assembled from `size`
    /// row pieces: the fast single-pixel form (used to score the few
    /// detected pixels of a frame).
    pub fn pattern_of(self, frame: &BitFrame, x: usize, y: usize) -> u128 {
        let s = self.size() as usize;
        let r = self.radius() as isize;
        let mut p = 0u128;
        for k in 0..s {
            let yy = y as isize + k as isize - r;
            if yy < 0 || yy >= frame.height() as isize {
                continue;
            }
            let piece = row_bits(frame.row(yy as usize), x as isize - r, s as u32);
            p |= (piece as u128) << (k * s);
        }
        p
    }
}

/// Bits `start .. start + len` of a packed row (`len <= 32`), bit 0 of the
/// result being pixel `start`; pixels outside `0..width` read clear (the
/// frame's padding bits are clear, and missing words read as zero).
#[inline]
fn row_bits(row: &[u64], start: isize, len: u32) -> u64 {
    let mask = (1u64 << len) - 1;
    if start < 0 {
        let neg = start.unsigned_abs() as u32;
        if neg >= len {
            return 0;
        }
        return (row_bits(row, 0, len - neg) << neg) & mask;
    }
    let s = start as usize;
    let (wi, off) = (s / 64, (s % 64) as u32);
    let lo = row.get(wi).copied().unwrap_or(0) >> off;
    let hi = if off > 0 {
        row.get(wi + 1).copied().unwrap_or(0) << (64 - off)
    } else {
        0
    };
    (lo | hi) & mask
}

/// Calls `f(y, patterns)` for every row `y` of the frame in order, with the
/// window pattern of every pixel of that row. One pass, linear in pixels:
/// each source row is cut into `size`-bit pieces once and each pattern is
/// assembled from `size` pieces.
pub fn for_each_row(frame: &BitFrame, window: Window, mut f: impl FnMut(usize, &[u128])) {
    let (w, h) = (frame.width(), frame.height());
    let s = window.size() as usize;
    let r = window.radius() as isize;
    // pieces[k][x] = bits of source row (y + k - r) at x - r .. x + r.
    let mut ring: Vec<Vec<u64>> = vec![vec![0; w]; s];
    let fill = |buf: &mut Vec<u64>, yy: isize| {
        if yy < 0 || yy >= h as isize {
            buf.iter_mut().for_each(|v| *v = 0);
        } else {
            let row = frame.row(yy as usize);
            for (x, v) in buf.iter_mut().enumerate() {
                *v = row_bits(row, x as isize - r, s as u32);
            }
        }
    };
    // Ring slot of source row yy is yy mod s (shifted to be non-negative).
    let slot = |yy: isize| (yy + s as isize).rem_euclid(s as isize) as usize;
    for k in 0..s as isize {
        fill(&mut ring[slot(k - r)], k - r);
    }
    let mut out = vec![0u128; w];
    for y in 0..h {
        let y = y as isize;
        out.iter_mut().for_each(|p| *p = 0);
        for k in 0..s {
            let piece = &ring[slot(y + k as isize - r)];
            let shift = k * s;
            for (p, &v) in out.iter_mut().zip(piece) {
                *p |= (v as u128) << shift;
            }
        }
        f(y as usize, &out);
        // Slide: the row leaving at the top is replaced by the one entering
        // at the bottom.
        fill(&mut ring[slot(y - r)], y + r + 1);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn offsets_roundtrip() {
        for size in [3u8, 5, 7, 9, 11] {
            let w = Window::new(size).unwrap();
            for i in 0..w.features() {
                assert_eq!(w.index(w.offset(i)), Some(i));
            }
            assert_eq!(w.offset(w.centre()), Offset { dx: 0, dy: 0 });
        }
        assert!(Window::new(4).is_none());
        assert!(Window::new(13).is_none());
        assert!(Window::new(1).is_none());
        assert_eq!(Window::default().features(), 121);
    }

    #[test]
    fn rows_match_pixel_by_pixel() {
        let f = BitFrame::from_fn(70, 13, |x, y| (x * 31 + y * 17) % 7 < 3);
        for size in [3u8, 5, 11] {
            let w = Window::new(size).unwrap();
            for_each_row(&f, w, |y, pats| {
                for (x, &p) in pats.iter().enumerate() {
                    assert_eq!(p, w.pattern_at(&f, x, y), "size {size} at ({x},{y})");
                    assert_eq!(p, w.pattern_of(&f, x, y), "size {size} at ({x},{y})");
                }
            });
        }
    }

    #[test]
    fn offset_display() {
        assert_eq!(Offset { dx: 1, dy: -2 }.to_string(), "(+1,-2)");
        assert_eq!(Offset { dx: 0, dy: 0 }.to_string(), "(+0,+0)");
    }
}
