//! The events log: `events.jsonl` in the logs folder, one JSON line per
//! decision about the models and the labels: a retrain's gate decision
//! (taken or refused, with both models' scores and the reason), a model
//! put in service by hand, a changeover, a model registered at start.
//!
//! Each line is appended with one `write` and synced before the call
//! returns; a reader passes over a torn line, and the next append ends it
//! first. The log is never rewritten.

use std::fs::OpenOptions;
use std::io::Write;
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use super::registry::GateScores;
use crate::error::{Error, Result};

/// The events log's file name in the logs folder.
pub const FILE: &str = "events.jsonl";

/// One line of the events log.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct Event {
    /// RFC 3339 UTC.
    pub time: String,
    /// "retrain", "use", "changeover", "registered".
    pub event: String,
    /// Who asked: "schedule", "operator", "start".
    pub by: String,
    /// "in-service", "refused", "kept", "recorded".
    pub decision: String,
    pub reason: String,
    /// The model in service before, and the one decided about.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub running: Option<ModelRef>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub model: Option<ModelRef>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub gate: Option<GateScores>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub line: Option<u64>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub note: Option<String>,
    /// The label set's generation the decision was taken at (retrain,
    /// use): the schedule counts new labels from the latest.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub generation: Option<u64>,
}

/// A model named by version and hash.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct ModelRef {
    pub version: u64,
    pub hash: String,
}

/// The events log of one logs folder.
#[derive(Clone, Debug)]
pub struct EventsLog {
    path: PathBuf,
}

impl EventsLog {
    pub fn new(logs: &Path) -> EventsLog {
        EventsLog {
            path: logs.join(FILE),
        }
    }

    pub fn path(&self) -> &Path {
        &self.path
    }

    /// Appends one event and syncs it.
    pub fn append(&self, mut event: Event) -> Result<()> {
        if event.time.is_empty() {
            event.time = crate::record::rfc3339(std::time::SystemTime::now());
        }
        let line = serde_json::to_string(&event).expect("event serialises");
        append_line(&self.path, line)
    }

    /// Every event that parses, oldest first (a torn or foreign line is
    /// passed over).
    pub fn read(&self) -> Result<Vec<Event>> {
        read_json_lines(&self.path)
    }
}

/// Every line of a JSON Lines file that parses as `T`, in order (a torn or
/// foreign line is passed over); none for a file that is not there.
pub fn read_json_lines<T: serde::de::DeserializeOwned>(path: &Path) -> Result<Vec<T>> {
    let text = match std::fs::read_to_string(path) {
        Ok(t) => t,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(Vec::new()),
        Err(e) => return Err(Error::from(e).with_path(path)),
    };
    Ok(text
        .lines()
        .filter_map(|l| serde_json::from_str(l).ok())
        .collect())
}

/// Appends one line (a newline is added) to a JSON Lines file with one
/// `write`, and syncs it. A line a crash cut off is ended first, so it
/// stays one bad line (passed over by readers) and this one is whole.
pub fn append_line(path: &Path, mut line: String) -> Result<()> {
    line.push('\n');
    let err = |e: std::io::Error| Error::from(e).with_path(path);
    let mut f = OpenOptions::new()
        .create(true)
        .read(true)
        .append(true)
        .open(path)
        .map_err(err)?;
    let len = f.metadata().map_err(err)?.len();
    if len > 0 {
        let mut last = [0u8; 1];
        std::os::unix::fs::FileExt::read_exact_at(&f, &mut last, len - 1).map_err(err)?;
        if last[0] != b'\n' {
            line.insert(0, '\n');
        }
    }
    f.write_all(line.as_bytes()).map_err(err)?;
    f.sync_data().map_err(err)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_torn_last_line_is_ended_and_passed_over() {
        let d = tempfile::tempdir().unwrap();
        let log = EventsLog::new(d.path());
        log.append(Event {
            event: "changeover".into(),
            ..Event::default()
        })
        .unwrap();
        // A crash cut the next line short.
        let mut f = OpenOptions::new().append(true).open(log.path()).unwrap();
        f.write_all(b"{\"time\":\"2026").unwrap();
        log.append(Event {
            event: "use".into(),
            ..Event::default()
        })
        .unwrap();
        let events: Vec<String> = log.read().unwrap().into_iter().map(|e| e.event).collect();
        assert_eq!(events, ["changeover", "use"]);
        let text = std::fs::read_to_string(log.path()).unwrap();
        assert_eq!(text.lines().count(), 3);
    }
}
