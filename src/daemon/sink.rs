//! Where finished frames are announced: the subscribers of the pipeline.
//!
//! The writer decides each frame's fate in hand-out order and, once it is
//! final (its record durable and the frame archived, or the frame rejected
//! or left in the inbox), tells every [`RecordSink`] subscribed to the run.
//! The daemon's own counts are one subscriber; the drift monitors, the
//! metrics of the status endpoint and tests subscribe the same way. Sinks
//! run on the writer's thread, so they must be quick and must not block.

use std::path::Path;
use std::sync::{Arc, Mutex};

use crate::drift::FrameStats;
use crate::record::FrameRecord;

/// The fate of one frame handed out.
#[derive(Debug)]
pub enum Finished<'a> {
    /// Its record is durable in the detection log (the frame is archived
    /// next), with the frame's input statistics for the drift monitors
    /// (all zero when they are off).
    Logged(&'a FrameRecord, &'a FrameStats),
    /// It was found already logged (after a crash) and only archived.
    AlreadyLogged { frame: &'a Path },
    /// It cannot be read as a frame: moved to `rejected/` with the reason.
    Rejected { frame: &'a Path, reason: &'a str },
    /// Not moved (gone, changed since read, or a log or move error): the
    /// next listing decides.
    Left { frame: &'a Path },
    /// An operation the writer repeats for every frame (writing the log,
    /// moving to the archive or to `rejected/`) started or kept failing
    /// (`error`), or works again (`None`). Said once per change, not per
    /// frame.
    Trouble {
        what: &'a str,
        error: Option<&'a str>,
    },
}

/// A subscriber to finished frames.
pub trait RecordSink: Send {
    fn finished(&mut self, event: &Finished<'_>);
    /// The run is over: no more frames (the writer's last call).
    fn stopped(&mut self) {}
}

/// Counts of one run.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub struct Summary {
    /// Frames with a new record in the log.
    pub logged: u64,
    /// Frames found already logged (after a crash) and only archived.
    pub already_logged: u64,
    pub rejected: u64,
    /// Objects in the new records.
    pub objects: u64,
}

impl Summary {
    /// What was counted since `earlier` (an earlier reading of the same
    /// counts).
    pub fn since(&self, earlier: &Summary) -> Summary {
        Summary {
            logged: self.logged - earlier.logged,
            already_logged: self.already_logged - earlier.already_logged,
            rejected: self.rejected - earlier.rejected,
            objects: self.objects - earlier.objects,
        }
    }

    /// Counts one finished frame.
    pub fn add(&mut self, event: &Finished<'_>) {
        match event {
            Finished::Logged(r, _) => {
                self.logged += 1;
                self.objects += r.objects.len() as u64;
            }
            Finished::AlreadyLogged { .. } => self.already_logged += 1,
            Finished::Rejected { .. } => self.rejected += 1,
            Finished::Left { .. } | Finished::Trouble { .. } => {}
        }
    }
}

/// A sink that keeps a [`Summary`] others can read while the run goes on.
#[derive(Clone, Debug, Default)]
pub struct Counter(pub Arc<Mutex<Summary>>);

impl Counter {
    pub fn get(&self) -> Summary {
        *self.0.lock().unwrap_or_else(|p| p.into_inner())
    }
}

impl RecordSink for Counter {
    fn finished(&mut self, event: &Finished<'_>) {
        self.0.lock().unwrap_or_else(|p| p.into_inner()).add(event);
    }
}
