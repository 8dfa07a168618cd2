//! Reading the detection log for maintenance: one record line at a time,
//! into summaries and filters whose memory does not grow with the log.
//! Pure: line bytes and times in, counts out; `fileio::logs` finds and
//! streams the files, the `log` command prints.
//!
//! - [`Line`]: what a query needs of one record, read from the line
//!   without building the whole record (names borrowed, objects counted,
//!   their highest score kept);
//! - [`parse_time`]: RFC 3339 to milliseconds since 1970, with a fast path
//!   for the daemon's own `YYYY-MM-DDTHH:MM:SS.mmmZ`;
//! - [`Summary`]: frames, objects, processing-time percentiles (from a
//!   histogram of log-spaced bins, within 1%), the models seen, and counts
//!   per hour; its size grows with the hours and models in the range, never
//!   with the records;
//! - [`Range`]: the time window a query covers.
//!
//! Invariants: a line that does not parse is counted (torn at a file's
//! end, unreadable elsewhere), never fatal; every count is exact; the
//! percentiles are within one bin (1%) of the exact value.

use std::borrow::Cow;
use std::collections::BTreeMap;
use std::fmt;

use serde::de::{Deserializer, IgnoredAny, MapAccess, SeqAccess, Visitor};
use serde::{Deserialize, Serialize};

/// Milliseconds since 1970-01-01T00:00:00Z.
pub type Millis = i64;

/// Milliseconds in an hour.
pub const HOUR: Millis = 3_600_000;

/// Days since 1970-01-01 of a civil date (Hinnant's `days_from_civil`,
/// from "chrono-Compatible Low-Level Date Algorithms").
fn days_from_civil(y: i64, m: i64, d: i64) -> i64 {
    let y = if m <= 2 { y - 1 } else { y };
    let era = if y >= 0 { y } else { y - 399 } / 400;
    let yoe = y - era * 400;
    let mp = (m + 9) % 12;
    let doy = (153 * mp + 2) / 5 + d - 1;
    let doe = yoe * 365 + yoe / 4 - yoe / 100 + doy;
    era * 146_097 + doe - 719_468
}

/// Midnight UTC of a civil date, in milliseconds since 1970.
pub fn days_from_civil_ms(y: i64, m: i64, d: i64) -> Millis {
    days_from_civil(y, m, d) * 86_400_000
}

/// An RFC 3339 time as milliseconds since 1970. The daemon's form
/// (`2026-12-02T10:00:00.000Z`) is read by position; anything else goes
/// through the general parser. `None` if it is not a time.
pub fn parse_time(s: &str) -> Option<Millis> {
    let b = s.as_bytes();
    if b.len() == 24
        && b[4] == b'-'
        && b[7] == b'-'
        && b[10] == b'T'
        && b[13] == b':'
        && b[16] == b':'
        && b[19] == b'.'
        && b[23] == b'Z'
    {
        let num = |r: std::ops::Range<usize>| -> Option<i64> {
            let mut v = 0i64;
            for &c in &b[r] {
                if !c.is_ascii_digit() {
                    return None;
                }
                v = v * 10 + (c - b'0') as i64;
            }
            Some(v)
        };
        let (y, mo, d) = (num(0..4)?, num(5..7)?, num(8..10)?);
        let (h, mi, sec, ms) = (num(11..13)?, num(14..16)?, num(17..19)?, num(20..23)?);
        if !(1..=12).contains(&mo) || !(1..=31).contains(&d) || h > 23 || mi > 59 || sec > 60 {
            return None;
        }
        let days = days_from_civil(y, mo, d);
        return Some((((days * 24 + h) * 60 + mi) * 60 + sec) * 1000 + ms);
    }
    parse_general(s)
}

/// `YYYY-MM-DD`, optionally followed by `T` (or a space) and
/// `HH:MM[:SS[.fraction]]`, optionally followed by `Z` or `+HH:MM` /
/// `-HH:MM` (RFC 3339's offsets); no zone means UTC.
fn parse_general(s: &str) -> Option<Millis> {
    let s = s.trim();
    let digits = |t: &str, n: usize| -> Option<i64> {
        (t.len() == n && t.bytes().all(|c| c.is_ascii_digit())).then(|| t.parse().ok())?
    };
    let (date, rest) = s.split_at(s.len().min(10));
    let mut d = date.split('-');
    let (y, mo, day) = (
        digits(d.next()?, 4)?,
        digits(d.next()?, 2)?,
        digits(d.next()?, 2)?,
    );
    if d.next().is_some() || !(1..=12).contains(&mo) || !(1..=31).contains(&day) {
        return None;
    }
    let mut ms = days_from_civil(y, mo, day) * 86_400_000;
    let rest = match rest.strip_prefix(['T', 't', ' ']) {
        Some(r) => r,
        None if rest.is_empty() => return Some(ms),
        None => return None,
    };
    // The zone, from the end.
    let (clock, offset) = if let Some(c) = rest.strip_suffix(['Z', 'z']) {
        (c, 0)
    } else if rest.len() > 6 && matches!(rest.as_bytes()[rest.len() - 6], b'+' | b'-') {
        let (c, z) = rest.split_at(rest.len() - 6);
        let (zh, zm) = (digits(&z[1..3], 2)?, digits(&z[4..6], 2)?);
        if &z[3..4] != ":" || zh > 23 || zm > 59 {
            return None;
        }
        let sign = if z.starts_with('-') { -1 } else { 1 };
        (c, sign * (zh * 60 + zm) * 60_000)
    } else {
        (rest, 0)
    };
    let (hms, frac) = clock.split_once('.').unwrap_or((clock, ""));
    let mut parts = hms.split(':');
    let h = digits(parts.next()?, 2)?;
    let mi = digits(parts.next()?, 2)?;
    let sec = match parts.next() {
        Some(p) => digits(p, 2)?,
        None => 0,
    };
    if parts.next().is_some() || h > 23 || mi > 59 || sec > 60 {
        return None;
    }
    if !frac.bytes().all(|c| c.is_ascii_digit()) || (frac.is_empty() && clock.contains('.')) {
        return None;
    }
    let frac_ms = frac
        .bytes()
        .chain(std::iter::repeat(b'0'))
        .take(3)
        .fold(0i64, |v, c| v * 10 + (c - b'0') as i64);
    ms += ((h * 60 + mi) * 60 + sec) * 1000 + frac_ms;
    Some(ms - offset)
}

/// Milliseconds since 1970 as RFC 3339 UTC with milliseconds.
pub fn format_time(t: Millis) -> String {
    let t = std::time::UNIX_EPOCH
        + if t >= 0 {
            std::time::Duration::from_millis(t as u64)
        } else {
            std::time::Duration::ZERO
        };
    crate::record::rfc3339(t)
}

/// The objects of a record as a query needs them: how many, and the
/// highest score.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct Objects {
    pub count: u32,
    pub max_score: f64,
}

impl<'de> Deserialize<'de> for Objects {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        struct Each;
        impl<'de> Visitor<'de> for Each {
            type Value = Objects;
            fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
                f.write_str("a list of objects")
            }
            fn visit_seq<A: SeqAccess<'de>>(self, mut seq: A) -> Result<Objects, A::Error> {
                let mut o = Objects::default();
                while let Some(obj) = seq.next_element::<Score>()? {
                    o.count += 1;
                    if obj.0 > o.max_score {
                        o.max_score = obj.0;
                    }
                }
                Ok(o)
            }
        }
        d.deserialize_seq(Each)
    }
}

/// One object's score; its other fields are passed over.
struct Score(f64);

impl<'de> Deserialize<'de> for Score {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        struct Fields;
        impl<'de> Visitor<'de> for Fields {
            type Value = Score;
            fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
                f.write_str("an object")
            }
            fn visit_map<A: MapAccess<'de>>(self, mut map: A) -> Result<Score, A::Error> {
                let mut score = 0.0;
                while let Some(key) = map.next_key::<Cow<'de, str>>()? {
                    if key == "score" {
                        score = map.next_value()?;
                    } else {
                        map.next_value::<IgnoredAny>()?;
                    }
                }
                Ok(Score(score))
            }
        }
        d.deserialize_map(Fields)
    }
}

/// What a query reads of one record line.
#[derive(Clone, Debug, Deserialize)]
pub struct Line<'a> {
    #[serde(borrow)]
    pub time: Cow<'a, str>,
    #[serde(borrow)]
    pub frame: Cow<'a, str>,
    pub model_version: u64,
    #[serde(borrow, default)]
    pub model_hash: Cow<'a, str>,
    pub millis: f64,
    pub objects: Objects,
}

impl<'a> Line<'a> {
    /// Parses one line (without its newline); `None` if it is not a
    /// record.
    pub fn parse(bytes: &'a [u8]) -> Option<Line<'a>> {
        serde_json::from_slice(bytes).ok()
    }
}

/// The time window of a query: `from` inclusive, `to` exclusive; either
/// open.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Serialize)]
pub struct Range {
    pub from: Option<Millis>,
    pub to: Option<Millis>,
}

impl Range {
    pub fn contains(&self, t: Millis) -> bool {
        self.from.is_none_or(|f| t >= f) && self.to.is_none_or(|e| t < e)
    }
}

/// Processing times in log-spaced bins: bin `k` holds times up to
/// `MIN_MS * RATIO^k`; a percentile is its bin's upper bound, so within
/// 1% of the exact value (and exact for times under `MIN_MS`: 1 us).
#[derive(Clone, Debug, PartialEq)]
pub struct TimeHistogram {
    bins: Vec<u64>,
    count: u64,
    max: f64,
}

const MIN_MS: f64 = 0.001;
const RATIO: f64 = 1.01;
/// Bins up to about 10^9 ms (11.6 days): far past any frame.
const BINS: usize = 2800;

impl Default for TimeHistogram {
    fn default() -> Self {
        TimeHistogram {
            bins: vec![0; BINS],
            count: 0,
            max: 0.0,
        }
    }
}

/// A processing time made finite and not negative, and its bin.
fn bin_of(ms: f64) -> (f64, usize) {
    let ms = if ms.is_finite() { ms.max(0.0) } else { 0.0 };
    let k = if ms <= MIN_MS {
        0
    } else {
        ((ms / MIN_MS).ln() / RATIO.ln()).ceil() as usize
    };
    (ms, k.min(BINS - 1))
}

/// The upper bound of bin `k`, in milliseconds.
fn bin_upper(k: usize) -> f64 {
    MIN_MS * RATIO.powi(k as i32)
}

/// The `q`-quantile of `count` values in `bins` ((bin, count), by bin):
/// its bin's upper bound, never above the largest value `max`.
fn quantile_of(bins: impl Iterator<Item = (usize, u64)>, count: u64, max: f64, q: f64) -> f64 {
    let rank = ((q * count as f64).ceil() as u64).clamp(1, count);
    let mut seen = 0;
    for (k, n) in bins {
        seen += n;
        if seen >= rank {
            return bin_upper(k).min(max);
        }
    }
    max
}

impl TimeHistogram {
    pub fn add(&mut self, ms: f64) {
        let (ms, k) = bin_of(ms);
        self.bins[k] += 1;
        self.count += 1;
        self.max = self.max.max(ms);
    }

    /// The `q`-quantile (0..=1), `None` with no values. Never above the
    /// largest value added.
    pub fn quantile(&self, q: f64) -> Option<f64> {
        if self.count == 0 {
            return None;
        }
        Some(quantile_of(
            self.bins.iter().copied().enumerate(),
            self.count,
            self.max,
            q,
        ))
    }

    pub fn count(&self) -> u64 {
        self.count
    }
}

/// The same bins as [`TimeHistogram`], only those used kept: for one
/// hour's times, whose few hundred distinct bins would not pay for 2,800.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct SparseTimes {
    /// (bin, count), by bin.
    bins: Vec<(u16, u32)>,
    count: u64,
    max: f64,
}

impl SparseTimes {
    pub fn add(&mut self, ms: f64) {
        let (ms, k) = bin_of(ms);
        let k = k as u16;
        match self.bins.binary_search_by_key(&k, |b| b.0) {
            Ok(i) => self.bins[i].1 += 1,
            Err(i) => self.bins.insert(i, (k, 1)),
        }
        self.count += 1;
        self.max = self.max.max(ms);
    }

    /// As [`TimeHistogram::quantile`].
    pub fn quantile(&self, q: f64) -> Option<f64> {
        if self.count == 0 {
            return None;
        }
        Some(quantile_of(
            self.bins.iter().map(|&(k, n)| (k as usize, n as u64)),
            self.count,
            self.max,
            q,
        ))
    }

    pub fn count(&self) -> u64 {
        self.count
    }
}

/// One of the frames with the most objects: its record line and what it
/// is ranked by.
#[derive(Clone, Debug, PartialEq)]
pub struct TopFrame {
    pub objects: u32,
    pub max_score: f64,
    pub time: Millis,
    /// The record line as logged.
    pub line: Vec<u8>,
}

impl TopFrame {
    /// More objects first, then a higher best score, then later.
    fn outranks(&self, objects: u32, max_score: f64, time: Millis) -> bool {
        (self.objects, self.max_score, self.time)
            .partial_cmp(&(objects, max_score, time))
            .is_some_and(|o| o.is_gt())
    }
}

/// The `n` frames with the most objects seen, kept as they stream past:
/// a line is copied only when it enters, so most records cost one
/// comparison.
#[derive(Clone, Debug, Default)]
pub struct TopFrames {
    n: usize,
    /// Best first.
    kept: Vec<TopFrame>,
}

impl TopFrames {
    pub fn new(n: usize) -> TopFrames {
        TopFrames {
            n,
            kept: Vec::with_capacity(n + 1),
        }
    }

    /// Offers one record with at least one object.
    pub fn offer(&mut self, line: &Line<'_>, t: Millis, bytes: &[u8]) {
        let (objects, score) = (line.objects.count, line.objects.max_score);
        if self.n == 0 || objects == 0 {
            return;
        }
        let full = self.kept.len() == self.n;
        if full
            && self
                .kept
                .last()
                .is_none_or(|worst| worst.outranks(objects, score, t))
        {
            return;
        }
        let at = self
            .kept
            .iter()
            .position(|k| !k.outranks(objects, score, t))
            .unwrap_or(self.kept.len());
        self.kept.insert(
            at,
            TopFrame {
                objects,
                max_score: score,
                time: t,
                line: bytes.to_vec(),
            },
        );
        self.kept.truncate(self.n);
    }

    /// Best first.
    pub fn frames(&self) -> &[TopFrame] {
        &self.kept
    }
}

/// A stretch of consecutive records (in log order) by one model.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct ModelRun {
    pub version: u64,
    pub hash: String,
    pub from: Millis,
    pub to: Millis,
    pub frames: u64,
}

/// What a report reads of the records of a range: the [`Summary`], each
/// hour's processing times, the stretches each model ran, and the frames
/// with the most objects.
#[derive(Clone, Debug, Default)]
pub struct ReportStats {
    pub summary: Summary,
    /// By the hour's start.
    pub hour_times: BTreeMap<Millis, SparseTimes>,
    /// In log order; a model that ran twice has two.
    pub runs: Vec<ModelRun>,
    pub top: TopFrames,
}

impl ReportStats {
    /// Keeps the `top` frames with the most objects.
    pub fn new(top: usize) -> ReportStats {
        ReportStats {
            top: TopFrames::new(top),
            ..ReportStats::default()
        }
    }

    /// As [`Summary::add_line`].
    pub fn add_line(&mut self, bytes: &[u8], last_in_file: bool, range: &Range) {
        let s = &mut self.summary;
        let Some(line) = Line::parse(bytes) else {
            s.not_a_record(bytes, last_in_file);
            return;
        };
        let Some(t) = parse_time(&line.time) else {
            s.bad_times += 1;
            return;
        };
        if range.contains(t) {
            s.add(&line, t);
            self.hour_times
                .entry(t.div_euclid(HOUR) * HOUR)
                .or_default()
                .add(line.millis);
            match self.runs.last_mut() {
                Some(r) if r.version == line.model_version && r.hash == line.model_hash => {
                    r.from = r.from.min(t);
                    r.to = r.to.max(t);
                    r.frames += 1;
                }
                _ => self.runs.push(ModelRun {
                    version: line.model_version,
                    hash: line.model_hash.to_string(),
                    from: t,
                    to: t,
                    frames: 1,
                }),
            }
            self.top.offer(&line, t, bytes);
        }
    }
}

/// One hour's counts.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Serialize)]
pub struct HourCounts {
    pub frames: u64,
    pub objects: u64,
    /// Frames with at least one object.
    pub with_objects: u64,
}

/// A model seen in the records of the range.
#[derive(Clone, Debug, PartialEq, Eq, Serialize)]
pub struct ModelSeen {
    pub version: u64,
    pub hash: String,
    pub frames: u64,
    pub first: Millis,
    pub last: Millis,
}

/// The summary of the records of a range.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Summary {
    pub frames: u64,
    pub objects: u64,
    pub with_objects: u64,
    pub times: TimeHistogram,
    /// By the hour's start (milliseconds since 1970).
    pub hours: BTreeMap<Millis, HourCounts>,
    /// In the order first seen.
    pub models: Vec<ModelSeen>,
    /// The first and last record times in the range.
    pub first: Option<Millis>,
    pub last: Option<Millis>,
    /// A file's last line with no newline and not a record (a line a crash
    /// cut off, or one being written).
    pub torn: u64,
    /// Lines elsewhere that are not records.
    pub unreadable: u64,
    /// Records whose time does not parse (counted, not summarised).
    pub bad_times: u64,
}

impl Summary {
    /// Takes one line of a log file; `last_in_file` when it had no newline
    /// after it. Lines outside `range` are passed over.
    pub fn add_line(&mut self, bytes: &[u8], last_in_file: bool, range: &Range) {
        let Some(line) = Line::parse(bytes) else {
            self.not_a_record(bytes, last_in_file);
            return;
        };
        let Some(t) = parse_time(&line.time) else {
            self.bad_times += 1;
            return;
        };
        if range.contains(t) {
            self.add(&line, t);
        }
    }

    /// Counts a line that is not a record: torn when it was a file's
    /// last with no newline, unreadable elsewhere (blank lines are not
    /// counted).
    pub fn not_a_record(&mut self, bytes: &[u8], last_in_file: bool) {
        if last_in_file {
            self.torn += 1;
        } else if !bytes.iter().all(u8::is_ascii_whitespace) {
            self.unreadable += 1;
        }
    }

    /// Takes one record at time `t`.
    pub fn add(&mut self, line: &Line<'_>, t: Millis) {
        let objects = line.objects.count as u64;
        self.frames += 1;
        self.objects += objects;
        self.with_objects += (objects > 0) as u64;
        self.times.add(line.millis);
        let h = self.hours.entry(t.div_euclid(HOUR) * HOUR).or_default();
        h.frames += 1;
        h.objects += objects;
        h.with_objects += (objects > 0) as u64;
        self.first = Some(self.first.map_or(t, |f| f.min(t)));
        self.last = Some(self.last.map_or(t, |l| l.max(t)));
        match self
            .models
            .iter_mut()
            .rev()
            .find(|m| m.version == line.model_version && m.hash == line.model_hash)
        {
            Some(m) => {
                m.frames += 1;
                m.first = m.first.min(t);
                m.last = m.last.max(t);
            }
            None => self.models.push(ModelSeen {
                version: line.model_version,
                hash: line.model_hash.to_string(),
                frames: 1,
                first: t,
                last: t,
            }),
        }
    }

    /// Every hour from the first record's to the last's, empty ones
    /// included.
    pub fn hour_table(&self) -> Vec<(Millis, HourCounts)> {
        let (Some(&first), Some(&last)) = (self.hours.keys().next(), self.hours.keys().last())
        else {
            return Vec::new();
        };
        (0..=((last - first) / HOUR))
            .map(|k| {
                let h = first + k * HOUR;
                (h, self.hours.get(&h).copied().unwrap_or_default())
            })
            .collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn times_parse_as_the_general_parser_reads_them() {
        // 2000-03-01, the day after a leap day, checked against the
        // humantime crate's RFC 3339 parser (a general-purpose reference).
        for s in [
            "1970-01-01T00:00:00.000Z",
            "2000-02-29T23:59:59.999Z",
            "2000-03-01T00:00:00.000Z",
            "2026-12-02T10:00:00.123Z",
            "2100-12-31T23:59:59.000Z",
        ] {
            let general = humantime::parse_rfc3339_weak(s)
                .unwrap()
                .duration_since(std::time::UNIX_EPOCH)
                .unwrap()
                .as_millis() as i64;
            assert_eq!(parse_time(s), Some(general), "{s}");
            assert_eq!(format_time(general), s);
        }
        // POSIX time of 2000-01-01T00:00:00Z is 946684800 (common
        // knowledge, from memory; the general parser agrees above).
        assert_eq!(
            parse_time("2000-01-01T00:00:00.000Z"),
            Some(946_684_800_000)
        );
        assert_eq!(
            parse_time("2026-12-02T10:00:00+01:00"),
            parse_time("2026-12-02T09:00:00.000Z")
        );
        assert_eq!(
            parse_time("2026-12-02T09:00:00Z"),
            parse_time("2026-12-02T09:00:00.000Z")
        );
        assert_eq!(
            parse_time("2026-12-02 09:00"),
            parse_time("2026-12-02T09:00:00.000Z")
        );
        assert_eq!(
            parse_time("2026-12-02"),
            parse_time("2026-12-02T00:00:00.000Z")
        );
        assert_eq!(
            parse_time("2026-12-02T09:00:00.5-00:30"),
            parse_time("2026-12-02T09:30:00.500Z")
        );
        for bad in [
            "yesterday",
            "2026-13-02T10:00:00.000Z",
            "2026-12-02T25:00",
            "2026-12-02X",
            "2026-12-02T10:00:00.",
        ] {
            assert_eq!(parse_time(bad), None, "{bad}");
        }
    }

    #[test]
    fn a_line_is_read_without_its_objects_details() {
        let line = br#"{"time":"2026-12-02T10:00:00.000Z","frame":"loom \"7\".pbm","sha256":"ab","width":4,"height":4,"model_version":3,"model_hash":"abcdef012345","millis":1.5,"objects":[{"id":1,"bbox":[0,0,1,1],"centroid":[0.5,0.5],"area":4,"score":0.7},{"id":2,"bbox":[2,2,3,3],"centroid":[2.5,2.5],"area":4,"score":0.9}]}"#;
        let l = Line::parse(line).unwrap();
        assert_eq!(l.frame, "loom \"7\".pbm");
        assert_eq!((l.model_version, l.millis), (3, 1.5));
        assert_eq!(
            l.objects,
            Objects {
                count: 2,
                max_score: 0.9
            }
        );
        assert!(Line::parse(b"{\"time\":\"2026").is_none());
    }

    #[test]
    fn percentiles_are_within_one_percent() {
        let mut h = TimeHistogram::default();
        let mut exact: Vec<f64> = (1..=10_000).map(|i| i as f64 * 0.0137).collect();
        for &v in &exact {
            h.add(v);
        }
        exact.sort_by(f64::total_cmp);
        for q in [0.5, 0.9, 0.99, 1.0] {
            // The nearest-rank percentile (common practice).
            let want = exact[((q * exact.len() as f64).ceil() as usize).max(1) - 1];
            let got = h.quantile(q).unwrap();
            assert!(
                (got - want).abs() <= want * 0.0101,
                "q {q}: {got} vs {want}"
            );
        }
        assert_eq!(TimeHistogram::default().quantile(0.5), None);
    }

    #[test]
    fn torn_and_unreadable_lines_are_counted() {
        let mut s = Summary::default();
        let r = Range::default();
        let rec = |t: &str, n: usize| {
            let objects: Vec<String> = (0..n)
                .map(|i| format!("{{\"id\":{},\"bbox\":[0,0,0,0],\"centroid\":[0,0],\"area\":1,\"score\":0.5}}", i + 1))
                .collect();
            format!(
                "{{\"time\":\"{t}\",\"frame\":\"f.pbm\",\"sha256\":\"x\",\"width\":1,\"height\":1,\"model_version\":1,\"model_hash\":\"h\",\"millis\":2.0,\"objects\":[{}]}}",
                objects.join(",")
            )
        };
        s.add_line(rec("2026-12-02T10:10:00.000Z", 2).as_bytes(), false, &r);
        s.add_line(rec("2026-12-02T12:59:59.999Z", 0).as_bytes(), false, &r);
        s.add_line(b"not json", false, &r);
        s.add_line(b"{\"time\":\"2026-12", true, &r);
        assert_eq!((s.frames, s.objects, s.with_objects), (2, 2, 1));
        assert_eq!((s.torn, s.unreadable), (1, 1));
        let table = s.hour_table();
        assert_eq!(table.len(), 3);
        assert_eq!(table[1].1, HourCounts::default());
        assert_eq!(table[0].1.objects, 2);
        // A range takes only its records.
        let mut s = Summary::default();
        let r = Range {
            from: parse_time("2026-12-02T11:00:00.000Z"),
            to: None,
        };
        s.add_line(rec("2026-12-02T10:10:00.000Z", 2).as_bytes(), false, &r);
        s.add_line(rec("2026-12-02T12:59:59.999Z", 0).as_bytes(), false, &r);
        assert_eq!(s.frames, 1);
    }

    fn record(t: Millis, objects: &[f64], millis: f64) -> String {
        let objects: Vec<String> = objects
            .iter()
            .enumerate()
            .map(|(i, score)| format!("{{\"id\":{},\"bbox\":[0,0,0,0],\"centroid\":[0,0],\"area\":1,\"score\":{score}}}", i + 1))
            .collect();
        format!(
            "{{\"time\":\"{}\",\"frame\":\"f{t}.pbm\",\"sha256\":\"x\",\"width\":1,\"height\":1,\"model_version\":1,\"model_hash\":\"h\",\"millis\":{millis},\"objects\":[{}]}}",
            format_time(t),
            objects.join(",")
        )
    }

    #[test]
    fn an_hours_sparse_times_agree_with_the_full_histogram() {
        let mut full = TimeHistogram::default();
        let mut sparse = SparseTimes::default();
        let mut x = 17u64;
        for _ in 0..5000 {
            x = x
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            let ms = 0.5 + (x >> 40) as f64 / (1u64 << 24) as f64 * 40.0;
            full.add(ms);
            sparse.add(ms);
        }
        for q in [0.0, 0.1, 0.5, 0.9, 0.99, 1.0] {
            assert_eq!(full.quantile(q), sparse.quantile(q), "q {q}");
        }
        assert_eq!(sparse.count(), 5000);
        assert_eq!(SparseTimes::default().quantile(0.5), None);
    }

    #[test]
    fn the_top_frames_are_those_a_full_sort_puts_first() {
        let t0 = parse_time("2026-12-01T00:00:00.000Z").unwrap();
        let mut stats = ReportStats::new(7);
        let mut all = Vec::new();
        let range = Range::default();
        let mut x = 5u64;
        for i in 0..400i64 {
            x = x
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            let n = (x >> 61) as usize; // 0..=7 objects
            let scores: Vec<f64> = (0..n)
                .map(|k| ((x >> (8 * k)) & 0xff) as f64 / 256.0)
                .collect();
            let t = t0 + i * 1000;
            let line = record(t, &scores, 1.0 + (i % 5) as f64);
            stats.add_line(line.as_bytes(), false, &range);
            let best = scores.iter().cloned().fold(0.0, f64::max);
            if n > 0 {
                all.push((n as u32, best, t, line));
            }
        }
        // The reference order: a full sort, most objects, best score,
        // latest first.
        all.sort_by(|a, b| (b.0, b.1, b.2).partial_cmp(&(a.0, a.1, a.2)).unwrap());
        let top = stats.top.frames();
        assert_eq!(top.len(), 7);
        for (got, want) in top.iter().zip(&all) {
            assert_eq!(
                (got.objects, got.max_score, got.time),
                (want.0, want.1, want.2)
            );
            assert_eq!(got.line, want.3.as_bytes());
        }
        assert_eq!(stats.summary.frames, 400);
        assert_eq!(
            stats
                .hour_times
                .values()
                .map(SparseTimes::count)
                .sum::<u64>(),
            400
        );
    }
}
