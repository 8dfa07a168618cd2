//! Typed errors of the library.
//!
//! Every error carries an [`ErrorKind`] saying what went wrong and, when the
//! problem came from a file, the file's path, so a message always names the
//! file and the problem ("frames/a.pbm: truncated pixel data: ..."). Pure
//! decoders return errors without a path; the I/O layer attaches it with
//! [`Error::with_path`]. Nothing in the library panics on bad data.

use std::fmt;
use std::path::{Path, PathBuf};

/// What went wrong.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum ErrorKind {
    /// The first bytes are not a format we read.
    #[error("not a PBM or PNG file (starts with {found:?})")]
    BadMagic { found: String },
    /// A header field is missing or malformed.
    #[error("bad header at byte {offset}: {detail}")]
    BadHeader { offset: usize, detail: String },
    /// The file ends before all pixels were read.
    #[error("truncated pixel data: expected {expected} {unit}, found {found}")]
    Truncated {
        expected: usize,
        found: usize,
        unit: &'static str,
    },
    /// Width or height over the configured limit (checked before allocating).
    #[error("frame is {width}x{height}, over the limit of {max_width}x{max_height}")]
    TooLarge {
        width: u64,
        height: u64,
        max_width: usize,
        max_height: usize,
    },
    /// A P1 (plain PBM) raster holds something other than 0, 1 or whitespace.
    #[error("plain PBM pixel at byte {offset} is {found:?}, only '0' and '1' are allowed")]
    BadPixelValue { offset: usize, found: char },
    /// A mask whose size differs from its frame.
    #[error("mask is {mask_width}x{mask_height} but its frame is {width}x{height}")]
    MaskSizeMismatch {
        width: usize,
        height: usize,
        mask_width: usize,
        mask_height: usize,
    },
    /// The PNG decoder rejected the data.
    #[error("PNG decoding failed: {0}")]
    Png(String),
    /// A model file that does not validate.
    #[error("invalid model: {0}")]
    BadModel(String),
    /// A label store file that does not validate.
    #[error("invalid label store: {0}")]
    BadStore(String),
    /// Invalid parameters or data for learning.
    #[error("cannot train: {0}")]
    Training(String),
    /// Growing would not fit the training memory limit, even one tree at a
    /// time (the message gives the bound and the limit).
    #[error("cannot train: {0}")]
    OverMemory(String),
    /// A data folder or file that cannot be used.
    #[error("{0}")]
    Data(String),
    /// A configuration key with a bad value, or a configuration that does
    /// not parse (`key` is the whole path, such as `log.sync`; empty when
    /// the text itself is broken).
    #[error("{}", config_message(key, message))]
    Config { key: String, message: String },
    /// Detection settings out of range (threshold, min_area,
    /// merge_distance), from whichever source set them.
    #[error("bad detection setting: {0}")]
    Settings(String),
    /// The daemon cannot start or go on (another daemon holds the lock, a
    /// watcher cannot be set up, its threads stopped).
    #[error("{0}")]
    Daemon(String),
    /// An operator's correction file that cannot be applied (bad TOML, an
    /// unknown object id, a region outside the frame, a frame gone from
    /// the archive, ...).
    #[error("invalid correction: {0}")]
    Correction(String),
    /// An operating-system error.
    #[error("{0}")]
    Io(#[from] std::io::Error),
}

fn config_message(key: &str, message: &str) -> String {
    if key.is_empty() {
        format!("invalid configuration: {message}")
    } else {
        format!("invalid configuration: {key}: {message}")
    }
}

/// An error with the file it concerns, if any.
#[derive(Debug)]
pub struct Error {
    kind: ErrorKind,
    path: Option<PathBuf>,
}

impl Error {
    pub fn new(kind: ErrorKind) -> Error {
        Error { kind, path: None }
    }

    /// Attaches the file this error is about (keeps an existing one).
    pub fn with_path(mut self, path: impl AsRef<Path>) -> Error {
        if self.path.is_none() {
            self.path = Some(path.as_ref().to_path_buf());
        }
        self
    }

    pub fn kind(&self) -> &ErrorKind {
        &self.kind
    }

    pub fn path(&self) -> Option<&Path> {
        self.path.as_deref()
    }

    pub(crate) fn bad_model(msg: impl Into<String>) -> Error {
        Error::new(ErrorKind::BadModel(msg.into()))
    }

    pub(crate) fn bad_store(msg: impl Into<String>) -> Error {
        Error::new(ErrorKind::BadStore(msg.into()))
    }

    pub(crate) fn training(msg: impl Into<String>) -> Error {
        Error::new(ErrorKind::Training(msg.into()))
    }

    pub(crate) fn over_memory(msg: impl Into<String>) -> Error {
        Error::new(ErrorKind::OverMemory(msg.into()))
    }

    pub(crate) fn config(key: impl Into<String>, message: impl std::fmt::Display) -> Error {
        Error::new(ErrorKind::Config {
            key: key.into(),
            message: message.to_string(),
        })
    }

    pub(crate) fn daemon(msg: impl Into<String>) -> Error {
        Error::new(ErrorKind::Daemon(msg.into()))
    }

    pub(crate) fn header(offset: usize, detail: impl Into<String>) -> Error {
        Error::new(ErrorKind::BadHeader {
            offset,
            detail: detail.into(),
        })
    }
}

impl fmt::Display for Error {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match &self.path {
            Some(p) => write!(f, "{}: {}", p.display(), self.kind),
            None => write!(f, "{}", self.kind),
        }
    }
}

/// The message already includes the cause (an I/O error's text, say), so
/// no `source` is reported: printing the chain would repeat it.
impl std::error::Error for Error {}

impl From<ErrorKind> for Error {
    fn from(kind: ErrorKind) -> Error {
        Error::new(kind)
    }
}

impl From<std::io::Error> for Error {
    fn from(e: std::io::Error) -> Error {
        Error::new(ErrorKind::Io(e))
    }
}

pub type Result<T, E = Error> = std::result::Result<T, E>;
