//! `burlwatch log`: the detection log for maintenance. `summary` counts a
//! time range (frames, objects, rejects, processing time, alerts, model
//! changes, and a table per hour); `frames` lists the records that pass
//! filters; `show` prints one frame's record. All three stream the log
//! files in order through `fileio::logs` and `review`, so memory stays
//! flat however long the logs are; a torn last line is counted, not fatal.

use std::collections::VecDeque;
use std::path::{Path, PathBuf};
use std::time::SystemTime;

use anyhow::{anyhow, bail, Context, Result};
use clap::Subcommand;

use burlwatch::daemon::alerts::read_alerts;
use burlwatch::daemon::events::EventsLog;
use burlwatch::fileio::logs::{detection_logs, for_each_line, LogFile};
use burlwatch::record::FrameRecord;
use burlwatch::review::{format_time, parse_time, Line, Millis, Range, Summary, HOUR};

use super::load_config;

#[derive(clap::Args, Debug)]
pub struct LogArgs {
    /// Configuration file (TOML).
    #[arg(long)]
    config: PathBuf,
    #[command(subcommand)]
    action: Action,
}

/// The time range options every query takes.
#[derive(clap::Args, Debug, Clone)]
pub(super) struct When {
    /// Only the last DURATION (24h, 7d, 90min...).
    #[arg(long, conflicts_with_all = ["from", "to"])]
    pub(super) since: Option<String>,
    /// From this time (RFC 3339, "2026-12-01T08:00:00Z"; a date alone is
    /// midnight UTC).
    #[arg(long)]
    pub(super) from: Option<String>,
    /// Up to this time (exclusive).
    #[arg(long)]
    pub(super) to: Option<String>,
}

impl When {
    pub(super) fn range(&self, now: SystemTime) -> Result<Range> {
        let time = |what: &str, s: &str| {
            parse_time(s).ok_or_else(|| {
                anyhow!("--{what} {s:?} is not a time (RFC 3339, such as 2026-12-01T08:00:00Z)")
            })
        };
        let now_ms = now
            .duration_since(SystemTime::UNIX_EPOCH)
            .map_or(0, |d| d.as_millis() as Millis);
        let mut r = Range::default();
        if let Some(s) = &self.since {
            let d = humantime::parse_duration(s)
                .map_err(|e| anyhow!("--since {s:?} is not a duration (24h, 7d...): {e}"))?;
            r.from = Some(now_ms - d.as_millis() as Millis);
        }
        if let Some(s) = &self.from {
            r.from = Some(time("from", s)?);
        }
        if let Some(s) = &self.to {
            r.to = Some(time("to", s)?);
        }
        if let (Some(f), Some(t)) = (r.from, r.to) {
            if t <= f {
                bail!("--to is not after --from");
            }
        }
        Ok(r)
    }
}

#[derive(Subcommand, Debug)]
enum Action {
    /// Counts of a time range, with a table per hour (per day past 7 days).
    Summary {
        #[command(flatten)]
        when: When,
        /// Print JSON.
        #[arg(long)]
        json: bool,
    },
    /// The records that pass every filter given, oldest first.
    Frames {
        #[command(flatten)]
        when: When,
        /// At least this many objects.
        #[arg(long)]
        min_objects: Option<u32>,
        /// At most this many objects.
        #[arg(long)]
        max_objects: Option<u32>,
        /// Detected by this model version.
        #[arg(long)]
        model: Option<u64>,
        /// With an object scoring at least this.
        #[arg(long)]
        min_score: Option<f64>,
        /// Print only the last N that pass (0: all).
        #[arg(long, default_value_t = 50)]
        limit: usize,
        /// Print JSON Lines (the records as logged).
        #[arg(long)]
        json: bool,
    },
    /// One frame's record (the latest of that name).
    Show {
        /// The frame's file name, as in its record.
        frame: String,
        /// Every record of that name, oldest first.
        #[arg(long)]
        all: bool,
        /// Print JSON.
        #[arg(long)]
        json: bool,
    },
}

pub fn run(a: LogArgs) -> Result<i32> {
    let cfg = load_config(&a.config)?;
    let folders = cfg.start.folders.absolute()?;
    let files = detection_logs(&folders.logs)
        .with_context(|| format!("cannot list the logs folder {}", folders.logs.display()))?;
    match a.action {
        Action::Summary { when, json } => {
            let range = when.range(SystemTime::now())?;
            summary(&files, &folders.logs, &folders.rejected, &range, json)
        }
        Action::Frames {
            when,
            min_objects,
            max_objects,
            model,
            min_score,
            limit,
            json,
        } => {
            let range = when.range(SystemTime::now())?;
            let keep = |l: &Line<'_>| {
                min_objects.is_none_or(|n| l.objects.count >= n)
                    && max_objects.is_none_or(|n| l.objects.count <= n)
                    && model.is_none_or(|v| l.model_version == v)
                    && min_score.is_none_or(|s| l.objects.count > 0 && l.objects.max_score >= s)
            };
            frames(&files, &range, &keep, limit, json)
        }
        Action::Show { frame, all, json } => show(&files, &frame, all, json),
    }
}

/// Streams every line of the files that may hold the range.
fn each_line(files: &[LogFile], range: &Range, f: &mut dyn FnMut(&[u8], bool)) -> Result<u64> {
    let mut bytes = 0;
    for file in files.iter().filter(|file| file.may_hold(range)) {
        bytes += for_each_line(&file.path, f)
            .with_context(|| format!("cannot read {}", file.path.display()))?;
    }
    Ok(bytes)
}

fn summary(
    files: &[LogFile],
    logs: &Path,
    rejected: &Path,
    range: &Range,
    json: bool,
) -> Result<i32> {
    let mut s = Summary::default();
    let bytes = each_line(files, range, &mut |line, last| {
        s.add_line(line, last, range)
    })?;
    let in_range = |t: &str| parse_time(t).is_some_and(|t| range.contains(t));
    let alerts: Vec<_> = read_alerts(logs)
        .map_err(|e| anyhow!("{e}"))?
        .into_iter()
        .filter(|a| in_range(&a.time))
        .collect();
    let raised = alerts.iter().filter(|a| a.state != "cleared").count();
    let changes: Vec<_> = EventsLog::new(logs)
        .read()
        .map_err(|e| anyhow!("{e}"))?
        .into_iter()
        .filter(|e| in_range(&e.time))
        .filter(|e| e.decision == "in-service" || e.event == "use")
        .collect();
    let rejects = burlwatch::report::gather::rejects(rejected, range).len() as u64;
    let (p50, p99) = (s.times.quantile(0.5), s.times.quantile(0.99));
    let per_day = match (s.first, s.last) {
        (Some(f), Some(l)) => l - f > 7 * 24 * HOUR,
        _ => false,
    };
    if json {
        let hours: Vec<_> = s
            .hour_table()
            .into_iter()
            .map(|(h, c)| {
                serde_json::json!({"hour": format_time(h), "frames": c.frames, "objects": c.objects, "with_objects": c.with_objects})
            })
            .collect();
        let models: Vec<_> = s
            .models
            .iter()
            .map(|m| {
                serde_json::json!({"version": m.version, "hash": m.hash, "frames": m.frames,
                    "first": format_time(m.first), "last": format_time(m.last)})
            })
            .collect();
        let doc = serde_json::json!({
            "from": range.from.map(format_time),
            "to": range.to.map(format_time),
            "first_record": s.first.map(format_time),
            "last_record": s.last.map(format_time),
            "files": files.iter().filter(|f| f.may_hold(range)).count(),
            "bytes_read": bytes,
            "frames": s.frames,
            "objects": s.objects,
            "frames_with_objects": s.with_objects,
            "objects_per_frame": ratio(s.objects, s.frames),
            "rejected": rejects,
            "millis_p50": p50,
            "millis_p99": p99,
            "alerts": alerts.len(),
            "alerts_raised": raised,
            "model_changes": changes.len(),
            "models": models,
            "torn_lines": s.torn,
            "unreadable_lines": s.unreadable + s.bad_times,
            "hours": hours,
        });
        out!("{}", serde_json::to_string_pretty(&doc)?);
        return Ok(0);
    }
    let span = match (range.from, range.to) {
        (None, None) => "all records".to_string(),
        (f, t) => format!(
            "{} to {}",
            f.map_or("the first record".into(), format_time),
            t.map_or("now".into(), format_time)
        ),
    };
    out!("Detection log, {span}:");
    out!(
        "  frames            {:>12}   ({} with objects)",
        s.frames,
        s.with_objects
    );
    out!(
        "  objects           {:>12}   ({:.3} per frame)",
        s.objects,
        ratio(s.objects, s.frames)
    );
    out!("  rejected files    {:>12}", rejects);
    match (p50, p99) {
        (Some(a), Some(b)) => out!("  processing time   p50 {a:.2} ms, p99 {b:.2} ms"),
        _ => out!("  processing time   -"),
    }
    out!(
        "  alerts            {:>12}   ({raised} raised, {} cleared)",
        alerts.len(),
        alerts.len() - raised
    );
    out!("  model changes     {:>12}", changes.len());
    for c in &changes {
        let m = c.model.as_ref().map_or(String::new(), |m| {
            format!("version {} ({})", m.version, m.hash)
        });
        out!("    {}  {} {m}: {}", c.time, c.event, c.reason);
    }
    for m in &s.models {
        out!(
            "  model {} ({})  {} frames, {} to {}",
            m.version,
            m.hash,
            m.frames,
            format_time(m.first),
            format_time(m.last)
        );
    }
    if s.torn + s.unreadable + s.bad_times > 0 {
        out!(
            "  not records       {} torn last line(s), {} unreadable line(s)",
            s.torn,
            s.unreadable + s.bad_times
        );
    }
    let table = s.hour_table();
    if table.is_empty() {
        return Ok(0);
    }
    let rows: Vec<(Millis, u64, u64)> = if per_day {
        let mut days: Vec<(Millis, u64, u64)> = Vec::new();
        for (h, c) in table {
            let day = h.div_euclid(24 * HOUR) * 24 * HOUR;
            match days.last_mut() {
                Some(d) if d.0 == day => {
                    d.1 += c.frames;
                    d.2 += c.objects;
                }
                _ => days.push((day, c.frames, c.objects)),
            }
        }
        out!("Per day (UTC): frames, a bar of frames, objects");
        days
    } else {
        out!("Per hour (UTC): frames, a bar of frames, objects");
        table
            .into_iter()
            .map(|(h, c)| (h, c.frames, c.objects))
            .collect()
    };
    let most = rows.iter().map(|r| r.1).max().unwrap_or(0).max(1);
    for (t, frames, objects) in rows {
        let bar = "#".repeat(((frames * 40).div_ceil(most)) as usize);
        let label = &format_time(t)[..if per_day { 10 } else { 16 }];
        out!("  {label}  {frames:>9}  {bar:<40}  {objects}");
    }
    Ok(0)
}

fn ratio(a: u64, b: u64) -> f64 {
    if b == 0 {
        0.0
    } else {
        a as f64 / b as f64
    }
}

fn frames(
    files: &[LogFile],
    range: &Range,
    keep: &dyn Fn(&Line<'_>) -> bool,
    limit: usize,
    json: bool,
) -> Result<i32> {
    // Only its counts of lines that are not records.
    let mut bad = Summary::default();
    let mut kept: VecDeque<Vec<u8>> = VecDeque::new();
    let mut matched = 0u64;
    let mut printed: Result<()> = Ok(());
    let print = |line: &[u8]| -> Result<()> {
        if json {
            out!("{}", String::from_utf8_lossy(line));
        } else {
            let l = Line::parse(line).expect("parsed before");
            let score = if l.objects.count > 0 {
                format!("{:.3}", l.objects.max_score)
            } else {
                "-".into()
            };
            out!(
                "{}  {:>3} objects  max score {score:>5}  model {}  {:>7.2} ms  {}",
                l.time,
                l.objects.count,
                l.model_version,
                l.millis,
                l.frame
            );
        }
        Ok(())
    };
    each_line(files, range, &mut |line, last| {
        let Some(l) = Line::parse(line) else {
            bad.not_a_record(line, last);
            return;
        };
        if !parse_time(&l.time).is_some_and(|t| range.contains(t)) || !keep(&l) {
            return;
        }
        matched += 1;
        if limit == 0 {
            if printed.is_ok() {
                printed = print(line);
            }
        } else {
            if kept.len() == limit {
                kept.pop_front();
            }
            kept.push_back(line.to_vec());
        }
    })?;
    printed?;
    for line in &kept {
        print(line)?;
    }
    if !json {
        let shown = if limit == 0 {
            matched
        } else {
            kept.len() as u64
        };
        out!("{shown} of {matched} matching frame(s) shown");
        if bad.torn + bad.unreadable > 0 {
            out!(
                "({} torn last line(s) and {} unreadable line(s) passed over)",
                bad.torn,
                bad.unreadable
            );
        }
    }
    Ok(0)
}

fn show(files: &[LogFile], frame: &str, all: bool, json: bool) -> Result<i32> {
    let mut found: Vec<Vec<u8>> = Vec::new();
    each_line(files, &Range::default(), &mut |line, _| {
        if Line::parse(line).is_some_and(|l| l.frame == frame) {
            if !all {
                found.clear();
            }
            found.push(line.to_vec());
        }
    })?;
    if found.is_empty() {
        bail!("no record of a frame named {frame:?} in the detection log");
    }
    for line in &found {
        let r: FrameRecord = serde_json::from_slice(line)
            .with_context(|| format!("the record of {frame:?} cannot be read"))?;
        if json {
            out!("{}", serde_json::to_string_pretty(&r)?);
            continue;
        }
        out!(
            "{}  ({}x{}, sha256 {})",
            r.frame,
            r.width,
            r.height,
            r.sha256
        );
        out!(
            "  detected {} by model {} ({}) in {:.2} ms",
            r.time,
            r.model_version,
            r.model_hash,
            r.millis
        );
        if r.objects.is_empty() {
            out!("  no objects");
        }
        for o in &r.objects {
            out!(
                "  object {:>3}  box [{}, {}, {}, {}]  area {:>6}  score {:.3}",
                o.id,
                o.bbox[0],
                o.bbox[1],
                o.bbox[2],
                o.bbox[3],
                o.area,
                o.score
            );
        }
    }
    Ok(0)
}
