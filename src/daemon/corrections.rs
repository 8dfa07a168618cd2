//! Applying the operator's correction files: each one found in the
//! corrections folder is checked against the archive and the detection
//! log, turned into a labelled frame ([`crate::correct`]), added to the
//! labels ([`super::labels::LabelSet::put`]), and moved to
//! `corrections/applied/`; one that cannot be applied moves to
//! `corrections/rejected/` with `NAME.reason.txt` beside it, and nothing
//! else changes. A mask file a correction names moves with it.
//!
//! [`prepare`] does every check and builds the labels without writing
//! anything: `burlwatch mark` runs it before it writes a correction, so
//! what `mark` accepts the daemon applies.
//!
//! Exactly once: the labels' index remembers the SHA-256 of the correction
//! each labelled frame came from, so a correction met again after a crash
//! between the index write and the move is only moved.

use std::fs;
use std::io::{BufRead, BufReader};
use std::path::{Path, PathBuf};

use tracing::{info, warn};

use super::labels::{read_lines, role_key, role_of, Label, Source};
use super::learning::Learning;
use super::registry::Registry;
use crate::codec;
use crate::config::{Folders, LiveConfig};
use crate::correct::{check_name, Correction};
use crate::detect::compile::Scratch;
use crate::detect::Detector;
use crate::error::{Error, ErrorKind, Result};
use crate::fileio::durable::{move_into, read_bounded_in_place, write_atomic};
use crate::frame::LabelledFrame;
use crate::record::{sha256_hex, FrameRecord};

/// Largest correction file read.
pub const MAX_CORRECTION_BYTES: u64 = 1 << 20;
/// Where applied and refused corrections go, inside the corrections folder.
pub const APPLIED: &str = "applied";
pub const REJECTED: &str = "rejected";

fn bad(msg: impl Into<String>) -> Error {
    Error::new(ErrorKind::Correction(msg.into()))
}

/// A checked correction and the labelled frame it makes.
#[derive(Debug)]
pub struct Prepared {
    pub correction: Correction,
    pub record: FrameRecord,
    pub labelled: LabelledFrame,
    /// The mask file the correction names, resolved beside it.
    pub mask_file: Option<PathBuf>,
}

/// The record of `frame` with `sha256` (any hash when `None`) in the
/// detection log: the latest such record of the newest file holding one.
/// Each file is read through once, line by line; only lines holding the
/// hash (or the name) are parsed.
pub fn find_record(logs: &Path, frame: &str, sha256: Option<&str>) -> Result<Option<FrameRecord>> {
    let needle = match sha256 {
        Some(h) => h.to_string(),
        None => serde_json::to_string(frame).expect("a string serialises"),
    };
    let mut files: Vec<PathBuf> = match fs::read_dir(logs) {
        Ok(rd) => rd
            .flatten()
            .map(|e| e.path())
            .filter(|p| {
                p.file_name()
                    .and_then(|n| n.to_str())
                    .is_some_and(|n| n.starts_with("detections") && n.ends_with(".jsonl"))
            })
            .collect(),
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(None),
        Err(e) => return Err(Error::from(e).with_path(logs)),
    };
    // `detections.jsonl` is the newest; rotated names sort by time.
    files.sort();
    let mut found = None;
    let order: Vec<&PathBuf> = {
        let mut v: Vec<&PathBuf> = files.iter().collect();
        if let Some(cur) = v.iter().position(|p| p.ends_with("detections.jsonl")) {
            let c = v.remove(cur);
            v.push(c);
        }
        v.reverse();
        v
    };
    for path in order {
        let file = fs::File::open(path).map_err(|e| Error::from(e).with_path(path))?;
        let mut line = String::new();
        let mut reader = BufReader::with_capacity(1 << 16, file);
        loop {
            line.clear();
            match reader.read_line(&mut line) {
                Ok(0) => break,
                Ok(_) => {}
                Err(e) if e.kind() == std::io::ErrorKind::InvalidData => continue,
                Err(e) => return Err(Error::from(e).with_path(path)),
            }
            if !line.contains(&needle) {
                continue;
            }
            if let Ok(r) = serde_json::from_str::<FrameRecord>(line.trim_end()) {
                if r.frame == frame && sha256.is_none_or(|h| r.sha256 == h) {
                    // The latest record of the frame wins.
                    found = Some(r);
                }
            }
        }
        if found.is_some() {
            return Ok(found);
        }
    }
    Ok(None)
}

/// The archived file of `frame` whose bytes hash to `sha256`: the archive
/// keeps a second frame of the same name as `STEM-2.EXT`, `STEM-3.EXT`, ...
pub fn find_archived(
    archive: &Path,
    frame: &str,
    sha256: &str,
    live: &LiveConfig,
) -> Result<(PathBuf, Vec<u8>)> {
    let (stem, ext) = match frame.rsplit_once('.') {
        Some((s, e)) if !s.is_empty() => (s, format!(".{e}")),
        _ => (frame, String::new()),
    };
    // The archive keeps a second frame of a name as STEM-2.EXT, ...: every
    // such file is looked at (retention may have deleted the first).
    let of_frame = |name: &str| -> bool {
        name == frame
            || name
                .strip_prefix(stem)
                .and_then(|r| r.strip_prefix('-'))
                .and_then(|r| r.strip_suffix(ext.as_str()))
                .is_some_and(|k| !k.is_empty() && k.bytes().all(|b| b.is_ascii_digit()))
    };
    let mut names: Vec<String> = match fs::read_dir(archive) {
        Ok(rd) => rd
            .flatten()
            .filter(|e| e.file_type().is_ok_and(|t| t.is_file()))
            .map(|e| e.file_name().to_string_lossy().into_owned())
            .filter(|n| of_frame(n))
            .collect(),
        Err(e) => return Err(Error::from(e).with_path(archive)),
    };
    names.sort();
    let mut seen_other = false;
    for name in names {
        let path = archive.join(&name);
        let read = crate::fileio::data::read_frame_file_in_place(&path, &live.limits)
            .map_err(|(e, _)| e)?;
        if sha256_hex(&read.bytes) == sha256 {
            return Ok((path, read.bytes));
        }
        seen_other = true;
    }
    Err(bad(if seen_other {
        format!(
            "frame {frame} in the archive is not the version logged (its content hash differs from {sha256})"
        )
    } else {
        format!("frame {frame} is no longer in the archive (archive retention may have deleted it)")
    }))
}

/// Whether `d` runs the model that made `record`.
fn made(d: &Detector, record: &FrameRecord) -> bool {
    d.version() == record.model_version
        && (record.model_hash.is_empty() || d.hash() == record.model_hash)
}

/// The detector of the model that made `record`, from the registry (when
/// it is not the one running).
pub fn record_detector(
    record: &FrameRecord,
    registry: &Registry,
    live: &LiveConfig,
) -> Result<Detector> {
    let entries = registry.entries()?;
    let entry = entries
        .iter()
        .filter(|e| e.version == record.model_version)
        .find(|e| record.model_hash.is_empty() || e.hash == record.model_hash)
        .ok_or_else(|| {
            bad(format!(
                "the model that made this record (version {} {}) is not in the registry; \
                 say the truth with `only` regions or a `mask` instead",
                record.model_version, record.model_hash
            ))
        })?;
    super::start::detector(registry.model(entry)?, live)
}

/// Checks a correction's text against the frame it names and builds its
/// labelled frame, writing nothing. `dir` is the folder a mask file it
/// names lies in.
pub fn prepare(
    text: &[u8],
    dir: &Path,
    folders: &Folders,
    live: &LiveConfig,
    registry: &Registry,
    running: Option<&Detector>,
) -> Result<Prepared> {
    let text = std::str::from_utf8(text).map_err(|_| bad("the file is not UTF-8 text"))?;
    let c = Correction::parse(text)?;
    c.check_statements()?;
    check_name(&c.frame)?;
    let Some(record) = find_record(&folders.logs, &c.frame, Some(&c.sha256))? else {
        if folders.rejected.join(&c.frame).exists() {
            return Err(bad(format!(
                "frame {} was rejected (see {}), so it has no detection to correct",
                c.frame,
                folders
                    .rejected
                    .join(format!("{}.reason.txt", c.frame))
                    .display()
            )));
        }
        return Err(bad(format!(
            "no record of frame {} with sha256 {} in the detection log",
            c.frame, c.sha256
        )));
    };
    c.check_record(&record)?;
    let (_, bytes) = find_archived(&folders.archive, &c.frame, &c.sha256, live)?;
    let frame = codec::decode(&bytes, &live.limits)?;
    let detected = if c.needs_detection() {
        // The running detector when it made the record (no compiling).
        let compiled;
        let d = match running.filter(|d| made(d, &record)) {
            Some(d) => d,
            None => {
                compiled = record_detector(&record, registry, live)?;
                &compiled
            }
        };
        let r = d.detect(&frame, &mut Scratch::default());
        let boxes = |v: &[crate::record::ObjectRecord]| -> Vec<[u32; 4]> {
            v.iter().map(|o| o.bbox).collect()
        };
        let now: Vec<[u32; 4]> = r
            .objects
            .iter()
            .map(|o| [o.bbox.x0, o.bbox.y0, o.bbox.x1, o.bbox.y1])
            .collect();
        if now != boxes(&record.objects) {
            return Err(bad(format!(
                "the model of the record (version {}) no longer finds the objects the record lists \
                 (detection settings changed since?); say the truth with `only` regions or a `mask` instead",
                record.model_version
            )));
        }
        Some((r.mask, d.settings().grouping.merge_distance))
    } else {
        None
    };
    let (mask_file, truth) = match &c.mask {
        Some(m) => {
            check_name(m).map_err(|e| bad(format!("mask: {}", e.kind())))?;
            let p = dir.join(m);
            match fs::symlink_metadata(&p) {
                Ok(meta) if meta.file_type().is_file() => {}
                Ok(_) => {
                    return Err(bad(format!(
                        "mask {m} is a symbolic link or not a plain file; copy the mask itself beside the correction"
                    )))
                }
                Err(_) => {
                    return Err(bad(format!(
                        "mask {m} is not beside the correction in {}",
                        dir.display()
                    )))
                }
            }
            let t = crate::fileio::data::read_mask(&p, &live.limits)?;
            if !t.same_size(&frame) {
                return Err(bad(format!(
                    "mask {m} is {}x{} but frame {} is {}x{}",
                    t.width(),
                    t.height(),
                    c.frame,
                    frame.width(),
                    frame.height()
                )));
            }
            (Some(p), Some(t))
        }
        None => (None, None),
    };
    let labelled = c.labels(
        &frame,
        detected.as_ref().map(|d| &d.0),
        detected.as_ref().map_or(0, |d| d.1),
        truth.as_ref(),
    )?;
    Ok(Prepared {
        correction: c,
        record,
        labelled,
        mask_file,
    })
}

/// What became of one correction file.
#[derive(Debug)]
pub enum Applied {
    /// Added to the labels (or found already added) and moved.
    Applied(Label),
    /// Added to the labels now: with the hash of the model that made the
    /// record and whether the operator reported an error in it (for the
    /// error-drift monitor).
    New {
        label: Label,
        model_hash: String,
        error: bool,
    },
    /// Moved to `rejected/` with this reason.
    Rejected(String),
    /// Gone before it was read.
    Gone,
    /// Left where it is for a passing reason (the log or archive could not
    /// be read, the labels could not be stored: a full disk...); read again
    /// at a later listing. `what` names the operation for the messages.
    Waiting { what: &'static str, error: String },
}

/// What [`Applied::Waiting`] names when the log or the archive could not
/// be read for the checks.
pub const CHECKING: &str = "checking corrections against the log and archive";
/// ... and when the labels could not be stored.
pub const STORING: &str = "storing corrections in the state folder";

/// Applies one correction file (see the module docs).
pub fn apply(
    path: &Path,
    learning: &mut Learning,
    live: &LiveConfig,
    running: Option<&Detector>,
) -> Applied {
    let name = path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    let dir = path.parent().unwrap_or(Path::new(".")).to_path_buf();
    let bytes = match read_bounded_in_place(path, MAX_CORRECTION_BYTES, &|| "a correction".into()) {
        Ok(b) => b.bytes,
        Err((e, _)) => {
            return match e.kind() {
                ErrorKind::Io(io) if io.kind() == std::io::ErrorKind::NotFound => Applied::Gone,
                _ => reject(path, &dir, None, &format!("{name}: {}", e.kind())),
            }
        }
    };
    let hash = sha256_hex(&bytes);
    // The mask file a correction names goes wherever the correction goes.
    let mask = Correction::parse(std::str::from_utf8(&bytes).unwrap_or(""))
        .ok()
        .and_then(|c| c.mask)
        .filter(|m| check_name(m).is_ok())
        .map(|m| dir.join(m));
    if let Some(label) = learning.labels.applied(&hash).cloned() {
        move_done(path, &dir, mask.as_deref(), APPLIED);
        return Applied::Applied(label);
    }
    let folders = learning.folders.clone();
    let prepared = match prepare(&bytes, &dir, &folders, live, &learning.registry, running) {
        Ok(p) => p,
        // A passing failure (the log or archive could not be read): the
        // correction stays for the next listing.
        Err(e) if matches!(e.kind(), ErrorKind::Io(_)) => {
            return Applied::Waiting {
                what: CHECKING,
                error: format!("{name}: {e}"),
            };
        }
        Err(e) => {
            return reject(
                path,
                &dir,
                mask.as_deref(),
                &format!("{name}: {}", e.kind()),
            );
        }
    };
    let lines = match read_lines(&folders.state) {
        Ok(l) => l,
        Err(e) => {
            return Applied::Waiting {
                what: STORING,
                error: format!("{name}: cannot read the lines: {e}"),
            };
        }
    };
    let label = Label {
        frame: prepared.record.frame.clone(),
        sha256: prepared.record.sha256.clone(),
        stem: String::new(),
        // The line a label belongs to is the one running when it was
        // applied: the operator records a changeover when the new fabric
        // shows, often after its first frames were detected.
        line: lines.last().map_or(1, |l| l.line),
        role: role_of(&role_key(&prepared.labelled.frame), live.retrain.gate_share),
        targets: false,
        pixels: 0,
        generation: 0,
        time: crate::record::rfc3339(std::time::SystemTime::now()),
        source: Source {
            file: name.clone(),
            sha256: hash,
            by: prepared.correction.by.clone(),
        },
    };
    match learning.labels.put(&prepared.labelled, label) {
        Ok(label) => {
            info!(correction = %name, frame = %label.frame, line = label.line, role = ?label.role, "correction applied");
            move_done(path, &dir, prepared.mask_file.as_deref(), APPLIED);
            Applied::New {
                error: prepared
                    .correction
                    .reports_error(&prepared.record, &prepared.labelled),
                model_hash: prepared.record.model_hash.clone(),
                label,
            }
        }
        // The labels could not be written (a full disk...): the file stays
        // for the next listing.
        Err(e) => Applied::Waiting {
            what: STORING,
            error: format!("{name}: {e}"),
        },
    }
}

/// Refuses the correction files in `dir` that are symbolic links (the
/// intake passes over them, as over every link): each moves to
/// `rejected/` with its reason. Returns how many.
pub fn reject_links(dir: &Path) -> usize {
    let Ok(rd) = fs::read_dir(dir) else {
        return 0;
    };
    let mut n = 0;
    for e in rd.flatten() {
        let name = e.file_name().to_string_lossy().into_owned();
        let wanted = super::intake::is_frame_name(&name, &["toml".to_string()]);
        if wanted && e.file_type().is_ok_and(|t| t.is_symlink()) {
            reject(
                &e.path(),
                dir,
                None,
                &format!("{name}: is a symbolic link; a correction must be a plain file in the corrections folder"),
            );
            n += 1;
        }
    }
    n
}

/// Moves a correction (and its mask file) into `dir/sub`.
fn move_done(path: &Path, dir: &Path, mask: Option<&Path>, sub: &str) -> Option<PathBuf> {
    let to = dir.join(sub);
    if let Err(e) = fs::create_dir_all(&to) {
        warn!(folder = %to.display(), "cannot create: {e}");
        return None;
    }
    if let Some(m) = mask.filter(|m| m.is_file()) {
        if let Err(e) = move_into(m, &to) {
            warn!(file = %m.display(), "cannot move: {e}");
        }
    }
    match move_into(path, &to) {
        Ok(p) => Some(p),
        Err(e) => {
            warn!(file = %path.display(), "cannot move: {e}");
            None
        }
    }
}

fn reject(path: &Path, dir: &Path, mask: Option<&Path>, reason: &str) -> Applied {
    warn!("correction rejected: {reason}");
    if let Some(target) = move_done(path, dir, mask, REJECTED) {
        let name = target
            .file_name()
            .map(|n| n.to_string_lossy().into_owned())
            .unwrap_or_default();
        let text = format!(
            "{}\n{reason}\n",
            crate::record::rfc3339(std::time::SystemTime::now())
        );
        let rpath = dir.join(REJECTED).join(format!("{name}.reason.txt"));
        if let Err(e) = write_atomic(&rpath, text.as_bytes()) {
            warn!(file = %rpath.display(), "cannot write: {e}");
        }
    }
    Applied::Rejected(reason.to_string())
}
