//! The operator's correction file: what it says about one archived frame,
//! and the labelled frame it makes. Pure: text and bit planes in, values
//! out; the daemon's `corrections` module finds the frame, its record and
//! the model, and stores the result.
//!
//! The file is TOML with keys of our own:
//!
//! ```toml
//! format = "burlwatch-correction"   # optional
//! format_version = 1                # optional
//! frame = "loom-0007.pbm"           # the frame's file name in its log record
//! sha256 = "…64 hex digits…"        # that record's sha256
//! right = true                      # the detection is right as it stands
//! wrong = [3, 7]                    # these reported objects are false alarms
//! missed = [[10, 20, 30, 40], { ellipse = [60.0, 40.0, 8.0, 5.0] }]
//! only = [[10, 20, 30, 40]]         # the defects are exactly these regions
//! mask = "loom-0007.truth.pbm"      # the truth is this mask, beside the file
//! unknown = [[0, 0, 15, 15]]        # don't know here
//! note = "free text"
//! by = "operator"
//! ```
//!
//! A region is a box `[x0, y0, x1, y1]`, inclusive (the detection log's
//! convention), or an ellipse `{ ellipse = [cx, cy, rx, ry] }` whose pixels
//! satisfy `((x-cx)/rx)^2 + ((y-cy)/ry)^2 <= 1`.
//!
//! The labels, in order: the base is the `mask` if given, else the `only`
//! regions as targets if any, else the detection as it stands (the pixels
//! of the record's objects); then each `wrong` object's pixels become
//! clear; then `missed` regions become targets; then `unknown` regions are
//! left out of training and scoring. `right` says the base stands as is.
//! Contradictions are refused: `right` with anything but `unknown`, `mask`
//! with `wrong`/`missed`/`only`, `only` with `wrong`/`missed`.
//!
//! Invariants: the same correction, frame and detection always give the
//! same labels; a frame is a name, never a path.

use serde::{Deserialize, Serialize};

use crate::detect::group;
use crate::error::{Error, ErrorKind, Result};
use crate::frame::{BitFrame, LabelledFrame};
use crate::record::FrameRecord;

pub const FORMAT: &str = "burlwatch-correction";
pub const FORMAT_VERSION: u32 = 1;

fn bad(msg: impl Into<String>) -> Error {
    Error::new(ErrorKind::Correction(msg.into()))
}

/// A region of a frame.
#[derive(Clone, Debug, PartialEq)]
pub enum Region {
    /// Inclusive pixel box.
    Box {
        x0: u32,
        y0: u32,
        x1: u32,
        y1: u32,
    },
    Ellipse {
        cx: f64,
        cy: f64,
        rx: f64,
        ry: f64,
    },
}

impl Region {
    /// Parses the command-line form: `x0,y0,x1,y1` (a box) or
    /// `ellipse:cx,cy,rx,ry`.
    pub fn parse_arg(s: &str) -> Result<Region> {
        let (ellipse, nums) = match s.strip_prefix("ellipse:") {
            Some(rest) => (true, rest),
            None => (false, s),
        };
        let parts: Vec<&str> = nums.split(',').map(str::trim).collect();
        if parts.len() != 4 {
            return Err(bad(format!(
                "region {s:?} is not x0,y0,x1,y1 or ellipse:cx,cy,rx,ry (four numbers)"
            )));
        }
        if ellipse {
            let v: Vec<f64> = parts
                .iter()
                .map(|p| p.parse::<f64>())
                .collect::<std::result::Result<_, _>>()
                .map_err(|_| bad(format!("ellipse {s:?}: cx,cy,rx,ry must be numbers")))?;
            Ok(Region::Ellipse {
                cx: v[0],
                cy: v[1],
                rx: v[2],
                ry: v[3],
            })
        } else {
            let v: Vec<u32> = parts
                .iter()
                .map(|p| p.parse::<u32>())
                .collect::<std::result::Result<_, _>>()
                .map_err(|_| {
                    bad(format!(
                        "box {s:?}: x0,y0,x1,y1 must be whole pixel coordinates"
                    ))
                })?;
            Ok(Region::Box {
                x0: v[0],
                y0: v[1],
                x1: v[2],
                y1: v[3],
            })
        }
    }

    /// Whether every pixel the region covers lies inside a `width` x
    /// `height` frame (and the region is well formed).
    pub fn inside(&self, width: u32, height: u32) -> bool {
        match *self {
            Region::Box { x0, y0, x1, y1 } => x0 <= x1 && y0 <= y1 && x1 < width && y1 < height,
            Region::Ellipse { cx, cy, rx, ry } => {
                [cx, cy, rx, ry].iter().all(|v| v.is_finite())
                    && rx > 0.0
                    && ry > 0.0
                    && cx - rx >= 0.0
                    && cy - ry >= 0.0
                    && cx + rx <= width as f64 - 1.0
                    && cy + ry <= height as f64 - 1.0
            }
        }
    }

    /// Sets (or clears) the region's pixels in `plane` (pixels outside the
    /// plane are passed over).
    pub fn paint(&self, plane: &mut BitFrame, value: bool) {
        let (w, h) = (plane.width() as i64, plane.height() as i64);
        match *self {
            Region::Box { x0, y0, x1, y1 } => {
                for y in y0 as i64..=(y1 as i64).min(h - 1) {
                    for x in x0 as i64..=(x1 as i64).min(w - 1) {
                        plane.set(x as usize, y as usize, value);
                    }
                }
            }
            Region::Ellipse { cx, cy, rx, ry } => {
                if !(rx > 0.0 && ry > 0.0) {
                    return;
                }
                let ys = ((cy - ry).ceil().max(0.0) as i64)..=((cy + ry).floor() as i64).min(h - 1);
                for y in ys {
                    let xs =
                        ((cx - rx).ceil().max(0.0) as i64)..=((cx + rx).floor() as i64).min(w - 1);
                    for x in xs {
                        let (dx, dy) = ((x as f64 - cx) / rx, (y as f64 - cy) / ry);
                        if dx * dx + dy * dy <= 1.0 {
                            plane.set(x as usize, y as usize, value);
                        }
                    }
                }
            }
        }
    }
}

impl std::fmt::Display for Region {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            Region::Box { x0, y0, x1, y1 } => write!(f, "{x0},{y0},{x1},{y1}"),
            Region::Ellipse { cx, cy, rx, ry } => write!(f, "ellipse:{cx},{cy},{rx},{ry}"),
        }
    }
}

/// A region as the file writes it.
#[derive(Debug, Serialize, Deserialize)]
#[serde(untagged)]
enum RawRegion {
    Box([u32; 4]),
    Ellipse { ellipse: [f64; 4] },
}

impl From<&RawRegion> for Region {
    fn from(r: &RawRegion) -> Region {
        match *r {
            RawRegion::Box([x0, y0, x1, y1]) => Region::Box { x0, y0, x1, y1 },
            RawRegion::Ellipse {
                ellipse: [cx, cy, rx, ry],
            } => Region::Ellipse { cx, cy, rx, ry },
        }
    }
}

impl From<&Region> for RawRegion {
    fn from(r: &Region) -> RawRegion {
        match *r {
            Region::Box { x0, y0, x1, y1 } => RawRegion::Box([x0, y0, x1, y1]),
            Region::Ellipse { cx, cy, rx, ry } => RawRegion::Ellipse {
                ellipse: [cx, cy, rx, ry],
            },
        }
    }
}

/// The file as written.
#[derive(Debug, Default, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawCorrection {
    #[serde(skip_serializing_if = "Option::is_none")]
    format: Option<String>,
    #[serde(skip_serializing_if = "Option::is_none")]
    format_version: Option<u32>,
    frame: String,
    sha256: String,
    #[serde(default, skip_serializing_if = "std::ops::Not::not")]
    right: bool,
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    wrong: Vec<u32>,
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    missed: Vec<RawRegion>,
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    only: Vec<RawRegion>,
    #[serde(skip_serializing_if = "Option::is_none")]
    mask: Option<String>,
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    unknown: Vec<RawRegion>,
    #[serde(skip_serializing_if = "Option::is_none")]
    note: Option<String>,
    #[serde(skip_serializing_if = "Option::is_none")]
    by: Option<String>,
}

/// What one correction file says about one archived frame.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Correction {
    pub frame: String,
    pub sha256: String,
    pub right: bool,
    pub wrong: Vec<u32>,
    pub missed: Vec<Region>,
    pub only: Vec<Region>,
    pub mask: Option<String>,
    pub unknown: Vec<Region>,
    pub note: Option<String>,
    pub by: Option<String>,
}

/// A frame is a name, never a path.
pub fn check_name(name: &str) -> Result<()> {
    let why = if name.is_empty() {
        Some("is empty")
    } else if name == "." || name == ".." {
        Some("is not a file name")
    } else if name.contains('/') || name.contains('\\') {
        Some("is a path; give the file name only")
    } else if name.contains('\0') {
        Some("holds a NUL byte")
    } else if name.starts_with('.') {
        Some("starts with a dot")
    } else if name.len() > 255 {
        Some("is longer than 255 bytes")
    } else {
        None
    };
    match why {
        Some(w) => Err(bad(format!("frame name {name:?} {w}"))),
        None => Ok(()),
    }
}

impl Correction {
    /// Parses a correction file's text; an error names the key and line.
    pub fn parse(text: &str) -> Result<Correction> {
        let raw: RawCorrection = serde_path_to_error::deserialize(toml::Deserializer::new(text))
            .map_err(|e| {
                let key = e.path().to_string();
                let inner = e.into_inner();
                let line = inner
                    .span()
                    .map(|sp| text[..sp.start.min(text.len())].matches('\n').count() + 1);
                let mut msg = inner.message().trim_end().to_string();
                if msg.starts_with("unknown field") {
                    msg = format!("unknown key ({msg})");
                }
                if key != "." && !key.is_empty() {
                    msg = format!("{key}: {msg}");
                }
                if let Some(l) = line {
                    msg.push_str(&format!(" (line {l})"));
                }
                bad(msg)
            })?;
        if let Some(f) = &raw.format {
            if f != FORMAT {
                return Err(bad(format!("format is {f:?}, expected {FORMAT:?}")));
            }
        }
        if let Some(v) = raw.format_version {
            if v != FORMAT_VERSION {
                return Err(bad(format!(
                    "format_version {v} is not known (this build reads {FORMAT_VERSION})"
                )));
            }
        }
        let regions = |v: &[RawRegion]| v.iter().map(Region::from).collect();
        Ok(Correction {
            frame: raw.frame,
            sha256: raw.sha256,
            right: raw.right,
            wrong: raw.wrong,
            missed: regions(&raw.missed),
            only: regions(&raw.only),
            mask: raw.mask,
            unknown: regions(&raw.unknown),
            note: raw.note,
            by: raw.by,
        })
    }

    /// The file's text, with a comment header.
    pub fn to_toml(&self) -> String {
        let regions = |v: &[Region]| v.iter().map(RawRegion::from).collect();
        let raw = RawCorrection {
            format: Some(FORMAT.into()),
            format_version: Some(FORMAT_VERSION),
            frame: self.frame.clone(),
            sha256: self.sha256.clone(),
            right: self.right,
            wrong: self.wrong.clone(),
            missed: regions(&self.missed),
            only: regions(&self.only),
            mask: self.mask.clone(),
            unknown: regions(&self.unknown),
            note: self.note.clone(),
            by: self.by.clone(),
        };
        format!(
            "# burlwatch correction: what was wrong with one archived frame.\n{}",
            toml::to_string(&raw).expect("correction serialises")
        )
    }

    /// Checks what can be checked without files: names, the hash, that
    /// something is said, and that the statements agree.
    pub fn check_statements(&self) -> Result<()> {
        check_name(&self.frame)?;
        if self.sha256.len() != 64
            || !self
                .sha256
                .bytes()
                .all(|b| b.is_ascii_digit() || (b'a'..=b'f').contains(&b))
        {
            return Err(bad(format!(
                "sha256 {:?} is not 64 lower-case hex digits (copy it from the frame's log record)",
                self.sha256
            )));
        }
        if let Some(m) = &self.mask {
            check_name(m).map_err(|e| bad(format!("mask: {}", e.kind())))?;
        }
        let says_more = !self.wrong.is_empty() || !self.missed.is_empty();
        if !self.right
            && !says_more
            && self.only.is_empty()
            && self.mask.is_none()
            && self.unknown.is_empty()
        {
            return Err(bad(
                "says nothing: give right, wrong, missed, only, mask or unknown",
            ));
        }
        if self.right && (says_more || !self.only.is_empty() || self.mask.is_some()) {
            return Err(bad(
                "right says the detection stands; it cannot go with wrong, missed, only or mask",
            ));
        }
        if self.mask.is_some() && (says_more || !self.only.is_empty()) {
            return Err(bad(
                "mask is the whole truth; it cannot go with wrong, missed or only",
            ));
        }
        if !self.only.is_empty() && says_more {
            return Err(bad(
                "only already says the whole truth; it cannot go with wrong or missed",
            ));
        }
        let mut ids = self.wrong.clone();
        ids.sort_unstable();
        if let Some(w) = ids.windows(2).find(|w| w[0] == w[1]) {
            return Err(bad(format!("wrong: id {} is given twice", w[0])));
        }
        Ok(())
    }

    /// Checks the correction against its frame's log record.
    pub fn check_record(&self, record: &FrameRecord) -> Result<()> {
        if record.frame != self.frame || record.sha256 != self.sha256 {
            return Err(bad(format!(
                "is about {} ({}), but the record is of {} ({})",
                self.frame, self.sha256, record.frame, record.sha256
            )));
        }
        let ids: Vec<u32> = record.objects.iter().map(|o| o.id).collect();
        let missing: Vec<String> = self
            .wrong
            .iter()
            .filter(|i| !ids.contains(i))
            .map(u32::to_string)
            .collect();
        if !missing.is_empty() {
            let have = if ids.is_empty() {
                "the record has no objects".to_string()
            } else {
                format!(
                    "its objects are {}",
                    ids.iter()
                        .map(u32::to_string)
                        .collect::<Vec<_>>()
                        .join(", ")
                )
            };
            return Err(bad(format!(
                "wrong: no object {} in the record of {}; {have}",
                missing.join(", "),
                self.frame
            )));
        }
        for (key, list) in [
            ("missed", &self.missed),
            ("only", &self.only),
            ("unknown", &self.unknown),
        ] {
            if let Some(r) = list.iter().find(|r| !r.inside(record.width, record.height)) {
                return Err(bad(format!(
                    "{key}: region {r} is not inside the {}x{} frame",
                    record.width, record.height
                )));
            }
        }
        Ok(())
    }

    /// The error indicator the error-drift monitor takes from this
    /// correction of `record`, whose labels are `labelled`: an error when
    /// the operator reported a wrong object or a missed one, or gave the
    /// truth (`only`, `mask`) and its objects do not match the record's
    /// one to one (PASCAL VOC matching at IoU 0.5, `score::object_confusion`);
    /// no error for `right`, or for `unknown` alone (the detection stands
    /// elsewhere).
    pub fn reports_error(&self, record: &FrameRecord, labelled: &LabelledFrame) -> bool {
        if !self.wrong.is_empty() || !self.missed.is_empty() {
            return true;
        }
        if self.mask.is_none() && self.only.is_empty() {
            return false;
        }
        let detected: Vec<group::Object> = record
            .objects
            .iter()
            .map(|o| group::Object {
                id: o.id,
                bbox: group::BBox {
                    x0: o.bbox[0],
                    y0: o.bbox[1],
                    x1: o.bbox[2],
                    y1: o.bbox[3],
                },
                centroid: (o.centroid[0], o.centroid[1]),
                area: o.area,
                score: o.score,
            })
            .collect();
        let truth = crate::score::truth_objects(&labelled.truth());
        let c = crate::score::object_confusion(&detected, &truth);
        c.fp > 0 || c.fn_ > 0
    }

    /// Whether the labels start from the detection as it stands.
    pub fn needs_detection(&self) -> bool {
        self.mask.is_none() && self.only.is_empty()
    }

    /// Builds the labelled frame (see the module docs). `detected`: the
    /// pixels of the record's objects, when [`Correction::needs_detection`];
    /// `merge_distance`: the grouping that numbered them; `truth`: the
    /// mask file's plane when `mask` is set.
    pub fn labels(
        &self,
        frame: &BitFrame,
        detected: Option<&BitFrame>,
        merge_distance: u32,
        truth: Option<&BitFrame>,
    ) -> Result<LabelledFrame> {
        let size = |what: &str, p: &BitFrame| -> Result<()> {
            if p.same_size(frame) {
                Ok(())
            } else {
                Err(bad(format!(
                    "{what} is {}x{} but the frame is {}x{}",
                    p.width(),
                    p.height(),
                    frame.width(),
                    frame.height()
                )))
            }
        };
        let mut mask = if self.mask.is_some() {
            let t = truth.ok_or_else(|| bad("mask: the mask file was not read"))?;
            size("the mask", t)?;
            t.clone()
        } else if !self.only.is_empty() {
            let mut m = BitFrame::new(frame.width(), frame.height());
            for r in &self.only {
                r.paint(&mut m, true);
            }
            m
        } else {
            let d = detected.ok_or_else(|| bad("the detection of the frame is needed"))?;
            size("the detection", d)?;
            d.clone()
        };
        if !self.wrong.is_empty() {
            let d = detected.ok_or_else(|| bad("the detection of the frame is needed"))?;
            for &id in &self.wrong {
                let pixels = group::component_pixels(d, merge_distance, id).ok_or_else(|| {
                    bad(format!(
                        "wrong: object {id} is not in the detection (the record and the detection disagree)"
                    ))
                })?;
                mask = mask.and_not(&pixels);
            }
        }
        for r in &self.missed {
            r.paint(&mut mask, true);
        }
        let unknown = if self.unknown.is_empty() {
            None
        } else {
            let mut u = BitFrame::new(frame.width(), frame.height());
            for r in &self.unknown {
                r.paint(&mut u, true);
            }
            Some(u)
        };
        Ok(LabelledFrame {
            unknown,
            ..LabelledFrame::new(self.frame.clone(), frame.clone(), mask)
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::record::ObjectRecord;

    const SHA: &str = "ab00000000000000000000000000000000000000000000000000000000000001";

    fn base() -> Correction {
        Correction {
            frame: "loom-0007.pbm".into(),
            sha256: SHA.into(),
            ..Correction::default()
        }
    }

    fn record(objects: &[(u32, [u32; 4])]) -> FrameRecord {
        FrameRecord {
            time: "2026-12-02T10:00:00.000Z".into(),
            frame: "loom-0007.pbm".into(),
            sha256: SHA.into(),
            width: 12,
            height: 8,
            model_version: 1,
            model_hash: String::new(),
            millis: 1.0,
            objects: objects
                .iter()
                .map(|&(id, bbox)| ObjectRecord {
                    id,
                    bbox,
                    centroid: [0.0, 0.0],
                    area: 1,
                    score: 1.0,
                })
                .collect(),
        }
    }

    #[test]
    fn the_file_round_trips_and_bad_files_say_why() {
        let c = Correction {
            wrong: vec![3, 7],
            missed: vec![
                Region::Box {
                    x0: 1,
                    y0: 2,
                    x1: 3,
                    y1: 4,
                },
                Region::Ellipse {
                    cx: 6.0,
                    cy: 4.0,
                    rx: 2.0,
                    ry: 1.5,
                },
            ],
            unknown: vec![Region::Box {
                x0: 0,
                y0: 0,
                x1: 1,
                y1: 1,
            }],
            note: Some("knot".into()),
            by: Some("operator".into()),
            ..base()
        };
        let text = c.to_toml();
        assert_eq!(Correction::parse(&text).unwrap(), c, "{text}");
        for (text, want) in [
            (
                "frame = \"a.pbm\"\nsha256 = \"x\"\ncolour = 1\n",
                "unknown key",
            ),
            ("frame = \"a.pbm\"\n", "missing field `sha256`"),
            ("frame = ", "line 1"),
            (
                "frame = \"a.pbm\"\nsha256 = \"x\"\nwrong = [\"one\"]\n",
                "wrong",
            ),
            (
                "format_version = 2\nframe = \"a.pbm\"\nsha256 = \"x\"\n",
                "format_version 2",
            ),
        ] {
            let e = Correction::parse(text).unwrap_err().to_string();
            assert!(e.contains(want), "{want:?} in {e:?}");
        }
    }

    #[test]
    fn the_error_indicator_follows_what_the_operator_said() {
        // One detected object at (2..4, 2..4) in a 12x8 frame.
        let rec = record(&[(1, [2, 2, 4, 4])]);
        let frame = BitFrame::new(12, 8);
        let truth_at = |boxes: &[[usize; 4]]| {
            BitFrame::from_fn(12, 8, |x, y| {
                boxes
                    .iter()
                    .any(|b| (b[0]..=b[2]).contains(&x) && (b[1]..=b[3]).contains(&y))
            })
        };
        let labelled = |mask: BitFrame| LabelledFrame::new("loom-0007.pbm", frame.clone(), mask);
        let right = Correction {
            right: true,
            ..base()
        };
        assert!(!right.reports_error(&rec, &labelled(truth_at(&[[2, 2, 4, 4]]))));
        let wrong = Correction {
            wrong: vec![1],
            ..base()
        };
        assert!(wrong.reports_error(&rec, &labelled(BitFrame::new(12, 8))));
        let missed = Correction {
            missed: vec![Region::Box {
                x0: 8,
                y0: 1,
                x1: 9,
                y1: 2,
            }],
            ..base()
        };
        assert!(missed.reports_error(&rec, &labelled(truth_at(&[[2, 2, 4, 4], [8, 1, 9, 2]]))));
        // `only`: the same object (IoU 1) is no error; another place is.
        let only = |b: [u32; 4]| Correction {
            only: vec![Region::Box {
                x0: b[0],
                y0: b[1],
                x1: b[2],
                y1: b[3],
            }],
            ..base()
        };
        assert!(!only([2, 2, 4, 4]).reports_error(&rec, &labelled(truth_at(&[[2, 2, 4, 4]]))));
        assert!(only([7, 4, 9, 6]).reports_error(&rec, &labelled(truth_at(&[[7, 4, 9, 6]]))));
        // `unknown` alone says nothing about errors.
        let unknown = Correction {
            unknown: vec![Region::Box {
                x0: 0,
                y0: 0,
                x1: 1,
                y1: 1,
            }],
            ..base()
        };
        assert!(!unknown.reports_error(&rec, &labelled(truth_at(&[[2, 2, 4, 4]]))));
    }

    #[test]
    fn the_commented_sample_in_config_is_a_valid_correction() {
        let c = Correction::parse(include_str!("../config/correction-example.toml")).unwrap();
        c.check_statements().unwrap();
        assert_eq!(c.wrong, [3, 7]);
        assert_eq!(c.missed.len(), 2);
        assert!(matches!(c.missed[1], Region::Ellipse { rx, .. } if rx == 6.0));
        assert_eq!(c.unknown.len(), 1);
    }

    #[test]
    fn names_are_names_never_paths() {
        for bad_name in [
            "../x.pbm",
            "/etc/passwd",
            "a/b.pbm",
            ".hidden",
            "",
            "..",
            "a\\b",
        ] {
            assert!(check_name(bad_name).is_err(), "{bad_name}");
        }
        assert!(check_name("loom-0007.pbm").is_ok());
    }

    #[test]
    fn contradictions_are_refused() {
        let b = Region::Box {
            x0: 0,
            y0: 0,
            x1: 1,
            y1: 1,
        };
        let cases = [
            (base(), "says nothing"),
            (
                Correction {
                    right: true,
                    wrong: vec![1],
                    ..base()
                },
                "right says",
            ),
            (
                Correction {
                    mask: Some("t.pbm".into()),
                    only: vec![b.clone()],
                    ..base()
                },
                "mask is the whole truth",
            ),
            (
                Correction {
                    only: vec![b.clone()],
                    missed: vec![b.clone()],
                    ..base()
                },
                "only already",
            ),
            (
                Correction {
                    wrong: vec![2, 2],
                    ..base()
                },
                "twice",
            ),
            (
                Correction {
                    right: true,
                    sha256: "AB".into(),
                    ..base()
                },
                "64 lower-case hex",
            ),
            (
                Correction {
                    mask: Some("../t.pbm".into()),
                    ..base()
                },
                "mask",
            ),
        ];
        for (c, want) in cases {
            let e = c.check_statements().unwrap_err().to_string();
            assert!(e.contains(want), "{want:?} in {e:?}");
        }
        let ok = Correction {
            right: true,
            unknown: vec![b],
            ..base()
        };
        assert!(ok.check_statements().is_ok());
    }

    #[test]
    fn records_are_checked() {
        let r = record(&[(1, [0, 0, 1, 1]), (2, [5, 5, 6, 6])]);
        let c = Correction {
            wrong: vec![3],
            ..base()
        };
        let e = c.check_record(&r).unwrap_err().to_string();
        assert!(e.contains("no object 3") && e.contains("1, 2"), "{e}");
        let e = c.check_record(&record(&[])).unwrap_err().to_string();
        assert!(e.contains("no objects"), "{e}");
        let c = Correction {
            missed: vec![Region::Box {
                x0: 10,
                y0: 0,
                x1: 12,
                y1: 1,
            }],
            ..base()
        };
        let e = c.check_record(&r).unwrap_err().to_string();
        assert!(e.contains("10,0,12,1") && e.contains("12x8"), "{e}");
        let c = Correction {
            unknown: vec![Region::Ellipse {
                cx: 2.0,
                cy: 2.0,
                rx: 3.0,
                ry: 1.0,
            }],
            ..base()
        };
        assert!(c.check_record(&r).is_err());
        let mut other = r.clone();
        other.sha256 = "cd".repeat(32);
        let c = Correction {
            right: true,
            ..base()
        };
        assert!(c.check_record(&other).is_err());
        assert!(c.check_record(&r).is_ok());
    }

    #[test]
    fn labels_follow_the_statements() {
        let frame = BitFrame::new(12, 8);
        // Two objects: a 2x2 block (id 1) and a 3-pixel bar (id 2).
        let detected = BitFrame::from_ascii(
            "##..........\n##..........\n............\n......###...\n............\n............\n............\n............\n",
        );
        let right = Correction {
            right: true,
            ..base()
        };
        let l = right.labels(&frame, Some(&detected), 0, None).unwrap();
        assert_eq!(l.mask, detected);
        assert!(l.unknown.is_none());
        let wrong = Correction {
            wrong: vec![1],
            ..base()
        };
        let l = wrong.labels(&frame, Some(&detected), 0, None).unwrap();
        assert_eq!(l.mask.count_set(), 3);
        assert!(l.mask.get(6, 3) && !l.mask.get(0, 0));
        let e = Correction {
            wrong: vec![3],
            ..base()
        }
        .labels(&frame, Some(&detected), 0, None)
        .unwrap_err();
        assert!(e.to_string().contains("object 3"), "{e}");
        // An ellipse with rx = ry = 2 at a pixel centre covers the 13
        // lattice points with x^2 + y^2 <= 4 (counted by hand: 1 + 4 + 4 +
        // 4 on the axes and diagonals; common practice).
        let missed = Correction {
            missed: vec![
                Region::Ellipse {
                    cx: 9.0,
                    cy: 5.0,
                    rx: 2.0,
                    ry: 2.0,
                },
                Region::Box {
                    x0: 0,
                    y0: 6,
                    x1: 1,
                    y1: 7,
                },
            ],
            ..base()
        };
        let l = missed.labels(&frame, Some(&detected), 0, None).unwrap();
        assert_eq!(l.mask.count_set(), 4 + 3 + 13 + 4);
        let only = Correction {
            only: vec![Region::Box {
                x0: 4,
                y0: 4,
                x1: 5,
                y1: 5,
            }],
            unknown: vec![Region::Box {
                x0: 10,
                y0: 0,
                x1: 11,
                y1: 1,
            }],
            ..base()
        };
        assert!(!only.needs_detection());
        let l = only.labels(&frame, None, 0, None).unwrap();
        assert_eq!(l.mask.count_set(), 4);
        assert!(l.mask.get(4, 4));
        assert_eq!(l.unknown.as_ref().unwrap().count_set(), 4);
        assert_eq!(l.known_pixels(), 96 - 4);
        let truth = BitFrame::from_fn(12, 8, |x, _| x == 0);
        let mask = Correction {
            mask: Some("t.pbm".into()),
            ..base()
        };
        assert_eq!(
            mask.labels(&frame, None, 0, Some(&truth)).unwrap().mask,
            truth
        );
        let small = BitFrame::new(4, 4);
        let e = mask.labels(&frame, None, 0, Some(&small)).unwrap_err();
        assert!(e.to_string().contains("4x4"), "{e}");
    }

    #[test]
    fn command_line_regions() {
        assert_eq!(
            Region::parse_arg("1,2,3,4").unwrap(),
            Region::Box {
                x0: 1,
                y0: 2,
                x1: 3,
                y1: 4
            }
        );
        let e = Region::parse_arg("ellipse:5,5,2.5,1").unwrap();
        assert_eq!(e.to_string(), "ellipse:5,5,2.5,1");
        for bad_arg in ["1,2,3", "a,b,c,d", "-1,0,2,2", "ellipse:1,2,3"] {
            assert!(Region::parse_arg(bad_arg).is_err(), "{bad_arg}");
        }
    }
}
