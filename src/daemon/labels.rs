//! The operator's labels in the state folder: every applied correction as
//! a labelled frame, the label store of each line, and the lines
//! themselves (what ran between two changeovers).
//!
//! `state/labels/` is a data folder `burlwatch train --data` reads: for
//! each labelled frame `STEM.pbm`, `STEM.mask.pbm` and, when the
//! correction said "don't know here", `STEM.unknown.pbm`. Beside them:
//! - `index.json`: the labelled frames (frame name, its log record's
//!   sha256, the stem of its files, line, role, the correction it came
//!   from), and, for each line, its label store file and the stems the
//!   store holds: the commit point;
//! - `store-line-L-gG.bin`: the label store of line `L`'s training frames,
//!   as of generation `G`.
//!
//! Applying a correction writes the frame's files under a stem carrying a
//! new generation, then the index (atomically); files the index no longer
//! names go after. A crash at any point leaves the index naming complete
//! files; [`LabelSet::open`] removes the rest. A later correction of the
//! same frame replaces the earlier one in the index at once, so a frame is
//! never counted twice.
//!
//! The label stores are brought up to date incrementally, when a retrain
//! needs one ([`LabelSet::store_job`], run off the learner's thread, then
//! [`LabelSet::commit_store`]): the store file is read, the frames replaced
//! or dropped since are taken out, the new ones put in, and the result
//! written under a new generation. Nothing but the frames that changed is
//! read again, and no store stays in memory between retrains: correction
//! intake writes a few small files and the daemon stays small. The files of
//! a replaced frame are kept while a store still counts them.
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
use crate::fileio::durable::{write_atomic, write_atomic_paced};
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
    /// The stems of the labelled frames it counts.
    pub holds: Vec<String>,
    pub frames: u64,
    pub totals: [u64; 2],
}

#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
struct Index {
    generation: u64,
    labels: Vec<Label>,
    /// Each line's store, by line.
    stores: BTreeMap<u64, StoreFile>,
    /// Labels a store still counts after they were replaced: their files
    /// stay until the store is brought up to date.
    #[serde(default)]
    replaced: Vec<Label>,
}

/// What bringing one line's store up to date takes: run
/// [`StoreJob::run`] anywhere (it only reads), then
/// [`LabelSet::commit_store`].
#[derive(Clone, Debug)]
pub struct StoreJob {
    dir: PathBuf,
    line: u64,
    window: Window,
    limits: DecodeLimits,
    base: Option<StoreFile>,
    /// Labels the store counts but should not, and those it should count
    /// but does not.
    take_out: Vec<Label>,
    put_in: Vec<Label>,
    /// The stems the store holds when done.
    holds: Vec<String>,
    generation: u64,
}

/// A store brought up to date, written, not yet named by the index.
#[derive(Debug)]
pub struct UpdatedStore {
    pub line: u64,
    /// The store itself, until someone takes it.
    pub store: Option<LabelStore>,
    file: StoreFile,
}

impl StoreJob {
    /// The window of the store.
    pub fn window(&self) -> Window {
        self.window
    }

    /// Reads the store file (or starts empty when it is missing, damaged
    /// or of another window: then every frame is put in), applies the
    /// changes, and writes the result under a new name.
    pub fn run(self) -> Result<UpdatedStore> {
        let (store, from_file) = self.counted()?;
        // Nothing changed and the file was good: keep it.
        if let (Some(b), true) = (&self.base, from_file) {
            let same = self.take_out.is_empty()
                && self.put_in.is_empty()
                && b.holds == self.holds
                && store.frames() == b.frames
                && store.totals() == b.totals;
            if same {
                return Ok(UpdatedStore {
                    line: self.line,
                    file: b.clone(),
                    store: Some(store),
                });
            }
        }
        let file = format!("store-line-{}-g{}.bin", self.line, self.generation);
        let path = self.dir.join(&file);
        // Synced every 4 MiB as it is written, so the detection log's
        // syncs meanwhile wait for little.
        write_atomic_paced(&path, 4 << 20, &mut |w| store.write_to(w))
            .map_err(|e| Error::from(e).with_path(&path))?;
        Ok(UpdatedStore {
            line: self.line,
            file: StoreFile {
                file,
                holds: self.holds,
                frames: store.frames(),
                totals: store.totals(),
            },
            store: Some(store),
        })
    }

    /// The up-to-date store, computed from the store file and the changes
    /// without writing anything.
    pub fn count(&self) -> Result<LabelStore> {
        Ok(self.counted()?.0)
    }

    /// The store, and whether it was read from the store file.
    fn counted(&self) -> Result<(LabelStore, bool)> {
        let loaded = self.base.as_ref().and_then(|b| {
            let f = fs::File::open(self.dir.join(&b.file)).ok()?;
            let len = f.metadata().ok()?.len();
            let mut r = std::io::BufReader::with_capacity(1 << 16, f);
            let s = LabelStore::read_from(&mut r, len).ok()?;
            (s.window() == self.window && s.frames() == b.frames && s.totals() == b.totals)
                .then_some(s)
        });
        // Taking out what a label added needs its files; when one cannot be
        // read, the store is built afresh from the labels it should hold.
        let loaded = loaded.and_then(|mut s| {
            for l in &self.take_out {
                let f = read_stem(&self.dir, &self.limits, &l.stem, &l.frame).ok()?;
                s.remove_labelled(&f).ok()?;
            }
            Some(s)
        });
        let from_file = loaded.is_some();
        let (mut store, to_add) = match loaded {
            Some(s) => (s, self.put_in.iter().map(|l| l.stem.clone()).collect()),
            // Start afresh: every frame the store should hold.
            None => (LabelStore::new(self.window), self.holds.clone()),
        };
        for stem in &to_add {
            store.add_labelled(&read_stem(&self.dir, &self.limits, stem, stem)?)?;
        }
        Ok((store, from_file))
    }
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

/// The index of the labels folder `dir` (empty when there is none yet).
fn read_index(dir: &Path) -> Result<Index> {
    let path = dir.join(INDEX);
    match fs::read_to_string(&path) {
        Ok(t) => serde_json::from_str(&t).map_err(|e| {
            Error::new(ErrorKind::Data(format!("not a label index: {e}"))).with_path(&path)
        }),
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => Ok(Index::default()),
        Err(e) => Err(Error::from(e).with_path(&path)),
    }
}

/// The labels of a state folder, read without touching anything (for
/// `check` while a daemon owns the folder): every label, in the order
/// applied; none when there is no index yet.
pub fn read_labels(state: &Path) -> Result<Vec<Label>> {
    Ok(read_index(&state.join(DIR))?.labels)
}

/// Reads labelled frames' files (a replaced label's hidden ones too).
#[derive(Clone, Debug)]
pub struct LabelReader {
    dir: PathBuf,
    limits: DecodeLimits,
}

impl LabelReader {
    pub fn read(&self, l: &Label) -> Result<LabelledFrame> {
        read_stem(&self.dir, &self.limits, &l.stem, &l.frame)
    }
}

/// Reads one labelled frame's files by stem; `name` becomes its name.
fn read_stem(dir: &Path, limits: &DecodeLimits, stem: &str, name: &str) -> Result<LabelledFrame> {
    // A label replaced since it was named has its files hidden.
    let hidden = format!(".{}", stem.trim_start_matches('.'));
    let stem = if dir.join(format!("{stem}.pbm")).exists() {
        stem
    } else {
        hidden.as_str()
    };
    let p = |suffix: &str| dir.join(format!("{stem}{suffix}"));
    let frame = crate::fileio::data::read_frame(&p(".pbm"), limits)?;
    let mask = crate::fileio::data::read_mask(&p(MASK_SUFFIX), limits)?;
    let upath = p(UNKNOWN_SUFFIX);
    let unknown = if upath.exists() {
        Some(crate::fileio::data::read_mask(&upath, limits)?)
    } else {
        None
    };
    let f = LabelledFrame {
        unknown,
        ..LabelledFrame::new(name.to_string(), frame, mask)
    };
    if !f.sizes_agree() {
        return Err(Error::new(ErrorKind::Data(
            "the labelled frame's planes differ in size".into(),
        ))
        .with_path(p(".pbm")));
    }
    Ok(f)
}

/// The labels of one state folder.
#[derive(Debug)]
pub struct LabelSet {
    dir: PathBuf,
    index: Index,
    window: Window,
    limits: DecodeLimits,
    /// Store jobs handed out and not yet committed or released, by line:
    /// the store file each will write and the stems it reads are kept,
    /// and a label it counts that is replaced meanwhile is kept (hidden)
    /// as replaced.
    jobs: BTreeMap<u64, (String, Vec<String>)>,
}

impl LabelSet {
    /// Opens (creating) `state/labels` for stores of `window`, and removes
    /// files the index does not name (left by a crash).
    pub fn open(state: &Path, window: Window, limits: &DecodeLimits) -> Result<LabelSet> {
        let dir = state.join(DIR);
        fs::create_dir_all(&dir).map_err(|e| Error::from(e).with_path(&dir))?;
        let set = LabelSet::read_only(state, window, limits)?;
        set.repair_replaced();
        set.remove_strays();
        Ok(set)
    }

    /// The labels of `state` for reading only: nothing is created, moved or
    /// removed (for looking at a folder a daemon owns).
    pub fn read_only(state: &Path, window: Window, limits: &DecodeLimits) -> Result<LabelSet> {
        let dir = state.join(DIR);
        Ok(LabelSet {
            index: read_index(&dir)?,
            dir,
            window,
            limits: limits.clone(),
            jobs: BTreeMap::new(),
        })
    }

    /// A replaced label's files are hidden (a dot before the stem, so a
    /// data-folder reader passes over them) just after the index says so;
    /// a crash between the two is finished here.
    fn repair_replaced(&self) {
        for l in &self.index.replaced {
            let Some(visible) = l.stem.strip_prefix('.') else {
                continue;
            };
            for suffix in [".pbm", MASK_SUFFIX, UNKNOWN_SUFFIX] {
                let from = self.dir.join(format!("{visible}{suffix}"));
                let to = self.dir.join(format!("{}{suffix}", l.stem));
                if from.exists() && !to.exists() {
                    let _ = fs::rename(&from, &to);
                }
            }
        }
    }

    /// Removes files in the folder that the index does not name.
    fn remove_strays(&self) {
        let mut keep: std::collections::HashSet<String> = [INDEX.to_string()].into();
        let mut stems: Vec<&str> = self
            .index
            .labels
            .iter()
            .chain(&self.index.replaced)
            .map(|l| l.stem.as_str())
            .collect();
        for (file, holds) in self.jobs.values() {
            keep.insert(file.clone());
            keep.insert(format!(".{file}.tmp"));
            stems.extend(holds.iter().map(String::as_str));
        }
        for stem in stems {
            // A stem's files, visible or hidden (replaced).
            let visible = stem.trim_start_matches('.');
            for suffix in [".pbm", MASK_SUFFIX, UNKNOWN_SUFFIX] {
                keep.insert(format!("{visible}{suffix}"));
                keep.insert(format!(".{visible}{suffix}"));
            }
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

    /// The folder (a data folder `train --data` reads).
    pub fn dir(&self) -> &Path {
        &self.dir
    }

    /// Whether a store counts `stem` (committed, or a job handed out).
    fn held(&self, stem: &str) -> bool {
        let visible = stem.trim_start_matches('.');
        let same = |h: &String| h.trim_start_matches('.') == visible;
        self.index.stores.values().any(|s| s.holds.iter().any(same))
            || self.jobs.values().any(|(_, holds)| holds.iter().any(same))
    }

    /// The label the correction with these bytes' hash made, if it was
    /// applied and is still in force.
    pub fn applied(&self, correction_sha256: &str) -> Option<&Label> {
        self.index
            .labels
            .iter()
            .find(|l| l.source.sha256 == correction_sha256)
    }

    /// Reads one labelled frame's files.
    pub fn read(&self, l: &Label) -> Result<LabelledFrame> {
        read_stem(&self.dir, &self.limits, &l.stem, &l.frame)
    }

    /// Adds (or replaces) the labels of one archived frame. `label` says
    /// what it is (its stem, generation, targets and pixels are set here).
    /// Crash-safe: see the module docs.
    pub fn put(&mut self, f: &LabelledFrame, mut label: Label) -> Result<Label> {
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
        let before = self.index.clone();
        // The same archived frame (name and content): replaced. Another
        // frame that reused the name is another label.
        let old = self
            .index
            .labels
            .iter()
            .position(|l| l.frame == label.frame && l.sha256 == label.sha256);
        let mut hide = None;
        if let Some(i) = old {
            let mut gone = self.index.labels.remove(i);
            // A store still counts it: its files stay (hidden) until the
            // store is brought up to date.
            if self.held(&gone.stem) {
                let visible = gone.stem.clone();
                gone.stem = format!(".{visible}");
                hide = Some(visible);
                self.index.replaced.push(gone);
            }
        }
        self.index.labels.push(label.clone());
        self.index.generation = generation;
        if let Err(e) = self.write_index() {
            self.index = before;
            self.remove_strays();
            return Err(e);
        }
        if let Some(visible) = hide {
            for suffix in [".pbm", MASK_SUFFIX, UNKNOWN_SUFFIX] {
                let from = self.dir.join(format!("{visible}{suffix}"));
                if from.exists() {
                    let _ = fs::rename(&from, self.dir.join(format!(".{visible}{suffix}")));
                }
            }
        }
        self.remove_strays();
        Ok(label)
    }

    /// The labels of `lines` with `role`, in the order applied.
    pub fn labels_of(&self, lines: &[u64], role: Role) -> Vec<Label> {
        self.index
            .labels
            .iter()
            .filter(|l| l.role == role && lines.contains(&l.line))
            .cloned()
            .collect()
    }

    /// What reads the labels' files, for use off the owner's thread.
    pub fn reader(&self) -> LabelReader {
        LabelReader {
            dir: self.dir.clone(),
            limits: self.limits.clone(),
        }
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

    /// What bringing `line`'s store up to date with its training frames
    /// takes (nothing is read or written here).
    /// Its files and the labels it counts are kept until
    /// [`LabelSet::commit_store`] or [`LabelSet::release_jobs`].
    pub fn store_job(&mut self, line: u64) -> StoreJob {
        let base = self.index.stores.get(&line).cloned();
        let want: Vec<&Label> = self
            .index
            .labels
            .iter()
            .filter(|l| l.line == line && l.role == Role::Train)
            .collect();
        let holds: Vec<String> = want.iter().map(|l| l.stem.clone()).collect();
        let had: Vec<String> = base.as_ref().map(|b| b.holds.clone()).unwrap_or_default();
        let known = |stem: &String| {
            self.index
                .labels
                .iter()
                .chain(&self.index.replaced)
                .find(|l| l.stem.trim_start_matches('.') == stem.trim_start_matches('.'))
                .cloned()
        };
        let file = format!("store-line-{line}-g{}.bin", self.index.generation);
        let mut kept: Vec<String> = holds.clone();
        kept.extend(had.iter().cloned());
        self.jobs.insert(line, (file, kept));
        StoreJob {
            dir: self.dir.clone(),
            line,
            window: self.window,
            limits: self.limits.clone(),
            take_out: had
                .iter()
                .filter(|s| !holds.contains(s))
                .filter_map(known)
                .collect(),
            put_in: want
                .iter()
                .filter(|l| !had.contains(&l.stem))
                .map(|l| (*l).clone())
                .collect(),
            holds,
            base,
            generation: self.index.generation,
        }
    }

    /// Names an updated store in the index (its old file, and the files of
    /// replaced frames no store counts any more, go).
    pub fn commit_store(&mut self, updated: &UpdatedStore) -> Result<()> {
        let before = self.index.clone();
        let mut file = updated.file.clone();
        // A label the job counted that was replaced meanwhile is counted
        // under its hidden stem now.
        for h in file.holds.iter_mut() {
            let current = self.index.labels.iter().any(|l| &l.stem == h);
            let hidden = format!(".{}", h.trim_start_matches('.'));
            if !current && self.index.replaced.iter().any(|l| l.stem == hidden) {
                *h = hidden;
            }
        }
        self.index.stores.insert(updated.line, file);
        self.jobs.remove(&updated.line);
        self.forget_uncounted();
        if let Err(e) = self.write_index() {
            self.index = before;
            return Err(e);
        }
        self.remove_strays();
        Ok(())
    }

    /// Store jobs that will not be committed (a retrain that failed or was
    /// stopped): their files are no longer kept.
    pub fn release_jobs(&mut self) {
        self.jobs.clear();
        let before = self.index.replaced.len();
        self.forget_uncounted();
        if self.index.replaced.len() != before {
            let _ = self.write_index();
        }
        self.remove_strays();
    }

    /// Replaced labels no store counts any more are forgotten.
    fn forget_uncounted(&mut self) {
        let replaced = std::mem::take(&mut self.index.replaced);
        self.index.replaced = replaced
            .into_iter()
            .filter(|l| self.held(&l.stem))
            .collect();
    }

    /// `line`'s store brought up to date here and now (the offline
    /// commands and tests; the daemon runs the job on its retrain thread).
    pub fn store(&mut self, line: u64) -> Result<LabelStore> {
        let mut updated = self.store_job(line).run()?;
        self.commit_store(&updated)?;
        Ok(updated.store.take().expect("just counted"))
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
        let one = set.store(1).unwrap();
        assert_eq!(one.frames(), 1);
        // A second correction of a.pbm replaces the first; the store still
        // counts the first until it is brought up to date.
        set.put(&lf("a.pbm", 3), label("a.pbm", 1, Role::Train, "c3"))
            .unwrap();
        assert_eq!(set.index.replaced.len(), 1);
        let mut want = LabelStore::new(w);
        want.add_labelled(&lf("a.pbm", 3)).unwrap();
        assert_eq!(set.store(1).unwrap(), want);
        assert!(set.index.replaced.is_empty());
        assert_eq!(set.labels().len(), 2);
        assert!(set.applied("c3").is_some() && set.applied("c1").is_none());
        // Only the files the index names are left: two frames' pairs, one
        // store, the index.
        let count = fs::read_dir(set.dir()).unwrap().count();
        assert_eq!(count, 2 * 2 + 1 + 1);
        // The folder is a data folder.
        let folder = crate::fileio::data::read_folder(set.dir(), &limits, &mut |_, _| {}).unwrap();
        assert_eq!(folder.frames.len(), 2);
        assert!(folder.problems.is_empty());
        // Reopened: the same store, read back; a damaged one is rebuilt.
        let mut again = LabelSet::open(d.path(), w, &limits).unwrap();
        let job = again.store_job(1);
        assert!(job.put_in.is_empty() && job.take_out.is_empty());
        assert_eq!(again.store(1).unwrap(), want);
        let file = again.index.stores[&1].file.clone();
        fs::write(again.dir().join(&file), b"damaged").unwrap();
        let mut rebuilt = LabelSet::open(d.path(), w, &limits).unwrap();
        assert_eq!(rebuilt.store(1).unwrap(), want);
        // Files a crash left behind are removed at open.
        fs::write(rebuilt.dir().join("a-g99.pbm"), b"P1 1 1 0").unwrap();
        let _ = LabelSet::open(d.path(), w, &limits).unwrap();
        assert!(!d.path().join(DIR).join("a-g99.pbm").exists());
    }

    #[test]
    fn a_label_replaced_while_its_store_is_brought_up_to_date_is_counted_once() {
        let d = tempfile::tempdir().unwrap();
        let w = Window::new(3).unwrap();
        let limits = DecodeLimits::default();
        let mut set = LabelSet::open(d.path(), w, &limits).unwrap();
        set.put(&lf("a.pbm", 1), label("a.pbm", 1, Role::Train, "c1"))
            .unwrap();
        set.put(&lf("b.pbm", 2), label("b.pbm", 1, Role::Train, "c2"))
            .unwrap();
        // A retrain's job counts a and b; a is corrected again meanwhile.
        let updated = set.store_job(1).run().unwrap();
        set.put(&lf("a.pbm", 5), label("a.pbm", 1, Role::Train, "c3"))
            .unwrap();
        assert!(
            set.dir().join(&updated.file.file).exists(),
            "the job's store kept"
        );
        set.commit_store(&updated).unwrap();
        // The next store takes the old a out and puts the new one in.
        let mut want = LabelStore::new(w);
        want.add_labelled(&lf("a.pbm", 5)).unwrap();
        want.add_labelled(&lf("b.pbm", 2)).unwrap();
        assert_eq!(set.store(1).unwrap(), want);
        assert!(set.index.replaced.is_empty());
        // Meanwhile and after, a data-folder reader sees the labels now in
        // force only.
        let folder = crate::fileio::data::read_folder(set.dir(), &limits, &mut |_, _| {}).unwrap();
        assert_eq!(folder.frames.len(), 2);
        // A job that is let go keeps nothing.
        let _ = set.store_job(1);
        set.release_jobs();
        assert!(set.jobs.is_empty());
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
