//! Shared harness: temporary folders and running the built binary.

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

/// A temporary folder removed when dropped.
pub struct Dir {
    inner: tempfile::TempDir,
}

impl Dir {
    pub fn new() -> Dir {
        Dir {
            inner: tempfile::Builder::new()
                .prefix("burlwatch-test-")
                .tempdir()
                .expect("temporary folder"),
        }
    }

    pub fn path(&self) -> &Path {
        self.inner.path()
    }

    pub fn join(&self, p: &str) -> PathBuf {
        self.inner.path().join(p)
    }

    pub fn write(&self, name: &str, bytes: &[u8]) -> PathBuf {
        let p = self.join(name);
        if let Some(parent) = p.parent() {
            std::fs::create_dir_all(parent).unwrap();
        }
        std::fs::write(&p, bytes).unwrap();
        p
    }
}

/// The result of one run of the binary.
pub struct Run {
    pub code: i32,
    pub stdout: String,
    pub stderr: String,
}

impl From<Output> for Run {
    fn from(o: Output) -> Run {
        Run {
            code: o.status.code().unwrap_or(-1),
            stdout: String::from_utf8_lossy(&o.stdout).into_owned(),
            stderr: String::from_utf8_lossy(&o.stderr).into_owned(),
        }
    }
}

/// Runs `burlwatch` with arguments, in `cwd`.
pub fn burlwatch(cwd: &Path, args: &[&str]) -> Run {
    Command::new(env!("CARGO_BIN_EXE_burlwatch"))
        .args(args)
        .current_dir(cwd)
        .env_remove("RUST_LOG")
        .output()
        .expect("run burlwatch")
        .into()
}

/// The repository root (for the committed demo frames).
pub fn repo() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

/// `count` small loom frames (64x40, PBM) named `frame-0000.pbm`, ...,
/// from the seeded generator.
pub fn frames(count: usize, seed: u64) -> Vec<(String, Vec<u8>)> {
    let p = burlwatch::synth::LoomParams {
        width: 64,
        height: 40,
        ..burlwatch::synth::LoomParams::standard()
    };
    (0..count)
        .map(|i| {
            let f = burlwatch::synth::generate(&p, burlwatch::synth::frame_seed(seed, i)).frame;
            (
                format!("frame-{i:04}.pbm"),
                burlwatch::codec::encode_pbm(&f),
            )
        })
        .collect()
}

/// Polls `cond` until it holds or the deadline passes (the tests never
/// assert on durations; deadlines are generous).
pub fn wait_for(what: &str, secs: u64, mut cond: impl FnMut() -> bool) {
    let deadline = std::time::Instant::now() + std::time::Duration::from_secs(secs);
    while !cond() {
        assert!(
            std::time::Instant::now() < deadline,
            "timed out waiting for {what}"
        );
        std::thread::sleep(std::time::Duration::from_millis(20));
    }
}

/// Starts `burlwatch run --config CONFIG` in `cwd`, its stderr appended to
/// `stderr` (shared by every daemon of a test), with no systemd socket.
pub fn spawn_daemon(config: &Path, cwd: &Path, stderr: &Path) -> std::process::Child {
    let err = std::fs::OpenOptions::new()
        .create(true)
        .append(true)
        .open(stderr)
        .unwrap();
    Command::new(env!("CARGO_BIN_EXE_burlwatch"))
        .args(["run", "--config"])
        .arg(config)
        .current_dir(cwd)
        .env_remove("RUST_LOG")
        .env_remove("NOTIFY_SOCKET")
        .stdin(std::process::Stdio::null())
        .stdout(std::process::Stdio::null())
        .stderr(err)
        .spawn()
        .expect("start the daemon")
}

/// Puts a file into a watched folder the preferred way: written under a
/// hidden temporary name, then renamed.
pub fn rename_in(dir: &Path, name: &str, bytes: &[u8]) {
    let tmp = dir.join(format!(".{name}.tmp"));
    std::fs::write(&tmp, bytes).unwrap();
    std::fs::rename(&tmp, dir.join(name)).unwrap();
}

/// The `[folders]` section of a box whose folders are all under `root`.
pub fn folders_section(root: &Path) -> String {
    format!(
        "[folders]\ninbox = {:?}\narchive = {:?}\nrejected = {:?}\ncorrections = {:?}\n\
         state = {:?}\nlogs = {:?}\n",
        root.join("inbox"),
        root.join("archive"),
        root.join("rejected"),
        root.join("corrections"),
        root.join("state"),
        root.join("logs"),
    )
}

/// Runs `burlwatch COMMAND --config CONFIG ARGS...` in `cwd` (`args[0]` is
/// the command).
pub fn burlwatch_with(cwd: &Path, config: &Path, args: &[&str]) -> Run {
    let mut v: Vec<&str> = args.to_vec();
    let c = config.to_str().unwrap();
    v.insert(1, c);
    v.insert(1, "--config");
    burlwatch(cwd, &v)
}

/// [`spawn_daemon`], then waits until its stderr says "watching" once more
/// than before.
pub fn start_watching(config: &Path, cwd: &Path, stderr: &Path) -> std::process::Child {
    let said = || {
        std::fs::read_to_string(stderr)
            .unwrap_or_default()
            .matches("watching")
            .count()
    };
    let before = said();
    let child = spawn_daemon(config, cwd, stderr);
    wait_for("the daemon to start", 180, || said() > before);
    child
}

/// Sends SIGTERM and waits (a minute at most) for the daemon to exit 0.
pub fn stop(mut child: std::process::Child) {
    // SAFETY: sends a signal to a child process we started.
    unsafe { libc::kill(child.id() as i32, libc::SIGTERM) };
    let deadline = std::time::Instant::now() + std::time::Duration::from_secs(60);
    loop {
        if let Some(s) = child.try_wait().unwrap() {
            assert_eq!(s.code(), Some(0), "the daemon's exit status");
            return;
        }
        assert!(
            std::time::Instant::now() < deadline,
            "the daemon did not stop"
        );
        std::thread::sleep(std::time::Duration::from_millis(20));
    }
}

/// An outside tool on the PATH. Tests that need one skip (`None`) with a
/// printed reason naming the Debian package that has it, unless
/// `BURLWATCH_REQUIRE_TOOLS=1` (set by `.ci/run`), which makes a missing
/// tool a failure.
pub fn tool(name: &str, package: &str) -> Option<PathBuf> {
    let found = std::env::var_os("PATH").and_then(|paths| {
        std::env::split_paths(&paths)
            .map(|p| p.join(name))
            .find(|p| p.is_file())
    });
    if found.is_none() {
        assert!(
            std::env::var("BURLWATCH_REQUIRE_TOOLS").as_deref() != Ok("1"),
            "{name} is required (BURLWATCH_REQUIRE_TOOLS=1) but not installed"
        );
        // Straight to the process's stderr: the test harness captures
        // `eprintln!` of passing tests, and a skip must be seen.
        use std::io::Write as _;
        let _ = writeln!(
            std::io::stderr(),
            "SKIPPED: {name} is not installed (Debian package `{package}`); \
             set BURLWATCH_REQUIRE_TOOLS=1 to make this a failure"
        );
    }
    found
}

/// The whole lines of a file another process may be appending to: a last
/// line without its newline is still being written, and is left out.
pub fn whole_lines(text: &str) -> impl Iterator<Item = &str> {
    let end = text.rfind('\n').map_or(0, |i| i + 1);
    text[..end].lines()
}

/// A tmpfs mounted for a test, unmounted when dropped.
pub struct Mounted(PathBuf);

impl Mounted {
    /// Mounts a tmpfs of `size` (mount's syntax, "1m") at `at`; `None`
    /// (with the reason printed) where this process may not mount.
    pub fn tmpfs(at: &std::path::Path, size: &str) -> Option<Mounted> {
        std::fs::create_dir_all(at).unwrap();
        let out = std::process::Command::new("mount")
            .args(["-t", "tmpfs", "-o", &format!("size={size}"), "tmpfs"])
            .arg(at)
            .output();
        match out {
            Ok(o) if o.status.success() => Some(Mounted(at.to_path_buf())),
            Ok(o) => {
                eprintln!(
                    "skipped: cannot mount a tmpfs here ({})",
                    String::from_utf8_lossy(&o.stderr).trim()
                );
                None
            }
            Err(e) => {
                eprintln!("skipped: cannot run mount: {e}");
                None
            }
        }
    }
}

impl Drop for Mounted {
    fn drop(&mut self) {
        let _ = std::process::Command::new("umount")
            .arg("-l")
            .arg(&self.0)
            .status();
    }
}

/// Fills the filesystem `file` is on, to the last byte, with `file`.
pub fn fill(file: &std::path::Path) {
    use std::io::Write as _;
    let mut f = std::fs::File::create(file).unwrap();
    let block = vec![0u8; 4096];
    while f.write_all(&block).is_ok() {}
    while f.write_all(&[0u8]).is_ok() {}
}
