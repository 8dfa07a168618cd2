//! Smoothing of a detection mask by neighbourhood votes, word-parallel.
//!
//! A pixel stays (or becomes) detected when at least `votes` pixels of the
//! `(2r+1) x (2r+1)` square centred on it, itself included, were detected;
//! pixels outside the frame vote no. This is the binary rank-order filter
//! (Gonzalez & Woods, *Digital Image Processing*, 3rd ed., section 3.5.2,
//! order-statistic filters; for a binary image the median is the majority
//! vote): one vote is a dilation by the square, all votes an erosion
//! (Serra, *Image Analysis and Mathematical Morphology*, 1982), a majority
//! fills the pin-holes of a defect found in pieces and drops lone specks.
//! Training chooses the square and the votes on held-out frames
//! ([`crate::learn::tune`]); [`Smoothing::OFF`] leaves the mask as it is.
//!
//! The votes are counted 64 pixels at a time with bit-sliced adders: each
//! of the square's `(2r+1)^2` shifted copies of a row word is added into a
//! few counter planes (plane `p` holds bit `p` of every pixel's count),
//! and the count is compared with `votes` plane by plane: about a hundred
//! word operations per 64 pixels for the 3x3 square, a few hundred for
//! the 5x5 (each addition ripples through at most four or five planes). [`apply_naive`] counts pixel
//! by pixel; the two agree bit for bit (tested on random masks).
//!
//! Invariant: the output has the input's size and clear padding bits.

use serde::{Deserialize, Serialize};

use crate::frame::BitFrame;

/// Largest square radius (a 5x5 square).
pub const MAX_RADIUS: u32 = 2;

/// The square's radius and the votes a pixel needs; radius 0 is off.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Smoothing {
    pub radius: u32,
    pub votes: u32,
}

impl Smoothing {
    /// No smoothing.
    pub const OFF: Smoothing = Smoothing {
        radius: 0,
        votes: 0,
    };

    pub fn is_off(&self) -> bool {
        self.radius == 0
    }

    /// Pixels in the square.
    pub fn square(&self) -> u32 {
        (2 * self.radius + 1) * (2 * self.radius + 1)
    }

    /// Why these values cannot be used, if they cannot.
    pub fn problem(&self) -> Option<String> {
        if self.is_off() {
            return (self.votes != 0)
                .then(|| format!("smoothing votes {} without a radius", self.votes));
        }
        if self.radius > MAX_RADIUS {
            return Some(format!(
                "smoothing radius {} is over the limit of {MAX_RADIUS}",
                self.radius
            ));
        }
        if self.votes == 0 || self.votes > self.square() {
            return Some(format!(
                "smoothing votes {} must be 1 to {} for radius {}",
                self.votes,
                self.square(),
                self.radius
            ));
        }
        None
    }

    /// A short name for messages: `off`, or `3x3>=5`.
    pub fn name(&self) -> String {
        if self.is_off() {
            "off".to_string()
        } else {
            let side = 2 * self.radius + 1;
            format!("{side}x{side}>={}", self.votes)
        }
    }

    /// The smoothed mask (the mask itself when off).
    pub fn apply(&self, mask: &BitFrame) -> BitFrame {
        if self.is_off() {
            return mask.clone();
        }
        let mut out = BitFrame::new(mask.width(), mask.height());
        let mut planes = [0u64; PLANES];
        let r = self.radius as isize;
        let stride = mask.stride();
        let h = mask.height() as isize;
        let nplanes = planes_for(self.square());
        let mut rows: [&[u64]; 2 * MAX_RADIUS as usize + 1] = Default::default();
        for y in 0..mask.height() {
            // The square's rows inside the frame (rows outside vote no).
            let mut nrows = 0;
            for yy in (y as isize - r..=y as isize + r).filter(|yy| (0..h).contains(yy)) {
                rows[nrows] = mask.row(yy as usize);
                nrows += 1;
            }
            let orow = out.row_mut(y);
            for i in 0..stride {
                planes[..nplanes].fill(0);
                for row in &rows[..nrows] {
                    let prev = if i > 0 { row[i - 1] } else { 0 };
                    let next = if i + 1 < stride { row[i + 1] } else { 0 };
                    let cur = row[i];
                    for dx in -r..=r {
                        // Bit x of `v` is pixel x + dx of the row.
                        let v = match dx {
                            0 => cur,
                            d if d > 0 => (cur >> d) | (next << (64 - d)),
                            d => (cur << -d) | (prev >> (64 + d)),
                        };
                        add(&mut planes[..nplanes], v);
                    }
                }
                orow[i] = at_least(&planes[..nplanes], self.votes);
            }
        }
        out.clear_padding();
        out
    }
}

/// Counter planes for counts up to 25.
const PLANES: usize = 5;

/// Planes needed to count up to `n`.
fn planes_for(n: u32) -> usize {
    (32 - n.leading_zeros()) as usize
}

/// Adds the one-bit numbers of `v` into the bit-sliced counters (a ripple
/// of half adders).
#[inline]
fn add(planes: &mut [u64], v: u64) {
    let mut carry = v;
    for p in planes.iter_mut() {
        if carry == 0 {
            break;
        }
        let c = *p & carry;
        *p ^= carry;
        carry = c;
    }
}

/// Bits whose count in `planes` is at least `k`: compared from the top
/// plane down, keeping which counts are already greater and which equal.
#[inline]
fn at_least(planes: &[u64], k: u32) -> u64 {
    let (mut greater, mut equal) = (0u64, !0u64);
    for (p, &plane) in planes.iter().enumerate().rev() {
        if (k >> p) & 1 == 1 {
            equal &= plane;
        } else {
            greater |= equal & plane;
            equal &= !plane;
        }
    }
    // A k with bits above the planes cannot be reached.
    if (k >> planes.len()) != 0 {
        return 0;
    }
    greater | equal
}

/// [`Smoothing::apply`] pixel by pixel, the reference it is tested against.
pub fn apply_naive(s: &Smoothing, mask: &BitFrame) -> BitFrame {
    if s.is_off() {
        return mask.clone();
    }
    let r = s.radius as isize;
    BitFrame::from_fn(mask.width(), mask.height(), |x, y| {
        let mut n = 0;
        for dy in -r..=r {
            for dx in -r..=r {
                n += mask.get_signed(x as isize + dx, y as isize + dy) as u32;
            }
        }
        n >= s.votes
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    #[test]
    fn one_vote_dilates_and_all_votes_erode() {
        // The structuring-element definitions of dilation and erosion by a
        // square (Serra 1982; Gonzalez & Woods 3rd ed., section 9.2): a
        // lone pixel dilates to the 3x3 square and erodes to nothing; a
        // 3x3 square erodes to its centre.
        let dot = BitFrame::from_ascii(".....\n.....\n..#..\n.....\n.....\n");
        let grown = Smoothing {
            radius: 1,
            votes: 1,
        }
        .apply(&dot);
        assert_eq!(
            grown.to_ascii(),
            ".....\n.###.\n.###.\n.###.\n.....\n",
            "dilation"
        );
        let all = Smoothing {
            radius: 1,
            votes: 9,
        };
        assert_eq!(all.apply(&dot).count_set(), 0);
        assert_eq!(
            all.apply(&grown).to_ascii(),
            ".....\n.....\n..#..\n.....\n.....\n"
        );
    }

    #[test]
    fn a_majority_fills_pin_holes_and_drops_specks() {
        // The binary median of a 3x3 square (five votes of nine): common
        // practice for salt-and-pepper noise (Gonzalez & Woods, 3rd ed.,
        // section 3.5.2).
        let m = BitFrame::from_ascii(
            "..........\n.####.....\n.#.##.....\n.####...#.\n.####.....\n..........\n",
        );
        let out = Smoothing {
            radius: 1,
            votes: 5,
        }
        .apply(&m);
        assert!(out.get(2, 2), "the pin-hole is filled");
        assert!(!out.get(8, 3), "the speck is gone");
        assert_eq!(
            out,
            apply_naive(
                &Smoothing {
                    radius: 1,
                    votes: 5
                },
                &m
            )
        );
    }

    #[test]
    fn values_are_checked() {
        assert!(Smoothing::OFF.problem().is_none());
        assert!(Smoothing {
            radius: 2,
            votes: 25
        }
        .problem()
        .is_none());
        assert!(Smoothing {
            radius: 1,
            votes: 10
        }
        .problem()
        .unwrap()
        .contains("1 to 9"));
        assert!(Smoothing {
            radius: 3,
            votes: 1
        }
        .problem()
        .is_some());
        assert!(Smoothing {
            radius: 0,
            votes: 2
        }
        .problem()
        .is_some());
        assert_eq!(
            Smoothing {
                radius: 2,
                votes: 13
            }
            .name(),
            "5x5>=13"
        );
    }

    proptest! {
        #[test]
        fn word_parallel_votes_equal_pixel_by_pixel(
            w in 1usize..150,
            h in 1usize..12,
            radius in 1u32..=2,
            votes_pick in 0u32..25,
            density in 0u32..100,
            seed in any::<u64>(),
        ) {
            let mut rng = crate::synth::Rng::new(seed);
            let m = BitFrame::from_fn(w, h, |_, _| rng.range(0, 100) < density as usize);
            let s = Smoothing { radius, votes: 1 + votes_pick % ((2 * radius + 1) * (2 * radius + 1)) };
            let fast = s.apply(&m);
            prop_assert_eq!(&fast, &apply_naive(&s, &m));
            prop_assert_eq!(fast.words().len(), m.words().len());
        }
    }
}
