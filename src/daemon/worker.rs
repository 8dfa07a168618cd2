//! A detection worker: reads the frame it is handed, runs the detector
//! that is in service at that moment, and passes the outcome to the
//! writer. Workers share the swappable [`Running`] state and the
//! [`PixelBudget`]; each keeps its own scratch buffers.
//!
//! Memory: detection needs about 1.7 bytes a pixel of working planes. A
//! worker takes its frame's pixels from the shared budget
//! (`detection.max_pixels_at_once`) before detecting and gives them back
//! after, so the planes of all workers together stay within the budget
//! whatever the number of workers; a frame larger than the whole budget
//! waits for the others and runs alone. After a frame larger than
//! [`KEEP_SCRATCH_PIXELS`] the worker lets its planes go, so a rare huge
//! frame does not hold memory until the next one.

use std::path::PathBuf;
use std::sync::{Arc, Condvar, Mutex};
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

/// A worker keeps its scratch planes between frames up to this size (4
/// Mpx, about 7 MB of planes); past it they are let go after the frame.
pub const KEEP_SCRATCH_PIXELS: u64 = 1 << 22;

/// Pixels in detection at once, shared by the workers (see the module
/// docs).
#[derive(Debug)]
pub struct PixelBudget {
    capacity: u64,
    used: Mutex<u64>,
    freed: Condvar,
}

/// Pixels taken from a [`PixelBudget`], given back when dropped.
#[derive(Debug)]
pub struct Taken<'a> {
    budget: &'a PixelBudget,
    pixels: u64,
}

impl PixelBudget {
    pub fn new(capacity: u64) -> PixelBudget {
        PixelBudget {
            capacity: capacity.max(1),
            used: Mutex::new(0),
            freed: Condvar::new(),
        }
    }

    /// Waits until `pixels` (at most the whole budget) are free and takes
    /// them.
    pub fn take(&self, pixels: u64) -> Taken<'_> {
        let pixels = pixels.clamp(1, self.capacity);
        let mut used = self.used.lock().unwrap_or_else(|p| p.into_inner());
        while *used + pixels > self.capacity {
            used = self.freed.wait(used).unwrap_or_else(|p| p.into_inner());
        }
        *used += pixels;
        Taken {
            budget: self,
            pixels,
        }
    }

    /// Pixels taken now.
    #[cfg(test)]
    fn used(&self) -> u64 {
        *self.used.lock().unwrap_or_else(|p| p.into_inner())
    }
}

impl Drop for Taken<'_> {
    fn drop(&mut self) {
        let mut used = self.budget.used.lock().unwrap_or_else(|p| p.into_inner());
        *used -= self.pixels;
        self.budget.freed.notify_all();
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
    budget: Arc<PixelBudget>,
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
        let outcome = detect_one(&job, &run, &budget, &mut scratch, &mut clock);
        if results.send((job, outcome)).is_err() {
            return;
        }
    }
}

fn detect_one(
    job: &Job,
    run: &Running,
    budget: &PixelBudget,
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
    // The pixels the header states (the decode checks them against the
    // limits); bytes that state none take the least share.
    let pixels = crate::codec::stated_size(&bytes).map_or(1, |(w, h)| w.saturating_mul(h));
    let taken = budget.take(pixels);
    // A bug in detection must cost one frame, not the daemon: the frame is
    // rejected with the panic's message.
    let result = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| {
        run.detector.process(&name, &bytes, limits, scratch, clock)
    }));
    if pixels > KEEP_SCRATCH_PIXELS {
        *scratch = Scratch::default();
    }
    drop(taken);
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

#[cfg(test)]
mod tests {
    use super::*;
    use std::time::Duration;

    #[test]
    fn the_budget_holds_pixels_until_they_are_given_back() {
        let b = Arc::new(PixelBudget::new(100));
        let a = b.take(60);
        // 60 + 50 > 100: the second waits until the first is given back.
        let (tx, rx) = crossbeam_channel::bounded(1);
        let b2 = b.clone();
        let t = std::thread::spawn(move || {
            let _t = b2.take(50);
            tx.send(()).unwrap();
        });
        assert!(rx.recv_timeout(Duration::from_millis(200)).is_err());
        drop(a);
        rx.recv_timeout(Duration::from_secs(10)).unwrap();
        t.join().unwrap();
        assert_eq!(b.used(), 0);
        // Larger than the whole budget: takes all of it, and runs alone.
        let big = b.take(1_000);
        assert_eq!(b.used(), 100);
        drop(big);
        assert_eq!(b.used(), 0);
    }
}
