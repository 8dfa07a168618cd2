//! The arithmetic on one block (or chunk) of words, and the choice of
//! [`Backend`] at run time.
//!
//! The functions here are plain, safe array code, written so that the
//! compiler vectorises them: a walk visit (both child masks and whether
//! each has a pixel), its detections, and one select instruction. There
//! is one implementation; the backends differ only in the target features
//! the evaluation loop is compiled with (the baseline, or AVX2 chosen at
//! run time), and so compute the same words bit for bit.
//!
//! Invariant: every function here is `#[inline(always)]`, and none calls
//! crate or library code of its own out of line to do vector work (the C
//! library's `memcpy`, which the compiler may use for a plain copy, picks
//! its vector width at run time). A Rust function that is not inlined
//! into the AVX2 build of the loop is compiled for the baseline only: an
//! earlier version built select values with `std::array::from_fn`, and one
//! of those calls stayed out of line as SSE2 code, through the stack.

use super::plan::{Form, Select};
use super::BLOCK;

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

/// `W` words of pixel bits, aligned for whole-vector access.
#[derive(Clone, Copy, Debug)]
#[repr(C, align(64))]
pub(super) struct Lanes<const W: usize>(pub(super) [u64; W]);

impl<const W: usize> Default for Lanes<W> {
    fn default() -> Self {
        Lanes([0; W])
    }
}

/// One block's pixel bits.
pub(super) type Mask = Lanes<BLOCK>;

/// A walk visit: writes `set = m & b` and `clear = m & !b` to `kids` and
/// tells which of them has a pixel.
#[inline(always)]
pub(super) fn split(m: &Mask, b: &[u64; BLOCK], kids: &mut [Mask; 2]) -> [bool; 2] {
    // Written straight into the two slots, word by word: a block of set
    // and clear words held apart would not fit in the registers.
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

/// Adds to `acc` the children of a visit whose outcome is `Detect`:
/// `detect[k]` is all ones where child `k` (0 set, 1 clear) is detected,
/// else zero.
#[inline(always)]
pub(super) fn detect(acc: &mut Mask, kids: &[Mask; 2], detect: [u64; 2]) {
    let [ds, dc] = detect;
    for k in 0..BLOCK {
        acc.0[k] |= (kids[0].0[k] & ds) | (kids[1].0[k] & dc);
    }
}

/// `acc |= m & v`.
#[inline(always)]
pub(super) fn keep(acc: &mut Mask, m: &Mask, v: &Mask) {
    for k in 0..BLOCK {
        acc.0[k] |= m.0[k] & v.0[k];
    }
}

/// One select instruction over `W` words, `b` its plane: the value goes to
/// slot `ins.out`, in place of the child value it reads there.
#[inline(always)]
pub(super) fn select<const W: usize>(b: &[u64; W], slots: &mut [Lanes<W>], ins: Select) {
    // Plain loops over the words, each written where its result goes: no
    // temporary arrays (a fresh array per instruction measured 18-36%
    // slower for a whole select program without AVX2).
    let out = ins.out as usize;
    if let Form::Both | Form::BothClearHere = ins.form {
        let [Lanes(v), Lanes(w)] = slots
            .get_disjoint_mut([out, ins.other as usize])
            .expect("two different slots");
        select_both(ins.form == Form::Both, b, v, w);
    } else {
        select_one(ins.form, b, &mut slots[out].0);
    }
}

/// [`Form::Both`] (`set_here`) or [`Form::BothClearHere`], in place.
#[inline(always)]
fn select_both<const W: usize>(set_here: bool, b: &[u64; W], v: &mut [u64; W], w: &[u64; W]) {
    if set_here {
        for k in 0..W {
            v[k] = (b[k] & v[k]) | (!b[k] & w[k]);
        }
    } else {
        for k in 0..W {
            v[k] = (b[k] & w[k]) | (!b[k] & v[k]);
        }
    }
}

/// Every one-slot form, in place.
#[inline(always)]
fn select_one<const W: usize>(form: Form, b: &[u64; W], v: &mut [u64; W]) {
    match form {
        Form::Plane => *v = *b,
        Form::NotPlane => {
            for k in 0..W {
                v[k] = !b[k];
            }
        }
        Form::SetOnly => {
            for k in 0..W {
                v[k] &= b[k];
            }
        }
        Form::SetOrClear => {
            for k in 0..W {
                v[k] |= !b[k];
            }
        }
        Form::ClearOnly => {
            for k in 0..W {
                v[k] &= !b[k];
            }
        }
        Form::PlaneOrClear => {
            for k in 0..W {
                v[k] |= b[k];
            }
        }
        Form::Both | Form::BothClearHere => unreachable!("two-slot forms go to select_both"),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Pseudo-random words.
    fn words<const W: usize>(seed: u64) -> [u64; W] {
        let mut x = seed.wrapping_mul(0x9E37_79B9_7F4A_7C15) | 1;
        std::array::from_fn(|_| {
            x ^= x << 13;
            x ^= x >> 7;
            x ^= x << 17;
            x
        })
    }

    #[test]
    fn select_computes_each_form_word_by_word() {
        let (b, v, w) = (words::<8>(1), words::<8>(2), words::<8>(3));
        type Word = fn(u64, u64, u64) -> u64;
        let forms: [(Form, Word); 8] = [
            (Form::Plane, |b, _, _| b),
            (Form::NotPlane, |b, _, _| !b),
            (Form::SetOnly, |b, v, _| b & v),
            (Form::SetOrClear, |b, v, _| v | !b),
            (Form::ClearOnly, |b, v, _| !b & v),
            (Form::PlaneOrClear, |b, v, _| b | v),
            (Form::Both, |b, v, w| (b & v) | (!b & w)),
            (Form::BothClearHere, |b, v, w| (b & w) | (!b & v)),
        ];
        for (form, want) in forms {
            // The value in slot 1, the other one in slot 0 or 2.
            for other in [0, 2] {
                let mut slots = [Lanes(w), Lanes(v), Lanes(w)];
                let ins = Select {
                    op: 0,
                    form,
                    out: 1,
                    other,
                };
                select(&b, &mut slots, ins);
                for k in 0..8 {
                    assert_eq!(slots[1].0[k], want(b[k], v[k], w[k]), "{form:?} word {k}");
                }
                assert_eq!(slots[other as usize].0, w, "{form:?} leaves the other slot");
            }
        }
    }

    #[test]
    fn split_and_detect_partition_the_mask() {
        let (m, b) = (Lanes(words::<BLOCK>(4)), words::<BLOCK>(5));
        let mut kids = [Mask::default(); 2];
        assert_eq!(split(&m, &b, &mut kids), [true, true]);
        for (k, (&m, &b)) in m.0.iter().zip(&b).enumerate() {
            assert_eq!(kids[0].0[k], m & b);
            assert_eq!(kids[1].0[k], m & !b);
        }
        assert_eq!(split(&m, &[0; BLOCK], &mut kids), [false, true]);
        assert_eq!(split(&Mask::default(), &b, &mut kids), [false, false]);
        let mut acc = Mask::default();
        split(&m, &b, &mut kids);
        detect(&mut acc, &kids, [0, u64::MAX]);
        assert_eq!(acc.0, kids[1].0);
        detect(&mut acc, &kids, [u64::MAX, 0]);
        assert_eq!(acc.0, m.0);
    }
}
