//! The arithmetic on one block (or chunk) of words, and the choice of
//! [`Backend`] at run time.
//!
//! A [`Kernel`] computes a walk visit (both child masks and whether each
//! has a pixel), the detections of a visit, and one select instruction,
//! over whole aligned [`Lanes`]. Every kernel computes the same words as
//! the portable one, bit for bit; they differ only in the instructions the
//! compiler may use. The AVX2 kernel is made only after AVX2 was detected.

use super::plan::{Form, Select};
use super::{BLOCK, WIDE};

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

/// The block arithmetic, in two implementations: plain arrays (which the
/// compiler vectorises for the baseline vector unit) and AVX2 intrinsics,
/// whose emptiness test is one `vptest` instead of a horizontal OR.
pub(super) trait Kernel: Copy {
    /// A walk visit: writes `set = m & b` and `clear = m & !b` to `kids`
    /// and tells which of them has a pixel.
    fn split(self, m: &Mask, b: &[u64; BLOCK], kids: &mut [Mask; 2]) -> [bool; 2];

    /// Adds to `acc` the children of a visit whose outcome is `Detect`:
    /// `detect[k]` is all ones where child `k` (0 set, 1 clear) is
    /// detected, else zero.
    #[inline(always)]
    fn detect(self, acc: &mut Mask, kids: &[Mask; 2], detect: [u64; 2]) {
        let [ds, dc] = detect;
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

#[derive(Clone, Copy)]
pub(super) struct PortableKernel;

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
        // Plain loops over the words, each written where its result goes:
        // no temporary arrays, and nothing left out of line (a helper that
        // is not inlined would not get the caller's target features). The
        // loops take their arrays as separate arguments, which tells the
        // compiler that the output overlaps no input.
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

/// Every other form, in place.
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
        Form::Both | Form::BothClearHere => unreachable!("two slots"),
    }
}

/// AVX2 arithmetic. Only the AVX2 build of the evaluation loop makes one,
/// after checking that the processor has AVX2.
#[cfg(target_arch = "x86_64")]
#[derive(Clone, Copy)]
pub(super) struct Avx2Kernel(());

#[cfg(target_arch = "x86_64")]
impl Avx2Kernel {
    /// # Safety
    ///
    /// The processor must support AVX2.
    pub(super) unsafe fn new() -> Avx2Kernel {
        Avx2Kernel(())
    }
}

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
        let (out, other) = (ins.out as usize, ins.other as usize);
        assert!(out < slots.len() && other < slots.len());
        // SAFETY: AVX2 was detected; the two slots are in bounds (checked
        // above) and aligned (`Lanes` is 64-byte aligned); every input of a
        // vector is loaded before its output is stored, so the output may
        // be an input slot.
        unsafe {
            let base = slots.as_mut_ptr() as *mut __m256i;
            let ones = _mm256_set1_epi64x(-1);
            let (vp, wp) = (base.add(out * v_per), base.add(other * v_per));
            let bp = b.as_ptr() as *const __m256i;
            // One loop per form, so the form is decided once per instruction.
            macro_rules! each {
                (|$bv:ident, $q:ident| $e:expr) => {
                    for $q in 0..v_per {
                        let $bv = _mm256_loadu_si256(bp.add($q));
                        _mm256_store_si256(vp.add($q), $e);
                    }
                };
            }
            match ins.form {
                Form::Plane => each!(|bv, q| bv),
                Form::NotPlane => each!(|bv, q| _mm256_andnot_si256(bv, ones)),
                Form::SetOnly => each!(|bv, q| _mm256_and_si256(bv, _mm256_load_si256(vp.add(q)))),
                Form::SetOrClear => each!(|bv, q| _mm256_or_si256(
                    _mm256_load_si256(vp.add(q)),
                    _mm256_andnot_si256(bv, ones)
                )),
                Form::ClearOnly => {
                    each!(|bv, q| _mm256_andnot_si256(bv, _mm256_load_si256(vp.add(q))))
                }
                Form::PlaneOrClear => {
                    each!(|bv, q| _mm256_or_si256(bv, _mm256_load_si256(vp.add(q))))
                }
                Form::Both => each!(|bv, q| _mm256_or_si256(
                    _mm256_and_si256(bv, _mm256_load_si256(vp.add(q))),
                    _mm256_andnot_si256(bv, _mm256_load_si256(wp.add(q)))
                )),
                Form::BothClearHere => each!(|bv, q| _mm256_or_si256(
                    _mm256_and_si256(bv, _mm256_load_si256(wp.add(q))),
                    _mm256_andnot_si256(bv, _mm256_load_si256(vp.add(q)))
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
