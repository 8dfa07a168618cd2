//! Steps of the wall clock seen while the daemon runs, and what archive
//! retention makes of them.
//!
//! Retention deletes a frame once it was archived more than
//! `archive.keep_days` ago, reading its age off the wall clock. A box
//! without a clock battery starts in the past and is then set right; a
//! bad time source can step the clock a year ahead. Read naively, either
//! makes every archived frame look old at once, and retention would empty
//! the archive. So the daemon compares the wall clock with the monotonic
//! clock at every tick: a forward step of more than [`STEP`] is remembered
//! (in `state/clock-steps.json`, so a restart keeps it), and frames
//! archived before it are counted that much younger until `keep_days` have
//! passed after the step, when every one of them is truly that old.
//!
//! Invariants: a step never makes retention delete a frame earlier than
//! without it (the allowance only moves the cutoff back); a step back is
//! said but changes nothing (frames archived before it only look younger,
//! so they are kept longer); the size limit (`archive.keep_bytes`) holds
//! whatever the clock does. A step made while the daemon was stopped
//! cannot be told from time passing, and is taken as time passing.

use std::path::{Path, PathBuf};
use std::time::{Duration, Instant, SystemTime};

use serde::{Deserialize, Serialize};

/// The smallest difference between the two clocks taken as a step.
/// Slewing and ordinary corrections are far smaller; a box suspended to
/// memory (the monotonic clock stops) would count as a step, which only
/// keeps frames longer.
pub const STEP: Duration = Duration::from_secs(600);

/// The state folder's file of remembered steps.
pub const FILE: &str = "clock-steps.json";

/// One forward step still shielding frames archived before it.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct Step {
    /// The wall clock just after the step, in seconds since 1970.
    pub after: u64,
    /// How far it stepped, in seconds.
    pub seconds: u64,
}

/// What one look at the clocks saw.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Seen {
    Steady,
    Forward(Duration),
    Back(Duration),
}

/// The steps seen, and the last look at both clocks.
#[derive(Debug)]
pub struct ClockSteps {
    last: Option<(Instant, SystemTime)>,
    steps: Vec<Step>,
    file: Option<PathBuf>,
}

/// A duration for people: "1 y 3 d", "2 d 4 h", "3 h 10 min", "12 min".
pub fn span(d: Duration) -> String {
    let s = d.as_secs();
    let (y, dd, h, m) = (s / 31_536_000, s / 86_400 % 365, s / 3600 % 24, s / 60 % 60);
    match (y, s / 86_400, s / 3600) {
        (1.., _, _) => format!("{y} y {dd} d"),
        (0, 1.., _) => format!("{} d {h} h", s / 86_400),
        (0, 0, 1..) => format!("{h} h {m} min"),
        _ => format!("{} min", s / 60),
    }
}

fn secs(t: SystemTime) -> u64 {
    t.duration_since(SystemTime::UNIX_EPOCH)
        .map_or(0, |d| d.as_secs())
}

impl ClockSteps {
    /// No file: steps are kept in memory only (tests, tools).
    pub fn in_memory() -> ClockSteps {
        ClockSteps {
            last: None,
            steps: Vec::new(),
            file: None,
        }
    }

    /// Reads `state/clock-steps.json`; a missing file is no steps. A file
    /// that cannot be read is said (naming it) and taken as no steps.
    pub fn open(state: &Path) -> ClockSteps {
        let file = state.join(FILE);
        let steps = match std::fs::read(&file) {
            Ok(bytes) => match serde_json::from_slice(&bytes) {
                Ok(steps) => steps,
                Err(e) => {
                    tracing::warn!(
                        "{}: not a list of clock steps ({e}); taken as none",
                        file.display()
                    );
                    Vec::new()
                }
            },
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => Vec::new(),
            Err(e) => {
                tracing::warn!("{}: {e}; taken as no clock steps", file.display());
                Vec::new()
            }
        };
        ClockSteps {
            last: None,
            steps,
            file: Some(file),
        }
    }

    /// The steps remembered.
    pub fn steps(&self) -> &[Step] {
        &self.steps
    }

    /// Compares the clocks with the last look; remembers a forward step
    /// and forgets steps `keep_days` behind the wall clock. Says a step.
    pub fn look(&mut self, mono: Instant, wall: SystemTime, keep_days: u64) -> Seen {
        let seen = match self.last.replace((mono, wall)) {
            None => Seen::Steady,
            Some((m0, w0)) => {
                let expected = w0 + mono.saturating_duration_since(m0);
                match wall.duration_since(expected) {
                    Ok(ahead) if ahead > STEP => Seen::Forward(ahead),
                    Ok(_) => Seen::Steady,
                    Err(e) if e.duration() > STEP => Seen::Back(e.duration()),
                    Err(_) => Seen::Steady,
                }
            }
        };
        let before = self.steps.len();
        let now = secs(wall);
        let keep = keep_days.saturating_mul(86_400);
        match seen {
            Seen::Forward(d) => {
                self.steps.push(Step {
                    after: now,
                    seconds: d.as_secs(),
                });
                if keep > 0 {
                    tracing::warn!(
                        "the wall clock stepped forward by {}; frames archived before the step \
                         are counted that much younger, so archive retention does not delete \
                         them early (the size limit still applies)",
                        span(d)
                    );
                } else {
                    tracing::warn!("the wall clock stepped forward by {}", span(d));
                }
            }
            Seen::Back(d) => tracing::warn!(
                "the wall clock was set back by {}; records carry the time as the clock reads \
                 it, and frames archived before the step are kept that much longer",
                span(d)
            ),
            Seen::Steady => {}
        }
        // A step is spent once `keep_days` passed after it (or at once when
        // frames are never deleted for age).
        self.steps
            .retain(|s| keep > 0 && now < s.after.saturating_add(keep));
        if self.steps.len() != before || matches!(seen, Seen::Forward(_)) {
            self.save();
        }
        seen
    }

    /// How much younger than the wall clock says frames may be: the sum of
    /// the steps not yet spent at `now`. Retention subtracts it from now.
    pub fn allowance(&self, now: SystemTime, keep_days: u64) -> Duration {
        let keep = keep_days.saturating_mul(86_400);
        let now = secs(now);
        Duration::from_secs(
            self.steps
                .iter()
                .filter(|s| keep > 0 && now < s.after.saturating_add(keep))
                .map(|s| s.seconds)
                .sum(),
        )
    }

    fn save(&self) {
        let Some(file) = &self.file else { return };
        let bytes = serde_json::to_vec(&self.steps).expect("steps serialise");
        if let Err(e) = crate::fileio::durable::write_atomic(file, &bytes) {
            // Kept in memory; only a restart before the next save forgets.
            tracing::warn!("{}: cannot save the clock steps: {e}", file.display());
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    const DAY: Duration = Duration::from_secs(86_400);

    #[test]
    fn spans_read_as_people_say_them() {
        assert_eq!(span(Duration::from_secs(11 * 60 + 5)), "11 min");
        assert_eq!(span(Duration::from_secs(3 * 3600 + 600)), "3 h 10 min");
        assert_eq!(span(DAY * 2 + Duration::from_secs(4 * 3600)), "2 d 4 h");
        assert_eq!(span(DAY * 368), "1 y 3 d");
    }

    #[test]
    fn small_differences_are_not_steps() {
        let mut c = ClockSteps::in_memory();
        let (m, w) = (Instant::now(), SystemTime::now());
        assert_eq!(c.look(m, w, 30), Seen::Steady);
        // 60 s of monotonic time, the wall clock 5 minutes ahead of that.
        let m1 = m + Duration::from_secs(60);
        assert_eq!(c.look(m1, w + Duration::from_secs(360), 30), Seen::Steady);
        assert!(c.steps().is_empty());
    }

    #[test]
    fn a_forward_step_shields_older_frames_until_keep_days_passed() {
        let mut c = ClockSteps::in_memory();
        let (m, w) = (Instant::now(), SystemTime::now());
        c.look(m, w, 30);
        let year = DAY * 365;
        let after = w + year + Duration::from_secs(1);
        assert_eq!(
            c.look(m + Duration::from_secs(1), after, 30),
            Seen::Forward(year)
        );
        assert_eq!(c.allowance(after, 30), year);
        // Still shielding 29 days later, spent at 30.
        assert_eq!(c.allowance(after + DAY * 29, 30), year);
        assert_eq!(c.allowance(after + DAY * 30, 30), Duration::ZERO);
        let later = after + DAY * 30;
        assert_eq!(
            c.look(m + DAY * 30 + Duration::from_secs(1), later, 30),
            Seen::Steady
        );
        assert!(c.steps().is_empty(), "a spent step is forgotten");
    }

    #[test]
    fn a_step_back_changes_nothing_for_retention() {
        let mut c = ClockSteps::in_memory();
        let (m, w) = (Instant::now(), SystemTime::now());
        c.look(m, w, 30);
        let back = w - DAY;
        assert_eq!(
            c.look(m + Duration::from_secs(1), back, 30),
            Seen::Back(DAY + Duration::from_secs(1))
        );
        assert_eq!(c.allowance(back, 30), Duration::ZERO);
    }

    #[test]
    fn steps_survive_a_restart_and_a_damaged_file_is_none() {
        let d = tempfile::tempdir().unwrap();
        let (m, w) = (Instant::now(), SystemTime::now());
        let mut c = ClockSteps::open(d.path());
        c.look(m, w, 30);
        c.look(m, w + DAY * 2, 30);
        let again = ClockSteps::open(d.path());
        assert_eq!(again.steps(), c.steps());
        assert_eq!(again.allowance(w + DAY * 2, 30), DAY * 2);
        std::fs::write(d.path().join(FILE), b"{not json").unwrap();
        assert!(ClockSteps::open(d.path()).steps().is_empty());
    }
}
