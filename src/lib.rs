//! treeline: finds defects in binarized camera frames with a decision tree
//! over each pixel's square neighbourhood.
//!
//! The pipeline, from labelled pixels to objects:
//!
//! ```text
//! frames + masks ──decode──▶ BitFrame ──windows──▶ label store ──grow/prune/tune──▶ Model
//!   (codec)                  (frame)    (window)     (store)        (learn)          (model)
//!
//! new frame ──decode──▶ BitFrame ──evaluate──▶ detection mask ──group──▶ objects ──score──▶ metrics
//!                                  (evaluate)                  (group)              (score)
//! ```
//!
//! - [`config`]: the TOML configuration file, parsed then resolved.
//! - [`codec`]: PBM/PNG bytes to [`frame::BitFrame`] and back; sizes checked before allocation.
//! - [`window`]: each pixel's `s x s` neighbourhood as a `u128` pattern; features named by offset.
//! - [`store`]: pattern -> class counts, the sufficient statistic for learning; mergeable.
//! - [`learn`]: greedy induction, cost-complexity pruning, holdout tuning; builds a [`model::Model`].
//! - [`model`]: the frozen tree and its validated JSON file; knows nothing of the learner.
//! - [`evaluate`]: the per-pixel reference walker.
//! - [`compile`]: the tree as a word-parallel bit program, bit-identical to the walker.
//! - [`group`]: connected components with merge distance and minimum area.
//! - [`score`]: pixel and object precision/recall/F1 (IoU >= 0.5 matching).
//! - [`synth`]: the seeded loom-frame generator for demo and test data.
//! - [`data`]: the one module here that touches the filesystem: labelled data folders.
//! - [`record`]: the JSON record of one scanned frame (the detection log's line).
//! - [`detector`]: one frame from bytes to its record, with a swappable model.
//! - [`daemon`]: the unattended detector: inbox watching, workers, the
//!   detection log, archive and rejects, reload and stop.
//!
//! Everything except [`data`], [`daemon`] and the binary is pure: bytes and
//! bit rows in, values out; the core knows nothing of threads, file watching
//! or the filesystem.

pub mod codec;
pub mod compile;
pub mod config;
pub mod daemon;
pub mod data;
pub mod detector;
pub mod error;
pub mod evaluate;
pub mod frame;
pub mod group;
pub mod learn;
pub mod model;
pub mod record;
pub mod score;
pub mod store;
pub mod synth;
pub mod window;

pub use error::{Error, ErrorKind, Result};
pub use frame::BitFrame;
