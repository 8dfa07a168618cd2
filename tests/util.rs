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
