//! `burlwatch render`: an annotated PNG of one frame (`render` module).
//! For a frame the daemon handled: its record from the detection log, its
//! file from the archive, and the model version the record names from the
//! registry, whose detection is drawn with the record's objects boxed.
//! For any other frame: `--model M --frame PATH`.

use std::path::PathBuf;

use anyhow::{anyhow, bail, Context, Result};

use burlwatch::codec::{self, DecodeLimits};
use burlwatch::daemon::corrections::{find_archived, find_record, record_detector};
use burlwatch::daemon::registry::Registry;
use burlwatch::detect::{compile::Scratch, Detector};
use burlwatch::fileio;
use burlwatch::render::{render, zoom_for, Mark};

use super::load_config;

#[derive(clap::Args, Debug)]
pub struct RenderArgs {
    /// Configuration file (TOML): for a frame the daemon handled.
    #[arg(long, required_unless_present = "model")]
    config: Option<PathBuf>,
    /// The archived frame's file name, as in its record.
    #[arg(required_unless_present = "frame")]
    name: Option<String>,
    /// With several records of that name, the one with this hash.
    #[arg(long)]
    sha256: Option<String>,
    /// A model file, for a frame outside the daemon's folders.
    #[arg(long, requires = "frame", conflicts_with_all = ["config", "name"])]
    model: Option<PathBuf>,
    /// That frame's file (PBM or PNG).
    #[arg(long, requires = "model")]
    frame: Option<PathBuf>,
    /// The PNG to write.
    #[arg(long)]
    out: PathBuf,
    /// Picture pixels per frame pixel [default: about 512 pixels on the
    /// longer side, 1 to 8].
    #[arg(long, value_parser = clap::value_parser!(u8).range(1..=16))]
    zoom: Option<u8>,
}

pub fn run(a: RenderArgs) -> Result<i32> {
    let (frame, detector, marks, what) = match (&a.model, &a.frame) {
        (Some(model), Some(path)) => {
            let model = super::load_model(model)?;
            let limits = DecodeLimits::default();
            let frame = fileio::data::read_frame(path, &limits).map_err(|e| anyhow!("{e}"))?;
            let detector = Detector::new(model.clone(), model.settings());
            (frame, detector, None, path.display().to_string())
        }
        _ => {
            let cfg = load_config(a.config.as_ref().expect("clap requires it"))?;
            let folders = cfg.start.folders.absolute()?;
            let name = a.name.as_deref().expect("clap requires it");
            let record = find_record(&folders.logs, name, a.sha256.as_deref())
                .map_err(|e| anyhow!("{e}"))?
                .ok_or_else(|| {
                    anyhow!("no record of a frame named {name:?} in the detection log")
                })?;
            let (path, bytes) = find_archived(&folders.archive, name, &record.sha256, &cfg.live)
                .map_err(|e| anyhow!("{e}"))?;
            let frame = codec::decode(&bytes, &cfg.live.limits)
                .map_err(|e| anyhow!("{}: {}", path.display(), e.kind()))?;
            let registry = Registry::read_only(&folders.state);
            let detector = record_detector(&record, &registry, &cfg.live)
                .map_err(|e| anyhow!("{e}"))
                .with_context(|| format!("cannot draw the detection of {name}"))?;
            let marks = Mark::of_record(&record);
            (frame, detector, Some(marks), path.display().to_string())
        }
    };
    let result = detector.detect(&frame, &mut Scratch::default());
    // The record's own objects when there is one (what was logged), else
    // this detection's.
    let marks = marks.unwrap_or_else(|| {
        result
            .objects
            .iter()
            .map(|o| Mark {
                bbox: [o.bbox.x0, o.bbox.y0, o.bbox.x1, o.bbox.y1],
                id: o.id,
                score: o.score,
            })
            .collect()
    });
    let zoom = a
        .zoom
        .map_or_else(|| zoom_for(frame.width(), frame.height()), usize::from);
    let picture = render(&frame, Some(&result.mask), &marks, zoom);
    let png = picture.to_png().map_err(|e| anyhow!("{e}"))?;
    if a.out.extension().is_none_or(|e| e != "png") {
        bail!("--out {} must end in .png", a.out.display());
    }
    fileio::durable::write_atomic(&a.out, &png)
        .with_context(|| format!("cannot write {}", a.out.display()))?;
    out!(
        "{}: {}x{} pixels (zoom {zoom}), {} object(s), model {} ({}), from {what}",
        a.out.display(),
        picture.width,
        picture.height,
        marks.len(),
        detector.version(),
        detector.hash()
    );
    Ok(0)
}
