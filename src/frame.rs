//! Bit-packed binary frames: the one in-memory picture type of burlwatch.
//!
//! A [`BitFrame`] is a 1-bit image stored as rows of `u64` words. Pixel value
//! 1 ("set", "ink") is what PBM stores as black; 0 is "clear". Frames, masks
//! of target pixels and detection masks all use this type.
//!
//! Layout and invariants (every function here keeps them, and the rest of
//! the crate may rely on them):
//! - pixel `(x, y)` lives in word `y * stride + x / 64`, bit `x % 64`
//!   (least significant bit first, so `trailing_zeros` walks left to right);
//! - `stride == ceil(width / 64)`, and a row of width 0 still has no words;
//! - padding bits past `width` in the last word of a row are always clear,
//!   so whole-word operations (popcount, AND, OR) never see stray pixels.

/// A binary image packed 64 pixels to a word, rows padded to whole words.
#[derive(Clone, PartialEq, Eq)]
pub struct BitFrame {
    width: usize,
    height: usize,
    stride: usize,
    words: Vec<u64>,
}

impl std::fmt::Debug for BitFrame {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(
            f,
            "BitFrame({}x{}, {} set)",
            self.width,
            self.height,
            self.count_set()
        )
    }
}

impl BitFrame {
    /// An all-clear frame.
    pub fn new(width: usize, height: usize) -> BitFrame {
        let stride = width.div_ceil(64);
        BitFrame {
            width,
            height,
            stride,
            words: vec![0; stride * height],
        }
    }

    /// Builds a frame from a predicate over pixel coordinates.
    pub fn from_fn(width: usize, height: usize, mut f: impl FnMut(usize, usize) -> bool) -> Self {
        let mut frame = BitFrame::new(width, height);
        for y in 0..height {
            for x in 0..width {
                if f(x, y) {
                    frame.set(x, y, true);
                }
            }
        }
        frame
    }

    pub fn width(&self) -> usize {
        self.width
    }

    pub fn height(&self) -> usize {
        self.height
    }

    /// Words per row.
    pub fn stride(&self) -> usize {
        self.stride
    }

    /// Number of pixels.
    pub fn len(&self) -> usize {
        self.width * self.height
    }

    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// Pixel value; coordinates outside the frame read as clear.
    #[inline]
    pub fn get(&self, x: usize, y: usize) -> bool {
        if x >= self.width || y >= self.height {
            return false;
        }
        (self.words[y * self.stride + x / 64] >> (x % 64)) & 1 == 1
    }

    /// Pixel value at signed coordinates; outside the frame reads as clear.
    #[inline]
    pub fn get_signed(&self, x: isize, y: isize) -> bool {
        if x < 0 || y < 0 {
            return false;
        }
        self.get(x as usize, y as usize)
    }

    /// Sets or clears one pixel. Panics when out of range (a programming
    /// error, never a data error: decoders check sizes first).
    #[inline]
    pub fn set(&mut self, x: usize, y: usize, value: bool) {
        assert!(x < self.width && y < self.height, "pixel out of range");
        let w = &mut self.words[y * self.stride + x / 64];
        let bit = 1u64 << (x % 64);
        if value {
            *w |= bit;
        } else {
            *w &= !bit;
        }
    }

    /// The packed words of row `y`.
    #[inline]
    pub fn row(&self, y: usize) -> &[u64] {
        &self.words[y * self.stride..(y + 1) * self.stride]
    }

    /// Mutable packed words of row `y`. Callers must keep padding bits clear;
    /// [`BitFrame::clear_padding`] restores the invariant.
    #[inline]
    pub(crate) fn row_mut(&mut self, y: usize) -> &mut [u64] {
        &mut self.words[y * self.stride..(y + 1) * self.stride]
    }

    /// All words, row after row.
    pub fn words(&self) -> &[u64] {
        &self.words
    }

    /// All words, mutable. Callers must keep padding bits clear;
    /// [`BitFrame::clear_padding`] restores the invariant.
    pub(crate) fn words_mut(&mut self) -> &mut [u64] {
        &mut self.words
    }

    /// Mask of the valid bits in the last word of a row.
    pub fn last_word_mask(&self) -> u64 {
        match self.width % 64 {
            0 => u64::MAX,
            r => (1u64 << r) - 1,
        }
    }

    /// Clears any bits past `width`, re-establishing the padding invariant.
    pub fn clear_padding(&mut self) {
        if self.stride == 0 {
            return;
        }
        let mask = self.last_word_mask();
        for y in 0..self.height {
            let i = y * self.stride + self.stride - 1;
            self.words[i] &= mask;
        }
    }

    /// Number of set pixels.
    pub fn count_set(&self) -> u64 {
        self.words.iter().map(|w| w.count_ones() as u64).sum()
    }

    /// Share of set pixels, 0 for an empty frame.
    pub fn density(&self) -> f64 {
        if self.is_empty() {
            0.0
        } else {
            self.count_set() as f64 / self.len() as f64
        }
    }

    /// Same width and height.
    pub fn same_size(&self, other: &BitFrame) -> bool {
        self.width == other.width && self.height == other.height
    }

    /// Pixel-wise AND of two frames of the same size.
    pub fn and(&self, other: &BitFrame) -> BitFrame {
        assert!(self.same_size(other));
        let words = self
            .words
            .iter()
            .zip(&other.words)
            .map(|(a, b)| a & b)
            .collect();
        BitFrame {
            words,
            ..self.clone()
        }
    }

    /// Pixel-wise union of two frames of the same size.
    pub fn or(&self, other: &BitFrame) -> BitFrame {
        assert!(self.same_size(other));
        let mut out = self.clone();
        for (a, b) in out.words.iter_mut().zip(&other.words) {
            *a |= b;
        }
        out
    }

    /// The pixels set here and clear in `other` (same size).
    pub fn and_not(&self, other: &BitFrame) -> BitFrame {
        assert!(self.same_size(other));
        let mut out = self.clone();
        for (a, b) in out.words.iter_mut().zip(&other.words) {
            *a &= !b;
        }
        out
    }

    /// Pixel-wise complement (padding stays clear).
    pub fn not(&self) -> BitFrame {
        let mut out = BitFrame {
            words: self.words.iter().map(|w| !w).collect(),
            ..self.clone()
        };
        out.clear_padding();
        out
    }

    /// Coordinates of set pixels in raster order.
    pub fn iter_set(&self) -> impl Iterator<Item = (usize, usize)> + '_ {
        (0..self.height).flat_map(move |y| {
            self.row(y).iter().enumerate().flat_map(move |(i, &w)| {
                let mut w = w;
                std::iter::from_fn(move || {
                    if w == 0 {
                        None
                    } else {
                        let b = w.trailing_zeros() as usize;
                        w &= w - 1;
                        Some((i * 64 + b, y))
                    }
                })
            })
        })
    }

    /// A short text picture (`#` set, `.` clear), for tests and debugging.
    pub fn to_ascii(&self) -> String {
        let mut s = String::with_capacity((self.width + 1) * self.height);
        for y in 0..self.height {
            for x in 0..self.width {
                s.push(if self.get(x, y) { '#' } else { '.' });
            }
            s.push('\n');
        }
        s
    }

    /// Parses the picture made by [`BitFrame::to_ascii`] (`#`/`1` set,
    /// anything else clear); all lines must have the same length.
    pub fn from_ascii(text: &str) -> BitFrame {
        let lines: Vec<&str> = text
            .lines()
            .map(str::trim)
            .filter(|l| !l.is_empty())
            .collect();
        let width = lines.first().map_or(0, |l| l.chars().count());
        BitFrame::from_fn(width, lines.len(), |x, y| {
            matches!(lines[y].chars().nth(x), Some('#') | Some('1'))
        })
    }
}

/// A frame with its per-pixel labels: target where `mask` is set, clear
/// elsewhere, except where `unknown` is set: those pixels are left out of
/// training and scoring (an operator's "don't know here").
///
/// Invariant kept by the constructors that read files (and checked where
/// frames are used): `mask` and `unknown` have the frame's size.
#[derive(Clone, Debug)]
pub struct LabelledFrame {
    pub name: String,
    pub frame: BitFrame,
    pub mask: BitFrame,
    /// Pixels whose label is not known; `None` when every pixel is known.
    pub unknown: Option<BitFrame>,
}

impl LabelledFrame {
    /// A frame whose every pixel is labelled by `mask`.
    pub fn new(name: impl Into<String>, frame: BitFrame, mask: BitFrame) -> LabelledFrame {
        LabelledFrame {
            name: name.into(),
            frame,
            mask,
            unknown: None,
        }
    }

    /// Whether every labelled plane has the frame's size.
    pub fn sizes_agree(&self) -> bool {
        self.frame.same_size(&self.mask)
            && self
                .unknown
                .as_ref()
                .is_none_or(|u| self.frame.same_size(u))
    }

    /// The pixels whose label is known (all of them without `unknown`).
    pub fn known(&self) -> BitFrame {
        match &self.unknown {
            Some(u) => u.not(),
            None => BitFrame::new(self.frame.width(), self.frame.height()).not(),
        }
    }

    /// The target pixels whose label is known.
    pub fn truth(&self) -> BitFrame {
        match &self.unknown {
            Some(u) => self.mask.and_not(u),
            None => self.mask.clone(),
        }
    }

    /// How many pixels have a known label.
    pub fn known_pixels(&self) -> u64 {
        self.frame.len() as u64 - self.unknown.as_ref().map_or(0, |u| u.count_set())
    }
    /// SHA-256 of the frame's and mask's pixels (with their sizes): the key
    /// of the holdout split.
    pub fn content_hash(&self) -> [u8; 32] {
        use sha2::Digest;
        let mut h = sha2::Sha256::new();
        for f in [&self.frame, &self.mask] {
            h.update((f.width() as u64).to_le_bytes());
            h.update((f.height() as u64).to_le_bytes());
            for w in f.words() {
                h.update(w.to_le_bytes());
            }
        }
        h.finalize().into()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn padding_stays_clear() {
        let f = BitFrame::new(65, 2).not();
        assert_eq!(f.count_set(), 130);
        assert_eq!(f.row(0)[1], 1);
    }

    #[test]
    fn iter_set_is_raster_order() {
        let f = BitFrame::from_ascii("#..#\n.#..\n");
        let v: Vec<_> = f.iter_set().collect();
        assert_eq!(v, vec![(0, 0), (3, 0), (1, 1)]);
        assert!(!f.get_signed(-1, 0));
        assert!(!f.get(10, 0));
    }
}
