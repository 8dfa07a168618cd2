//! Maintenance review through the real binary: `burlwatch log` over a
//! month of detection logs generated here (rotated files, an unreadable
//! line, a torn last line), with every count checked against the
//! generator's own bookkeeping.

use std::io::Write;

use burlwatch::record::{FrameRecord, ObjectRecord};
use burlwatch::review::{format_time, parse_time, HOUR};

use crate::util::{burlwatch, burlwatch_with, folders_section, Dir};

/// One record a minute for 30 days from 2026-11-01; `objects(i)` objects
/// on the i-th; model 1 for the first half, model 2 after.
const RECORDS: usize = 30 * 24 * 60;
const START: &str = "2026-11-01T00:00:00.000Z";
/// Records per rotated file.
const PER_FILE: usize = 5000;

fn objects(i: usize) -> usize {
    if i.is_multiple_of(7) {
        i % 3 + 1
    } else {
        0
    }
}

fn record(i: usize) -> FrameRecord {
    let t = parse_time(START).unwrap() + i as i64 * 60_000;
    let n = objects(i);
    FrameRecord {
        time: format_time(t),
        frame: format!("loom-{i:06}.pbm"),
        sha256: format!("{i:064x}"),
        width: 256,
        height: 256,
        model_version: if i < RECORDS / 2 { 1 } else { 2 },
        model_hash: if i < RECORDS / 2 {
            "aaaaaaaaaaaa"
        } else {
            "bbbbbbbbbbbb"
        }
        .into(),
        millis: 1.0 + (i % 100) as f64 * 0.01,
        objects: (0..n)
            .map(|k| ObjectRecord {
                id: k as u32 + 1,
                bbox: [k as u32, 0, k as u32 + 4, 4],
                centroid: [k as f64 + 2.0, 2.0],
                area: 25,
                score: 0.5 + 0.1 * k as f64,
            })
            .collect(),
    }
}

/// The logs folder of a box: rotated files named as the daemon names them
/// (the time of rotation, after their last record), one unreadable line in
/// the second file, and a torn line at the end of the current file.
fn write_month(logs: &std::path::Path) {
    std::fs::create_dir_all(logs).unwrap();
    let mut i = 0;
    let mut file_no = 0;
    while i < RECORDS {
        let end = (i + PER_FILE).min(RECORDS);
        let current = end == RECORDS;
        let mut text = Vec::new();
        for k in i..end {
            serde_json::to_writer(&mut text, &record(k)).unwrap();
            text.push(b'\n');
            if file_no == 1 && k == i + 10 {
                text.extend_from_slice(b"this line is not a record\n");
            }
        }
        let name = if current {
            text.extend_from_slice(b"{\"time\":\"2026-11-30T23:59:59.000Z\",\"fra");
            "detections.jsonl".to_string()
        } else {
            // Rotated one millisecond after its last record.
            let t = parse_time(&record(end - 1).time).unwrap() + 1;
            let s = format_time(t);
            // YYYYMMDDTHHMMSS_nnnnnnnnnZ
            let digits: String = s[..19]
                .chars()
                .filter(|c| c.is_ascii_digit() || *c == 'T')
                .collect();
            format!("detections-{digits}_{:03}000000Z.jsonl", &s[20..23])
        };
        std::fs::File::create(logs.join(name))
            .unwrap()
            .write_all(&text)
            .unwrap();
        i = end;
        file_no += 1;
    }
}

fn config(d: &Dir) -> std::path::PathBuf {
    let p = d.join("burlwatch.toml");
    std::fs::write(&p, folders_section(d.path())).unwrap();
    p
}

fn summary(d: &Dir, args: &[&str]) -> serde_json::Value {
    let mut v = vec!["log", "summary", "--json"];
    v.extend_from_slice(args);
    let r = burlwatch_with(d.path(), &config(d), &v);
    assert_eq!(r.code, 0, "{}", r.stderr);
    serde_json::from_str(&r.stdout).unwrap()
}

#[test]
fn a_month_of_logs_summarises_exactly() {
    let d = Dir::new();
    write_month(&d.join("logs"));
    let all = summary(&d, &[]);
    let total: usize = (0..RECORDS).map(objects).sum();
    let with: usize = (0..RECORDS).filter(|&i| objects(i) > 0).count();
    assert_eq!(all["frames"], RECORDS);
    assert_eq!(all["objects"], total);
    assert_eq!(all["frames_with_objects"], with);
    assert_eq!(all["torn_lines"], 1);
    assert_eq!(all["unreadable_lines"], 1);
    assert_eq!(all["files"], RECORDS.div_ceil(PER_FILE));
    assert_eq!(all["hours"].as_array().unwrap().len(), 30 * 24);
    let models = all["models"].as_array().unwrap();
    assert_eq!(models.len(), 2);
    assert_eq!(models[0]["frames"], RECORDS / 2);
    assert_eq!(models[1]["version"], 2);
    // Processing times 1.00..1.99 ms, each equally often: the nearest-rank
    // median is 1.49 and p99 1.98 (common practice), within the
    // histogram's 1%.
    let p50 = all["millis_p50"].as_f64().unwrap();
    let p99 = all["millis_p99"].as_f64().unwrap();
    assert!((p50 - 1.49).abs() <= 1.49 * 0.01, "{p50}");
    assert!((p99 - 1.98).abs() <= 1.98 * 0.01, "{p99}");

    // One day in the middle, across a rotation: the generator's counts.
    let from = parse_time("2026-11-10T00:00:00.000Z").unwrap();
    let day: Vec<usize> = (0..RECORDS)
        .filter(|&i| {
            let t = parse_time(&record(i).time).unwrap();
            t >= from && t < from + 24 * HOUR
        })
        .collect();
    let one = summary(
        &d,
        &["--from", "2026-11-10", "--to", "2026-11-11T00:00:00Z"],
    );
    assert_eq!(one["frames"], day.len());
    assert_eq!(
        one["objects"],
        day.iter().map(|&i| objects(i)).sum::<usize>()
    );
    assert_eq!(one["hours"].as_array().unwrap().len(), 24);
    assert_eq!(one["hours"][5]["frames"], 60);
    // Files rotated before the range are not read at all.
    assert!(one["files"].as_u64().unwrap() < all["files"].as_u64().unwrap());

    // The human summary: a table per day past a week, with bars.
    let r = burlwatch_with(d.path(), &config(&d), &["log", "summary"]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert!(r.stdout.contains("Per day (UTC)"), "{}", r.stdout);
    assert!(
        r.stdout
            .contains("1 torn last line(s), 1 unreadable line(s)"),
        "{}",
        r.stdout
    );
    let r = burlwatch_with(
        d.path(),
        &config(&d),
        &[
            "log",
            "summary",
            "--from",
            "2026-11-10",
            "--to",
            "2026-11-11",
        ],
    );
    assert!(r.stdout.contains("Per hour (UTC)"), "{}", r.stdout);
    assert!(
        r.stdout.contains("2026-11-10T05:00  ") && r.stdout.contains('#'),
        "{}",
        r.stdout
    );
}

#[test]
fn frames_are_filtered_and_one_frame_is_shown() {
    let d = Dir::new();
    write_month(&d.join("logs"));
    let cfg = config(&d);
    let r = burlwatch_with(
        d.path(),
        &cfg,
        &[
            "log",
            "frames",
            "--min-objects",
            "3",
            "--model",
            "2",
            "--limit",
            "0",
            "--json",
        ],
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    let want: Vec<usize> = (RECORDS / 2..RECORDS)
        .filter(|&i| objects(i) >= 3)
        .collect();
    let got: Vec<FrameRecord> = r
        .stdout
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect();
    assert_eq!(got.len(), want.len());
    assert_eq!(got[0], record(want[0]));
    // A score filter: objects score 0.5, 0.6, 0.7 by id, so 0.65 keeps the
    // frames with three objects; the last 5 are printed.
    let r = burlwatch_with(
        d.path(),
        &cfg,
        &["log", "frames", "--min-score", "0.65", "--limit", "5"],
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    let all3 = (0..RECORDS).filter(|&i| objects(i) == 3).count();
    assert!(
        r.stdout
            .contains(&format!("5 of {all3} matching frame(s) shown")),
        "{}",
        r.stdout
    );
    let last3 = (0..RECORDS).rev().find(|&i| objects(i) == 3).unwrap();
    assert!(r.stdout.contains(&record(last3).frame), "{}", r.stdout);

    let r = burlwatch_with(
        d.path(),
        &cfg,
        &["log", "show", "loom-000014.pbm", "--json"],
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    let shown: FrameRecord = serde_json::from_str(&r.stdout).unwrap();
    assert_eq!(shown, record(14));
    let r = burlwatch_with(d.path(), &cfg, &["log", "show", "loom-000014.pbm"]);
    assert!(
        r.stdout.contains("object   3") && r.stdout.contains("score 0.700"),
        "{}",
        r.stdout
    );
    let r = burlwatch_with(d.path(), &cfg, &["log", "show", "no-such.pbm"]);
    assert_eq!(r.code, 1);
    assert!(r.stderr.contains("no-such.pbm"), "{}", r.stderr);
    // Bad times are named.
    let r = burlwatch_with(
        d.path(),
        &cfg,
        &["log", "summary", "--from", "last tuesday"],
    );
    assert_eq!(r.code, 1);
    assert!(r.stderr.contains("--from \"last tuesday\""), "{}", r.stderr);
}

/// An archived frame drawn with the model its record names: the PNG
/// decodes (with the `image` crate, a general-purpose reference decoder)
/// to the frame's size times the zoom, and the pixels just outside a
/// logged object's box have the box colour; a frame outside the daemon's
/// folders is drawn with `--model --frame`.
#[test]
fn render_draws_a_logged_frame_and_an_outside_one() {
    use burlwatch::render::BOX;

    let d = Dir::new();
    let (cfg, records) = reviewed_box(&d);
    // An object away from the frame's left edge, so the pixel left of its
    // box is in the picture.
    let rec = records
        .into_iter()
        .find(|r| r.objects.first().is_some_and(|o| o.bbox[0] > 0))
        .expect("a frame with objects");
    let out = d.join("picture.png");
    let r = burlwatch_with(
        d.path(),
        &cfg,
        &["render", &rec.frame, "--out", out.to_str().unwrap()],
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    let img = image::open(&out).unwrap().to_rgb8();
    // 96 pixels wide: zoom 5 makes it 480.
    assert_eq!(img.dimensions(), (96 * 5, 64 * 5));
    let o = &rec.objects[0];
    // The picture pixel just left of the object's box, at its middle row.
    let (x, y) = (o.bbox[0] * 5 - 1, (o.bbox[1] + o.bbox[3]) / 2 * 5 + 2);
    assert_eq!(img.get_pixel(x, y).0, BOX, "at {x},{y}");

    // The same frame from outside the folders, with the model file.
    let frame_file = d.join("outside.pbm");
    let archived = d.join(&format!("archive/{}", rec.frame));
    std::fs::copy(&archived, &frame_file).unwrap();
    let out2 = d.join("outside.png");
    let r = burlwatch(
        d.path(),
        &[
            "render",
            "--model",
            d.join("state/model.json").to_str().unwrap(),
            "--frame",
            frame_file.to_str().unwrap(),
            "--out",
            out2.to_str().unwrap(),
            "--zoom",
            "2",
        ],
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    let img2 = image::open(&out2).unwrap().to_rgb8();
    assert_eq!(img2.dimensions(), (96 * 2, 64 * 2));
    assert_eq!(
        img2.get_pixel(o.bbox[0] * 2 - 1, (o.bbox[1] + o.bbox[3]) / 2 * 2)
            .0,
        BOX
    );
    // A frame with no record is named.
    let r = burlwatch_with(
        d.path(),
        &cfg,
        &["render", "nothing.pbm", "--out", out.to_str().unwrap()],
    );
    assert_eq!(r.code, 1);
    assert!(r.stderr.contains("nothing.pbm"), "{}", r.stderr);
}

/// A box whose daemon handled loom frames in batches (so the drift
/// history, one line every 0.6 s, has several lines) and rejected one
/// file; returns the configuration and the records.
fn reviewed_box(d: &Dir) -> (std::path::PathBuf, Vec<FrameRecord>) {
    use crate::util::{rename_in, start_watching, stop, wait_for};
    use burlwatch::synth::{self, LoomParams};

    let p = LoomParams {
        width: 96,
        height: 64,
        ..LoomParams::standard()
    };
    let seed = d.join("seed");
    std::fs::create_dir_all(&seed).unwrap();
    for (i, g) in synth::generate_set(&p, 1, 30).into_iter().enumerate() {
        burlwatch::fileio::data::write_pair(&seed, &format!("seed-{i:04}"), &g.frame, &g.mask)
            .unwrap();
    }
    let cfg = d.join("burlwatch.toml");
    std::fs::write(
        &cfg,
        format!(
            "{}[training]\nseed_data = {:?}\n[watch]\nsettle_millis = 50\nrescan_seconds = 0.2\n\
             [drift]\nwindow_frames = 5\nwarmup_frames = 10\nhistory_minutes = 0.01\n[status]\nenabled = false\n",
            folders_section(d.path()),
            seed
        ),
    )
    .unwrap();
    let daemon = start_watching(&cfg, d.path(), &d.join("daemon.stderr"));
    let records = || -> Vec<FrameRecord> {
        crate::util::whole_lines(
            &std::fs::read_to_string(d.join("logs/detections.jsonl")).unwrap_or_default(),
        )
        .map(|l| serde_json::from_str(l).unwrap())
        .collect()
    };
    let frames = synth::generate_set(&p, 78, 32);
    for (batch, chunk) in frames.chunks(4).enumerate() {
        for (i, g) in chunk.iter().enumerate() {
            rename_in(
                &d.join("inbox"),
                &format!("loom-{batch}-{i}.pbm"),
                &burlwatch::codec::encode_pbm(&g.frame),
            );
        }
        wait_for("a batch to be logged", 120, || {
            records().len() == (batch + 1) * 4.min(frames.len())
        });
        std::thread::sleep(std::time::Duration::from_millis(300));
    }
    rename_in(&d.join("inbox"), "broken <1>.pbm", b"P4\n96 64\n\x00");
    wait_for("the broken file to be rejected", 60, || {
        d.join("rejected/broken <1>.pbm.reason.txt").exists()
    });
    wait_for("a few drift history lines", 60, || {
        std::fs::read_to_string(d.join("logs/drift.jsonl"))
            .unwrap_or_default()
            .lines()
            .count()
            >= 2
    });
    stop(daemon);
    (cfg, records())
}

/// The SVG elements of a page, each as its own text.
fn svgs(html: &str) -> Vec<&str> {
    let mut out = Vec::new();
    let mut rest = html;
    while let Some(a) = rest.find("<svg") {
        let b = rest[a..].find("</svg>").expect("every svg is closed") + a + 6;
        out.push(&rest[a..b]);
        rest = &rest[b..];
    }
    out
}

/// The PNG pictures embedded in a page as data URIs, decoded.
fn pictures(html: &str) -> Vec<image::RgbImage> {
    use base64::Engine;
    html.split("src=\"data:image/png;base64,")
        .skip(1)
        .map(|s| {
            let b64 = &s[..s.find('"').unwrap()];
            let png = base64::engine::general_purpose::STANDARD
                .decode(b64)
                .unwrap();
            image::load_from_memory(&png).unwrap().to_rgb8()
        })
        .collect()
}

/// `burlwatch report` on a box whose daemon ran: one self-contained page
/// (no script, no outside address, every picture a data URI), its SVG
/// charts well-formed XML (checked with roxmltree, a general-purpose XML
/// parser), its counts those of the log, its thumbnails decoding (with the
/// `image` crate) to the frame's size times the zoom with the box colour
/// just outside the object, and a file name with markup in it escaped.
#[test]
fn the_report_is_one_self_contained_page_of_the_logs() {
    use burlwatch::render::BOX;

    let d = Dir::new();
    let (cfg, records) = reviewed_box(&d);
    let out = d.join("report.html");
    let r = burlwatch_with(
        d.path(),
        &cfg,
        &["report", "--since", "1h", "--out", out.to_str().unwrap()],
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    let html = std::fs::read_to_string(&out).unwrap();
    assert!(html.starts_with("<!DOCTYPE html>"));
    // Self-contained: no script, no linked file, no outside address but
    // the SVG namespace.
    assert!(!html.contains("<script") && !html.contains("<link"));
    assert_eq!(
        html.matches("src=\"").count(),
        html.matches("src=\"data:image/png;base64,").count()
    );
    assert_eq!(
        html.matches("http").count(),
        html.matches("http://www.w3.org/2000/svg").count()
    );
    // Charts: frames and objects, processing time, the drift statistics
    // that were not warming up, the model timeline.
    let charts = svgs(&html);
    assert!(charts.len() >= 5, "{} charts", charts.len());
    for svg in &charts {
        let doc = roxmltree::Document::parse(svg).unwrap_or_else(|e| panic!("{e}: {svg}"));
        let root = doc.root_element();
        assert_eq!(root.tag_name().name(), "svg");
        assert!(root.attribute("viewBox").is_some());
        assert!(root.children().any(|c| c.has_tag_name("title")));
    }
    assert!(
        charts
            .iter()
            .any(|s| s.contains("<title>Input: 2x2 pixel patterns")),
        "no pattern_psi chart"
    );
    // Counts as in the log.
    let objects: usize = records.iter().map(|r| r.objects.len()).sum();
    assert!(
        html.contains(&format!("Frames<b>{}</b>", records.len())),
        "frames card"
    );
    assert!(
        html.contains(&format!("Objects<b>{objects}</b>")),
        "objects card"
    );
    assert!(html.contains("Rejected files<b>1</b>"));
    // The rejected file's name, escaped.
    assert!(html.contains("broken &lt;1&gt;.pbm") && !html.contains("broken <1>"));
    // Thumbnails: the frames with the most objects, drawn.
    let with_objects = records.iter().filter(|r| !r.objects.is_empty()).count();
    let pics = pictures(&html);
    assert_eq!(pics.len(), with_objects.min(50));
    let best = records
        .iter()
        .max_by(|a, b| {
            let key = |r: &FrameRecord| {
                let s = r.objects.iter().map(|o| o.score).fold(0.0, f64::max);
                (r.objects.len(), s, r.time.clone())
            };
            key(a).partial_cmp(&key(b)).unwrap()
        })
        .unwrap();
    // 96 pixels wide: zoom 5.
    let first = &pics[0];
    assert_eq!(first.dimensions(), (96 * 5, 64 * 5));
    // The picture pixel just outside an object's box, at its middle row:
    // left of it, or right of it for an object at the frame's left edge.
    let o = &best.objects[0];
    let x = if o.bbox[0] > 0 {
        o.bbox[0] * 5 - 1
    } else {
        (o.bbox[2] + 1) * 5
    };
    let y = (o.bbox[1] + o.bbox[3]) / 2 * 5 + 2;
    assert_eq!(first.get_pixel(x, y).0, BOX, "at {x},{y} of {}", best.frame);
    assert!(html.contains(&best.frame));
    // A range with nothing in it is a page that says so.
    let r = burlwatch_with(
        d.path(),
        &cfg,
        &[
            "report",
            "--from",
            "2020-01-01T00:00:00Z",
            "--to",
            "2020-01-02T00:00:00Z",
            "--out",
            out.to_str().unwrap(),
        ],
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    let empty = std::fs::read_to_string(&out).unwrap();
    assert!(empty.contains("No frame was logged in this range."));
    assert!(empty.contains("Frames<b>0</b>"));
    // A wrong output name is refused before anything is read.
    let r = burlwatch_with(d.path(), &cfg, &["report", "--out", "report.txt"]);
    assert_eq!(r.code, 1);
    assert!(r.stderr.contains("report.txt"), "{}", r.stderr);
}

/// Runs Debian's Chromium headless on `args` with a fresh profile, as the
/// issue names the flags; killed after two minutes.
fn chromium(exe: &std::path::Path, profile: &std::path::Path, args: &[&str]) -> Vec<u8> {
    use std::process::{Command, Stdio};
    let mut child = Command::new(exe)
        .args([
            "--headless",
            "--no-sandbox",
            "--disable-gpu",
            "--no-first-run",
            "--disable-background-networking",
            "--disable-component-update",
            "--disable-sync",
            "--disable-quic",
            "--hide-scrollbars",
        ])
        .arg(format!("--user-data-dir={}", profile.display()))
        .args(args)
        .stdout(Stdio::piped())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    let mut stdout = child.stdout.take().unwrap();
    let reader = std::thread::spawn(move || {
        let mut out = Vec::new();
        std::io::Read::read_to_end(&mut stdout, &mut out).unwrap();
        out
    });
    let deadline = std::time::Instant::now() + std::time::Duration::from_secs(120);
    let status = loop {
        if let Some(s) = child.try_wait().unwrap() {
            break s;
        }
        if std::time::Instant::now() > deadline {
            let _ = child.kill();
            panic!("chromium {args:?} did not finish in two minutes");
        }
        std::thread::sleep(std::time::Duration::from_millis(50));
    };
    assert!(status.success(), "chromium {args:?}: {status}");
    reader.join().unwrap()
}

/// The report opened in real headless Chromium (Debian's `chromium`): the
/// page it parsed (`--dump-dom`) holds every SVG chart of the file as
/// elements, and its screenshots, at a laptop's and a phone's
/// width, are not blank and show the charts' bars in their colours.
#[test]
fn the_report_renders_in_headless_chromium() {
    let Some(exe) = crate::util::tool("chromium", "chromium") else {
        return;
    };
    let d = Dir::new();
    let (cfg, records) = reviewed_box(&d);
    let out = d.join("report.html");
    let r = burlwatch_with(
        d.path(),
        &cfg,
        &[
            "report",
            "--since",
            "1h",
            "--out",
            out.to_str().unwrap(),
            "--thumbnails",
            "0",
        ],
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    let html = std::fs::read_to_string(&out).unwrap();
    let url = format!("file://{}", out.display());

    let dom = String::from_utf8(chromium(
        &exe,
        &d.join("profile-dom"),
        &["--dump-dom", &url],
    ))
    .unwrap();
    assert_eq!(dom.matches("<svg").count(), html.matches("<svg").count());
    assert!(dom.contains("<title>Frames per hour</title>"), "{dom}");
    assert!(records.iter().any(|r| !r.objects.is_empty()));
    assert_eq!(
        dom.matches("<polyline").count() + dom.matches("<rect").count(),
        html.matches("<polyline").count() + html.matches("<rect").count()
    );

    for (width, least_blue) in [(1000u32, 400usize), (390, 150)] {
        let shot = d.join(&format!("shot-{width}.png"));
        chromium(
            &exe,
            &d.join(&format!("profile-{width}")),
            &[
                &format!("--window-size={width},2400"),
                &format!("--screenshot={}", shot.display()),
                &url,
            ],
        );
        let img = image::open(&shot).unwrap().to_rgb8();
        assert_eq!(img.dimensions(), (width, 2400));
        let pixels = img.pixels().count();
        let inked = img.pixels().filter(|p| p.0 != [255, 255, 255]).count();
        assert!(inked * 50 > pixels, "{width}: blank ({inked} of {pixels})");
        // The frames bars are filled with Okabe-Ito blue, the objects bars
        // with vermillion (svg::BLUE, svg::VERMILLION); no other part of
        // this page (no thumbnails) has those colours.
        let blue = img.pixels().filter(|p| p.0 == [0, 114, 178]).count();
        let vermillion = img.pixels().filter(|p| p.0 == [213, 94, 0]).count();
        assert!(blue >= least_blue, "{width}: {blue} blue pixels");
        assert!(
            vermillion >= least_blue,
            "{width}: {vermillion} vermillion pixels"
        );
    }
}
