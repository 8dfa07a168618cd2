//! Labelled data folders and frame files: the library's only file access.
//!
//! A data folder holds frames `NAME.pbm` or `NAME.png` and their masks
//! `NAME.mask.pbm` (set = target pixel), and, optionally, an unknown-pixel
//! plane `NAME.unknown.pbm` (set = label not known: left out of training
//! and scoring; the daemon writes one for a correction that says "don't
//! know here"). Files whose names start with a dot and files of other
//! types are ignored; subfolders are not read.
//!
//! Design decision: one bad file never stops the rest. Reading a folder
//! returns the good pairs *and* one error per bad file or pair (naming the
//! file and the problem); the caller decides whether problems are fatal
//! (`train` without `--skip-bad`) or warnings. Pairs come back sorted by
//! name so every command sees the same order on every machine.

use std::collections::BTreeMap;
use std::fs;
use std::path::{Path, PathBuf};

use crate::codec::{self, DecodeLimits};
use crate::error::{Error, ErrorKind, Result};
use crate::frame::{BitFrame, LabelledFrame};

/// Suffix of mask files.
pub const MASK_SUFFIX: &str = ".mask.pbm";
/// Suffix of the optional unknown-pixel planes.
pub const UNKNOWN_SUFFIX: &str = ".unknown.pbm";

/// Whether a file name is a label plane (a mask or an unknown-pixel
/// plane) rather than a frame.
pub fn is_label_plane(name: &str) -> bool {
    name.ends_with(MASK_SUFFIX) || name.ends_with(UNKNOWN_SUFFIX)
}

/// Largest file read, in bytes, for the given limits: a plain PBM of the
/// largest frame with one separator per pixel, plus room for comments.
pub fn max_file_bytes(limits: &DecodeLimits) -> u64 {
    (limits.max_width as u64)
        .saturating_mul(limits.max_height as u64)
        .saturating_mul(2)
        .saturating_add(1 << 20)
}

/// Reads and decodes one frame file.
pub fn read_frame(path: &Path, limits: &DecodeLimits) -> Result<BitFrame> {
    let bytes = read_bounded(path, limits)?;
    codec::decode(&bytes, limits).map_err(|e| e.with_path(path))
}

/// Reads a mask file, which must be PBM whatever its name says.
pub fn read_mask(path: &Path, limits: &DecodeLimits) -> Result<BitFrame> {
    let bytes = read_bounded(path, limits)?;
    match codec::sniff(&bytes) {
        Ok(codec::Format::Png) => Err(Error::new(ErrorKind::Data(
            "mask holds PNG data; masks must be PBM".into(),
        ))
        .with_path(path)),
        _ => codec::decode_pbm(&bytes, limits).map_err(|e| e.with_path(path)),
    }
}

/// Reads a whole file, refusing empty files and files over
/// [`max_file_bytes`] (counted as read, so a growing file is bounded too).
pub fn read_bounded(path: &Path, limits: &DecodeLimits) -> Result<Vec<u8>> {
    read_frame_file(path, limits)
        .map(|f| f.bytes)
        .map_err(|(e, _)| e)
}

/// [`read_bounded`] with the stamp of the version read, and the stamp on
/// failure when the file could be opened (what the daemon needs to tell
/// versions apart): the one bounded frame reader.
pub fn read_frame_file(
    path: &Path,
    limits: &DecodeLimits,
) -> std::result::Result<super::durable::FileBytes, super::durable::ReadFailure> {
    super::durable::read_bounded(path, max_file_bytes(limits), &|| fits(limits))
}

/// [`read_frame_file`] of a frame the daemon found in its inbox or
/// archive: a symbolic link is refused, never followed.
pub fn read_frame_file_in_place(
    path: &Path,
    limits: &DecodeLimits,
) -> std::result::Result<super::durable::FileBytes, super::durable::ReadFailure> {
    super::durable::read_bounded_in_place(path, max_file_bytes(limits), &|| fits(limits))
}

/// What a frame file's size limit is for, in an error.
fn fits(limits: &DecodeLimits) -> String {
    format!(
        "a frame of at most {}x{}",
        limits.max_width, limits.max_height
    )
}

/// What kind of file a name denotes in a data folder.
enum Role {
    Frame(String),
    Mask(String),
    Unknown(String),
    /// A mask in a format masks may not use.
    BadMask(String),
    Other,
}

fn role(name: &str) -> Role {
    if name.starts_with('.') {
        return Role::Other;
    }
    if let Some(stem) = name.strip_suffix(MASK_SUFFIX) {
        return Role::Mask(stem.to_string());
    }
    if let Some(stem) = name.strip_suffix(UNKNOWN_SUFFIX) {
        return Role::Unknown(stem.to_string());
    }
    if let Some(stem) = name.strip_suffix(".mask.png") {
        return Role::BadMask(stem.to_string());
    }
    for ext in [".pbm", ".png"] {
        if let Some(stem) = name.strip_suffix(ext) {
            if !stem.is_empty() {
                return Role::Frame(stem.to_string());
            }
        }
    }
    Role::Other
}

/// The good labelled frames of a folder and one error per bad file.
pub struct Folder {
    pub frames: Vec<LabelledFrame>,
    pub problems: Vec<Error>,
}

/// A frame file and its mask file, not yet read.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Pair {
    /// The shared stem `NAME`.
    pub name: String,
    pub frame: PathBuf,
    pub mask: PathBuf,
    /// The unknown-pixel plane, when there is one.
    pub unknown: Option<PathBuf>,
}

/// Lists the frame/mask pairs of a data folder without decoding them, and
/// one error per file that cannot be paired.
pub fn list_pairs(dir: &Path) -> Result<(Vec<Pair>, Vec<Error>)> {
    let rd = fs::read_dir(dir).map_err(|e| Error::from(e).with_path(dir))?;
    let mut frames: BTreeMap<String, Vec<PathBuf>> = BTreeMap::new();
    let mut masks: BTreeMap<String, PathBuf> = BTreeMap::new();
    let mut unknowns: BTreeMap<String, PathBuf> = BTreeMap::new();
    let mut problems = Vec::new();
    for entry in rd {
        let entry = entry.map_err(|e| Error::from(e).with_path(dir))?;
        let path = entry.path();
        let Ok(ft) = entry.file_type() else { continue };
        if !ft.is_file() && !ft.is_symlink() {
            continue;
        }
        let Some(name) = path.file_name().and_then(|n| n.to_str()) else {
            problems.push(
                Error::new(ErrorKind::Data("file name is not valid UTF-8".into())).with_path(&path),
            );
            continue;
        };
        match role(name) {
            Role::Frame(stem) => frames.entry(stem).or_default().push(path.clone()),
            Role::Mask(stem) => {
                masks.insert(stem, path.clone());
            }
            Role::Unknown(stem) => {
                unknowns.insert(stem, path.clone());
            }
            Role::BadMask(stem) => problems.push(
                Error::new(ErrorKind::Data(format!(
                    "masks must be PBM: rename or convert it to {stem}{MASK_SUFFIX}"
                )))
                .with_path(&path),
            ),
            Role::Other => {}
        }
    }
    let mut pairs = Vec::new();
    for (stem, paths) in frames {
        let mask = masks.remove(&stem);
        if paths.len() > 1 {
            problems.push(
                Error::new(ErrorKind::Data(format!(
                    "frame {stem:?} exists as both {}",
                    paths
                        .iter()
                        .map(|p| p.display().to_string())
                        .collect::<Vec<_>>()
                        .join(" and ")
                )))
                .with_path(&paths[0]),
            );
            continue;
        }
        match mask {
            Some(m) => pairs.push(Pair {
                unknown: unknowns.remove(&stem),
                name: stem,
                frame: paths[0].clone(),
                mask: m,
            }),
            None => problems.push(
                Error::new(ErrorKind::Data(format!(
                    "no mask: expected {stem}{MASK_SUFFIX} beside it"
                )))
                .with_path(&paths[0]),
            ),
        }
    }
    for (stem, m) in masks {
        problems.push(
            Error::new(ErrorKind::Data(format!(
                "mask without a frame: no {stem}.pbm or {stem}.png beside it"
            )))
            .with_path(&m),
        );
    }
    for (stem, u) in unknowns {
        problems.push(
            Error::new(ErrorKind::Data(format!(
                "unknown-pixel plane without a labelled frame: no {stem}.pbm with {stem}{MASK_SUFFIX} beside it"
            )))
            .with_path(&u),
        );
    }
    Ok((pairs, problems))
}

/// Reads and decodes every pair of a data folder. `progress(done, total)` is
/// called as pairs are read. Fails only if the folder itself is unreadable.
pub fn read_folder(
    dir: &Path,
    limits: &DecodeLimits,
    progress: &mut dyn FnMut(usize, usize),
) -> Result<Folder> {
    let (pairs, mut problems) = list_pairs(dir)?;
    let mut frames = Vec::with_capacity(pairs.len());
    let total = pairs.len();
    for (
        k,
        Pair {
            name,
            frame: fpath,
            mask: mpath,
            unknown: upath,
        },
    ) in pairs.into_iter().enumerate()
    {
        progress(k, total);
        let frame = read_frame(&fpath, limits);
        let mask = read_mask(&mpath, limits);
        let frame = match (frame, mask) {
            (Err(e), Err(m)) => {
                problems.push(e);
                problems.push(m);
                continue;
            }
            (Err(e), Ok(_)) | (Ok(_), Err(e)) => {
                problems.push(e);
                continue;
            }
            (Ok(f), Ok(m)) => (f, m),
        };
        let (frame, mask) = frame;
        if frame.is_empty() {
            problems.push(
                Error::new(ErrorKind::Data(format!(
                    "frame has no pixels ({}x{})",
                    frame.width(),
                    frame.height()
                )))
                .with_path(&fpath),
            );
            continue;
        }
        if !frame.same_size(&mask) {
            problems.push(
                Error::new(ErrorKind::MaskSizeMismatch {
                    width: frame.width(),
                    height: frame.height(),
                    mask_width: mask.width(),
                    mask_height: mask.height(),
                })
                .with_path(&mpath),
            );
            continue;
        }
        let unknown = match upath.map(|u| (read_mask(&u, limits), u)) {
            None => None,
            Some((Err(e), _)) => {
                problems.push(e);
                continue;
            }
            Some((Ok(u), upath)) if !frame.same_size(&u) => {
                problems.push(
                    Error::new(ErrorKind::Data(format!(
                        "unknown-pixel plane is {}x{} but its frame is {}x{}",
                        u.width(),
                        u.height(),
                        frame.width(),
                        frame.height()
                    )))
                    .with_path(&upath),
                );
                continue;
            }
            Some((Ok(u), _)) => Some(u),
        };
        frames.push(LabelledFrame {
            unknown,
            ..LabelledFrame::new(name, frame, mask)
        });
    }
    progress(total, total);
    problems.sort_by_key(|e| e.path().map(Path::to_path_buf));
    Ok(Folder { frames, problems })
}

/// Writes a labelled frame as `NAME.pbm` and `NAME.mask.pbm` in `dir`
/// (plain writes: for generated data; the daemon's labels are written
/// durably by its own code).
pub fn write_pair(dir: &Path, name: &str, frame: &BitFrame, mask: &BitFrame) -> Result<()> {
    let fp = dir.join(format!("{name}.pbm"));
    fs::write(&fp, codec::encode_pbm(frame)).map_err(|e| Error::from(e).with_path(&fp))?;
    let mp = dir.join(format!("{name}{MASK_SUFFIX}"));
    fs::write(&mp, codec::encode_pbm(mask)).map_err(|e| Error::from(e).with_path(&mp))?;
    Ok(())
}
