//! Operations that fail again and again for a while (a full disk fails
//! every frame and every correction): said once when they start failing,
//! again every [`TROUBLE_REPEAT`] while they last, and once when they work
//! again, rather than once per file. A disk that is nearly full fails,
//! works for a record or two when a cut frees a page, and fails again: a
//! run of failures that starts within [`TROUBLE_REPEAT`] of the last thing
//! said about the operation is not said (nor its end), so such flapping is
//! said once. Callers still hear every change, for the status endpoint.
//! Pure apart from the messages.

use std::collections::HashMap;
use std::path::Path;
use std::time::{Duration, Instant};

use tracing::{debug, error, info};

/// While an operation fails, it is said again this often.
pub const TROUBLE_REPEAT: Duration = Duration::from_secs(600);

/// One failing operation.
#[derive(Debug)]
struct Trouble {
    since: Instant,
    failures: u64,
    said: Instant,
    /// Whether this run of failures was said (its end is said only then).
    told: bool,
}

/// Failing operations, by name, and when each was last said.
#[derive(Debug, Default)]
pub struct Troubles {
    failing: HashMap<&'static str, Trouble>,
    last_said: HashMap<&'static str, Instant>,
}

impl Troubles {
    /// Counts a failure of `what` on `file`; `then` says what becomes of
    /// the files meanwhile. Whether it is the first of a run of failures.
    pub fn fail(&mut self, what: &'static str, e: &str, file: &Path, then: &str) -> bool {
        self.fail_at(what, e, file, then, Instant::now())
    }

    fn fail_at(
        &mut self,
        what: &'static str,
        e: &str,
        file: &Path,
        then: &str,
        now: Instant,
    ) -> bool {
        match self.failing.get_mut(what) {
            None => {
                let recent = self
                    .last_said
                    .get(what)
                    .filter(|&&t| now.duration_since(t) < TROUBLE_REPEAT)
                    .copied();
                match recent {
                    Some(said) => {
                        debug!(file = ?file, "{what} fails again soon after it was said: {e}");
                        self.failing.insert(
                            what,
                            Trouble {
                                since: now,
                                failures: 1,
                                said,
                                told: false,
                            },
                        );
                    }
                    None => {
                        error!(
                            file = ?file,
                            "{what} fails: {e}; {then} (said again every {} minutes while it lasts)",
                            TROUBLE_REPEAT.as_secs() / 60
                        );
                        self.last_said.insert(what, now);
                        self.failing.insert(
                            what,
                            Trouble {
                                since: now,
                                failures: 1,
                                said: now,
                                told: true,
                            },
                        );
                    }
                }
                true
            }
            Some(t) => {
                t.failures += 1;
                if now.duration_since(t.said) >= TROUBLE_REPEAT {
                    t.said = now;
                    t.told = true;
                    self.last_said.insert(what, now);
                    error!(
                        "{what} still fails ({} failures over {:.0} s): {e}",
                        t.failures,
                        now.duration_since(t.since).as_secs_f64()
                    );
                } else {
                    debug!(file = ?file, "{what} fails: {e}");
                }
                false
            }
        }
    }

    /// An operation worked; whether it had been failing.
    pub fn ok(&mut self, what: &'static str) -> bool {
        self.ok_at(what, Instant::now())
    }

    fn ok_at(&mut self, what: &'static str, now: Instant) -> bool {
        match self.failing.remove(what) {
            Some(t) => {
                if t.told {
                    info!(
                        "{what} works again, after {} failure(s) over {:.0} s",
                        t.failures,
                        now.duration_since(t.since).as_secs_f64()
                    );
                    self.last_said.insert(what, now);
                } else {
                    debug!("{what} works again");
                }
                true
            }
            None => false,
        }
    }

    /// Whether the current run of failures of `what` was said.
    #[cfg(test)]
    fn told(&self, what: &str) -> bool {
        self.failing.get(what).is_some_and(|t| t.told)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_run_of_failures_is_one_trouble() {
        let mut t = Troubles::default();
        let f = Path::new("a.pbm");
        assert!(t.fail("writing", "full", f, "they wait"));
        assert!(!t.fail("writing", "full", f, "they wait"));
        assert!(t.fail("moving", "denied", f, "they wait"));
        assert!(t.ok("writing"));
        assert!(!t.ok("writing"));
        assert!(t.fail("writing", "full", f, "they wait"), "a new run");
    }

    #[test]
    fn a_flapping_operation_is_said_once_per_repeat_time() {
        let mut t = Troubles::default();
        let f = Path::new("a.pbm");
        let t0 = Instant::now();
        assert!(t.fail_at("writing", "full", f, "they wait", t0));
        assert!(t.told("writing"));
        assert!(t.ok_at("writing", t0 + Duration::from_millis(1)));
        // Fails again at once: a change (for the status endpoint), not said.
        assert!(t.fail_at(
            "writing",
            "full",
            f,
            "they wait",
            t0 + Duration::from_millis(2)
        ));
        assert!(!t.told("writing"));
        // Still failing ten minutes after it was last said: said again.
        let later = t0 + TROUBLE_REPEAT + Duration::from_millis(5);
        assert!(!t.fail_at("writing", "full", f, "they wait", later));
        assert!(t.told("writing"));
        assert!(t.ok_at("writing", t0 + TROUBLE_REPEAT * 2));
        // Long after: a new run is said.
        assert!(t.fail_at("writing", "full", f, "they wait", t0 + TROUBLE_REPEAT * 4));
        assert!(t.told("writing"));
    }
}
