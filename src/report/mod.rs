//! The maintenance report: one self-contained HTML page of a time range,
//! with inline SVG charts (frames and objects per hour, processing-time
//! percentiles, each drift statistic against its thresholds, which model
//! ran when), tables of models, decisions, alerts and rejected files, and
//! annotated thumbnails of the frames with the most objects, embedded as
//! data URIs.
//!
//! [`Report`] is everything the page shows, gathered by [`gather()`] (the
//! only part that reads files); [`Report::html`] is pure. The page needs
//! no script and no outside file: styles are inline, charts are SVG
//! elements, pictures are `data:` URIs. It reads on a phone (the charts
//! scroll sideways inside their box rather than shrinking their text
//! below legibility) and prints (no scrolling boxes, no page break inside
//! a chart or a table row).
//!
//! Invariants: every text that came from a file is escaped; the page
//! names the range it covers and how many records, lines and files it was
//! made from, so a reader can tell an empty week from a missing log; long
//! tables show their latest rows and say how many were left out.

pub mod gather;
pub mod svg;

use std::fmt::Write;

use base64::Engine;

use crate::daemon::events::Event;
use crate::daemon::registry::Entry;
use crate::monitor::{Alert, DriftSample, MonitorState};
use crate::review::{format_time, parse_time, Millis, Range, ReportStats, HOUR};
use svg::{esc, Row, Series, Span};

pub use gather::{gather, Sources};

/// Rows kept in each long table (the latest).
pub const TABLE_ROWS: usize = 200;
/// Thumbnails by default.
pub const THUMBNAILS: usize = 50;

/// A rejected frame: when, its name in the rejected folder, and why.
#[derive(Clone, Debug, PartialEq)]
pub struct Reject {
    pub time: Millis,
    pub name: String,
    pub reason: String,
}

/// One of the frames with the most objects, drawn or not.
#[derive(Clone, Debug, PartialEq)]
pub struct Thumbnail {
    pub frame: String,
    pub time: String,
    pub objects: u32,
    pub max_score: f64,
    pub model_version: u64,
    /// The annotated picture (PNG), or why there is none (the frame has
    /// left the archive, its model is not in the registry...).
    pub png: std::result::Result<Vec<u8>, String>,
}

/// Everything the report shows.
#[derive(Clone, Debug, Default)]
pub struct Report {
    /// The box, as the page's heading names it.
    pub title: String,
    /// When the report was made.
    pub generated: Millis,
    /// The range asked for (either end open).
    pub range: Range,
    pub stats: ReportStats,
    /// Detection log files read, and their bytes.
    pub files: usize,
    pub bytes: u64,
    /// In the range, oldest first.
    pub rejects: Vec<Reject>,
    pub alerts: Vec<Alert>,
    pub events: Vec<Event>,
    /// Registry entries of the models that ran or were decided about in
    /// the range.
    pub models: Vec<Entry>,
    pub history: Vec<DriftSample>,
    /// The monitors' states when the daemon last saved them.
    pub monitors: Option<(String, Vec<MonitorState>)>,
    pub thumbnails: Vec<Thumbnail>,
}

const STYLE: &str = "\
:root{color-scheme:light}\
body{font-family:system-ui,-apple-system,'Segoe UI',Roboto,'DejaVu Sans',sans-serif;margin:0 auto;max-width:1000px;padding:12px;color:#222;background:#fff;line-height:1.4}\
h1{font-size:1.5em;margin:.2em 0}\
h2{font-size:1.2em;border-bottom:2px solid #888;padding-bottom:2px;margin-top:1.6em}\
h3{font-size:1em;margin:1em 0 .3em}\
.cards{display:grid;grid-template-columns:repeat(auto-fill,minmax(150px,1fr));gap:8px}\
.card{border:1px solid #ddd;border-radius:6px;padding:6px 10px}\
.card b{display:block;font-size:1.35em}\
.scroll{overflow-x:auto}\
svg.chart{width:100%;min-width:520px;height:auto;display:block}\
table{border-collapse:collapse;font-size:.9em;width:100%}\
th,td{border-bottom:1px solid #e4e4e4;padding:3px 6px;text-align:left;vertical-align:top}\
tr.head td{border-bottom:0;padding-bottom:0}td.note{padding-top:0;overflow-wrap:anywhere}\
@media (max-width:640px){.t table,.t tbody,.t tr,.t td{display:block}.t tr:first-child{display:none}.t tr.head td{display:inline-block;padding:3px 12px 0 0;text-align:left}.t td[data-l]::before{content:attr(data-l) ': ';color:#666;font-size:.85em;font-weight:normal}.t td.note{border-bottom:1px solid #ccc;padding:2px 0 6px}}\
td.n{text-align:right;font-variant-numeric:tabular-nums;white-space:nowrap}\
.alert{color:#b34700;font-weight:bold}.watch{color:#8a5d00;font-weight:bold}\
.thumbs{display:grid;grid-template-columns:repeat(auto-fill,minmax(160px,1fr));gap:10px}\
figure{margin:0;border:1px solid #ddd;padding:4px}\
figure img{width:100%;height:auto;image-rendering:pixelated;display:block}\
figcaption{font-size:.8em;overflow-wrap:anywhere}\
.note{color:#555;font-size:.9em}\
footer{margin-top:2em;border-top:1px solid #ddd;font-size:.85em;color:#555}\
@media print{body{max-width:none;padding:0}.scroll{overflow:visible}svg.chart{min-width:0}section>h2{break-after:avoid}svg,figure,tr,.card{break-inside:avoid}tr.head{break-after:avoid}}";

/// The statistics of the drift history, with a heading and a unit each.
const STATISTICS: [(&str, &str, &str); 5] = [
    (
        "pattern_psi",
        "Input: 2x2 pixel patterns against the training frames",
        "PSI",
    ),
    (
        "leaf_psi",
        "Input: leaves the pixels reach against the training pixels",
        "PSI",
    ),
    (
        "objects_per_frame",
        "Output: change in objects per frame (Page-Hinkley)",
        "std. dev.",
    ),
    (
        "detected_share",
        "Output: change in the detected share of pixels (Page-Hinkley)",
        "std. dev.",
    ),
    (
        "error_rate",
        "Errors the operator reported (Drift Detection Method)",
        "std. dev.",
    ),
];

fn level_class(level: &str) -> &'static str {
    match level {
        "alert" => " class=\"alert\"",
        "watch" => " class=\"watch\"",
        _ => "",
    }
}

/// A number with a thin space between thousands.
fn count(n: u64) -> String {
    let s = n.to_string();
    let mut out = String::new();
    for (i, c) in s.chars().enumerate() {
        if i > 0 && (s.len() - i).is_multiple_of(3) {
            out.push('\u{2009}');
        }
        out.push(c);
    }
    out
}

fn ms(v: Option<f64>) -> String {
    v.map_or("-".into(), |v| format!("{v:.2} ms"))
}

/// `2026-12-02 10:00` from milliseconds.
fn minute(t: Millis) -> String {
    let s = format_time(t);
    format!("{} {}", &s[..10], &s[11..16])
}

/// A record's time for a table: to the second.
fn second(t: &str) -> String {
    parse_time(t).map_or_else(
        || t.to_string(),
        |ms| {
            let s = format_time(ms);
            format!("{} {}", &s[..10], &s[11..19])
        },
    )
}

fn hours(ms: Millis) -> String {
    let h = ms as f64 / HOUR as f64;
    if h >= 48.0 {
        format!("{:.1} days", h / 24.0)
    } else {
        format!("{h:.0} h")
    }
}

/// The latest `TABLE_ROWS` of `items`, and how many were left out.
fn latest<T>(items: &[T]) -> (&[T], usize) {
    let skip = items.len().saturating_sub(TABLE_ROWS);
    (&items[skip..], skip)
}

/// A table whose rows are a line of short cells and, under it, a line of
/// text (a message, a reason). On a narrow screen each row's cells flow
/// as labelled items instead of columns.
struct Table<'a> {
    heads: &'a [&'a str],
    html: String,
}

impl<'a> Table<'a> {
    fn new(heads: &'a [&'a str]) -> Table<'a> {
        let mut html = String::from("<div class=\"scroll t\"><table><tr>");
        for head in heads {
            let _ = write!(html, "<th>{head}</th>");
        }
        html.push_str("</tr>");
        Table { heads, html }
    }

    /// One row: each cell's attributes (a class) and inner HTML, then the
    /// text under them (escaped here), if any.
    fn row(&mut self, cells: &[(&str, String)], note: &str) {
        self.html.push_str("<tr class=\"head\">");
        for ((attrs, cell), head) in cells.iter().zip(self.heads) {
            let _ = write!(self.html, "<td{attrs} data-l=\"{head}\">{cell}</td>");
        }
        let _ = write!(
            self.html,
            "</tr><tr><td colspan=\"{}\" class=\"note\">{}</td></tr>",
            self.heads.len(),
            esc(note)
        );
    }

    fn end(mut self, h: &mut String) {
        self.html.push_str("</table></div>");
        h.push_str(&self.html);
    }
}

const NUM: &str = " class=\"n\"";

impl Report {
    /// The time span the charts cover: the range asked for, its open ends
    /// closed by the first record (or the report's time) and the report's
    /// time; whole hours.
    pub fn span(&self) -> Span {
        let s = &self.stats.summary;
        let first = [
            s.first,
            self.history.first().and_then(|h| parse_time(&h.time)),
            self.alerts.first().and_then(|a| parse_time(&a.time)),
        ]
        .into_iter()
        .flatten()
        .min();
        let from = self
            .range
            .from
            .or(first)
            .unwrap_or(self.generated - 24 * HOUR);
        let to = self.range.to.unwrap_or(self.generated).max(from + HOUR);
        Span {
            from: from.div_euclid(HOUR) * HOUR,
            to: (to + HOUR - 1).div_euclid(HOUR) * HOUR,
        }
    }

    /// The whole page.
    pub fn html(&self) -> String {
        let mut h = String::with_capacity(64 * 1024);
        let span = self.span();
        let _ = write!(
            h,
            "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\"><meta name=\"viewport\" content=\"width=device-width,initial-scale=1\"><title>{t}</title><style>{STYLE}</style></head><body>",
            t = esc(&self.title)
        );
        let _ = write!(
            h,
            "<header><h1>{t}</h1><p>{from} to {to} (UTC), made {now}.</p></header>",
            t = esc(&self.title),
            from = minute(span.from),
            to = minute(span.to),
            now = minute(self.generated)
        );
        self.glance(&mut h, span);
        self.counts(&mut h, span);
        self.times(&mut h, span);
        self.drift(&mut h, span);
        self.model_section(&mut h, span);
        self.alert_table(&mut h);
        self.reject_table(&mut h);
        self.pictures(&mut h);
        let s = &self.stats.summary;
        let _ = writeln!(
            h,
            "<footer><p>Made by burlwatch {v} from {files} detection log file(s) ({mb:.1} MB, {lines} records in the range; {torn} torn and {bad} unreadable line(s) passed over), the alerts, events and drift history logs, the rejected folder and the model registry.</p><p>burlwatch is an inspection aid, not a safety device: it must not be used to guard machinery or people. Follow local codes and the plant's own procedures.</p></footer></body></html>",
            v = env!("CARGO_PKG_VERSION"),
            files = self.files,
            mb = self.bytes as f64 / 1e6,
            lines = count(s.frames),
            torn = s.torn,
            bad = s.unreadable + s.bad_times
        );
        h
    }

    fn glance(&self, h: &mut String, span: Span) {
        let s = &self.stats.summary;
        let raised = self.alerts.iter().filter(|a| a.state != "cleared").count();
        let changes = self
            .events
            .iter()
            .filter(|e| e.decision == "in-service")
            .count();
        let hours_total = ((span.to - span.from) / HOUR).max(1);
        let ran = self
            .stats
            .summary
            .hours
            .range(span.from..span.to)
            .filter(|(_, c)| c.frames > 0)
            .count() as i64;
        let cards: [(&str, String, String); 8] = [
            (
                "Frames",
                count(s.frames),
                format!("in {ran} of {hours_total} hours"),
            ),
            (
                "Objects",
                count(s.objects),
                format!(
                    "{:.3} per frame",
                    if s.frames > 0 {
                        s.objects as f64 / s.frames as f64
                    } else {
                        0.0
                    }
                ),
            ),
            (
                "Frames with objects",
                count(s.with_objects),
                if s.frames > 0 {
                    format!("{:.1}%", 100.0 * s.with_objects as f64 / s.frames as f64)
                } else {
                    "-".into()
                },
            ),
            (
                "Rejected files",
                count(self.rejects.len() as u64),
                "could not be read".into(),
            ),
            (
                "Processing time",
                ms(s.times.quantile(0.5)),
                format!("p50; p99 {}", ms(s.times.quantile(0.99))),
            ),
            (
                "Alerts",
                count(raised as u64),
                format!("raised; {} cleared", self.alerts.len() - raised),
            ),
            (
                "Models",
                count(
                    self.stats
                        .runs
                        .iter()
                        .map(|r| (r.version, &r.hash))
                        .collect::<std::collections::BTreeSet<_>>()
                        .len() as u64,
                ),
                format!("ran; {changes} put in service"),
            ),
            (
                "Not records",
                count(s.torn + s.unreadable + s.bad_times),
                "torn or unreadable lines".into(),
            ),
        ];
        h.push_str("<section><h2>At a glance</h2><div class=\"cards\">");
        for (what, big, small) in cards {
            let _ = write!(
                h,
                "<div class=\"card\">{what}<b>{big}</b><span class=\"note\">{small}</span></div>"
            );
        }
        h.push_str("</div>");
        // Did it run: the longest stretch of whole hours without a record.
        let mut longest = (0i64, span.from);
        let mut run = (0i64, span.from);
        let mut t = span.from;
        while t < span.to {
            let empty = s.hours.get(&t).is_none_or(|c| c.frames == 0);
            if empty {
                if run.0 == 0 {
                    run.1 = t;
                }
                run.0 += 1;
                if run.0 > longest.0 {
                    longest = run;
                }
            } else {
                run.0 = 0;
            }
            t += HOUR;
        }
        if s.frames == 0 {
            h.push_str("<p class=\"alert\">No frame was logged in this range.</p>");
        } else if longest.0 > 0 {
            let _ = write!(
                h,
                "<p>Longest stretch without a logged frame: {} from {} (UTC). Records from {} to {}.</p>",
                hours(longest.0 * HOUR),
                minute(longest.1),
                second(&format_time(s.first.unwrap_or_default())),
                second(&format_time(s.last.unwrap_or_default()))
            );
        } else {
            h.push_str("<p>Frames were logged in every hour of the range.</p>");
        }
        h.push_str("</section>");
    }

    /// Hours, or days when the span is longer than 16 days.
    fn bin(span: Span) -> Millis {
        if span.to - span.from > 16 * 24 * HOUR {
            24 * HOUR
        } else {
            HOUR
        }
    }

    fn counts(&self, h: &mut String, span: Span) {
        let bin = Self::bin(span);
        let per = if bin == HOUR { "hour" } else { "day" };
        let mut frames: Vec<(Millis, f64)> = Vec::new();
        let mut objects: Vec<(Millis, f64)> = Vec::new();
        for (&t, c) in &self.stats.summary.hours {
            let b = t.div_euclid(bin) * bin;
            match frames.last_mut() {
                Some(f) if f.0 == b => {
                    f.1 += c.frames as f64;
                    objects.last_mut().expect("kept in step").1 += c.objects as f64;
                }
                _ => {
                    frames.push((b, c.frames as f64));
                    objects.push((b, c.objects as f64));
                }
            }
        }
        let _ = write!(
            h,
            "<section><h2>Frames and objects per {per}</h2><div class=\"scroll\">{}</div><div class=\"scroll\">{}</div></section>",
            svg::bars(&format!("Frames per {per}"), &format!("frames per {per}"), span, bin, &frames, svg::BLUE),
            svg::bars(&format!("Objects per {per}"), &format!("objects per {per}"), span, bin, &objects, svg::VERMILLION)
        );
    }

    fn times(&self, h: &mut String, span: Span) {
        let series = [
            (0.5, "p50", svg::GREEN),
            (0.9, "p90", svg::ORANGE),
            (0.99, "p99", svg::VERMILLION),
        ]
        .into_iter()
        .map(|(q, name, colour)| Series {
            name: name.into(),
            colour,
            dashed: false,
            points: self
                .stats
                .hour_times
                .iter()
                .filter_map(|(&t, times)| times.quantile(q).map(|v| (t + HOUR / 2, v)))
                .collect(),
        })
        .collect::<Vec<_>>();
        let _ = write!(
            h,
            "<section><h2>Processing time per hour</h2><p class=\"note\">From a frame's arrival to its record, percentiles of each hour (within 1%).</p><div class=\"scroll\">{}</div></section>",
            svg::lines("Processing time percentiles per hour", "ms", span, &series, HOUR, 0.0)
        );
    }

    fn drift(&self, h: &mut String, span: Span) {
        h.push_str("<section><h2>Drift</h2>");
        let samples: Vec<(Millis, &DriftSample)> = self
            .history
            .iter()
            .filter_map(|s| parse_time(&s.time).map(|t| (t, s)))
            .filter(|(t, _)| *t >= span.from && *t <= span.to)
            .collect();
        if samples.is_empty() {
            h.push_str("<p>No drift history in this range: the monitors were off, no frame came, or the daemon keeps none (<code>drift.history_minutes = 0</code>).</p>");
        } else {
            // Lines break where samples are more than three usual
            // intervals apart (the daemon was not running, or no frames).
            let mut steps: Vec<Millis> = samples.windows(2).map(|w| w[1].0 - w[0].0).collect();
            steps.sort_unstable();
            let usual = steps.get(steps.len() / 2).copied().unwrap_or(HOUR);
            let gap = (3 * usual).max(60_000);
            let _ = write!(
                h,
                "<p class=\"note\">{} samples of every statistic, the value against its watch and alert levels. Points while a monitor warms up are left out.</p>",
                samples.len()
            );
            for (name, heading, unit) in STATISTICS {
                let pick = |f: &dyn Fn(&crate::monitor::SampleValue) -> f64| -> Vec<(Millis, f64)> {
                    samples
                        .iter()
                        .filter_map(|(t, s)| {
                            let v = s.statistics.iter().find(|v| v.statistic == name)?;
                            let shown = v.level != "off" && v.level != "warming";
                            Some((*t, if shown { f(v) } else { f64::NAN }))
                        })
                        .collect()
                };
                let value = pick(&|v| v.value);
                if value.iter().all(|p| p.1.is_nan()) {
                    let _ = write!(
                        h,
                        "<h3>{}</h3><p class=\"note\">Warming up or off in every sample.</p>",
                        esc(heading)
                    );
                    continue;
                }
                let alert = pick(&|v| v.alert);
                let top = alert
                    .iter()
                    .map(|p| p.1)
                    .filter(|v| v.is_finite())
                    .fold(0.0, f64::max)
                    * 1.15;
                let series = [
                    Series {
                        name: "value".into(),
                        colour: svg::BLUE,
                        dashed: false,
                        points: value,
                    },
                    Series {
                        name: "watch".into(),
                        colour: svg::ORANGE,
                        dashed: true,
                        points: pick(&|v| v.watch),
                    },
                    Series {
                        name: "alert".into(),
                        colour: svg::VERMILLION,
                        dashed: true,
                        points: alert,
                    },
                ];
                let _ = write!(
                    h,
                    "<h3>{}</h3><div class=\"scroll\">{}</div>",
                    esc(heading),
                    svg::lines(heading, unit, span, &series, gap, top)
                );
            }
        }
        if let Some((saved, states)) = &self.monitors {
            let _ = write!(
                h,
                "<h3>The monitors now</h3><p class=\"note\">As the daemon last saved them, {}.</p>",
                esc(&second(saved))
            );
            let mut t = Table::new(&["Statistic", "Level", "Value", "Watch", "Alert"]);
            for m in states {
                t.row(
                    &[
                        ("", esc(&m.statistic)),
                        (level_class(&m.level), esc(&m.level)),
                        (NUM, format!("{:.3}", m.value)),
                        (NUM, m.thresholds.watch.to_string()),
                        (NUM, m.thresholds.alert.to_string()),
                    ],
                    &m.detail,
                );
            }
            t.end(h);
        }
        h.push_str("</section>");
    }

    fn model_section(&self, h: &mut String, span: Span) {
        h.push_str("<section><h2>Models</h2>");
        let mut keys: Vec<(u64, String)> = Vec::new();
        for r in &self.stats.runs {
            if !keys.iter().any(|k| k.0 == r.version && k.1 == r.hash) {
                keys.push((r.version, r.hash.clone()));
            }
        }
        keys.sort();
        if keys.is_empty() {
            h.push_str("<p>No model ran in this range.</p>");
        } else {
            let colours = [
                svg::BLUE,
                svg::GREEN,
                svg::ORANGE,
                svg::SKY,
                svg::PURPLE,
                svg::VERMILLION,
            ];
            let rows: Vec<Row> = keys
                .iter()
                .enumerate()
                .map(|(i, (v, hash))| {
                    let gate = self
                        .models
                        .iter()
                        .find(|e| e.version == *v && e.hash == *hash)
                        .and_then(|e| e.gate.as_ref())
                        .map_or(String::new(), |g| format!(" F1 {:.3}", g.f1));
                    Row {
                        label: format!("v{v}{gate}"),
                        colour: colours[i % colours.len()],
                        spans: self
                            .stats
                            .runs
                            .iter()
                            .filter(|r| r.version == *v && r.hash == *hash)
                            .map(|r| (r.from, r.to.max(r.from + 60_000)))
                            .collect(),
                    }
                })
                .collect();
            let marks: Vec<(Millis, String)> = self
                .events
                .iter()
                .filter(|e| e.decision == "in-service")
                .filter_map(|e| {
                    let t = parse_time(&e.time)?;
                    Some((
                        t,
                        e.model
                            .as_ref()
                            .map_or("new".into(), |m| format!("v{}", m.version)),
                    ))
                })
                .collect();
            let _ = write!(
                h,
                "<p class=\"note\">Which model's records the log holds, when; a dashed tick where a model was put in service. F1: its object F1 on held-out frames when the gate let it in.</p><div class=\"scroll\">{}</div>",
                svg::timeline("Model versions over time", span, &rows, &marks)
            );
        }
        if !self.models.is_empty() {
            h.push_str("<h3>Registered models</h3>");
            let mut t = Table::new(&[
                "Version",
                "Hash",
                "Made",
                "Origin",
                "Trained on",
                "Held-out F1",
                "Then running",
                "Frames in range",
            ]);
            for e in &self.models {
                let frames: u64 = self
                    .stats
                    .runs
                    .iter()
                    .filter(|r| r.version == e.version && r.hash == e.hash)
                    .map(|r| r.frames)
                    .sum();
                let (f1, running) = e.gate.as_ref().map_or(("-".into(), "-".into()), |g| {
                    (
                        format!("{:.3} ({} frames)", g.f1, g.frames),
                        format!("{:.3}", g.running_f1),
                    )
                });
                t.row(
                    &[
                        (NUM, e.version.to_string()),
                        ("", format!("<code>{}</code>", esc(&e.hash))),
                        ("", esc(&second(&e.time))),
                        ("", esc(&format!("{:?}", e.origin).to_lowercase())),
                        (
                            "",
                            format!("line {}, {} frames", e.trained_on.line, e.trained_on.frames),
                        ),
                        (NUM, f1),
                        (NUM, running),
                        (NUM, count(frames)),
                    ],
                    &e.reason,
                );
            }
            t.end(h);
        }
        if !self.events.is_empty() {
            let (rows, left) = latest(&self.events);
            h.push_str("<h3>Decisions</h3>");
            let mut t = Table::new(&["Time", "Event", "By", "Decision", "Model"]);
            for e in rows {
                t.row(
                    &[
                        ("", esc(&second(&e.time))),
                        ("", esc(&e.event)),
                        ("", esc(&e.by)),
                        ("", esc(&e.decision)),
                        (
                            "",
                            e.model.as_ref().map_or(String::new(), |m| {
                                format!("v{} <code>{}</code>", m.version, esc(&m.hash))
                            }),
                        ),
                    ],
                    &e.reason,
                );
            }
            t.end(h);
            if left > 0 {
                let _ = write!(
                    h,
                    "<p class=\"note\">{left} earlier decision(s) not shown.</p>"
                );
            }
        }
        h.push_str("</section>");
    }

    fn alert_table(&self, h: &mut String) {
        h.push_str("<section><h2>Alerts</h2>");
        if self.alerts.is_empty() {
            h.push_str("<p>No alert in this range.</p></section>");
            return;
        }
        let (rows, left) = latest(&self.alerts);
        let mut t = Table::new(&[
            "Time",
            "State",
            "Statistic",
            "Value",
            "Watch / alert",
            "Model",
        ]);
        for a in rows {
            t.row(
                &[
                    ("", esc(&second(&a.time))),
                    (level_class(&a.state), esc(&a.state)),
                    ("", esc(&a.statistic)),
                    (NUM, format!("{:.3}", a.value)),
                    (
                        NUM,
                        format!("{} / {}", a.thresholds.watch, a.thresholds.alert),
                    ),
                    (NUM, format!("v{}", a.model_version)),
                ],
                &a.message,
            );
        }
        t.end(h);
        if left > 0 {
            let _ = write!(
                h,
                "<p class=\"note\">{left} earlier alert line(s) not shown.</p>"
            );
        }
        h.push_str("</section>");
    }

    fn reject_table(&self, h: &mut String) {
        h.push_str("<section><h2>Rejected files</h2>");
        if self.rejects.is_empty() {
            h.push_str("<p>No file was rejected in this range.</p></section>");
            return;
        }
        let (rows, left) = latest(&self.rejects);
        let mut t = Table::new(&["Time", "File"]);
        for r in rows {
            t.row(
                &[
                    ("", esc(&second(&format_time(r.time)))),
                    ("", format!("<code>{}</code>", esc(&r.name))),
                ],
                &r.reason,
            );
        }
        t.end(h);
        if left > 0 {
            let _ = write!(
                h,
                "<p class=\"note\">{left} earlier rejected file(s) not shown.</p>"
            );
        }
        h.push_str("</section>");
    }

    fn pictures(&self, h: &mut String) {
        h.push_str("<section><h2>Frames with the most objects</h2>");
        if self.thumbnails.is_empty() {
            h.push_str("<p>No frame with an object in this range.</p></section>");
            return;
        }
        h.push_str("<p class=\"note\">Ink in light grey, detected pixels in blue, each object boxed in vermillion with its id and score; drawn by the model that made the record.</p><div class=\"thumbs\">");
        let b64 = base64::engine::general_purpose::STANDARD;
        for t in &self.thumbnails {
            let caption = format!(
                "{} · {} object(s), best {:.2} · model v{} · {}",
                t.frame,
                t.objects,
                t.max_score,
                t.model_version,
                second(&t.time)
            );
            match &t.png {
                Ok(png) => {
                    let _ = write!(
                        h,
                        "<figure><img alt=\"{c}\" src=\"data:image/png;base64,{}\"><figcaption>{c}</figcaption></figure>",
                        b64.encode(png),
                        c = esc(&caption)
                    );
                }
                Err(why) => {
                    let _ = write!(
                        h,
                        "<figure><figcaption>{}<br><span class=\"note\">No picture: {}</span></figcaption></figure>",
                        esc(&caption),
                        esc(why)
                    );
                }
            }
        }
        h.push_str("</div></section>");
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::monitor::Thresholds;

    fn alert(t: Millis, state: &str) -> Alert {
        Alert {
            time: format_time(t),
            monitor: "input".into(),
            statistic: "leaf_psi".into(),
            value: 0.3,
            thresholds: Thresholds {
                watch: 0.1,
                alert: 0.25,
            },
            model_version: 2,
            model_hash: "abc".into(),
            window: 50,
            state: state.into(),
            message: "moved <a lot>".into(),
            repeats: 0,
        }
    }

    #[test]
    fn long_tables_show_their_latest_rows_and_say_how_many_are_left_out() {
        let t0 = parse_time("2026-12-01T00:00:00.000Z").unwrap();
        let report = Report {
            title: "box <7>".into(),
            generated: t0 + 24 * HOUR,
            range: Range {
                from: Some(t0),
                to: Some(t0 + 24 * HOUR),
            },
            alerts: (0..250).map(|k| alert(t0 + k * 60_000, "alert")).collect(),
            thumbnails: vec![Thumbnail {
                frame: "loom-<b>.pbm".into(),
                time: format_time(t0),
                objects: 3,
                max_score: 0.9,
                model_version: 2,
                png: Err("the frame has left the archive".into()),
            }],
            ..Report::default()
        };
        let html = report.html();
        assert!(html.contains("<title>box &lt;7&gt;</title>"));
        assert!(html.contains("50 earlier alert line(s) not shown."));
        assert_eq!(html.matches("moved &lt;a lot&gt;").count(), TABLE_ROWS);
        assert!(html.contains("loom-&lt;b&gt;.pbm"));
        assert!(html.contains("No picture: the frame has left the archive"));
        assert!(html.contains("No drift history in this range"));
        assert!(html.contains("No frame was logged in this range."));
        assert!(html.contains("Alerts<b>250</b>"));
        // The span is the range asked for, in whole hours.
        assert_eq!(
            report.span(),
            Span {
                from: t0,
                to: t0 + 24 * HOUR
            }
        );
    }

    #[test]
    fn an_open_range_starts_at_the_first_record() {
        let t0 = parse_time("2026-12-01T10:20:00.000Z").unwrap();
        let mut stats = ReportStats::new(0);
        let line = format!(
            "{{\"time\":\"{}\",\"frame\":\"f.pbm\",\"sha256\":\"x\",\"width\":1,\"height\":1,\"model_version\":1,\"model_hash\":\"h\",\"millis\":2.0,\"objects\":[]}}",
            format_time(t0)
        );
        stats.add_line(line.as_bytes(), false, &Range::default());
        let report = Report {
            generated: t0 + 3 * HOUR,
            stats,
            ..Report::default()
        };
        assert_eq!(
            report.span(),
            Span {
                from: parse_time("2026-12-01T10:00:00.000Z").unwrap(),
                to: parse_time("2026-12-01T14:00:00.000Z").unwrap()
            }
        );
        let html = report.html();
        assert!(html.contains("Frames<b>1</b>"));
        assert!(html.contains("Longest stretch without a logged frame: 3 h"));
    }
}
