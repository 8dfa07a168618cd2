//! burlwatch: finds defects in binarized camera frames with a decision tree
//! over each pixel's square neighbourhood.
//!
//! The pipeline, from labelled pixels to objects:
//!
//! ```text
//! frames + masks ──decode──▶ BitFrame ──windows──▶ label store ──grow/prune/tune──▶ Model
//!   (fileio, codec)          (frame)    (window)    (learn::store)    (learn)          (model)
//!
//! new frame ──decode──▶ BitFrame ──compiled program──▶ detection mask ──group──▶ objects ──▶ record
//!                                  (detect::compile;                 (detect::group)       (record)
//!                                   detect::walker is the reference)
//! ```
//!
//! The layers, lowest first; a module uses only those above it in this
//! list:
//!
//! - [`error`]: typed errors that name the file and the problem.
//! - [`frame`], [`window`], [`codec`], [`record`]: the bit-packed frame,
//!   each pixel's neighbourhood as a `u128` pattern, PBM/PNG bytes to
//!   frames and back, the JSON record of one frame (the detection log's
//!   line).
//! - [`model`]: the frozen tree and its validated JSON file; knows nothing
//!   of the learner or of evaluation strategies.
//! - [`detect`]: the [`detect::Detector`] (one frame from bytes to its
//!   record), the reference walker, the compiled evaluator, grouping.
//! - [`score`]: pixel and object precision/recall/F1 (IoU >= 0.5 matching),
//!   and a detector scored over labelled frames.
//! - [`drift`]: drift statistics (PSI, Jensen-Shannon, 2x2 pattern
//!   histograms, leaf groups, Page-Hinkley, DDM) for the monitors.
//! - [`monitor`]: the drift monitors' levels and alerts (pure; the daemon
//!   feeds and saves them).
//! - [`learn`]: the label store, greedy induction, cost-complexity pruning,
//!   holdout tuning; builds a [`model::Model`].
//! - [`synth`]: the seeded loom-frame generator for demo and test data.
//! - [`correct`]: the operator's correction file and the labelled frame it
//!   makes.
//! - [`config`]: the TOML configuration file, parsed then resolved
//!   (parsing is pure; [`config::load`] is its one file read).
//! - [`fileio`]: labelled data folders and durable file operations.
//! - [`daemon`]: the unattended detector: inbox watching, workers, the
//!   detection log, archive and rejects, reload and stop, the learning
//!   loop and the drift monitors' alerts.
//!
//! Everything except [`fileio`], [`daemon`], [`config::load`],
//! [`config::Folders::absolute`] and the binary is pure: bytes and bit
//! rows in, values out; the core knows nothing of file watching or the
//! filesystem, and starts no thread except the scoped pair in
//! [`learn::tune`].

pub mod codec;
pub mod config;
pub mod correct;
pub mod daemon;
pub mod detect;
pub mod drift;
pub mod error;
pub mod fileio;
pub mod frame;
pub mod learn;
pub mod messages;
pub mod model;
pub mod monitor;
pub mod record;
pub mod render;
pub mod report;
pub mod review;
pub mod score;
pub mod suite;
pub mod synth;
pub mod window;

pub use error::{Error, ErrorKind, Result};
pub use frame::BitFrame;
