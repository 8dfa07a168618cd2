//! What the daemon and learning benchmarks share: noting when files
//! arrive in a folder (the moment a frame is archived is the moment its
//! record is durable), a process's resident memory, and percentiles.

#![allow(dead_code)]

use std::path::Path;
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use notify::{RecursiveMode, Watcher};

/// Counts files arriving in a folder (created or renamed in) and notes
/// when each arrived.
pub struct Arrivals {
    pub count: Arc<AtomicUsize>,
    pub times: Arc<Mutex<Vec<(String, Instant)>>>,
    _watcher: notify::RecommendedWatcher,
}

impl Arrivals {
    pub fn watch(dir: &Path) -> Arrivals {
        std::fs::create_dir_all(dir).unwrap();
        let count = Arc::new(AtomicUsize::new(0));
        let times = Arc::new(Mutex::new(Vec::new()));
        let (c, t) = (count.clone(), times.clone());
        let mut w = notify::recommended_watcher(move |ev: notify::Result<notify::Event>| {
            let now = Instant::now();
            if let Ok(ev) = ev {
                use notify::event::{CreateKind, ModifyKind, RenameMode};
                if matches!(
                    ev.kind,
                    notify::EventKind::Create(CreateKind::File | CreateKind::Any)
                        | notify::EventKind::Modify(ModifyKind::Name(RenameMode::To))
                ) {
                    for p in ev.paths {
                        let n = p.file_name().unwrap().to_string_lossy().into_owned();
                        t.lock().unwrap().push((n, now));
                        c.fetch_add(1, Ordering::Relaxed);
                    }
                }
            }
        })
        .unwrap();
        w.watch(dir, RecursiveMode::NonRecursive).unwrap();
        Arrivals {
            count,
            times,
            _watcher: w,
        }
    }

    /// Waits until `n` files have arrived.
    pub fn wait_count(&self, n: usize, secs: u64) {
        let deadline = Instant::now() + Duration::from_secs(secs);
        while self.count.load(Ordering::Relaxed) < n {
            assert!(
                Instant::now() < deadline,
                "only {} of {n} files arrived",
                self.count.load(Ordering::Relaxed)
            );
            std::thread::sleep(Duration::from_millis(2));
        }
    }

    /// When `name` arrived, if it has.
    pub fn get(&self, name: &str) -> Option<Instant> {
        self.times
            .lock()
            .unwrap()
            .iter()
            .find(|t| t.0 == name)
            .map(|t| t.1)
    }

    /// Waits for `name` and says when it arrived.
    pub fn wait(&self, name: &str, secs: u64) -> Instant {
        let deadline = Instant::now() + Duration::from_secs(secs);
        loop {
            if let Some(t) = self.get(name) {
                return t;
            }
            assert!(Instant::now() < deadline, "{name} did not arrive");
            std::thread::sleep(Duration::from_millis(1));
        }
    }
}

/// A process's resident memory now, KiB.
pub fn rss_kib(pid: u32) -> u64 {
    let s = std::fs::read_to_string(format!("/proc/{pid}/status")).unwrap();
    let l = s.lines().find(|l| l.starts_with("VmRSS:")).unwrap();
    l.split_whitespace().nth(1).unwrap().parse().unwrap()
}

/// A process's peak resident memory so far (VmHWM), KiB.
#[allow(dead_code)]
pub fn peak_rss_kib(pid: u32) -> u64 {
    let s = std::fs::read_to_string(format!("/proc/{pid}/status")).unwrap();
    let l = s.lines().find(|l| l.starts_with("VmHWM:")).unwrap();
    l.split_whitespace().nth(1).unwrap().parse().unwrap()
}

/// The `q` quantile of `v` (sorted in place), nearest rank.
pub fn percentile(v: &mut [f64], q: f64) -> f64 {
    v.sort_by(f64::total_cmp);
    v[((v.len() - 1) as f64 * q).round() as usize]
}
