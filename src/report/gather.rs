//! Gathering a [`Report`] from the daemon's folders: the detection log
//! files streamed once through [`ReportStats`], the alerts, events and
//! drift history logs, the rejected folder's reason files, the model
//! registry, the monitors' saved state, and the frames with the most
//! objects read back from the archive and drawn by the model version their
//! records name.
//!
//! Reads only; a part that cannot be read is said in the report (a
//! thumbnail's reason) or is an error naming the file, never a silent
//! gap. Memory does not grow with the log: a line is held only while it
//! is among the frames with the most objects.

use std::collections::HashMap;
use std::path::Path;

use crate::codec;
use crate::config::{Folders, LiveConfig};
use crate::daemon::alerts::{read_alerts, read_history, read_saved};
use crate::daemon::corrections::{find_archived, record_detector};
use crate::daemon::events::EventsLog;
use crate::daemon::registry::Registry;
use crate::detect::{compile::Scratch, Detector};
use crate::error::{Error, Result};
use crate::fileio::logs::{detection_logs, for_each_line};
use crate::record::FrameRecord;
use crate::render::{render, zoom_for, Mark};
use crate::review::{parse_time, Millis, Range, ReportStats};

use super::{Reject, Report, Thumbnail};

/// Where a report is gathered from, and what it covers.
pub struct Sources<'a> {
    /// The daemon's folders (as the configuration names them).
    pub folders: &'a Folders,
    /// Decoding limits and detection settings, as the daemon runs them.
    pub live: &'a LiveConfig,
    pub range: Range,
    /// The report's own time.
    pub now: Millis,
    /// Thumbnails of at most this many frames.
    pub thumbnails: usize,
    pub title: String,
}

/// Reads everything the report shows.
pub fn gather(src: &Sources<'_>) -> Result<Report> {
    let f = src.folders;
    let range = src.range;
    let files = detection_logs(&f.logs).map_err(|e| Error::from(e).with_path(&f.logs))?;
    let mut stats = ReportStats::new(src.thumbnails);
    let (mut read, mut bytes) = (0, 0);
    for file in files.iter().filter(|file| file.may_hold(&range)) {
        bytes += for_each_line(&file.path, &mut |line, last| {
            stats.add_line(line, last, &range)
        })
        .map_err(|e| Error::from(e).with_path(&file.path))?;
        read += 1;
    }
    let in_range = |t: &str| parse_time(t).is_some_and(|t| range.contains(t));
    let alerts = read_alerts(&f.logs)?
        .into_iter()
        .filter(|a| in_range(&a.time))
        .collect();
    let events: Vec<_> = EventsLog::new(&f.logs)
        .read()?
        .into_iter()
        .filter(|e| in_range(&e.time))
        .collect();
    let history = read_history(&f.logs)?
        .into_iter()
        .filter(|h| in_range(&h.time))
        .collect();
    let monitors = match read_saved(&f.state) {
        Ok(Some(s)) => Some((s.saved, s.monitors.states())),
        Ok(None) => None,
        // The page says the rest; the monitors' table is left out.
        Err(_) => None,
    };
    let registry = Registry::read_only(&f.state);
    let models = registry
        .entries()
        .unwrap_or_default()
        .into_iter()
        .filter(|e| {
            stats
                .runs
                .iter()
                .any(|r| r.version == e.version && r.hash == e.hash)
                || events.iter().any(|ev| {
                    ev.model
                        .as_ref()
                        .is_some_and(|m| m.version == e.version && m.hash == e.hash)
                })
        })
        .collect();
    let rejects = rejects(&f.rejected, &range);
    let thumbnails = thumbnails(&stats, f, src.live, &registry);
    Ok(Report {
        title: src.title.clone(),
        generated: src.now,
        range,
        stats,
        files: read,
        bytes,
        rejects,
        alerts,
        events,
        models,
        history,
        monitors,
        thumbnails,
    })
}

/// The reason files in the rejected folder whose time is in the range,
/// oldest first. A reason file is the time (RFC 3339) on its first line
/// and the reason after it. (`log summary` counts them too.)
pub fn rejects(dir: &Path, range: &Range) -> Vec<Reject> {
    let Ok(rd) = std::fs::read_dir(dir) else {
        return Vec::new();
    };
    let mut out: Vec<Reject> = rd
        .filter_map(|e| e.ok())
        .filter_map(|e| {
            let name = e
                .file_name()
                .to_str()?
                .strip_suffix(".reason.txt")?
                .to_string();
            let text = std::fs::read_to_string(e.path()).ok()?;
            let (first, rest) = text.split_once('\n').unwrap_or((&text, ""));
            let time = parse_time(first.trim())?;
            range.contains(time).then(|| Reject {
                time,
                name,
                reason: rest.trim().to_string(),
            })
        })
        .collect();
    out.sort_by(|a, b| (a.time, &a.name).cmp(&(b.time, &b.name)));
    out
}

/// Draws each of the frames with the most objects from its archived file,
/// with the detection of the model that made its record (one detector per
/// model version, built once).
fn thumbnails(
    stats: &ReportStats,
    f: &Folders,
    live: &LiveConfig,
    registry: &Registry,
) -> Vec<Thumbnail> {
    let mut detectors: HashMap<(u64, String), std::result::Result<Detector, String>> =
        HashMap::new();
    let mut scratch = Scratch::default();
    stats
        .top
        .frames()
        .iter()
        .filter_map(|top| {
            let record: FrameRecord = serde_json::from_slice(&top.line).ok()?;
            let detector = detectors
                .entry((record.model_version, record.model_hash.clone()))
                .or_insert_with(|| {
                    record_detector(&record, registry, live).map_err(|e| e.to_string())
                });
            let png = detector.as_ref().map_err(Clone::clone).and_then(|d| {
                let (_, bytes) = find_archived(&f.archive, &record.frame, &record.sha256, live)
                    .map_err(|e| e.to_string())?;
                let frame = codec::decode(&bytes, &live.limits)
                    .map_err(|e| format!("the archived frame cannot be read: {}", e.kind()))?;
                let result = d.detect(&frame, &mut scratch);
                let marks = Mark::of_record(&record);
                let zoom = zoom_for(frame.width(), frame.height());
                render(&frame, Some(&result.mask), &marks, zoom)
                    .to_png()
                    .map_err(|e| e.to_string())
            });
            Some(Thumbnail {
                frame: record.frame.clone(),
                time: record.time.clone(),
                objects: top.objects,
                max_score: top.max_score,
                model_version: record.model_version,
                png,
            })
        })
        .collect()
}
