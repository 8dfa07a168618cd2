//! The daemon's logs as a maintenance reader sees them: the detection log
//! files in the order they were written, and their lines one at a time,
//! through one reused buffer, so reading a month of logs takes the same
//! memory as reading a minute of them.
//!
//! Invariants: rotated files come oldest first (by the UTC time in their
//! names, then their `-k` suffix), the current file last; a line longer
//! than [`MAX_LINE`] is passed to the caller cut short (it is not a
//! record) rather than held whole; reading never writes.

use std::fs::File;
use std::io::{self, BufRead, BufReader};
use std::path::{Path, PathBuf};

use crate::review::{days_from_civil_ms, Millis};

/// The current detection log's name (as the daemon writes it).
pub const CURRENT: &str = "detections.jsonl";
/// Lines longer than this are cut (a record is a few hundred bytes).
pub const MAX_LINE: usize = 1 << 20;

/// One detection log file.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct LogFile {
    pub path: PathBuf,
    /// When it was rotated (all its records are older); `None` for the
    /// current file.
    pub rotated_at: Option<Millis>,
    suffix: u32,
}

impl LogFile {
    /// Whether the file can hold records of `range`: a rotated file's
    /// records are all older than its rotation.
    pub fn may_hold(&self, range: &crate::review::Range) -> bool {
        match (self.rotated_at, range.from) {
            (Some(rotated), Some(from)) => rotated >= from,
            _ => true,
        }
    }
}

/// The time in a rotated file's name: `detections-YYYYMMDDTHHMMSS_nnnnnnnnnZ`
/// with an optional `-k`, `.jsonl`.
fn rotated_time(name: &str) -> Option<(Millis, u32)> {
    let stem = name.strip_prefix("detections-")?.strip_suffix(".jsonl")?;
    let (stamp, k) = match stem.split_once("Z-") {
        Some((s, k)) => (s, k.parse().ok()?),
        None => (stem.strip_suffix('Z')?, 0),
    };
    let b = stamp.as_bytes();
    if b.len() != 25 || b[8] != b'T' || b[15] != b'_' {
        return None;
    }
    let num = |r: std::ops::Range<usize>| -> Option<i64> { stamp.get(r)?.parse().ok() };
    let ms = days_from_civil_ms(num(0..4)?, num(4..6)?, num(6..8)?)
        + ((num(9..11)? * 60 + num(11..13)?) * 60 + num(13..15)?) * 1000
        + num(16..25)? / 1_000_000;
    Some((ms, k))
}

/// The detection log files in `dir`, oldest first, the current one last
/// (if it exists).
pub fn detection_logs(dir: &Path) -> io::Result<Vec<LogFile>> {
    let mut files = Vec::new();
    for e in std::fs::read_dir(dir)? {
        let e = e?;
        let name = e.file_name();
        let Some(name) = name.to_str() else { continue };
        if let Some((t, k)) = rotated_time(name) {
            files.push(LogFile {
                path: e.path(),
                rotated_at: Some(t),
                suffix: k,
            });
        }
    }
    files.sort_by_key(|f| (f.rotated_at, f.suffix));
    let current = dir.join(CURRENT);
    if current.is_file() {
        files.push(LogFile {
            path: current,
            rotated_at: None,
            suffix: 0,
        });
    }
    Ok(files)
}

/// Calls `f` with every line of `path` (without its newline) and whether
/// it was the file's last line with no newline after it (a line being
/// written, or one a crash cut off). Returns the bytes read.
pub fn for_each_line(path: &Path, f: &mut dyn FnMut(&[u8], bool)) -> io::Result<u64> {
    let mut r = BufReader::with_capacity(1 << 20, File::open(path)?);
    let mut line = Vec::with_capacity(4096);
    let mut total = 0u64;
    let mut cut = false;
    loop {
        let buf = r.fill_buf()?;
        if buf.is_empty() {
            if !line.is_empty() || cut {
                f(&line, true);
            }
            return Ok(total);
        }
        let n = buf.len();
        match buf.iter().position(|&c| c == b'\n') {
            Some(i) => {
                if line.is_empty() && !cut {
                    // The whole line is in the buffer: no copy.
                    f(&buf[..i], false);
                } else {
                    let room = MAX_LINE.saturating_sub(line.len());
                    line.extend_from_slice(&buf[..i.min(room)]);
                    f(&line, false);
                    line.clear();
                    cut = false;
                }
                r.consume(i + 1);
                total += i as u64 + 1;
            }
            None => {
                let room = MAX_LINE.saturating_sub(line.len());
                cut |= n > room;
                line.extend_from_slice(&buf[..n.min(room)]);
                r.consume(n);
                total += n as u64;
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn files_come_oldest_first_and_lines_whole() {
        let d = tempfile::tempdir().unwrap();
        for (name, text) in [
            ("detections.jsonl", "c1\nc2 torn"),
            ("detections-20261202T100000_000000000Z-2.jsonl", "b\n"),
            ("detections-20261202T100000_000000000Z.jsonl", "a\n"),
            ("detections-20261201T235959_500000000Z.jsonl", "z\n"),
            ("events.jsonl", "not a detection log\n"),
        ] {
            std::fs::write(d.path().join(name), text).unwrap();
        }
        let files = detection_logs(d.path()).unwrap();
        let mut seen = Vec::new();
        for f in &files {
            for_each_line(&f.path, &mut |l, last| {
                seen.push((String::from_utf8_lossy(l).into_owned(), last))
            })
            .unwrap();
        }
        let want = [
            ("z", false),
            ("a", false),
            ("b", false),
            ("c1", false),
            ("c2 torn", true),
        ];
        let want: Vec<(String, bool)> = want.iter().map(|(s, b)| (s.to_string(), *b)).collect();
        assert_eq!(seen, want);
        assert_eq!(
            files[0].rotated_at,
            crate::review::parse_time("2026-12-01T23:59:59.500Z")
        );
        assert_eq!(files.last().unwrap().rotated_at, None);
    }

    #[test]
    fn lines_across_buffers_and_overlong_lines() {
        let d = tempfile::tempdir().unwrap();
        let long = "x".repeat(3 << 20);
        let text = format!("first\n{long}\n{}\nlast\n", "y".repeat(1_500_000));
        let p = d.path().join("detections.jsonl");
        std::fs::write(&p, &text).unwrap();
        let mut lens = Vec::new();
        let n = for_each_line(&p, &mut |l, last| lens.push((l.len(), last))).unwrap();
        assert_eq!(n, text.len() as u64);
        assert_eq!(
            lens,
            [(5, false), (MAX_LINE, false), (MAX_LINE, false), (4, false)]
        );
    }
}
