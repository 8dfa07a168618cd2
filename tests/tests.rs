//! The integration tests: one binary, a module per area, a shared harness.
//!
//! - `reference_learning`: impurity, gain and the learner against published
//!   worked examples and the `smartcore` reference tree;
//! - `reference_drift`: the drift statistics against `scipy` and `river`
//!   (a fixture made once by `tests/reference/drift_reference.py`);
//! - `reference_images`: PBM decoding and grouping against the Netpbm
//!   specification, the `image` crate's decoder and `imageproc`;
//! - `properties`: property tests of the invariants;
//! - `compiled`: the compiled evaluator against the walker, bit for bit;
//! - `cli`: the `burlwatch` binary end to end on temporary folders;
//! - `daemon`: `burlwatch run` end to end: bursts, slow writers, bad files,
//!   kills, signals, lost events;
//! - `drift`: the drift monitors on long generated streams, and the
//!   daemon's alerts log, alert command, restarts and error drift;
//! - `inprocess`: the daemon driven in-process, with the clock, ticks,
//!   control channel and disk faults in the test's hands;
//! - `review`: `burlwatch log` over a generated month of logs;
//! - `learning`: corrections, changeovers, retraining behind the gate and
//!   the model registry, through the real binary, with kills;
//! - `fuzz`: the readers of outside input (PBM, PNG, model, configuration
//!   and correction files) on mutated inputs: no panic, no hang, no
//!   allocation past the limits (counted by this binary's allocator, in `reference_images`).

mod util;

mod cli;
mod compiled;
mod daemon;
mod drift;
mod fuzz;
mod inprocess;
mod learning;
mod properties;
mod reference_drift;
mod reference_images;
mod reference_learning;
mod review;
