//! The seam where tests make the daemon's disk operations fail.
//!
//! The detection log asks [`Faults::check`] before each write, sync and
//! rotation, and the writer before each move of a frame; in production
//! [`Faults::none`] answers every question with "go ahead" at the cost of
//! one branch. A test builds a plan with [`Faults::plan`] — a function of
//! the operation and its sequence number — so it can make exactly the
//! second sync after a rotation fail, say, and check what the daemon did.

use std::fmt;
use std::io;
use std::path::Path;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::Arc;

/// A disk operation that can be made to fail.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum Fault {
    /// Appending a record to the detection log.
    Write,
    /// Syncing the detection log when the writer asks for it.
    Sync,
    /// Rotating the full log file: its failure is that of the sync a
    /// rotation starts with (the full file's unsynced records are cut off).
    Rotate,
    /// Moving a frame to the archive or to `rejected/`.
    Move,
    /// A worker about to detect: while this "fails", the worker waits (a
    /// stalled pipeline, for the watchdog's tests; never in production,
    /// where there is no plan).
    Stall,
}

type Plan = dyn Fn(Fault, u64, &Path) -> bool + Send + Sync;

/// Which operations fail; cheap to clone and share between threads.
#[derive(Clone, Default)]
pub struct Faults {
    plan: Option<Arc<(Box<Plan>, [AtomicU64; 5])>>,
}

impl Faults {
    /// Nothing fails (production).
    pub fn none() -> Faults {
        Faults::default()
    }

    /// `fails(op, n, path)` says whether the `n`-th operation of kind `op`
    /// (counted from 0 per kind) on `path` fails.
    pub fn plan(fails: impl Fn(Fault, u64, &Path) -> bool + Send + Sync + 'static) -> Faults {
        Faults {
            plan: Some(Arc::new((Box::new(fails), Default::default()))),
        }
    }

    /// An error when the plan says this operation fails.
    pub fn check(&self, op: Fault, path: &Path) -> io::Result<()> {
        let Some(plan) = &self.plan else {
            return Ok(());
        };
        let n = plan.1[op as usize].fetch_add(1, Ordering::Relaxed);
        if (plan.0)(op, n, path) {
            return Err(io::Error::other(format!("injected {op:?} failure")));
        }
        Ok(())
    }
}

/// The environment variable naming the stall switch's file (debug builds).
pub const STALL_SWITCH: &str = "BURLWATCH_TEST_STALL";

/// The one fault that reaches a daemon run as its own process, for the test
/// of the systemd watchdog: while the file named by `BURLWATCH_TEST_STALL`
/// exists, workers wait before detecting. Compiled into debug builds only
/// (the ones `cargo test` makes); a release build has no such switch.
#[cfg(debug_assertions)]
pub fn stall_switch_on() -> bool {
    std::env::var_os(STALL_SWITCH).is_some_and(|p| Path::new(&p).exists())
}

/// Release builds: no switch.
#[cfg(not(debug_assertions))]
pub fn stall_switch_on() -> bool {
    false
}

impl fmt::Debug for Faults {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(if self.plan.is_some() {
            "Faults(plan)"
        } else {
            "Faults(none)"
        })
    }
}
