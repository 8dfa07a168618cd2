//! Which files in the inbox are frames, and when one is complete.
//!
//! File events are unreliable (queues overflow, some writers never close,
//! some filesystems send nothing), so the inbox is also listed: at start,
//! periodically, and after any watcher error. A file becomes *ready* when
//! an event says its writer is done (close after write, or a rename into
//! the inbox), or, for a file no event announced, when a listing finds its
//! size and time stamp unchanged for the settle time. A file that events
//! announced as being written waits for its close event; only if that
//! never comes does it fall back to a long settle time.
//!
//! [`Settle`] is pure: the caller passes the time in, so tests need no
//! sleeping.

use std::collections::HashMap;
use std::fs;
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant, SystemTime};

/// Name endings of files being written by common tools: never frames.
const TEMP_SUFFIXES: &[&str] = &[".tmp", ".part", ".partial", ".swp", "~"];

/// Whether a file name in the inbox can be a frame: not hidden, not a
/// temporary file, and ending in one of `formats` (lower-case, no dot).
pub fn is_frame_name(name: &str, formats: &[String]) -> bool {
    if name.starts_with('.') || name.is_empty() {
        return false;
    }
    let lower = name.to_ascii_lowercase();
    if TEMP_SUFFIXES.iter().any(|s| lower.ends_with(s)) {
        return false;
    }
    match lower.rsplit_once('.') {
        Some((stem, ext)) => !stem.is_empty() && formats.iter().any(|f| f == ext),
        None => false,
    }
}

/// A frame file found by listing the inbox.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Listed {
    pub path: PathBuf,
    pub size: u64,
    pub modified: SystemTime,
}

/// The frame files directly in `dir`: plain files only (symbolic links and
/// folders are passed over), oldest first (then by name).
pub fn list(dir: &Path, formats: &[String]) -> std::io::Result<Vec<Listed>> {
    let mut out = Vec::new();
    for entry in fs::read_dir(dir)? {
        let Ok(entry) = entry else { continue };
        let name = entry.file_name();
        let Some(name) = name.to_str() else { continue };
        if !is_frame_name(name, formats) {
            continue;
        }
        // `DirEntry::metadata` does not follow symbolic links.
        let Ok(meta) = entry.metadata() else { continue };
        if !meta.file_type().is_file() {
            continue;
        }
        out.push(Listed {
            path: entry.path(),
            size: meta.len(),
            modified: meta.modified().unwrap_or(SystemTime::UNIX_EPOCH),
        });
    }
    out.sort_by(|a, b| a.modified.cmp(&b.modified).then(a.path.cmp(&b.path)));
    Ok(out)
}

/// A file's size and time stamp, as last seen.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
struct Seen {
    size: u64,
    modified: SystemTime,
    /// When it was first seen with this size and stamp.
    since: Instant,
    /// An event announced it as being written: wait for its close event.
    announced: bool,
}

/// Tracks files that are not known to be complete yet.
#[derive(Debug)]
pub struct Settle {
    settle: Duration,
    /// How long an announced file may stay unchanged without its close
    /// event before it is taken anyway.
    announced_settle: Duration,
    files: HashMap<PathBuf, Seen>,
}

impl Settle {
    pub fn new(settle: Duration) -> Settle {
        Settle {
            settle,
            announced_settle: settle.max(Duration::from_secs(60)),
            files: HashMap::new(),
        }
    }

    /// An event says `path` is being written.
    pub fn announce(&mut self, path: &Path, now: Instant) {
        self.files
            .entry(path.to_path_buf())
            .and_modify(|s| {
                s.since = now;
                s.announced = true;
            })
            .or_insert(Seen {
                size: u64::MAX,
                modified: SystemTime::UNIX_EPOCH,
                since: now,
                announced: true,
            });
    }

    /// Events may have been lost: no file waits for a close event any more.
    pub fn forget_announcements(&mut self) {
        for s in self.files.values_mut() {
            s.announced = false;
        }
    }

    /// `path` is done (or gone): stop tracking it.
    pub fn remove(&mut self, path: &Path) {
        self.files.remove(path);
    }

    /// A listing saw `file`: returns true when it is ready to be read.
    pub fn observe(&mut self, file: &Listed, now: Instant) -> bool {
        let seen = self.files.entry(file.path.clone()).or_insert(Seen {
            size: file.size,
            modified: file.modified,
            since: now,
            announced: false,
        });
        if seen.size != file.size || seen.modified != file.modified {
            seen.size = file.size;
            seen.modified = file.modified;
            seen.since = now;
            return false;
        }
        let wait = if seen.announced {
            self.announced_settle
        } else {
            self.settle
        };
        if now.duration_since(seen.since) >= wait {
            self.files.remove(&file.path);
            return true;
        }
        false
    }

    /// The files being tracked.
    pub fn paths(&self) -> Vec<PathBuf> {
        self.files.keys().cloned().collect()
    }

    /// Drops files a listing no longer found.
    pub fn retain_listed(&mut self, listed: &[Listed]) {
        let keep: std::collections::HashSet<&Path> =
            listed.iter().map(|l| l.path.as_path()).collect();
        self.files.retain(|p, _| keep.contains(p.as_path()));
    }

    pub fn len(&self) -> usize {
        self.files.len()
    }

    pub fn is_empty(&self) -> bool {
        self.files.is_empty()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn formats() -> Vec<String> {
        vec!["pbm".into(), "png".into()]
    }

    #[test]
    fn frame_names() {
        let f = formats();
        for ok in ["a.pbm", "loom-0001.PNG", "x.y.pbm"] {
            assert!(is_frame_name(ok, &f), "{ok}");
        }
        for bad in [
            ".a.pbm",
            "a.pbm.tmp",
            "a.pbm.part",
            "a.pbm~",
            "a.txt",
            "pbm",
            ".pbm",
            "a.jpg",
            "",
        ] {
            assert!(!is_frame_name(bad, &f), "{bad}");
        }
        assert!(!is_frame_name("a.png", &["pbm".to_string()]));
    }

    #[test]
    fn unannounced_files_settle_after_the_settle_time() {
        let t0 = Instant::now();
        let ms = Duration::from_millis;
        let mut s = Settle::new(ms(500));
        let mut f = Listed {
            path: "in/a.pbm".into(),
            size: 10,
            modified: SystemTime::UNIX_EPOCH,
        };
        assert!(!s.observe(&f, t0));
        assert!(!s.observe(&f, t0 + ms(499)));
        // It grew: the clock starts again.
        f.size = 20;
        assert!(!s.observe(&f, t0 + ms(600)));
        assert!(!s.observe(&f, t0 + ms(1000)));
        assert!(s.observe(&f, t0 + ms(1100)));
        assert!(s.is_empty());
    }

    #[test]
    fn announced_files_wait_for_their_close_event() {
        let t0 = Instant::now();
        let ms = Duration::from_millis;
        let mut s = Settle::new(ms(500));
        let f = Listed {
            path: "in/a.pbm".into(),
            size: 10,
            modified: SystemTime::UNIX_EPOCH,
        };
        s.announce(&f.path, t0);
        assert!(!s.observe(&f, t0 + ms(10)));
        assert!(!s.observe(&f, t0 + ms(5000)));
        // The close event never came: a minute without change is enough.
        assert!(s.observe(&f, t0 + ms(61_000)));
        // After lost events, plain settling applies.
        s.announce(&f.path, t0);
        s.forget_announcements();
        assert!(!s.observe(&f, t0 + ms(100)));
        assert!(s.observe(&f, t0 + ms(700)));
    }

    #[test]
    fn listing_skips_links_folders_and_others() {
        let dir = tempfile::tempdir().unwrap();
        let d = dir.path();
        fs::write(d.join("b.pbm"), b"P1 1 1 0").unwrap();
        fs::write(d.join("a.png"), b"x").unwrap();
        fs::write(d.join(".hidden.pbm"), b"x").unwrap();
        fs::write(d.join("c.pbm.tmp"), b"x").unwrap();
        fs::create_dir(d.join("sub.pbm")).unwrap();
        std::os::unix::fs::symlink(d.join("b.pbm"), d.join("link.pbm")).unwrap();
        let names: Vec<String> = list(d, &formats())
            .unwrap()
            .iter()
            .map(|l| l.path.file_name().unwrap().to_string_lossy().into_owned())
            .collect();
        let mut sorted = names.clone();
        sorted.sort();
        assert_eq!(sorted, ["a.png", "b.pbm"]);
    }
}
