//! A one-line progress bar on stderr, drawn only when stderr is a terminal
//! and the work is long enough to be worth watching.

use std::io::{IsTerminal, Write};
use std::time::{Duration, Instant};

pub struct Progress {
    enabled: bool,
    started: Instant,
    last: Option<Instant>,
    label: String,
}

impl Progress {
    /// A bar for `total` steps; shown only on a terminal and for at least
    /// `min_total` steps.
    pub fn new(total: usize, min_total: usize) -> Progress {
        Progress {
            enabled: std::io::stderr().is_terminal() && total >= min_total,
            started: Instant::now(),
            last: None,
            label: String::new(),
        }
    }

    pub fn set_label(&mut self, label: &str) {
        if self.label != label {
            self.label = label.to_string();
            self.last = None;
        }
    }

    /// Redraws at most ten times a second.
    pub fn update(&mut self, done: usize, total: usize) {
        if !self.enabled {
            return;
        }
        let now = Instant::now();
        if self
            .last
            .is_some_and(|t| now - t < Duration::from_millis(100) && done < total)
        {
            return;
        }
        self.last = Some(now);
        let width = 30;
        let filled = done
            .min(total)
            .saturating_mul(width)
            .checked_div(total)
            .unwrap_or(width);
        let bar: String = "#".repeat(filled) + &".".repeat(width - filled);
        let mut err = std::io::stderr();
        let _ = write!(
            err,
            "\r\x1b[2K[{bar}] {done}/{total} {} ({:.1} s)",
            self.label,
            self.started.elapsed().as_secs_f64()
        );
        let _ = err.flush();
    }

    /// Shows a stage with no step count.
    pub fn stage(&mut self, label: &str) {
        if !self.enabled {
            return;
        }
        let mut err = std::io::stderr();
        let _ = write!(
            err,
            "\r\x1b[2K{label} ({:.1} s)",
            self.started.elapsed().as_secs_f64()
        );
        let _ = err.flush();
    }

    pub fn finish(&mut self) {
        if self.enabled {
            let mut err = std::io::stderr();
            let _ = write!(err, "\r\x1b[2K");
            let _ = err.flush();
        }
    }
}
