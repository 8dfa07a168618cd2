//! A detection worker: reads the frame it is handed, runs the detector
//! that is in service at that moment, and passes the outcome to the
//! writer. Workers share nothing but the swappable [`Running`] state; each
//! keeps its own scratch buffers.

use std::path::PathBuf;
use std::sync::Arc;
use std::time::{Instant, SystemTime};

use arc_swap::ArcSwap;
use crossbeam_channel::{Receiver, Sender};
use tracing::{error, warn};

use super::files::{self, FileBytes, Stamp};
use crate::config::LiveConfig;
use crate::detect::compile::Scratch;
use crate::detect::Detector;
use crate::drift::{self, FrameStats, LeafGroups};
use crate::error::ErrorKind;
use crate::record::FrameRecord;

/// What the workers use, swapped whole on reload and when a retrained
/// model is put in service: the detector, the live part of the
/// configuration it goes with, and what the input monitors sample.
#[derive(Debug)]
pub struct Running {
    pub detector: Detector,
    pub live: LiveConfig,
    /// The model's leaf groups and the pixels sampled per frame; `None`
    /// when the monitors are off.
    pub probe: Option<(LeafGroups, usize)>,
}

impl Running {
    /// `samples`: pixels per frame for the leaf groups (`None`: the
    /// monitors are off, nothing is sampled).
    pub fn new(detector: Detector, live: LiveConfig, samples: Option<usize>) -> Running {
        let probe = samples.map(|n| (LeafGroups::new(&detector.model().tree), n));
        Running {
            detector,
            live,
            probe,
        }
    }
}

/// A frame handed to the workers: its place in hand-out order and path.
#[derive(Debug)]
pub(super) struct Job {
    pub seq: u64,
    pub path: PathBuf,
}

/// What a worker made of a frame, with the stamp of the file it read. A
/// reject's reason names the frame by its file name, not by the inbox path
/// it had when read: the reason file goes beside the frame in `rejected/`.
#[derive(Debug)]
pub(super) enum Outcome {
    /// With the input statistics (zero when the monitors are off).
    Record(Box<FrameRecord>, Stamp, Box<FrameStats>),
    Reject(String, Option<Stamp>),
    /// The file went away before it was read, or could not be read for a
    /// passing reason: the next listing decides.
    Gone,
}

/// Runs until the job channel closes (or the writer is gone).
pub(super) fn work(
    jobs: Receiver<Job>,
    results: Sender<(Job, Outcome)>,
    running: Arc<ArcSwap<Running>>,
    faults: super::faults::Faults,
) {
    let mut scratch = Scratch::default();
    let started = Instant::now();
    let mut clock = || (SystemTime::now(), started.elapsed().as_secs_f64());
    for job in jobs {
        // A stalled pipeline, when a test's fault plan (or, in a debug
        // build, its stall switch) asks for one.
        while faults
            .check(super::faults::Fault::Stall, &job.path)
            .is_err()
            || super::faults::stall_switch_on()
        {
            std::thread::sleep(std::time::Duration::from_millis(5));
        }
        let run = running.load_full();
        let outcome = detect_one(&job, &run, &mut scratch, &mut clock);
        if results.send((job, outcome)).is_err() {
            return;
        }
    }
}

fn detect_one(
    job: &Job,
    run: &Running,
    scratch: &mut Scratch,
    clock: &mut dyn FnMut() -> (SystemTime, f64),
) -> Outcome {
    let limits = &run.live.limits;
    let name = job
        .path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    let (bytes, stamp) = match files::read_frame(&job.path, limits) {
        Ok(FileBytes { bytes, stamp }) => (bytes, stamp),
        Err((e, stamp)) => {
            return match e.kind() {
                ErrorKind::Io(io) if io.kind() == std::io::ErrorKind::NotFound => Outcome::Gone,
                // The file cannot be read by us: reject it, with the reason.
                ErrorKind::Io(io) if io.kind() == std::io::ErrorKind::PermissionDenied => {
                    Outcome::Reject(format!("{name}: {}", e.kind()), stamp)
                }
                // Out of file handles, an I/O error...: try again later.
                ErrorKind::Io(_) => {
                    warn!("{e}; it will be read again");
                    Outcome::Gone
                }
                _ => Outcome::Reject(format!("{name}: {}", e.kind()), stamp),
            };
        }
    };
    // A bug in detection must cost one frame, not the daemon: the frame is
    // rejected with the panic's message.
    let result = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| {
        run.detector.process(&name, &bytes, limits, scratch, clock)
    }));
    match result {
        Ok(Ok(d)) => {
            let stats = match &run.probe {
                Some((groups, samples)) => drift::frame_stats(
                    &run.detector.model().tree,
                    groups,
                    &d.frame,
                    // The mask's pixels are those of the objects kept.
                    d.result.objects.iter().map(|o| o.area).sum(),
                    job.seq,
                    *samples,
                ),
                None => FrameStats::default(),
            };
            Outcome::Record(Box::new(d.record), stamp, Box::new(stats))
        }
        Ok(Err(e)) => Outcome::Reject(format!("{name}: {}", e.kind()), Some(stamp)),
        Err(panic) => {
            *scratch = Scratch::default();
            let what = panic
                .downcast_ref::<&str>()
                .map(|s| s.to_string())
                .or_else(|| panic.downcast_ref::<String>().cloned())
                .unwrap_or_default();
            error!(frame = %job.path.display(), "internal error while detecting: {what}");
            Outcome::Reject(
                format!("{name}: internal error while detecting: {what}"),
                Some(stamp),
            )
        }
    }
}
