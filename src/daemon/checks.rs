//! Start-up checks: is this configuration ready to run? Shared by
//! `burlwatch check`, the daemon's start and (later) the status endpoint,
//! so all three say the same thing in the same words. Checking never
//! writes anything and never takes the lock.

use std::path::Path;

use serde::Serialize;

use super::{files, start};
use crate::config::{Config, Folders};

/// One finding: what was checked, whether it is usable, and the detail.
#[derive(Clone, Debug, PartialEq, Eq, Serialize)]
pub struct Finding {
    pub what: String,
    pub ok: bool,
    pub detail: String,
}

impl Finding {
    fn new(what: &str, ok: bool, detail: String) -> Finding {
        Finding {
            what: what.into(),
            ok,
            detail,
        }
    }
}

/// Below this much free space in a folder's filesystem, the daemon cannot
/// be expected to run (a frame, its record and its move need room).
pub const LEAST_FREE_BYTES: u64 = 16 << 20;
/// Below this, a folder's finding says how little is left.
pub const LOW_FREE_BYTES: u64 = 1 << 30;

/// Whether this process (its real user: run `check` as the daemon's user)
/// may create and delete files in `dir`; the error says why not (a
/// read-only filesystem counts).
fn writable(dir: &Path) -> std::result::Result<(), std::io::Error> {
    use std::os::unix::ffi::OsStrExt;
    let c = std::ffi::CString::new(dir.as_os_str().as_bytes()).map_err(std::io::Error::other)?;
    // SAFETY: access with a valid NUL-terminated path; no memory is kept.
    if unsafe { libc::access(c.as_ptr(), libc::W_OK | libc::X_OK) } == 0 {
        Ok(())
    } else {
        Err(std::io::Error::last_os_error())
    }
}

/// Free bytes and free inodes of the filesystem `dir` is on (for this
/// process's user).
pub fn free_space(dir: &Path) -> Option<(u64, u64)> {
    use std::os::unix::ffi::OsStrExt;
    let c = std::ffi::CString::new(dir.as_os_str().as_bytes()).ok()?;
    // SAFETY: statvfs fills the struct we pass, from a valid path.
    let mut v: libc::statvfs = unsafe { std::mem::zeroed() };
    if unsafe { libc::statvfs(c.as_ptr(), &mut v) } != 0 {
        return None;
    }
    Some((
        (v.f_bavail as u64).saturating_mul(v.f_frsize as u64),
        v.f_favail as u64,
    ))
}

/// Every folder: a folder this user may write in, on a filesystem with
/// room, or missing with a parent it can be made in.
pub fn folders(folders: &Folders) -> Vec<Finding> {
    folders_with(folders, true)
}

/// [`folders`] as the daemon checks them at start: a full filesystem is
/// not a reason to stop (frames wait in the inbox until there is room),
/// so with `space` false it is not checked.
pub fn folders_with(folders: &Folders, space: bool) -> Vec<Finding> {
    let mut out = Vec::new();
    for (name, dir) in folders.named() {
        out.push(match std::fs::metadata(dir) {
            Ok(m) if m.is_dir() => {
                let mut problems = Vec::new();
                let mut notes = Vec::new();
                if let Err(e) = writable(dir) {
                    problems.push(format!(
                        "cannot be written by this user ({e}); the daemon must create, move and delete files here"
                    ));
                }
                if let Some((bytes, inodes)) = free_space(dir).filter(|_| space) {
                    if bytes < LEAST_FREE_BYTES || inodes < 100 {
                        problems.push(format!(
                            "its filesystem is full ({:.1} MB, {inodes} inodes free)",
                            bytes as f64 / 1e6
                        ));
                    } else if bytes < LOW_FREE_BYTES {
                        notes.push(format!(
                            "only {:.0} MB free on its filesystem",
                            bytes as f64 / 1e6
                        ));
                    }
                }
                let ok = problems.is_empty();
                problems.extend(notes);
                let detail = if problems.is_empty() {
                    dir.display().to_string()
                } else {
                    format!("{}: {}", dir.display(), problems.join("; "))
                };
                Finding::new(name, ok, detail)
            }
            Ok(_) => Finding::new(name, false, format!("{} is not a folder", dir.display())),
            Err(_) => {
                // Missing folders are created at start, if the parent allows.
                let parent = dir
                    .ancestors()
                    .skip(1)
                    .find(|p| p.as_os_str().is_empty() || p.exists())
                    .map(|p| {
                        if p.as_os_str().is_empty() {
                            Path::new(".")
                        } else {
                            p
                        }
                    });
                let ok = parent.is_some_and(|p| p.is_dir());
                Finding::new(
                    name,
                    ok,
                    format!(
                        "{} does not exist yet; it is created at start",
                        dir.display()
                    ),
                )
            }
        });
    }
    out
}

/// The model in service, or the seed data a fresh box trains one from.
pub fn model(cfg: &Config) -> Finding {
    let path = start::model_path(&cfg.start.folders);
    if path.exists() {
        return match start::load_model(&cfg.start.folders, &cfg.live)
            .and_then(|m| start::detector(m, &cfg.live))
        {
            Ok(d) => {
                let (m, s) = (d.model(), d.settings());
                Finding::new(
                    "model",
                    true,
                    format!(
                        "{}: version {}, {}x{} window, {} nodes, threshold {}, min_area {}",
                        path.display(),
                        m.model_version,
                        m.tree.window().size(),
                        m.tree.window().size(),
                        m.tree.nodes().len(),
                        s.threshold,
                        s.grouping.min_area
                    ),
                )
            }
            Err(e) => Finding::new("model", false, e.to_string()),
        };
    }
    match &cfg.live.seed_data {
        None => Finding::new(
            "model",
            false,
            format!(
                "no {} and no training.seed_data to train one from",
                path.display()
            ),
        ),
        Some(seed) => match crate::fileio::data::list_pairs(seed) {
            Ok((pairs, problems)) if !pairs.is_empty() && problems.is_empty() => Finding::new(
                "model",
                true,
                format!(
                    "no model yet: one is trained at start from {} labelled frames in {}",
                    pairs.len(),
                    seed.display()
                ),
            ),
            Ok((pairs, problems)) => Finding::new(
                "model",
                false,
                format!(
                    "seed data {}: {} labelled frames, {} problems{}",
                    seed.display(),
                    pairs.len(),
                    problems.len(),
                    problems
                        .first()
                        .map(|p| format!(", first: {p}"))
                        .unwrap_or_default()
                ),
            ),
            Err(e) => Finding::new("model", false, format!("seed data: {e}")),
        },
    }
}

/// Whether a daemon holds the lock on these folders (not a problem: it
/// says which process serves them).
pub fn lock(cfg: &Config) -> Finding {
    let f = &cfg.start.folders;
    match files::daemon_running(&f.state) {
        None => {
            // A daemon with another state folder on the same inbox,
            // corrections or logs folder: this one would not start.
            for (key, path) in [
                ("folders.inbox", &f.inbox),
                ("folders.corrections", &f.corrections),
                ("folders.logs", &f.logs),
            ] {
                if files::folder_in_use(path) {
                    return Finding::new(
                        "lock",
                        false,
                        format!(
                            "{key} {} is in use by another burlwatch daemon with another state folder; \
                             this one would not start",
                            path.display()
                        ),
                    );
                }
            }
            Finding::new("lock", true, "no daemon is running on these folders".into())
        }
        Some(pid) => Finding::new(
            "lock",
            true,
            format!("a daemon (process {pid}) is running on these folders"),
        ),
    }
}

/// Every check, in the order `burlwatch check` prints them.
pub fn all(cfg: &Config) -> Vec<Finding> {
    let mut out = folders(&cfg.start.folders);
    out.push(model(cfg));
    out.push(learning(cfg));
    out.push(monitors(cfg));
    out.push(lock(cfg));
    out
}

/// The drift monitors: on or off, their saved state, and the alert
/// command's program (found and executable; the daemon runs it directly,
/// with no shell, so `PATH` is searched as for any program).
pub fn monitors(cfg: &Config) -> Finding {
    let Some(settings) = &cfg.start.monitors else {
        return Finding::new("drift monitors", true, "off (drift.enabled = false)".into());
    };
    let mut detail = format!(
        "on: windows of {} frames, PSI watch {} / alert {}",
        settings.window, settings.psi_watch, settings.psi_alert
    );
    match super::alerts::read_saved(&cfg.start.folders.state) {
        Ok(Some(s)) => detail.push_str(&format!(
            "; saved state of model {} ({}), {} frames",
            s.monitors.model().version,
            s.monitors.model().hash,
            s.monitors.frames()
        )),
        Ok(None) => detail.push_str("; no saved state yet"),
        // A damaged state file is set aside at start: not a reason to stop.
        Err(e) => detail.push_str(&format!("; {e} (the monitors will start afresh)")),
    }
    let Some(program) = cfg.start.alerts.command.first() else {
        detail.push_str("; no alert command");
        return Finding::new("drift monitors", true, detail);
    };
    match find_program(program) {
        Some(p) => {
            detail.push_str(&format!("; alert command {}", p.display()));
            Finding::new("drift monitors", true, detail)
        }
        None => {
            detail.push_str(&format!(
                "; the alert command's program {program:?} is not an executable file (alerts would only be logged)"
            ));
            Finding::new("drift monitors", false, detail)
        }
    }
}

/// Where a program named in a command is: the path itself when it has a
/// slash, else the first executable of that name in `PATH`.
fn find_program(program: &str) -> Option<std::path::PathBuf> {
    use std::os::unix::fs::PermissionsExt;
    let executable = |p: &Path| {
        std::fs::metadata(p).is_ok_and(|m| m.is_file() && m.permissions().mode() & 0o111 != 0)
    };
    if program.contains('/') {
        let p = Path::new(program);
        return executable(p).then(|| p.to_path_buf());
    }
    std::env::split_paths(&std::env::var_os("PATH")?)
        .map(|d| d.join(program))
        .find(|p| executable(p))
}

/// The learning loop's state: registered models, the line running, its
/// labels (read only; a state folder with none yet is fine).
pub fn learning(cfg: &Config) -> Finding {
    let state = &cfg.start.folders.state;
    let models = super::registry::Registry::read_only(state).entries();
    let lines = super::labels::read_lines(state);
    let labels = super::labels::read_labels(state);
    match (models, lines, labels) {
        (Ok(models), Ok(lines), Ok(labels)) => {
            let line = lines.last().map_or(1, |l| l.line);
            let on_line: Vec<_> = labels.iter().filter(|l| l.line == line).collect();
            let held = on_line
                .iter()
                .filter(|l| l.role == super::labels::Role::Gate)
                .count();
            Finding::new(
                "learning",
                true,
                format!(
                    "{} registered model(s); line {line} runs{}, with {} labelled frame(s) ({held} held out for the gate); {} labelled in all",
                    models.len(),
                    lines
                        .last()
                        .filter(|l| !l.since.is_empty())
                        .map(|l| format!(" since {}", l.since))
                        .unwrap_or_default(),
                    on_line.len(),
                    labels.len()
                ),
            )
        }
        (Err(e), _, _) | (_, Err(e), _) | (_, _, Err(e)) => {
            Finding::new("learning", false, e.to_string())
        }
    }
}
