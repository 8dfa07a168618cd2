//! Operations that fail again and again for a while (a full disk fails
//! every frame and every correction): said once when they start failing,
//! again every [`TROUBLE_REPEAT`] while they last, and once when they work
//! again, rather than once per file. Pure apart from the messages.

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
}

/// Failing operations, by name.
#[derive(Debug, Default)]
pub struct Troubles(HashMap<&'static str, Trouble>);

impl Troubles {
    /// Counts a failure of `what` on `file`; `then` says what becomes of
    /// the files meanwhile. Whether it is the first of a run of failures.
    pub fn fail(&mut self, what: &'static str, e: &str, file: &Path, then: &str) -> bool {
        let now = Instant::now();
        match self.0.get_mut(what) {
            None => {
                error!(
                    file = ?file,
                    "{what} fails: {e}; {then} (said again every {} minutes while it lasts)",
                    TROUBLE_REPEAT.as_secs() / 60
                );
                self.0.insert(
                    what,
                    Trouble {
                        since: now,
                        failures: 1,
                        said: now,
                    },
                );
                true
            }
            Some(t) => {
                t.failures += 1;
                if now.duration_since(t.said) >= TROUBLE_REPEAT {
                    t.said = now;
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
        match self.0.remove(what) {
            Some(t) => {
                info!(
                    "{what} works again, after {} failure(s) over {:.0} s",
                    t.failures,
                    t.since.elapsed().as_secs_f64()
                );
                true
            }
            None => false,
        }
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
}
