//! The status endpoint: `/metrics` (Prometheus text exposition format)
//! and `/healthz` (JSON, 200 when healthy, 503 when not), served by hyper
//! on a tokio runtime of its own thread, so the detection pipeline stays
//! as it is. Read-only: no request changes anything.
//!
//! ```text
//! writer thread: MetricsSink ──▶ Board (atomics, a small histogram) ◀── main loop (queue, stall, liveness, model)
//!                                  ▲                                     ◀── alerts (lines written)
//!                    status thread: GET /metrics, GET /healthz
//! ```
//!
//! - [`Board`] holds what the pages show; every part of the daemon writes
//!   its own fields, the server only reads them.
//! - Healthy means: the main loop ticked within [`LOOP_LATE`], the writer
//!   and the workers are running, and no frame is overdue: frames wait
//!   (queued, in flight or found in the inbox) and none was finished for
//!   `status.stall_seconds`.
//! - The address is loopback unless the configuration says otherwise
//!   (`status.allow_remote`, checked when the configuration is read); a
//!   remote address is said at start. An address that cannot be bound is
//!   said, and the daemon runs on without the endpoint.
//! - Metric names are our own, under `burlwatch_`; counters count from the
//!   daemon's start and end in `_total`.

use std::collections::BTreeMap;
use std::convert::Infallible;
use std::net::SocketAddr;
use std::sync::atomic::{AtomicBool, AtomicI64, AtomicU64, Ordering};
use std::sync::{Arc, Mutex};
use std::thread;
use std::time::{Duration, SystemTime};

use http_body_util::Full;
use hyper::body::Bytes;
use hyper::{Method, Request, Response, StatusCode};
use serde::Serialize;
use tracing::{info, warn};

use super::alerts::Watch;
use super::sink::{Finished, RecordSink};
use crate::error::{Error, Result};
use crate::review::format_time;

/// The main loop must tick at least this often for the daemon to be
/// healthy.
pub const LOOP_LATE: Duration = Duration::from_secs(10);

/// Upper bounds of the processing-time histogram, seconds.
pub const BUCKETS: [f64; 12] = [
    0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5,
];

fn now_ms() -> i64 {
    SystemTime::now()
        .duration_since(SystemTime::UNIX_EPOCH)
        .map_or(0, |d| d.as_millis() as i64)
}

/// What the endpoint shows, written by the parts of the daemon.
#[derive(Debug, Default)]
pub struct Board {
    frames: AtomicU64,
    already_logged: AtomicU64,
    objects: AtomicU64,
    rejected: AtomicU64,
    alerts: AtomicU64,
    /// Counts per bucket of [`BUCKETS`] (and one past the last), and the
    /// sum of the times, seconds.
    times: Mutex<([u64; BUCKETS.len() + 1], f64)>,
    /// Wall-clock milliseconds of the last frame finished (0: none yet).
    last_frame: AtomicI64,
    /// Frames handed out and not finished, and found in the inbox but not
    /// handed out yet.
    queue: AtomicU64,
    waiting: AtomicU64,
    /// Wall-clock milliseconds of the main loop's last tick.
    loop_at: AtomicI64,
    /// No frame finished for `stall_seconds` while frames wait.
    stalled: AtomicBool,
    writer_lost: AtomicBool,
    workers_lost: AtomicBool,
    /// The file watcher still sends events (false: listing alone).
    events: AtomicBool,
    model: Mutex<(u64, String)>,
    started: AtomicI64,
    /// Operations failing for every file now (writing the log, moving
    /// frames, storing corrections), with the problem as `/healthz` says it.
    troubles: Mutex<BTreeMap<String, String>>,
}

impl Board {
    pub fn new() -> Arc<Board> {
        let b = Board::default();
        b.started.store(now_ms(), Ordering::Relaxed);
        b.loop_at.store(now_ms(), Ordering::Relaxed);
        b.events.store(true, Ordering::Relaxed);
        Arc::new(b)
    }

    /// The main loop's reading, at every tick.
    pub fn tick(&self, queue: u64, waiting: u64, stalled: bool, events: bool) {
        self.queue.store(queue, Ordering::Relaxed);
        self.waiting.store(waiting, Ordering::Relaxed);
        self.stalled.store(stalled, Ordering::Relaxed);
        self.events.store(events, Ordering::Relaxed);
        self.loop_at.store(now_ms(), Ordering::Relaxed);
    }

    pub fn set_model(&self, version: u64, hash: &str) {
        *self.model.lock().unwrap_or_else(|p| p.into_inner()) = (version, hash.to_string());
    }

    pub fn writer_lost(&self) {
        self.writer_lost.store(true, Ordering::Relaxed);
    }

    pub fn workers_lost(&self) {
        self.workers_lost.store(true, Ordering::Relaxed);
    }

    /// An operation started failing (`Some(problem)`) or works again.
    pub fn trouble(&self, what: &str, problem: Option<String>) {
        let mut t = self.troubles.lock().unwrap_or_else(|p| p.into_inner());
        match problem {
            Some(p) => {
                t.insert(what.to_string(), p);
            }
            None => {
                t.remove(what);
            }
        }
    }

    /// An alert line was written.
    pub fn alert(&self) {
        self.alerts.fetch_add(1, Ordering::Relaxed);
    }

    fn record(&self, event: &Finished<'_>) {
        match event {
            Finished::Logged(r, _) => {
                self.frames.fetch_add(1, Ordering::Relaxed);
                self.objects
                    .fetch_add(r.objects.len() as u64, Ordering::Relaxed);
                let secs = r.millis / 1e3;
                let k = BUCKETS
                    .iter()
                    .position(|&b| secs <= b)
                    .unwrap_or(BUCKETS.len());
                let mut t = self.times.lock().unwrap_or_else(|p| p.into_inner());
                t.0[k] += 1;
                t.1 += secs;
            }
            Finished::AlreadyLogged { .. } => {
                self.already_logged.fetch_add(1, Ordering::Relaxed);
            }
            Finished::Rejected { .. } => {
                self.rejected.fetch_add(1, Ordering::Relaxed);
            }
            Finished::Left { .. } => return,
            Finished::Trouble { what, error } => {
                let problem = error.map(|e| format!("{what} fails: {e}; frames wait in the inbox"));
                self.trouble(what, problem);
                return;
            }
        }
        self.last_frame.store(now_ms(), Ordering::Relaxed);
    }

    /// Why the daemon is not healthy (empty: it is).
    pub fn problems(&self) -> Vec<String> {
        let mut p = Vec::new();
        let late = now_ms() - self.loop_at.load(Ordering::Relaxed);
        if late > LOOP_LATE.as_millis() as i64 {
            p.push(format!(
                "the main loop has not ticked for {:.1} s",
                late as f64 / 1e3
            ));
        }
        if self.writer_lost.load(Ordering::Relaxed) {
            p.push("the detection log writer stopped".into());
        }
        p.extend(
            self.troubles
                .lock()
                .unwrap_or_else(|p| p.into_inner())
                .values()
                .cloned(),
        );
        if self.workers_lost.load(Ordering::Relaxed) {
            p.push("every detection worker stopped".into());
        }
        if self.stalled.load(Ordering::Relaxed) {
            p.push("frames wait and none was finished within status.stall_seconds".into());
        }
        p
    }

    /// The Prometheus text exposition format (version 0.0.4).
    pub fn metrics(&self, monitors: &[crate::monitor::MonitorState]) -> String {
        use std::fmt::Write;
        let mut s = String::new();
        let mut one = |name: &str, kind: &str, help: &str, value: String| {
            let _ = writeln!(s, "# HELP burlwatch_{name} {help}");
            let _ = writeln!(s, "# TYPE burlwatch_{name} {kind}");
            let _ = writeln!(s, "burlwatch_{name} {value}");
        };
        let get = |a: &AtomicU64| a.load(Ordering::Relaxed).to_string();
        one(
            "frames_total",
            "counter",
            "Frames given a record in the detection log since the daemon started.",
            get(&self.frames),
        );
        one(
            "frames_already_logged_total",
            "counter",
            "Frames found already logged after a crash and only archived.",
            get(&self.already_logged),
        );
        one(
            "objects_total",
            "counter",
            "Objects in the records written since the daemon started.",
            get(&self.objects),
        );
        one(
            "rejects_total",
            "counter",
            "Files moved to the rejected folder since the daemon started.",
            get(&self.rejected),
        );
        one(
            "alerts_total",
            "counter",
            "Lines written to the alerts log since the daemon started.",
            get(&self.alerts),
        );
        one(
            "queue_frames",
            "gauge",
            "Frames handed out for detection and not finished yet.",
            get(&self.queue),
        );
        one(
            "inbox_waiting_frames",
            "gauge",
            "Frames found in the inbox and not handed out yet.",
            get(&self.waiting),
        );
        let (version, _) = self.model.lock().unwrap_or_else(|p| p.into_inner()).clone();
        one(
            "model_version",
            "gauge",
            "The version of the model in service.",
            version.to_string(),
        );
        let last = self.last_frame.load(Ordering::Relaxed);
        one(
            "last_frame_timestamp_seconds",
            "gauge",
            "When the last frame was finished, seconds since 1970 (0: none yet).",
            format!("{:.3}", last as f64 / 1e3),
        );
        one(
            "healthy",
            "gauge",
            "1 when /healthz answers 200, else 0.",
            (self.problems().is_empty() as u8).to_string(),
        );
        let (counts, sum) = *self.times.lock().unwrap_or_else(|p| p.into_inner());
        let _ = writeln!(
            s,
            "# HELP burlwatch_frame_seconds Time to decode, detect and group one frame."
        );
        let _ = writeln!(s, "# TYPE burlwatch_frame_seconds histogram");
        let mut cumulative = 0;
        for (k, b) in BUCKETS.iter().enumerate() {
            cumulative += counts[k];
            let _ = writeln!(
                s,
                "burlwatch_frame_seconds_bucket{{le=\"{b}\"}} {cumulative}"
            );
        }
        cumulative += counts[BUCKETS.len()];
        let _ = writeln!(
            s,
            "burlwatch_frame_seconds_bucket{{le=\"+Inf\"}} {cumulative}"
        );
        let _ = writeln!(s, "burlwatch_frame_seconds_sum {sum}");
        let _ = writeln!(s, "burlwatch_frame_seconds_count {cumulative}");
        if !monitors.is_empty() {
            let _ = writeln!(s, "# HELP burlwatch_monitor_level Drift monitor level: 0 ok (or warming, off), 1 watch, 2 alert.");
            let _ = writeln!(s, "# TYPE burlwatch_monitor_level gauge");
            for m in monitors {
                let level = match m.level.as_str() {
                    "watch" => 1,
                    "alert" => 2,
                    _ => 0,
                };
                let _ = writeln!(
                    s,
                    "burlwatch_monitor_level{{monitor=\"{}\",statistic=\"{}\"}} {level}",
                    m.monitor, m.statistic
                );
            }
        }
        s
    }

    /// The health report.
    pub fn health(&self, monitors: Vec<crate::monitor::MonitorState>) -> Health {
        let problems = self.problems();
        let (version, hash) = self.model.lock().unwrap_or_else(|p| p.into_inner()).clone();
        let last = self.last_frame.load(Ordering::Relaxed);
        Health {
            healthy: problems.is_empty(),
            problems,
            started: format_time(self.started.load(Ordering::Relaxed)),
            last_frame: (last > 0).then(|| format_time(last)),
            main_loop_tick: format_time(self.loop_at.load(Ordering::Relaxed)),
            file_events: self.events.load(Ordering::Relaxed),
            writer_running: !self.writer_lost.load(Ordering::Relaxed),
            workers_running: !self.workers_lost.load(Ordering::Relaxed),
            queue: self.queue.load(Ordering::Relaxed),
            inbox_waiting: self.waiting.load(Ordering::Relaxed),
            model_version: version,
            model_hash: hash,
            monitors,
        }
    }
}

/// `/healthz`'s body.
#[derive(Debug, Serialize)]
pub struct Health {
    pub healthy: bool,
    /// Why not, in words.
    pub problems: Vec<String>,
    pub started: String,
    pub last_frame: Option<String>,
    pub main_loop_tick: String,
    /// The file watcher still sends events (false: the inbox is found by
    /// listing alone, which still works).
    pub file_events: bool,
    pub writer_running: bool,
    pub workers_running: bool,
    pub queue: u64,
    pub inbox_waiting: u64,
    pub model_version: u64,
    pub model_hash: String,
    pub monitors: Vec<crate::monitor::MonitorState>,
}

/// The board's subscriber on the writer's thread.
pub struct MetricsSink(pub Arc<Board>);

impl RecordSink for MetricsSink {
    fn finished(&mut self, event: &Finished<'_>) {
        self.0.record(event);
    }
}

/// The running endpoint; dropping it stops the server.
pub struct Server {
    stop: Option<tokio::sync::oneshot::Sender<()>>,
    thread: Option<thread::JoinHandle<()>>,
    /// The address bound (the port chosen when the configuration said 0).
    pub address: SocketAddr,
}

impl Drop for Server {
    fn drop(&mut self) {
        if let Some(s) = self.stop.take() {
            let _ = s.send(());
        }
        if let Some(t) = self.thread.take() {
            let _ = t.join();
        }
    }
}

/// Binds `address` and serves the board on a thread of its own.
pub fn serve(address: SocketAddr, board: Arc<Board>, watch: Option<Watch>) -> Result<Server> {
    let listener = std::net::TcpListener::bind(address)
        .map_err(|e| Error::daemon(format!("status endpoint: cannot listen on {address}: {e}")))?;
    listener
        .set_nonblocking(true)
        .map_err(|e| Error::daemon(format!("status endpoint: {e}")))?;
    let bound = listener
        .local_addr()
        .map_err(|e| Error::daemon(format!("status endpoint: {e}")))?;
    let (stop_tx, stop_rx) = tokio::sync::oneshot::channel::<()>();
    let thread = thread::Builder::new()
        .name("burlwatch-status".into())
        .spawn(move || {
            let rt = match tokio::runtime::Builder::new_current_thread()
                .enable_io()
                .enable_time()
                .build()
            {
                Ok(rt) => rt,
                Err(e) => {
                    warn!("status endpoint: cannot start its runtime: {e}");
                    return;
                }
            };
            rt.block_on(accept_loop(listener, board, watch, stop_rx));
        })
        .map_err(Error::from)?;
    info!("status endpoint on http://{bound} (/metrics, /healthz)");
    Ok(Server {
        stop: Some(stop_tx),
        thread: Some(thread),
        address: bound,
    })
}

async fn accept_loop(
    listener: std::net::TcpListener,
    board: Arc<Board>,
    watch: Option<Watch>,
    mut stop: tokio::sync::oneshot::Receiver<()>,
) {
    let listener = match tokio::net::TcpListener::from_std(listener) {
        Ok(l) => l,
        Err(e) => {
            warn!("status endpoint: {e}");
            return;
        }
    };
    loop {
        tokio::select! {
            _ = &mut stop => return,
            accepted = listener.accept() => {
                let Ok((stream, _)) = accepted else { continue };
                let (board, watch) = (board.clone(), watch.clone());
                tokio::spawn(async move {
                    let io = hyper_util::rt::TokioIo::new(stream);
                    let service = hyper::service::service_fn(move |req| {
                        let (board, watch) = (board.clone(), watch.clone());
                        async move { Ok::<_, Infallible>(answer(&req, &board, watch.as_ref())) }
                    });
                    let conn = hyper::server::conn::http1::Builder::new()
                        .timer(hyper_util::rt::TokioTimer::new())
                        .header_read_timeout(Duration::from_secs(10))
                        .serve_connection(io, service);
                    let _ = tokio::time::timeout(Duration::from_secs(30), conn).await;
                });
            }
        }
    }
}

/// One request's answer; nothing is changed by any request.
fn answer<B>(req: &Request<B>, board: &Board, watch: Option<&Watch>) -> Response<Full<Bytes>> {
    let reply = |code: StatusCode, kind: &str, body: String| {
        Response::builder()
            .status(code)
            .header("content-type", kind)
            .header("cache-control", "no-store")
            .body(Full::new(Bytes::from(body)))
            .expect("a valid response")
    };
    if req.method() != Method::GET && req.method() != Method::HEAD {
        return reply(
            StatusCode::METHOD_NOT_ALLOWED,
            "text/plain; charset=utf-8",
            "only GET\n".into(),
        );
    }
    let monitors = watch.map(|w| w.states()).unwrap_or_default();
    match req.uri().path() {
        "/metrics" => reply(
            StatusCode::OK,
            "text/plain; version=0.0.4; charset=utf-8",
            board.metrics(&monitors),
        ),
        "/healthz" => {
            let h = board.health(monitors);
            let code = if h.healthy {
                StatusCode::OK
            } else {
                StatusCode::SERVICE_UNAVAILABLE
            };
            let mut body = serde_json::to_string_pretty(&h).expect("health serialises");
            body.push('\n');
            reply(code, "application/json", body)
        }
        _ => reply(
            StatusCode::NOT_FOUND,
            "text/plain; charset=utf-8",
            "not found: /metrics and /healthz are served\n".into(),
        ),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_failing_operation_makes_the_daemon_unhealthy_until_it_works() {
        let b = Board::new();
        assert!(b.problems().is_empty());
        b.record(&Finished::Trouble {
            what: "writing the detection log",
            error: Some("No space left on device (os error 28)"),
        });
        let p = b.problems();
        assert_eq!(p.len(), 1);
        assert!(
            p[0].contains("writing the detection log fails: No space left"),
            "{p:?}"
        );
        assert!(!b.health(Vec::new()).healthy);
        b.record(&Finished::Trouble {
            what: "writing the detection log",
            error: None,
        });
        assert!(b.problems().is_empty());
        assert!(b.health(Vec::new()).healthy);
        // The learner's troubles say what waits: corrections, not frames.
        b.trouble(
            "storing corrections in the state folder",
            Some("storing corrections in the state folder fails: full; corrections stay".into()),
        );
        assert_eq!(
            b.problems(),
            ["storing corrections in the state folder fails: full; corrections stay"]
        );
        b.trouble("storing corrections in the state folder", None);
        assert!(b.health(Vec::new()).healthy);
    }
}
