//! One frame from bytes to its record: the step every frame takes, whoever
//! calls it (the daemon's workers, `burlwatch scan`, `burlwatch bench`).
//!
//! A [`Detector`] is a model with its compiled program and the settings in
//! force. It is immutable and shared behind an `Arc`: swapping the running
//! model means building a new `Detector` and swapping the pointer, while
//! frames in flight finish with the one they started with. Each caller
//! brings its own [`Scratch`] and clock; nothing here reads files or time.

pub mod compile;
pub mod group;
pub mod smooth;
pub mod walker;

use crate::codec::{self, DecodeLimits};
use crate::error::Result;
use crate::frame::BitFrame;
pub use crate::model::settings::{Overrides, Settings};
use crate::model::{Model, Tree};
use crate::record::{rfc3339, sha256_hex, FrameRecord, ObjectRecord};
use compile::{Program, Scratch};
use group::Object;

/// What detection found in one frame.
#[derive(Clone, Debug)]
pub struct FrameResult {
    /// The detected pixels: score at or above the threshold and part of an
    /// object that `min_area` kept.
    pub mask: BitFrame,
    pub objects: Vec<Object>,
}

/// A model ready to detect: the tree, its compiled program and settings.
#[derive(Debug)]
pub struct Detector {
    model: Model,
    /// `model_hash` of the model (see [`model_hash`]).
    hash: String,
    program: Program,
    settings: Settings,
}

/// What detection made of one frame file.
#[derive(Debug)]
pub struct Detection {
    pub record: FrameRecord,
    pub result: FrameResult,
    /// The decoded frame.
    pub frame: BitFrame,
}

impl Detector {
    /// Compiles `model` for `settings` (validated by the caller).
    pub fn new(model: Model, settings: Settings) -> Detector {
        let program = Program::compile(&model.tree, settings.threshold);
        Detector {
            hash: model_hash(&model),
            model,
            program,
            settings,
        }
    }

    /// The model in service.
    pub fn model(&self) -> &Model {
        &self.model
    }

    /// The settings in force (the model's own, or overridden), which the
    /// program was compiled for.
    pub fn settings(&self) -> Settings {
        self.settings
    }

    /// The compiled program.
    pub fn program(&self) -> &Program {
        &self.program
    }

    /// Detects and groups one decoded frame with the compiled program and
    /// the settings it was compiled for.
    pub fn detect(&self, frame: &BitFrame, scratch: &mut Scratch) -> FrameResult {
        compile::run(
            &self.program,
            &self.model.tree,
            &self.settings,
            frame,
            scratch,
        )
    }

    /// The model's version, which every record carries.
    pub fn version(&self) -> u64 {
        self.model.model_version
    }

    /// The model's short content hash, which every record carries.
    pub fn hash(&self) -> &str {
        &self.hash
    }

    /// Decodes, detects and groups one frame file's bytes, and builds its
    /// record. `clock` gives the record's time and measures the
    /// processing milliseconds: it is called once at the start and once at
    /// the end, returning wall-clock time and seconds elapsed on a
    /// monotonic clock.
    pub fn process(
        &self,
        name: &str,
        bytes: &[u8],
        limits: &DecodeLimits,
        scratch: &mut Scratch,
        clock: &mut dyn FnMut() -> (std::time::SystemTime, f64),
    ) -> Result<Detection> {
        let (_, start) = clock();
        let frame = codec::decode(bytes, limits)?;
        let result = self.detect(&frame, scratch);
        let (now, end) = clock();
        let record = FrameRecord::new(
            now,
            name,
            bytes,
            frame.width(),
            frame.height(),
            self.version(),
            &self.hash,
            (end - start) * 1e3,
            &result.objects,
        );
        Ok(Detection {
            record,
            result,
            frame,
        })
    }
}

/// A model's identity beside its version: the first 12 hex digits of the
/// SHA-256 of its file's bytes (`Model::to_json`, which is deterministic).
/// Two models that both say "version 1" but differ in anything differ here.
pub fn model_hash(model: &Model) -> String {
    sha256_hex(model.to_json().as_bytes())[..12].to_string()
}

/// Groups a detection mask (from any evaluator, smoothed by the caller
/// when the settings smooth) into the frame's result: objects scored by the walker on the detected pixels only, and
/// the mask of the pixels of the objects `min_area` kept.
pub fn finish(tree: &Tree, settings: &Settings, frame: &BitFrame, raw: BitFrame) -> FrameResult {
    let (objects, mask) =
        group::group_and_keep(&raw, settings.grouping, |x, y| tree.score_at(frame, x, y));
    FrameResult { mask, objects }
}

// The log format knows nothing of detection; detection builds its records.
impl FrameRecord {
    /// The record of one processed frame: `bytes` is the frame file's
    /// content (hashed), `objects` what detection found.
    #[allow(clippy::too_many_arguments)]
    pub fn new(
        time: std::time::SystemTime,
        frame: &str,
        bytes: &[u8],
        width: usize,
        height: usize,
        model_version: u64,
        model_hash: &str,
        millis: f64,
        objects: &[Object],
    ) -> FrameRecord {
        FrameRecord {
            time: rfc3339(time),
            frame: frame.to_string(),
            sha256: sha256_hex(bytes),
            width: width as u32,
            height: height as u32,
            model_version,
            model_hash: model_hash.to_string(),
            millis: (millis * 1000.0).round() / 1000.0,
            objects: objects.iter().map(ObjectRecord::from_object).collect(),
        }
    }
}

impl ObjectRecord {
    pub fn from_object(o: &Object) -> ObjectRecord {
        let r2 = |v: f64| (v * 100.0).round() / 100.0;
        ObjectRecord {
            id: o.id,
            bbox: [o.bbox.x0, o.bbox.y0, o.bbox.x1, o.bbox.y1],
            centroid: [r2(o.centroid.0), r2(o.centroid.1)],
            area: o.area,
            score: (o.score * 10_000.0).round() / 10_000.0,
        }
    }
}
