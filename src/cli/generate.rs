//! `burlwatch generate`: writes seeded synthetic loom frames with their
//! masks. Frame `i` of seed `S` is [`synth::frame_seed`]`(S, i)`, so the
//! same seed and preset always give the same files.

use std::path::{Path, PathBuf};

use anyhow::{bail, Context, Result};

use burlwatch::fileio::data;
use burlwatch::synth::{self, LoomParams};

#[derive(clap::Args, Debug)]
pub struct GenerateArgs {
    /// Folder to write into (created if missing).
    #[arg(long)]
    out: PathBuf,
    /// Number of frames.
    #[arg(long, default_value_t = 30)]
    count: usize,
    /// Seed: the same seed and preset always give the same frames.
    #[arg(long, default_value_t = 1)]
    seed: u64,
    /// Loom setting: standard, alternate or drifted, or one of the
    /// evaluation suite's (plain-fine, plain-coarse, twill, thin-noisy,
    /// patchy-light, small-defects, edge-defects; see `burlwatch suite`).
    #[arg(long, default_value = "standard")]
    preset: String,
    /// Frame width in pixels (default: the preset's).
    #[arg(long)]
    width: Option<usize>,
    /// Frame height in pixels (default: the preset's).
    #[arg(long)]
    height: Option<usize>,
    /// Share of pixels flipped by camera noise (default: the preset's).
    #[arg(long)]
    noise: Option<f64>,
    /// Write frames as PNG instead of PBM (masks stay PBM).
    #[arg(long)]
    png: bool,
    /// Write into a folder that already holds files (same names are
    /// replaced, other files stay and mix with the new set).
    #[arg(long)]
    force: bool,
}

pub fn run(a: GenerateArgs) -> Result<i32> {
    let mut params = match a.preset.as_str() {
        "standard" => LoomParams::standard(),
        "alternate" => LoomParams::alternate(),
        "drifted" => LoomParams::drifted(),
        other => match LoomParams::suite().into_iter().find(|(n, _)| *n == other) {
            Some((_, p)) => p,
            None => {
                let suite: Vec<&str> = LoomParams::suite().iter().map(|(n, _)| *n).collect();
                bail!(
                    "--preset {other:?} must be standard, alternate, drifted or one of the suite's: {}",
                    suite.join(", ")
                )
            }
        },
    };
    if let Some(w) = a.width {
        params.width = w;
    }
    if let Some(h) = a.height {
        params.height = h;
    }
    if let Some(n) = a.noise {
        if !(0.0..=0.5).contains(&n) {
            bail!("--noise {n} must be between 0 and 0.5");
        }
        params.noise = n;
    }
    if params.width < 32 || params.height < 32 || params.width > 8192 || params.height > 8192 {
        bail!("frame size must be between 32x32 and 8192x8192");
    }
    let used = std::fs::read_dir(&a.out).is_ok_and(|mut d| d.next().is_some());
    if used && !a.force {
        bail!(
            "--out {} is not empty; its files would mix with the new set (same names replaced): \
             give a new or empty folder, or pass --force",
            a.out.display()
        );
    }
    let defects = write_set(&a.out, &a.preset, &params, a.seed, a.count, a.png)?;
    out!(
        "wrote {} {} frames ({}x{}, {} defects) to {}",
        a.count,
        a.preset,
        params.width,
        params.height,
        defects,
        a.out.display()
    );
    Ok(0)
}

/// Writes `count` frames of a loom setting with their masks into `out`
/// (created if missing), named `loom-PRESET-NNNN`; frame `i` is seeded
/// with `synth::frame_seed(seed, i)`. Returns how many defects they hold.
pub(super) fn write_set(
    out: &Path,
    preset: &str,
    params: &LoomParams,
    seed: u64,
    count: usize,
    png: bool,
) -> Result<usize> {
    std::fs::create_dir_all(out).with_context(|| format!("cannot create {}", out.display()))?;
    let mut defects = 0;
    for i in 0..count {
        let f = synth::generate(params, synth::frame_seed(seed, i));
        defects += f.defects.len();
        let name = format!("loom-{preset}-{i:04}");
        if png {
            let p = out.join(format!("{name}.png"));
            std::fs::write(&p, burlwatch::codec::encode_png(&f.frame)?)
                .with_context(|| format!("cannot write {}", p.display()))?;
            let mp = out.join(format!("{name}{}", data::MASK_SUFFIX));
            std::fs::write(&mp, burlwatch::codec::encode_pbm(&f.mask))
                .with_context(|| format!("cannot write {}", mp.display()))?;
        } else {
            data::write_pair(out, &name, &f.frame, &f.mask)?;
        }
    }
    Ok(defects)
}
