//! Requests to a running daemon from the commands (`retrain`,
//! `changeover`, `models use`): the daemon owns the state folder while it
//! runs, so a command that cannot take the state lock leaves a request
//! file in `state/requests/` and waits for its answer.
//!
//! A request is written atomically under a name of its own (time, process
//! id and a counter), so two commands racing each leave a whole file and
//! neither overwrites the other; the daemon takes them in name order, one
//! at a time. It claims a request (renames it to `NAME.taken`) before it
//! acts, writes `NAME.answer.json` atomically when done, and removes the
//! claim: a request is carried out at most once. One claimed but not
//! answered when the daemon stopped (a crash) is answered at the next
//! start as interrupted, so its command can look and ask again. A request
//! left by a command that gave up waiting is still carried out; answers
//! nobody took are removed after a day.

use std::fs;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};
use std::time::{Duration, Instant, SystemTime};

use serde::{Deserialize, Serialize};

use crate::error::{Error, Result};
use crate::fileio::durable::write_atomic;

/// The requests' folder inside the state folder.
pub const DIR: &str = "requests";
const ANSWER: &str = ".answer.json";
const TAKEN: &str = ".taken";

/// What a command asks of the daemon.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(tag = "ask", rename_all = "kebab-case")]
pub enum Ask {
    /// Grow a challenger now and put it through the gate.
    Retrain,
    /// The line now runs something new.
    Changeover { note: Option<String> },
    /// Put a registered version in service.
    Use { version: u64 },
}

/// A request file's content.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Request {
    #[serde(flatten)]
    pub ask: Ask,
    /// Who asked ("operator").
    pub by: String,
}

/// The daemon's answer.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Answer {
    pub ok: bool,
    pub message: String,
}

static COUNTER: AtomicU64 = AtomicU64::new(0);

/// Leaves a request for the daemon; returns its path.
pub fn send(state: &Path, request: &Request) -> Result<PathBuf> {
    let dir = state.join(DIR);
    fs::create_dir_all(&dir).map_err(|e| Error::from(e).with_path(&dir))?;
    let nanos = SystemTime::now()
        .duration_since(SystemTime::UNIX_EPOCH)
        .unwrap_or_default()
        .as_nanos();
    let name = format!(
        "r-{nanos:024}-{}-{}.json",
        std::process::id(),
        COUNTER.fetch_add(1, Ordering::Relaxed)
    );
    let path = dir.join(name);
    let text = serde_json::to_string(request).expect("request serialises");
    write_atomic(&path, text.as_bytes()).map_err(|e| Error::from(e).with_path(&path))?;
    Ok(path)
}

/// Where the answer to `request` will be.
pub fn answer_path(request: &Path) -> PathBuf {
    let name = request.file_name().unwrap_or_default().to_string_lossy();
    let name = name.strip_suffix(TAKEN).unwrap_or(&name);
    let stem = name.strip_suffix(".json").unwrap_or(name);
    request.with_file_name(format!("{stem}{ANSWER}"))
}

/// Waits up to `timeout` for the answer to `request`; takes it (removes the
/// file) when it comes.
pub fn wait(request: &Path, timeout: Duration) -> Option<Answer> {
    let path = answer_path(request);
    let until = Instant::now() + timeout;
    loop {
        if let Ok(text) = fs::read_to_string(&path) {
            if let Ok(a) = serde_json::from_str::<Answer>(&text) {
                let _ = fs::remove_file(&path);
                return Some(a);
            }
        }
        if Instant::now() >= until {
            return None;
        }
        std::thread::sleep(Duration::from_millis(50));
    }
}

/// Claims a request before acting on it: `None` when it is gone (taken
/// already).
pub fn claim(request: &Path) -> Option<PathBuf> {
    let name = request.file_name()?.to_string_lossy().into_owned();
    let taken = request.with_file_name(format!("{name}{TAKEN}"));
    std::fs::rename(request, &taken).ok()?;
    let _ = crate::fileio::durable::sync_dir(request.parent()?);
    Some(taken)
}

/// Requests claimed but never answered (the daemon stopped while acting on
/// them): each is answered as interrupted and removed.
pub fn answer_interrupted(state: &Path) -> usize {
    let dir = state.join(DIR);
    let Ok(rd) = fs::read_dir(&dir) else {
        return 0;
    };
    let mut n = 0;
    for e in rd.flatten() {
        let name = e.file_name().to_string_lossy().into_owned();
        if let Some(orig) = name.strip_suffix(TAKEN) {
            answer(
                &e.path(),
                &Answer {
                    ok: false,
                    message: "interrupted: the daemon stopped while carrying this out; \
                              see `burlwatch models` and the events log, then ask again if needed"
                        .into(),
                },
            );
            let _ = orig;
            n += 1;
        }
    }
    n
}

/// The requests waiting, oldest first: `(path, request or why it cannot
/// be read)`.
pub fn pending(state: &Path) -> Vec<(PathBuf, std::result::Result<Request, String>)> {
    let dir = state.join(DIR);
    let Ok(rd) = fs::read_dir(&dir) else {
        return Vec::new();
    };
    let mut out: Vec<(PathBuf, std::result::Result<Request, String>)> = Vec::new();
    for e in rd.flatten() {
        let name = e.file_name().to_string_lossy().into_owned();
        if name.starts_with('.') || !name.ends_with(".json") {
            continue;
        }
        if name.ends_with(ANSWER) {
            // Answers nobody took are removed after a day.
            let old = e
                .metadata()
                .and_then(|m| m.modified())
                .ok()
                .and_then(|t| t.elapsed().ok())
                .is_some_and(|a| a > Duration::from_secs(86_400));
            if old {
                let _ = fs::remove_file(e.path());
            }
            continue;
        }
        let parsed = fs::read_to_string(e.path())
            .map_err(|e| e.to_string())
            .and_then(|t| serde_json::from_str::<Request>(&t).map_err(|e| e.to_string()));
        out.push((e.path(), parsed));
    }
    out.sort_by(|a, b| a.0.cmp(&b.0));
    out
}

/// Answers a request (or its claim) and removes it.
pub fn answer(request: &Path, answer: &Answer) {
    let text = serde_json::to_string(answer).expect("answer serialises");
    let _ = write_atomic(&answer_path(request), text.as_bytes());
    let _ = fs::remove_file(request);
}
