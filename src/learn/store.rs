//! The label store: window pattern -> [clear count, target count].
//!
//! For a learner whose features are the bits of a window, two pixels with the
//! same pattern are indistinguishable, so the counts per pattern are a
//! sufficient statistic: learning reads the store, never the frames. Stores
//! from different sources (seed data now, operator corrections later) merge
//! by adding counts, which is commutative and associative, so the order in
//! which labelled data arrives never changes a model.
//!
//! Invariants: every entry has a non-zero total; no pattern uses bits past
//! the window's feature count; the totals equal the sum of the entries;
//! the sorted entries are distinct and in pattern order.
//!
//! File format (little-endian), version 2:
//! ```text
//! magic    8 bytes  "BWSTORE\0"
//! version  u32      1
//! window   u8       odd, 3..=11
//! reserved 3 bytes  zero
//! frames   u64      labelled frames that went into the store
//! entries  u64      number of entries
//! clear    u64      total clear pixels
//! target   u64      total target pixels
//! entry*   32 bytes pattern u128, clear u64, target u64; patterns strictly ascending
//! crc32    u32      CRC-32 (IEEE) of every byte before it
//! ```
//! The entry count is checked against the file length before anything is
//! allocated, and the checksum before any entry is trusted.

use rustc_hash::FxHashMap;

use crate::error::{Error, Result};
use crate::frame::{BitFrame, LabelledFrame};
use crate::window::{self, Window};

/// The first bytes of a label store file.
pub const MAGIC: &[u8; 8] = b"BWSTORE\0";
const VERSION: u32 = 2;
const HEADER_LEN: usize = 8 + 4 + 4 + 8 * 4;
const ENTRY_LEN: usize = 32;

/// Counts of one pattern: index 0 clear pixels, index 1 target pixels.
pub type Counts = [u64; 2];

/// Patterns added but not yet merged into the sorted entries: at least
/// this many may wait (a few megabytes), and up to a quarter of the sorted
/// entries.
const FRESH_MAX: usize = 1 << 17;

/// Pattern -> class counts for one window size.
///
/// Held as entries sorted by pattern (what learning and the file want)
/// plus a table of recent additions (at most a quarter of their number),
/// merged into the sorted entries in place whenever it fills: a store of n
/// patterns takes about 32n bytes plus the table, where a hash table of
/// them all takes two to four times 32n, and handing its entries to the
/// learner ([`LabelStore::into_entries`]) copies nothing.
#[derive(Clone, Debug)]
pub struct LabelStore {
    window: Window,
    frames: u64,
    totals: Counts,
    /// Sorted by pattern, distinct, none with zero counts.
    sorted: Vec<(u128, Counts)>,
    /// Recent additions (their patterns may also be in `sorted`).
    fresh: FxHashMap<u128, Counts>,
}

impl PartialEq for LabelStore {
    fn eq(&self, other: &Self) -> bool {
        self.window == other.window
            && self.frames == other.frames
            && self.totals == other.totals
            && self.merged().eq(other.merged())
    }
}

/// Merges `fresh` into `sorted` in place: counts of known patterns are
/// added where they stand (found by walking both in order), new patterns
/// merged in from the back. O(sorted + fresh log fresh).
fn settle(sorted: &mut Vec<(u128, Counts)>, fresh: &mut FxHashMap<u128, Counts>) {
    if fresh.is_empty() {
        return;
    }
    let mut add: Vec<(u128, Counts)> = fresh.drain().collect();
    add.sort_unstable_by_key(|e| e.0);
    let mut new: Vec<(u128, Counts)> = Vec::new();
    let mut i = 0;
    for (p, c) in add {
        while i < sorted.len() && sorted[i].0 < p {
            i += 1;
        }
        if i < sorted.len() && sorted[i].0 == p {
            sorted[i].1[0] += c[0];
            sorted[i].1[1] += c[1];
        } else {
            new.push((p, c));
        }
    }
    let old = sorted.len();
    sorted.reserve_exact(new.len());
    sorted.resize(old + new.len(), (0, [0, 0]));
    let (mut i, mut j, mut k) = (old, new.len(), old + new.len());
    while j > 0 {
        if i > 0 && sorted[i - 1].0 > new[j - 1].0 {
            sorted[k - 1] = sorted[i - 1];
            i -= 1;
        } else {
            sorted[k - 1] = new[j - 1];
            j -= 1;
        }
        k -= 1;
    }
}

/// Whether the recent additions should be merged now: past
/// [`FRESH_MAX`] and a quarter of the sorted entries, so merges come
/// geometrically less often as the store grows (building a store stays
/// near linear) while the table stays small beside the entries.
fn fresh_full(sorted: &[(u128, Counts)], fresh: &FxHashMap<u128, Counts>) -> bool {
    fresh.len() >= FRESH_MAX.max(sorted.len() / 4)
}

impl LabelStore {
    pub fn new(window: Window) -> LabelStore {
        LabelStore {
            window,
            frames: 0,
            totals: [0, 0],
            sorted: Vec::new(),
            fresh: FxHashMap::default(),
        }
    }

    pub fn window(&self) -> Window {
        self.window
    }

    /// Labelled frames added (directly or through merges).
    pub fn frames(&self) -> u64 {
        self.frames
    }

    /// Total clear and target pixels.
    pub fn totals(&self) -> Counts {
        self.totals
    }

    /// Every entry in pattern order, recent additions merged in as they
    /// are read (nothing is changed).
    fn merged(&self) -> impl Iterator<Item = (u128, Counts)> + '_ {
        let mut fresh: Vec<(u128, Counts)> = self.fresh.iter().map(|(&p, &c)| (p, c)).collect();
        fresh.sort_unstable_by_key(|e| e.0);
        let mut a = self.sorted.iter().copied().peekable();
        let mut b = fresh.into_iter().peekable();
        std::iter::from_fn(move || match (a.peek().copied(), b.peek().copied()) {
            (Some(x), Some(y)) if x.0 == y.0 => {
                a.next();
                b.next();
                Some((x.0, [x.1[0] + y.1[0], x.1[1] + y.1[1]]))
            }
            (Some(x), Some(y)) if x.0 < y.0 => a.next(),
            (Some(_), Some(_)) | (None, Some(_)) => b.next(),
            (Some(_), None) => a.next(),
            (None, None) => None,
        })
    }

    /// Number of distinct patterns.
    pub fn unique(&self) -> usize {
        let new = self
            .fresh
            .keys()
            .filter(|p| self.sorted.binary_search_by(|e| e.0.cmp(p)).is_err())
            .count();
        self.sorted.len() + new
    }

    pub fn get(&self, pattern: u128) -> Option<Counts> {
        let s = self
            .sorted
            .binary_search_by(|e| e.0.cmp(&pattern))
            .ok()
            .map(|i| self.sorted[i].1);
        match (s, self.fresh.get(&pattern)) {
            (Some(a), Some(b)) => Some([a[0] + b[0], a[1] + b[1]]),
            (a, b) => a.or(b.copied()),
        }
    }

    /// Merges recent additions when their table is full.
    fn settle_if_full(&mut self) {
        if fresh_full(&self.sorted, &self.fresh) {
            settle(&mut self.sorted, &mut self.fresh);
        }
    }

    /// Adds `clear` and `target` observations of one pattern. Fails, and
    /// changes nothing, if a count would overflow.
    pub fn add(&mut self, pattern: u128, counts: Counts) -> Result<()> {
        if counts[0] == 0 && counts[1] == 0 {
            return Ok(());
        }
        if self.window.features() < 128 && pattern >> self.window.features() != 0 {
            return Err(Error::bad_store("pattern uses bits outside the window"));
        }
        let overflow = || Error::bad_store("pixel counts overflow 64 bits");
        // No entry exceeds the totals, so totals that do not overflow
        // mean no entry does.
        let totals = [
            self.totals[0].checked_add(counts[0]).ok_or_else(overflow)?,
            self.totals[1].checked_add(counts[1]).ok_or_else(overflow)?,
        ];
        let e = self.fresh.entry(pattern).or_insert([0, 0]);
        e[0] += counts[0];
        e[1] += counts[1];
        self.totals = totals;
        self.settle_if_full();
        Ok(())
    }

    /// Adds every pixel of a frame, labelled by its mask (set = target).
    pub fn add_frame(&mut self, frame: &BitFrame, mask: &BitFrame) -> Result<()> {
        self.add_planes(frame, mask, None)
    }

    /// Adds the pixels of a frame not set in `unknown`, labelled by `mask`.
    fn add_planes(
        &mut self,
        frame: &BitFrame,
        mask: &BitFrame,
        unknown: Option<&BitFrame>,
    ) -> Result<()> {
        if !frame.same_size(mask) || unknown.is_some_and(|u| !frame.same_size(u)) {
            return Err(crate::error::ErrorKind::MaskSizeMismatch {
                width: frame.width(),
                height: frame.height(),
                mask_width: mask.width(),
                mask_height: mask.height(),
            }
            .into());
        }
        let known = frame.len() as u64 - unknown.map_or(0, |u| u.count_set());
        let targets = match unknown {
            Some(u) => mask.and_not(u).count_set(),
            None => mask.count_set(),
        };
        let overflow = || Error::bad_store("pixel counts overflow 64 bits");
        let totals = [
            self.totals[0]
                .checked_add(known - targets)
                .ok_or_else(overflow)?,
            self.totals[1].checked_add(targets).ok_or_else(overflow)?,
        ];
        let (sorted, fresh) = (&mut self.sorted, &mut self.fresh);
        window::for_each_row(frame, self.window, |y, pats| {
            let mrow = mask.row(y);
            let urow = unknown.map(|u| u.row(y));
            for (x, &p) in pats.iter().enumerate() {
                if urow.is_some_and(|r| (r[x / 64] >> (x % 64)) & 1 == 1) {
                    continue;
                }
                let target = (mrow[x / 64] >> (x % 64)) & 1;
                fresh.entry(p).or_insert([0, 0])[target as usize] += 1;
            }
            if fresh_full(sorted, fresh) {
                settle(sorted, fresh);
            }
        });
        self.totals = totals;
        self.frames += 1;
        Ok(())
    }

    /// Adds every pixel of a labelled frame whose label is known (pixels
    /// set in its `unknown` plane are left out).
    pub fn add_labelled(&mut self, f: &LabelledFrame) -> Result<()> {
        self.add_planes(&f.frame, &f.mask, f.unknown.as_ref())
    }

    /// Takes out exactly what [`LabelStore::add_labelled`] put in for `f`
    /// (a correction replaced by a later one, a frame held out). Fails,
    /// and changes nothing, when the store does not hold those counts.
    pub fn remove_labelled(&mut self, f: &LabelledFrame) -> Result<()> {
        let none = BitFrame::new(f.frame.width(), f.frame.height());
        let counts = self.frame_counts(f, f.unknown.as_ref().unwrap_or(&none))?;
        let missing = || Error::bad_store(format!("does not hold the labels of {}", f.name));
        if self.frames == 0 {
            return Err(missing());
        }
        settle(&mut self.sorted, &mut self.fresh);
        let mut at = Vec::with_capacity(counts.len());
        let mut totals = self.totals;
        for (p, c) in &counts {
            let i = self
                .sorted
                .binary_search_by(|e| e.0.cmp(p))
                .map_err(|_| missing())?;
            let e = self.sorted[i].1;
            if e[0] < c[0] || e[1] < c[1] {
                return Err(missing());
            }
            totals[0] = totals[0].checked_sub(c[0]).ok_or_else(missing)?;
            totals[1] = totals[1].checked_sub(c[1]).ok_or_else(missing)?;
            at.push((i, *c));
        }
        let mut emptied = false;
        for (i, c) in at {
            let e = &mut self.sorted[i].1;
            e[0] -= c[0];
            e[1] -= c[1];
            emptied |= *e == [0, 0];
        }
        if emptied {
            self.sorted.retain(|e| e.1 != [0, 0]);
        }
        self.totals = totals;
        self.frames -= 1;
        Ok(())
    }

    /// The counts one labelled frame contributes, its unknown pixels left
    /// out.
    fn frame_counts(
        &self,
        f: &LabelledFrame,
        unknown: &BitFrame,
    ) -> Result<FxHashMap<u128, Counts>> {
        if !f.sizes_agree() || !f.frame.same_size(unknown) {
            return Err(crate::error::ErrorKind::MaskSizeMismatch {
                width: f.frame.width(),
                height: f.frame.height(),
                mask_width: f.mask.width(),
                mask_height: f.mask.height(),
            }
            .into());
        }
        let mut counts: FxHashMap<u128, Counts> = FxHashMap::default();
        window::for_each_row(&f.frame, self.window, |y, pats| {
            let (mrow, urow) = (f.mask.row(y), unknown.row(y));
            for (x, &p) in pats.iter().enumerate() {
                if (urow[x / 64] >> (x % 64)) & 1 == 1 {
                    continue;
                }
                let target = (mrow[x / 64] >> (x % 64)) & 1;
                counts.entry(p).or_insert([0, 0])[target as usize] += 1;
            }
        });
        Ok(counts)
    }

    /// Adds all counts of another store of the same window size.
    pub fn merge(&mut self, other: &LabelStore) -> Result<()> {
        if other.window != self.window {
            return Err(Error::bad_store(format!(
                "cannot merge a {0}x{0} store into a {1}x{1} store",
                other.window.size(),
                self.window.size()
            )));
        }
        // No entry exceeds its store's totals, so if the totals add up
        // without overflow every entry does too: check once, then add.
        for k in 0..2 {
            if self.totals[k].checked_add(other.totals[k]).is_none() {
                return Err(Error::bad_store("pixel counts overflow 64 bits"));
            }
        }
        for (p, c) in other.merged() {
            self.add(p, c)?;
        }
        self.frames = self.frames.saturating_add(other.frames);
        Ok(())
    }

    /// Entries sorted by pattern: the deterministic order learning uses.
    pub fn entries(&self) -> Vec<(u128, Counts)> {
        self.merged().collect()
    }

    /// The entries sorted by pattern, taken out of the store without a
    /// copy.
    pub fn into_entries(mut self) -> Vec<(u128, Counts)> {
        settle(&mut self.sorted, &mut self.fresh);
        self.sorted
    }

    /// The file bytes (see the module docs).
    pub fn to_bytes(&self) -> Vec<u8> {
        let mut out = Vec::with_capacity(HEADER_LEN + self.sorted.len() * ENTRY_LEN + 4);
        self.write_to(&mut out).expect("writing to memory");
        out
    }

    /// Writes the file format to `w` entry by entry (the bytes of
    /// [`LabelStore::to_bytes`] without holding them all).
    pub fn write_to(&self, w: &mut dyn std::io::Write) -> std::io::Result<()> {
        let mut crc = crc32fast::Hasher::new();
        let mut put = |w: &mut dyn std::io::Write, b: &[u8]| -> std::io::Result<()> {
            crc.update(b);
            w.write_all(b)
        };
        put(w, MAGIC)?;
        put(w, &VERSION.to_le_bytes())?;
        put(w, &[self.window.size(), 0, 0, 0])?;
        put(w, &self.frames.to_le_bytes())?;
        put(w, &(self.unique() as u64).to_le_bytes())?;
        put(w, &self.totals[0].to_le_bytes())?;
        put(w, &self.totals[1].to_le_bytes())?;
        let mut entry = [0u8; ENTRY_LEN];
        for (p, c) in self.merged() {
            entry[..16].copy_from_slice(&p.to_le_bytes());
            entry[16..24].copy_from_slice(&c[0].to_le_bytes());
            entry[24..].copy_from_slice(&c[1].to_le_bytes());
            put(w, &entry)?;
        }
        let sum = crc.finalize();
        w.write_all(&sum.to_le_bytes())
    }

    /// Parses and validates a stored label store.
    pub fn from_bytes(bytes: &[u8]) -> Result<LabelStore> {
        LabelStore::read_from(&mut &bytes[..], bytes.len() as u64)
    }

    /// Reads a stored label store of `len` bytes from `r`, entry by entry
    /// (only the entries are held, never the file's bytes). The entry count
    /// is checked against `len` before anything is allocated; the checksum
    /// is checked at the end, and a damaged file is reported as such rather
    /// than by the first odd entry the damage made.
    pub fn read_from(r: &mut dyn std::io::Read, len: u64) -> Result<LabelStore> {
        let io = |e: std::io::Error| Error::bad_store(format!("cannot be read: {e}"));
        let mut head = [0u8; HEADER_LEN];
        if len < (HEADER_LEN + 4) as u64 {
            return Err(Error::bad_store(
                "not a burlwatch label store (bad magic or too short)",
            ));
        }
        r.read_exact(&mut head).map_err(io)?;
        if &head[..8] != MAGIC {
            return Err(Error::bad_store(
                "not a burlwatch label store (bad magic or too short)",
            ));
        }
        let u32_at = |b: &[u8], i: usize| u32::from_le_bytes(b[i..i + 4].try_into().unwrap());
        let u64_at = |b: &[u8], i: usize| u64::from_le_bytes(b[i..i + 8].try_into().unwrap());
        let version = u32_at(&head, 8);
        if version != VERSION {
            return Err(Error::bad_store(format!(
                "format version {version} is not known (this build reads {VERSION})"
            )));
        }
        let window = Window::new(head[12]).ok_or_else(|| {
            Error::bad_store(format!("window size {} is not 3, 5, 7, 9 or 11", head[12]))
        })?;
        let frames = u64_at(&head, 16);
        let n = u64_at(&head, 24);
        let totals = [u64_at(&head, 32), u64_at(&head, 40)];
        let expected = (n as u128) * ENTRY_LEN as u128 + (HEADER_LEN + 4) as u128;
        if expected != len as u128 {
            return Err(Error::bad_store(format!(
                "header says {n} entries, which needs {expected} bytes, but the file has {len}"
            )));
        }
        let mut crc = crc32fast::Hasher::new();
        crc.update(&head);
        let mut store = LabelStore::new(window);
        store.sorted.reserve_exact(n as usize);
        let mut sum = [0u64; 2];
        let mut prev: Option<u128> = None;
        let mut first_bad: Option<String> = None;
        let mut chunk = vec![0u8; ENTRY_LEN * 4096];
        let mut i = 0usize;
        while i < n as usize {
            let k = (n as usize - i).min(4096);
            let buf = &mut chunk[..k * ENTRY_LEN];
            r.read_exact(buf).map_err(io)?;
            crc.update(buf);
            for e in buf.chunks_exact(ENTRY_LEN) {
                let p = u128::from_le_bytes(e[..16].try_into().unwrap());
                let c = [u64_at(e, 16), u64_at(e, 24)];
                let bad = if window.features() < 128 && p >> window.features() != 0 {
                    Some(format!("entry {i} uses bits outside the window"))
                } else if prev.is_some_and(|q| q >= p) {
                    Some(format!("entry {i} is out of order"))
                } else if c[0] == 0 && c[1] == 0 {
                    Some(format!("entry {i} has no pixels"))
                } else {
                    match (sum[0].checked_add(c[0]), sum[1].checked_add(c[1])) {
                        (Some(a), Some(b)) => {
                            sum = [a, b];
                            None
                        }
                        _ => Some(format!("entry {i}: pixel counts overflow 64 bits")),
                    }
                };
                if bad.is_some() && first_bad.is_none() {
                    first_bad = bad;
                }
                prev = Some(p);
                store.sorted.push((p, c));
                i += 1;
            }
        }
        let mut tail = [0u8; 4];
        r.read_exact(&mut tail).map_err(io)?;
        if crc.finalize() != u32::from_le_bytes(tail) {
            return Err(Error::bad_store("checksum mismatch: the file is damaged"));
        }
        if let Some(b) = first_bad {
            return Err(Error::bad_store(b));
        }
        store.totals = sum;
        if store.totals != totals {
            return Err(Error::bad_store(format!(
                "entries add up to {:?} pixels but the header says {:?}",
                store.totals, totals
            )));
        }
        store.frames = frames;
        Ok(store)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn sample() -> LabelStore {
        let f = BitFrame::from_fn(20, 9, |x, y| (x + y) % 3 == 0);
        let m = BitFrame::from_fn(20, 9, |x, y| x > 10 && y < 3);
        let mut s = LabelStore::new(Window::new(5).unwrap());
        s.add_frame(&f, &m).unwrap();
        s
    }

    #[test]
    fn counts_equal_pixels() {
        let s = sample();
        assert_eq!(s.totals(), [180 - 27, 27]);
        let sum = s
            .entries()
            .iter()
            .fold([0, 0], |a, (_, c)| [a[0] + c[0], a[1] + c[1]]);
        assert_eq!(sum, s.totals());
    }

    #[test]
    fn unknown_pixels_are_left_out_and_removal_undoes_an_addition() {
        let f = BitFrame::from_fn(20, 9, |x, y| (x + y) % 3 == 0);
        let m = BitFrame::from_fn(20, 9, |x, y| x > 10 && y < 3);
        // A 4x3 unknown block over 3 target and 9 clear pixels.
        let u = BitFrame::from_fn(20, 9, |x, y| (9..13).contains(&x) && (1..4).contains(&y));
        let lf = LabelledFrame {
            unknown: Some(u),
            ..LabelledFrame::new("a", f.clone(), m.clone())
        };
        let mut s = sample();
        let before = s.clone();
        s.add_labelled(&lf).unwrap();
        // 27 targets of which 4 unknown (x 11..=12, y 1..=2); 180 - 12 known.
        assert_eq!(s.totals(), [153 + (168 - 23), 27 + 23]);
        assert_eq!(s.frames(), 2);
        s.remove_labelled(&lf).unwrap();
        assert_eq!(s, before);
        // Removing what the store does not hold fails and changes nothing.
        let other = LabelledFrame::new("b", f.not(), m);
        assert!(s.remove_labelled(&other).is_err());
        assert_eq!(s, before);
        let mut all = sample();
        all.remove_labelled(&LabelledFrame::new("a", f.clone(), sample_mask()))
            .unwrap();
        assert_eq!(all.totals(), [0, 0]);
        assert_eq!(all.unique(), 0);
        assert_eq!(all.frames(), 0);
    }

    fn sample_mask() -> BitFrame {
        BitFrame::from_fn(20, 9, |x, y| x > 10 && y < 3)
    }

    #[test]
    fn the_sorted_entries_and_recent_additions_agree_with_a_plain_map() {
        // Enough patterns to merge the recent additions several times.
        let mut s = LabelStore::new(Window::new(11).unwrap());
        let mut plain = std::collections::BTreeMap::new();
        let mut x: u64 = 0x2545_f491_4f6c_dd1d;
        for i in 0..(3 * FRESH_MAX + 1000) as u64 {
            // xorshift64 (Marsaglia 2003), a few repeats on purpose.
            x ^= x << 13;
            x ^= x >> 7;
            x ^= x << 17;
            let p = (x % (2 * FRESH_MAX as u64)) as u128;
            let c = [i % 3, (i % 5 == 0) as u64];
            s.add(p, c).unwrap();
            let e = plain.entry(p).or_insert([0u64, 0]);
            e[0] += c[0];
            e[1] += c[1];
        }
        plain.retain(|_, c| *c != [0, 0]);
        let want: Vec<(u128, Counts)> = plain.into_iter().collect();
        assert_eq!(s.unique(), want.len());
        assert_eq!(s.entries(), want);
        assert_eq!(LabelStore::from_bytes(&s.to_bytes()).unwrap(), s);
        assert_eq!(s.get(want[7].0), Some(want[7].1));
        assert_eq!(s.clone().into_entries(), want);
    }

    #[test]
    fn bytes_roundtrip_and_damage() {
        let s = sample();
        let b = s.to_bytes();
        assert_eq!(LabelStore::from_bytes(&b).unwrap(), s);
        let mut d = b.clone();
        d[HEADER_LEN + 3] ^= 1;
        assert!(LabelStore::from_bytes(&d)
            .unwrap_err()
            .to_string()
            .contains("checksum"));
        assert!(LabelStore::from_bytes(&b[..b.len() - 1]).is_err());
        assert!(LabelStore::from_bytes(b"garbage").is_err());
    }

    #[test]
    fn overflowing_counts_are_errors_not_panics() {
        let w = Window::new(3).unwrap();
        let mut a = LabelStore::new(w);
        a.add(1, [u64::MAX, 0]).unwrap();
        assert!(a.add(1, [1, 0]).is_err());
        assert_eq!(a.totals(), [u64::MAX, 0]);
        let mut b = LabelStore::new(w);
        b.add(2, [1, 0]).unwrap();
        assert!(b.merge(&a).is_err());
        assert_eq!(b.totals(), [1, 0]);
        // A file whose entries overflow, with a valid checksum.
        let mut c = LabelStore::new(w);
        c.add(1, [u64::MAX, 0]).unwrap();
        let mut bytes = c.to_bytes();
        // Second entry with the same count: rebuild by hand.
        let entry = bytes[HEADER_LEN..HEADER_LEN + ENTRY_LEN].to_vec();
        let mut e2 = entry.clone();
        e2[0] = 2;
        bytes.truncate(bytes.len() - 4);
        bytes.extend_from_slice(&e2);
        bytes[24..32].copy_from_slice(&2u64.to_le_bytes());
        let crc = crc32fast::hash(&bytes);
        bytes.extend_from_slice(&crc.to_le_bytes());
        let err = LabelStore::from_bytes(&bytes).unwrap_err().to_string();
        assert!(err.contains("overflow"), "{err}");
        assert!(
            a.add(1 << 9, [1, 0]).is_err(),
            "bit 9 is outside a 3x3 window"
        );
    }

    #[test]
    fn mask_mismatch_is_an_error() {
        let mut s = LabelStore::new(Window::default());
        let err = s
            .add_frame(&BitFrame::new(4, 4), &BitFrame::new(4, 5))
            .unwrap_err();
        assert!(err.to_string().contains("mask is 4x5"));
    }
}
