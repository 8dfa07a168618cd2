//! The operator's labels in the state folder: every applied correction as
//! a labelled frame, the label store of each line, and the lines
//! themselves (what ran between two changeovers).
//!
//! `state/labels/` is a data folder `burlwatch train --data` reads: for
//! each labelled frame `STEM.pbm`, `STEM.mask.pbm` and, when the
//! correction said "don't know here", `STEM.unknown.pbm`. Beside them:
//! - `index.json`: the labelled frames (frame name, its log record's
//!   sha256, the stem of its files, line, role, the correction it came
//!   from) and the label store file of each line: the commit point;
//! - `store-line-L-gG.bin`: the label store of line `L` (training-role
//!   frames only), as of generation `G`.
//!
//! Applying a correction writes the new files under a stem carrying the
//! new generation, then the new store, then the index (atomically), and
//! only then removes what the index no longer names. A crash at any point
//! leaves the index naming complete files; [`LabelSet::open`] removes the
//! rest and rebuilds a store that is missing or does not match. A later
//! correction of the same frame replaces the earlier one: its counts are
//! taken out of the store and the new ones put in, so a frame is never
//! counted twice.
//!
//! Roles: a labelled frame is held out for the gate or used for training
//! by its content hash ([`role_key`], the SHA-256 of its pixels as PBM),
//! never by arrival order, so a frame keeps its role however many labels
//! come later and whichever correction of it is the latest.
//!
//! `state/lines.json` lists the changeovers; the first line starts at the
//! beginning of time and its labels include the seed data. A label belongs
//! to the line running when its correction was applied (the operator
//! records a changeover when the new fabric shows, often after its first
//! frames were detected).

use std::collections::BTreeMap;
use std::fs;
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use crate::codec::{self, DecodeLimits};
use crate::error::{Error, ErrorKind, Result};
use crate::fileio::data::{MASK_SUFFIX, UNKNOWN_SUFFIX};
use crate::fileio::durable::write_atomic;
use crate::frame::LabelledFrame;
use crate::learn::store::LabelStore;
use crate::window::Window;

/// The labels' folder inside the state folder.
pub const DIR: &str = "labels";
const INDEX: &str = "index.json";
/// The changeovers' file inside the state folder.
pub const LINES: &str = "lines.json";

/// What a labelled frame is used for.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Role {
    /// Held out: the gate scores models on it; no model is trained on it.
    Gate,
    Train,
}

/// The key a frame's role is drawn from: SHA-256 of its pixels as binary
/// PBM (the same for a frame read from PBM or PNG).
pub fn role_key(frame: &crate::frame::BitFrame) -> String {
    crate::record::sha256_hex(&codec::encode_pbm(frame))
}

/// The role of a frame with this key: the gate's when the key's first 64
/// bits, as a fraction of 2^64, fall below `gate_share`.
pub fn role_of(key: &str, gate_share: f64) -> Role {
    let top = u64::from_str_radix(key.get(..16).unwrap_or("0"), 16).unwrap_or(0);
    if (top as f64) / 18_446_744_073_709_551_616.0 < gate_share {
        Role::Gate
    } else {
        Role::Train
    }
}

/// The correction a labelled frame came from.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Source {
    /// The correction file's name.
    pub file: String,
    /// SHA-256 of its bytes: a correction met again after a crash is
    /// recognised as applied.
    pub sha256: String,
    pub by: Option<String>,
}

/// One labelled frame of the index.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Label {
    /// The archived frame's file name, and its record's sha256.
    pub frame: String,
    pub sha256: String,
    /// Its files' stem in the labels folder.
    pub stem: String,
    pub line: u64,
    pub role: Role,
    /// Whether any pixel is a target.
    pub targets: bool,
    /// Pixels with a known label.
    pub pixels: u64,
    /// The generation that added it.
    pub generation: u64,
    /// When it was applied, RFC 3339 UTC.
    pub time: String,
    pub source: Source,
}

/// A line's label store file and what it holds.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct StoreFile {
    pub file: String,
    pub frames: u64,
    pub totals: [u64; 2],
}

#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
struct Index {
    generation: u64,
    /// The window of the stores (they are rebuilt when training's
    /// window changes).
    window: u8,
    labels: Vec<Label>,
    stores: BTreeMap<u64, StoreFile>,
}

/// One changeover: from `since` (RFC 3339 UTC) line `line` runs.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Line {
    pub line: u64,
    pub since: String,
    pub note: Option<String>,
}

/// The lines of a state folder; line 1 when none was recorded.
pub fn read_lines(state: &Path) -> Result<Vec<Line>> {
    let path = state.join(LINES);
    let mut lines: Vec<Line> = match fs::read_to_string(&path) {
        Ok(t) => serde_json::from_str(&t).map_err(|e| {
            Error::new(ErrorKind::Data(format!("not a list of lines: {e}"))).with_path(&path)
        })?,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => Vec::new(),
        Err(e) => return Err(Error::from(e).with_path(&path)),
    };
    if lines.is_empty() {
        lines.push(Line {
            line: 1,
            since: String::new(),
            note: None,
        });
    }
    Ok(lines)
}

/// Records a changeover: a new line from `now`. Returns it.
pub fn changeover(state: &Path, now: &str, note: Option<String>) -> Result<Line> {
    let mut lines = read_lines(state)?;
    let line = Line {
        line: lines.last().map_or(1, |l| l.line) + 1,
        since: now.to_string(),
        note,
    };
    lines.push(line.clone());
    let path = state.join(LINES);
    let text = serde_json::to_string_pretty(&lines).expect("lines serialise") + "\n";
    write_atomic(&path, text.as_bytes()).map_err(|e| Error::from(e).with_path(&path))?;
    Ok(line)
}

/// The labels of one state folder.
#[derive(Debug)]
pub struct LabelSet {
    dir: PathBuf,
    index: Index,
    stores: BTreeMap<u64, LabelStore>,
    limits: DecodeLimits,
}

impl LabelSet {
    /// Opens (creating) `state/labels`, removes files the index does not
    /// name, and loads or rebuilds every line's store for `window`.
    pub fn open(state: &Path, window: Window, limits: &DecodeLimits) -> Result<LabelSet> {
        let dir = state.join(DIR);
        fs::create_dir_all(&dir).map_err(|e| Error::from(e).with_path(&dir))?;
        let ipath = dir.join(INDEX);
        let index: Index = match fs::read_to_string(&ipath) {
            Ok(t) => serde_json::from_str(&t).map_err(|e| {
                Error::new(ErrorKind::Data(format!("not a label index: {e}"))).with_path(&ipath)
            })?,
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => Index {
                window: window.size(),
                ..Index::default()
            },
            Err(e) => return Err(Error::from(e).with_path(&ipath)),
        };
        let mut set = LabelSet {
            dir,
            index,
            stores: BTreeMap::new(),
            limits: limits.clone(),
        };
        set.remove_strays();
        let rebuild = set.index.window != window.size() || !set.load_stores(window);
        if rebuild {
            set.index.window = window.size();
            set.rebuild_stores(window)?;
        }
        Ok(set)
    }

    /// Loads every line's store; false when one is missing or does not
    /// match the index.
    fn load_stores(&mut self, window: Window) -> bool {
        for (line, sf) in &self.index.stores {
            let path = self.dir.join(&sf.file);
            let Ok(bytes) = fs::read(&path) else {
                return false;
            };
            let Ok(store) = LabelStore::from_bytes(&bytes) else {
                return false;
            };
            if store.window() != window
                || store.frames() != sf.frames
                || store.totals() != sf.totals
            {
                return false;
            }
            self.stores.insert(*line, store);
        }
        let lines: std::collections::BTreeSet<u64> = self
            .index
            .labels
            .iter()
            .filter(|l| l.role == Role::Train)
            .map(|l| l.line)
            .collect();
        lines.iter().all(|l| self.stores.contains_key(l))
    }

    /// Builds every line's store from the labelled frames and writes them.
    fn rebuild_stores(&mut self, window: Window) -> Result<()> {
        self.stores.clear();
        let labels = self.index.labels.clone();
        for l in labels.iter().filter(|l| l.role == Role::Train) {
            let f = self.read(l)?;
            self.stores
                .entry(l.line)
                .or_insert_with(|| LabelStore::new(window))
                .add_labelled(&f)?;
        }
        self.index.generation += 1;
        let lines: Vec<u64> = self.stores.keys().copied().collect();
        self.index.stores.clear();
        for line in lines {
            self.write_store(line)?;
        }
        self.write_index()?;
        self.remove_strays();
        Ok(())
    }

    /// Removes files in the folder that the index does not name.
    fn remove_strays(&self) {
        let mut keep: std::collections::HashSet<String> = [INDEX.to_string()].into();
        for l in &self.index.labels {
            keep.insert(format!("{}.pbm", l.stem));
            keep.insert(format!("{}{MASK_SUFFIX}", l.stem));
            keep.insert(format!("{}{UNKNOWN_SUFFIX}", l.stem));
        }
        for s in self.index.stores.values() {
            keep.insert(s.file.clone());
        }
        let Ok(rd) = fs::read_dir(&self.dir) else {
            return;
        };
        for e in rd.flatten() {
            let name = e.file_name().to_string_lossy().into_owned();
            if !keep.contains(&name) && e.file_type().is_ok_and(|t| t.is_file()) {
                let _ = fs::remove_file(e.path());
            }
        }
    }

    fn write_store(&mut self, line: u64) -> Result<()> {
        let store = &self.stores[&line];
        let file = format!("store-line-{line}-g{}.bin", self.index.generation);
        let path = self.dir.join(&file);
        write_atomic(&path, &store.to_bytes()).map_err(|e| Error::from(e).with_path(&path))?;
        self.index.stores.insert(
            line,
            StoreFile {
                file,
                frames: store.frames(),
                totals: store.totals(),
            },
        );
        Ok(())
    }

    fn write_index(&self) -> Result<()> {
        let path = self.dir.join(INDEX);
        let text = serde_json::to_string_pretty(&self.index).expect("index serialises") + "\n";
        write_atomic(&path, text.as_bytes()).map_err(|e| Error::from(e).with_path(&path))
    }

    /// The labelled frames, in the order they were applied.
    pub fn labels(&self) -> &[Label] {
        &self.index.labels
    }

    /// The generation: one more with every applied correction.
    pub fn generation(&self) -> u64 {
        self.index.generation
    }

    /// The label store of `line` (training-role frames), if it has any.
    pub fn store(&self, line: u64) -> Option<&LabelStore> {
        self.stores.get(&line)
    }

    /// The folder (a data folder `train --data` reads).
    pub fn dir(&self) -> &Path {
        &self.dir
    }

    /// The label of `frame`, if it has one.
    pub fn get(&self, frame: &str) -> Option<&Label> {
        self.index.labels.iter().find(|l| l.frame == frame)
    }

    /// Whether the correction with these bytes' hash was applied.
    pub fn applied(&self, correction_sha256: &str) -> bool {
        self.index
            .labels
            .iter()
            .any(|l| l.source.sha256 == correction_sha256)
    }

    /// Reads one labelled frame's files.
    pub fn read(&self, l: &Label) -> Result<LabelledFrame> {
        let p = |suffix: &str| self.dir.join(format!("{}{suffix}", l.stem));
        let frame = crate::fileio::data::read_frame(&p(".pbm"), &self.limits)?;
        let mask = crate::fileio::data::read_mask(&p(MASK_SUFFIX), &self.limits)?;
        let upath = p(UNKNOWN_SUFFIX);
        let unknown = if upath.exists() {
            Some(crate::fileio::data::read_mask(&upath, &self.limits)?)
        } else {
            None
        };
        let f = LabelledFrame {
            unknown,
            ..LabelledFrame::new(l.frame.clone(), frame, mask)
        };
        if !f.sizes_agree() {
            return Err(Error::new(ErrorKind::Data(
                "the labelled frame's planes differ in size".into(),
            ))
            .with_path(p(".pbm")));
        }
        Ok(f)
    }

    /// Adds (or replaces) the labels of one archived frame. `label` says
    /// what it is (its stem and generation are set here). Crash-safe: see
    /// the module docs.
    pub fn put(&mut self, f: &LabelledFrame, mut label: Label) -> Result<Label> {
        let old = self
            .index
            .labels
            .iter()
            .position(|l| l.frame == label.frame);
        let old_frame = match old {
            Some(i) if self.index.labels[i].role == Role::Train => Some((
                self.index.labels[i].clone(),
                self.read(&self.index.labels[i])?,
            )),
            _ => None,
        };
        let generation = self.index.generation + 1;
        let base = label
            .frame
            .rsplit_once('.')
            .map_or(label.frame.as_str(), |(s, _)| s);
        label.stem = format!("{base}-g{generation}");
        label.generation = generation;
        label.targets = f.truth().count_set() > 0;
        label.pixels = f.known_pixels();
        let p = |suffix: &str| self.dir.join(format!("{}{suffix}", label.stem));
        let write = |path: PathBuf, bytes: Vec<u8>| {
            write_atomic(&path, &bytes).map_err(|e| Error::from(e).with_path(&path))
        };
        write(p(".pbm"), codec::encode_pbm(&f.frame))?;
        write(p(MASK_SUFFIX), codec::encode_pbm(&f.mask))?;
        if let Some(u) = f.unknown.as_ref().filter(|u| u.count_set() > 0) {
            write(p(UNKNOWN_SUFFIX), codec::encode_pbm(u))?;
        }
        // The new stores (in memory until the index names them).
        let window = Window::new(self.index.window).expect("index window is valid");
        let mut touched = Vec::new();
        let mut stores = self.stores.clone();
        if let Some((l, frame)) = &old_frame {
            stores
                .get_mut(&l.line)
                .ok_or_else(|| Error::bad_store(format!("no store for line {}", l.line)))?
                .remove_labelled(frame)?;
            touched.push(l.line);
        }
        if label.role == Role::Train {
            stores
                .entry(label.line)
                .or_insert_with(|| LabelStore::new(window))
                .add_labelled(f)?;
            touched.push(label.line);
        }
        let before = (self.stores.clone(), self.index.clone());
        self.stores = stores;
        self.index.generation = generation;
        let result = (|| {
            for line in touched {
                self.write_store(line)?;
            }
            match old {
                Some(i) => self.index.labels[i] = label.clone(),
                None => self.index.labels.push(label.clone()),
            }
            self.write_index()
        })();
        if let Err(e) = result {
            (self.stores, self.index) = before;
            self.remove_strays();
            return Err(e);
        }
        self.remove_strays();
        Ok(label)
    }

    /// The labelled frames of `lines` with `role`, read from their files.
    pub fn frames(&self, lines: &[u64], role: Role) -> Result<Vec<LabelledFrame>> {
        self.index
            .labels
            .iter()
            .filter(|l| l.role == role && lines.contains(&l.line))
            .map(|l| self.read(l))
            .collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::frame::BitFrame;

    fn label(frame: &str, line: u64, role: Role, src: &str) -> Label {
        Label {
            frame: frame.into(),
            sha256: "00".repeat(32),
            stem: String::new(),
            line,
            role,
            targets: false,
            pixels: 0,
            generation: 0,
            time: "2026-12-02T10:00:00.000Z".into(),
            source: Source {
                file: format!("{src}.toml"),
                sha256: src.into(),
                by: None,
            },
        }
    }

    fn lf(name: &str, k: usize) -> LabelledFrame {
        LabelledFrame::new(
            name,
            BitFrame::from_fn(24, 16, |x, y| (x * 3 + y * 5 + k).is_multiple_of(7)),
            BitFrame::from_fn(24, 16, |x, y| x > 10 + k && y < 4),
        )
    }

    #[test]
    fn a_replaced_label_is_counted_once_and_survives_reopening() {
        let d = tempfile::tempdir().unwrap();
        let w = Window::new(3).unwrap();
        let limits = DecodeLimits::default();
        let mut set = LabelSet::open(d.path(), w, &limits).unwrap();
        set.put(&lf("a.pbm", 1), label("a.pbm", 1, Role::Train, "c1"))
            .unwrap();
        set.put(&lf("b.pbm", 2), label("b.pbm", 1, Role::Gate, "c2"))
            .unwrap();
        let one = set.store(1).unwrap().clone();
        assert_eq!(one.frames(), 1);
        // A second correction of a.pbm replaces the first.
        set.put(&lf("a.pbm", 3), label("a.pbm", 1, Role::Train, "c3"))
            .unwrap();
        let mut want = LabelStore::new(w);
        want.add_labelled(&lf("a.pbm", 3)).unwrap();
        assert_eq!(set.store(1).unwrap(), &want);
        assert_eq!(set.labels().len(), 2);
        assert!(set.applied("c3") && !set.applied("c1"));
        // Only the files the index names are left: two frames' pairs, one
        // store, the index.
        let count = fs::read_dir(set.dir()).unwrap().count();
        assert_eq!(count, 2 * 2 + 1 + 1);
        // The folder is a data folder.
        let folder = crate::fileio::data::read_folder(set.dir(), &limits, &mut |_, _| {}).unwrap();
        assert_eq!(folder.frames.len(), 2);
        assert!(folder.problems.is_empty());
        // Reopened: the same store, loaded; a damaged store is rebuilt.
        let again = LabelSet::open(d.path(), w, &limits).unwrap();
        assert_eq!(again.store(1).unwrap(), &want);
        let file = &again.index.stores[&1].file;
        fs::write(again.dir().join(file), b"damaged").unwrap();
        let rebuilt = LabelSet::open(d.path(), w, &limits).unwrap();
        assert_eq!(rebuilt.store(1).unwrap(), &want);
        // Files a crash left behind are removed at open.
        fs::write(rebuilt.dir().join("a-g99.pbm"), b"P1 1 1 0").unwrap();
        let _ = LabelSet::open(d.path(), w, &limits).unwrap();
        assert!(!d.path().join(DIR).join("a-g99.pbm").exists());
    }

    #[test]
    fn roles_follow_the_hash_and_changeovers_start_lines() {
        assert_eq!(role_of("0000000000000000ff", 0.3), Role::Gate);
        // 0x4c.. / 2^64 is 0.297; 0x4d.. is 0.301.
        assert_eq!(role_of("4c00000000000000", 0.3), Role::Gate);
        assert_eq!(role_of("4d00000000000000", 0.3), Role::Train);
        assert_eq!(role_of("ffffffffffffffff", 0.9), Role::Train);
        let d = tempfile::tempdir().unwrap();
        assert_eq!(read_lines(d.path()).unwrap().len(), 1);
        let l = changeover(d.path(), "2026-12-02T10:00:00.000Z", Some("denim".into())).unwrap();
        assert_eq!(l.line, 2);
        let lines = read_lines(d.path()).unwrap();
        assert_eq!(lines.len(), 2);
        assert_eq!(lines[1].note.as_deref(), Some("denim"));
    }
}
