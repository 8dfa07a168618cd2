//! What the learning commands (`retrain`, `changeover`, `models use`)
//! share: a running daemon owns the state folder, so they ask it through
//! a request file and wait for its answer; with no daemon, they take the
//! state lock themselves and do the work here.

use std::time::Duration;

use anyhow::{anyhow, Result};

use burlwatch::config::Config;
use burlwatch::daemon::files::{self, StateLock};
use burlwatch::daemon::learning::Learning;
use burlwatch::daemon::requests::{self, Request};
use burlwatch::daemon::start;
use burlwatch::model::Model;

/// The state folder held by this process (the lock goes with it).
pub struct Held {
    _lock: StateLock,
    pub learning: Learning,
    /// The model in service (`None` when the command needs none).
    pub running: Option<Model>,
    pub cfg: Config,
}

/// Who holds the state folder.
pub enum Holder {
    /// No daemon: this process holds the lock (for as long as it lives).
    Here(Box<Held>),
    /// A daemon (process id) holds it.
    Daemon(String),
}

/// Takes the state lock, or finds the daemon that holds it. Another
/// command holding it is waited for (up to a minute), never asked.
/// `needs_model`: load (or, on a fresh box, train) the model in service.
pub fn hold(cfg: &Config, needs_model: bool) -> Result<Holder> {
    let folders = start::make_folders(&cfg.start.folders).map_err(|e| anyhow!("{e}"))?;
    let deadline = std::time::Instant::now() + Duration::from_secs(60);
    let lock = loop {
        match files::daemon_running(&folders.state) {
            Some(holder) if holder.ends_with(files::COMMAND_MARK) => {}
            Some(pid) => return Ok(Holder::Daemon(pid)),
            None => {}
        }
        match StateLock::acquire_for_command(&folders.state) {
            Ok(l) => break l,
            Err(e) if std::time::Instant::now() >= deadline => return Err(anyhow!("{e}")),
            // A daemon or another command took it in between: look again.
            Err(_) => std::thread::sleep(Duration::from_millis(100)),
        }
    };
    let live = &cfg.live;
    let (learning, running) = if needs_model {
        let (model, origin, trained_on) =
            start::load_or_train(&folders, live).map_err(|e| anyhow!("{e}"))?;
        let learning =
            Learning::open(&folders, live, model.tree.window()).map_err(|e| anyhow!("{e}"))?;
        let (model, _) = learning
            .in_service(model, origin, trained_on)
            .map_err(|e| anyhow!("{e}"))?;
        (learning, Some(model))
    } else {
        let window = live.window.unwrap_or(live.training.window);
        let learning = Learning::open(&folders, live, window).map_err(|e| anyhow!("{e}"))?;
        (learning, None)
    };
    let mut cfg = cfg.clone();
    cfg.start.folders = folders;
    Ok(Holder::Here(Box::new(Held {
        _lock: lock,
        learning,
        running,
        cfg,
    })))
}

/// Asks the daemon `pid` and prints its answer; exit status 0 when it did
/// what was asked, 1 when it could not, 4 when no answer came in `wait`
/// (the request stays and is carried out when the daemon gets to it).
pub fn ask(cfg: &Config, pid: &str, request: Request, wait: Duration) -> Result<i32> {
    let state = burlwatch::config::Folders::absolute(&cfg.start.folders)?.state;
    let path = requests::send(&state, &request).map_err(|e| anyhow!("{e}"))?;
    eprintln!("burlwatch: asked the running daemon (process {pid}); waiting for its answer");
    match requests::wait(&path, wait) {
        Some(a) => {
            out!("{}", a.message);
            Ok(if a.ok { 0 } else { 1 })
        }
        None => {
            eprintln!(
                "burlwatch: no answer within {} s; the request stays in {} and the daemon carries it out when it can",
                wait.as_secs(),
                path.display()
            );
            Ok(EXIT_NO_ANSWER)
        }
    }
}

/// Exit status when a running daemon did not answer in time.
pub const EXIT_NO_ANSWER: i32 = 4;
