//! Training on a fabric's symmetries: every labelled frame also taken
//! mirrored and turned, so a line with few labelled frames teaches the
//! tree a defect in every orientation the fabric allows.
//!
//! A square window's pattern has the same symmetries as the square: the
//! eight of the dihedral group of order 8 (four turns by quarter turns,
//! each with or without a mirror; Armstrong, *Groups and Symmetry*, 1988,
//! chapter 5). A woven fabric whose warp and weft look alike keeps all
//! eight; one whose warp and weft differ keeps the four that never swap
//! rows and columns (the two mirrors and the half turn). Which group a
//! line has is a fact of the fabric, so the user states it; the tree,
//! the tuning and everything downstream are then the usual ones.
//!
//! Each transform is a [`Transform`]: a transpose (applied first), then a
//! mirror of columns, then a mirror of rows. The same transform is applied
//! to frames ([`Transform::frame`]), for the held-out frames that tuning
//! scores, and to window patterns ([`Transform::pattern`]), for the
//! entries a label store hands the learner ([`Symmetry::entries`]), which
//! then are what the transformed frames would have given.
//!
//! Invariant: for an odd square window `w`, a frame `f`, a pixel `(x, y)`
//! and a transform `t`, the pattern of `t.frame(f)` at `t.point(x, y)` is
//! `Transform::pattern(&t.feature_map(w), pattern of f at (x, y))`
//! (pixels outside a frame read clear on both sides). So a store's entries symmetrised one by one
//! equal the store of the transformed frames, and training from frames or
//! from a store gives the same model.

use crate::error::{Error, Result};
use crate::frame::{BitFrame, LabelledFrame};
use crate::learn::store::{Counts, LabelStore};
use crate::window::{Offset, Window};

/// One symmetry of the square.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub struct Transform(u8);

const TRANSPOSE: u8 = 4;
const MIRROR_COLUMNS: u8 = 1;
const MIRROR_ROWS: u8 = 2;

impl Transform {
    /// The identity.
    pub const IDENTITY: Transform = Transform(0);

    /// All eight, the identity first.
    pub fn all() -> [Transform; 8] {
        std::array::from_fn(|k| Transform(k as u8))
    }

    fn transposes(self) -> bool {
        self.0 & TRANSPOSE != 0
    }

    /// Where pixel `(x, y)` of a `width` x `height` frame goes.
    pub fn point(self, x: usize, y: usize, width: usize, height: usize) -> (usize, usize) {
        let (mut x, mut y, w, h) = if self.transposes() {
            (y, x, height, width)
        } else {
            (x, y, width, height)
        };
        if self.0 & MIRROR_COLUMNS != 0 {
            x = w - 1 - x;
        }
        if self.0 & MIRROR_ROWS != 0 {
            y = h - 1 - y;
        }
        (x, y)
    }

    /// Where a window offset goes.
    pub fn offset(self, o: Offset) -> Offset {
        let (mut dx, mut dy) = if self.transposes() {
            (o.dy, o.dx)
        } else {
            (o.dx, o.dy)
        };
        if self.0 & MIRROR_COLUMNS != 0 {
            dx = -dx;
        }
        if self.0 & MIRROR_ROWS != 0 {
            dy = -dy;
        }
        Offset { dx, dy }
    }

    /// The frame transformed (width and height swap under a transpose).
    pub fn frame(self, f: &BitFrame) -> BitFrame {
        let (w, h) = (f.width(), f.height());
        let mut out = if self.transposes() {
            BitFrame::new(h, w)
        } else {
            BitFrame::new(w, h)
        };
        for (x, y) in f.iter_set() {
            let (tx, ty) = self.point(x, y, w, h);
            out.set(tx, ty, true);
        }
        out
    }

    /// Where each feature of `window` goes: bit `i` of a pattern becomes
    /// bit `map[i]`.
    pub fn feature_map(self, window: Window) -> Vec<usize> {
        (0..window.features())
            .map(|i| {
                window
                    .index(self.offset(window.offset(i)))
                    .expect("a symmetry of the square keeps offsets in the window")
            })
            .collect()
    }

    /// A window pattern transformed, by a map from [`Transform::feature_map`].
    pub fn pattern(map: &[usize], pattern: u128) -> u128 {
        let mut out = 0u128;
        let mut rest = pattern;
        while rest != 0 {
            let i = rest.trailing_zeros() as usize;
            rest &= rest - 1;
            out |= 1 << map[i];
        }
        out
    }

    /// A labelled frame transformed, with its mask and unknown pixels.
    pub fn labelled(self, f: &LabelledFrame) -> LabelledFrame {
        let mut out = LabelledFrame::new(
            format!("{} (symmetry {})", f.name, self.0),
            self.frame(&f.frame),
            self.frame(&f.mask),
        );
        out.unknown = f.unknown.as_ref().map(|u| self.frame(u));
        out
    }
}

/// Which symmetries a line's fabric has.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub enum Symmetry {
    /// None assumed: the frames as they are.
    #[default]
    None,
    /// Mirrors of rows and of columns and the half turn: a fabric whose
    /// warp and weft differ.
    Mirrors,
    /// All eight: warp and weft alike.
    Square,
}

impl Symmetry {
    /// All of them, cheapest first (the transforms a frame is taken under:
    /// one, four, eight).
    pub const ALL: [Symmetry; 3] = [Symmetry::None, Symmetry::Mirrors, Symmetry::Square];

    /// Parses `none`, `mirrors` or `square`.
    pub fn parse(s: &str) -> Option<Symmetry> {
        match s {
            "none" => Some(Symmetry::None),
            "mirrors" => Some(Symmetry::Mirrors),
            "square" => Some(Symmetry::Square),
            _ => None,
        }
    }

    /// Parses a `symmetry` setting: `none`, `mirrors` or `square` (that
    /// symmetry, not chosen), or `choose` (no symmetry fixed, `None`, and
    /// chosen: training tries each and keeps one). The second value says
    /// whether to choose.
    pub fn parse_setting(s: &str) -> Option<(Symmetry, bool)> {
        match s {
            "choose" => Some((Symmetry::None, true)),
            _ => Symmetry::parse(s).map(|y| (y, false)),
        }
    }

    pub fn name(self) -> &'static str {
        match self {
            Symmetry::None => "none",
            Symmetry::Mirrors => "mirrors",
            Symmetry::Square => "square",
        }
    }

    pub fn is_none(self) -> bool {
        self == Symmetry::None
    }

    /// The transforms, the identity first.
    pub fn transforms(self) -> Vec<Transform> {
        match self {
            Symmetry::None => vec![Transform::IDENTITY],
            Symmetry::Mirrors => [0, MIRROR_COLUMNS, MIRROR_ROWS, MIRROR_COLUMNS | MIRROR_ROWS]
                .into_iter()
                .map(Transform)
                .collect(),
            Symmetry::Square => Transform::all().to_vec(),
        }
    }

    /// The store's entries, sorted by pattern, each also added under each
    /// other transform, and their totals: what the store of the frames
    /// and all their transforms would hand the learner. Built in one
    /// vector (sorted, then equal patterns merged), so the peak is the
    /// store plus its entries times the transforms, with no table.
    pub fn entries(self, store: LabelStore) -> Result<(Vec<(u128, Counts)>, Counts)> {
        let k = self.transforms().len() as u64;
        let overflow = || {
            Error::training(format!(
                "symmetry {}: pixel counts overflow 64 bits",
                self.name()
            ))
        };
        let t = store.totals();
        let totals = [
            t[0].checked_mul(k).ok_or_else(overflow)?,
            t[1].checked_mul(k).ok_or_else(overflow)?,
        ];
        // The learner adds the two classes: that sum must fit too.
        totals[0].checked_add(totals[1]).ok_or_else(overflow)?;
        if self.is_none() {
            return Ok((store.into_entries(), totals));
        }
        let window = store.window();
        let maps: Vec<Vec<usize>> = self
            .transforms()
            .into_iter()
            .map(|t| t.feature_map(window))
            .collect();
        let source = store.into_entries();
        let mut out: Vec<(u128, Counts)> = Vec::with_capacity(source.len() * maps.len());
        for &(pattern, counts) in &source {
            for map in &maps {
                out.push((Transform::pattern(map, pattern), counts));
            }
        }
        drop(source);
        out.sort_unstable_by_key(|e| e.0);
        // Equal patterns merged in place; no sum exceeds the totals,
        // which did not overflow.
        let mut kept = 0;
        for i in 0..out.len() {
            if kept > 0 && out[kept - 1].0 == out[i].0 {
                let c = out[i].1;
                out[kept - 1].1[0] += c[0];
                out[kept - 1].1[1] += c[1];
            } else {
                out[kept] = out[i];
                kept += 1;
            }
        }
        out.truncate(kept);
        Ok((out, totals))
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    fn frame(w: usize, h: usize, bits: &[bool]) -> BitFrame {
        BitFrame::from_fn(w, h, |x, y| bits[(y * w + x) % bits.len()])
    }

    /// The dihedral group of the square has order 8 (Armstrong 1988,
    /// chapter 5): the eight transforms are distinct on an asymmetric
    /// shape, and the quarter turn (transpose then mirror of columns)
    /// taken four times is the identity, twice the half turn.
    #[test]
    fn the_transforms_are_the_eight_symmetries_of_the_square() {
        let f = BitFrame::from_ascii("##.\n...\n...\n");
        let images: std::collections::HashSet<String> = Transform::all()
            .iter()
            .map(|t| t.frame(&f).to_ascii())
            .collect();
        assert_eq!(images.len(), 8);
        let quarter = Transform(TRANSPOSE | MIRROR_COLUMNS);
        let half = Transform(MIRROR_COLUMNS | MIRROR_ROWS);
        let g = BitFrame::from_ascii("##.#\n#...\n..#.\n");
        let twice = quarter.frame(&quarter.frame(&g));
        assert_eq!(twice, half.frame(&g));
        assert_eq!(quarter.frame(&twice.clone()).width(), 3);
        assert_eq!(quarter.frame(&quarter.frame(&twice)), g);
        // The half turn of a 4x3 frame by hand.
        assert_eq!(half.frame(&g).to_ascii(), ".#..\n...#\n#.##\n");
        // Mirrors keep rows and columns apart, so a fabric whose warp and
        // weft differ keeps them; the square group swaps them too.
        assert!(Symmetry::Mirrors
            .transforms()
            .iter()
            .all(|t| !t.transposes()));
        assert_eq!(Symmetry::Square.transforms().len(), 8);
        assert_eq!(Symmetry::None.transforms(), vec![Transform::IDENTITY]);
    }

    /// Counts that would overflow once taken under every transform are an
    /// error naming the symmetry, not a wrapped count.
    #[test]
    fn overflowing_counts_are_an_error() {
        let window = Window::new(3).unwrap();
        let mut store = LabelStore::new(window);
        // The top-left pixel: the mirrors take it to all four corners.
        store.add(0b1, [u64::MAX / 8, 1]).unwrap();
        let e = Symmetry::Square.entries(store.clone()).unwrap_err();
        assert!(e.to_string().contains("symmetry square"), "{e}");
        // Four transforms fit.
        let (entries, totals) = Symmetry::Mirrors.entries(store).unwrap();
        assert_eq!(totals, [u64::MAX / 8 * 4, 4]);
        assert_eq!(entries.len(), 4);
    }

    #[test]
    fn names_round_trip() {
        for s in [Symmetry::None, Symmetry::Mirrors, Symmetry::Square] {
            assert_eq!(Symmetry::parse(s.name()), Some(s));
        }
        assert_eq!(Symmetry::parse("turns"), None);
    }

    proptest! {
        /// The module's invariant: the pattern of the transformed frame at
        /// the transformed pixel is the transformed pattern, borders
        /// included.
        #[test]
        fn patterns_follow_their_frames(
            w in 1usize..20,
            h in 1usize..20,
            bits in proptest::collection::vec(any::<bool>(), 1..64),
            size in prop::sample::select(vec![3u8, 5, 7, 9, 11]),
            t in 0u8..8,
        ) {
            let f = frame(w, h, &bits);
            let window = Window::new(size).unwrap();
            let t = Transform(t);
            let map = t.feature_map(window);
            let g = t.frame(&f);
            for y in 0..h {
                for x in 0..w {
                    let (tx, ty) = t.point(x, y, w, h);
                    prop_assert_eq!(
                        window.pattern_at(&g, tx, ty),
                        Transform::pattern(&map, window.pattern_at(&f, x, y))
                    );
                }
            }
        }

        /// A symmetrised store is the store of the transformed frames.
        #[test]
        fn a_symmetrised_store_is_the_store_of_the_transformed_frames(
            w in 1usize..16,
            h in 1usize..16,
            bits in proptest::collection::vec(any::<bool>(), 1..40),
            marks in proptest::collection::vec(any::<bool>(), 1..40),
            square in any::<bool>(),
        ) {
            let symmetry = if square { Symmetry::Square } else { Symmetry::Mirrors };
            let lf = LabelledFrame::new("f", frame(w, h, &bits), frame(w, h, &marks));
            let window = Window::new(5).unwrap();
            let mut one = LabelStore::new(window);
            one.add_labelled(&lf).unwrap();
            let mut each = LabelStore::new(window);
            for t in symmetry.transforms() {
                each.add_labelled(&t.labelled(&lf)).unwrap();
            }
            let (entries, totals) = symmetry.entries(one).unwrap();
            prop_assert_eq!(entries, each.entries());
            prop_assert_eq!(totals, each.totals());
        }
    }
}
