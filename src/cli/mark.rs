//! `burlwatch mark`: writes a correction file for the operator. It finds
//! the frame's latest record in the detection log and the frame in the
//! archive, runs every check the daemon will run (building the labels
//! without storing them), and writes the file atomically (a hidden
//! temporary name, then a rename) into the corrections folder, where the
//! daemon applies it.

use std::path::PathBuf;

use anyhow::{anyhow, bail, Context, Result};

use burlwatch::correct::{check_name, Correction, Region};
use burlwatch::daemon::corrections::{find_record, prepare};
use burlwatch::daemon::registry::Registry;
use burlwatch::fileio::durable::write_atomic;

use super::load_config;

#[derive(clap::Args, Debug)]
pub struct MarkArgs {
    /// Configuration file (TOML).
    #[arg(long)]
    config: PathBuf,
    /// The archived frame's file name, as in its log record.
    frame: String,
    /// Which record of that name (its `sha256`), when the name was used
    /// for more than one frame; default: the latest record.
    #[arg(long)]
    sha256: Option<String>,
    /// The detection is right as it stands.
    #[arg(long)]
    right: bool,
    /// A reported object (its id in the record) is a false alarm.
    #[arg(long, value_name = "ID", num_args = 1..)]
    wrong: Vec<u32>,
    /// A defect was missed here: x0,y0,x1,y1 (inclusive) or ellipse:cx,cy,rx,ry.
    #[arg(long, value_name = "REGION", num_args = 1..)]
    missed: Vec<String>,
    /// The defects are exactly these regions and nothing else.
    #[arg(long, value_name = "REGION", num_args = 1..)]
    only: Vec<String>,
    /// The truth is this mask (PBM, the frame's size; set = defect).
    #[arg(long, value_name = "MASK.pbm")]
    mask: Option<PathBuf>,
    /// Don't know here: left out of training and scoring.
    #[arg(long, value_name = "REGION", num_args = 1..)]
    unknown: Vec<String>,
    /// A note kept with the correction.
    #[arg(long)]
    note: Option<String>,
    /// Who is marking (kept with the labels).
    #[arg(long)]
    by: Option<String>,
    /// Check everything and print the file, but write nothing.
    #[arg(long)]
    dry_run: bool,
}

fn regions(v: &[String]) -> Result<Vec<Region>> {
    v.iter()
        .map(|s| Region::parse_arg(s).map_err(|e| anyhow!("{e}")))
        .collect()
}

pub fn run(a: MarkArgs) -> Result<i32> {
    let cfg = load_config(&a.config)?;
    let folders = cfg.start.folders.absolute()?;
    check_name(&a.frame).map_err(|e| anyhow!("{e}"))?;
    let record = find_record(&folders.logs, &a.frame, a.sha256.as_deref())
        .map_err(|e| anyhow!("{e}"))?
        .ok_or_else(|| {
            if folders.rejected.join(&a.frame).exists() {
                anyhow!(
                    "frame {} was rejected (see {}), so it has no detection to correct",
                    a.frame,
                    folders
                        .rejected
                        .join(format!("{}.reason.txt", a.frame))
                        .display()
                )
            } else {
                anyhow!(
                    "no record of frame {} in the detection log in {}",
                    a.frame,
                    folders.logs.display()
                )
            }
        })?;
    let stamp = humantime::format_rfc3339_millis(std::time::SystemTime::now())
        .to_string()
        .replace([':', '.'], "");
    let stem = a
        .frame
        .rsplit_once('.')
        .map_or(a.frame.as_str(), |(s, _)| s);
    let name = format!("{stem}.{stamp}");
    let mask_name = a.mask.as_ref().map(|_| format!("{name}.truth.pbm"));
    let c = Correction {
        frame: record.frame.clone(),
        sha256: record.sha256.clone(),
        right: a.right,
        wrong: a.wrong.clone(),
        missed: regions(&a.missed)?,
        only: regions(&a.only)?,
        mask: mask_name.clone(),
        unknown: regions(&a.unknown)?,
        note: a.note.clone(),
        by: a.by.clone().or_else(|| std::env::var("USER").ok()),
    };
    c.check_statements().map_err(|e| anyhow!("{e}"))?;
    let text = c.to_toml();
    // The mask goes beside the correction first (the daemon reads only
    // `.toml` files, so it waits there for its correction).
    let dir = &folders.corrections;
    std::fs::create_dir_all(dir).with_context(|| format!("cannot create {}", dir.display()))?;
    let check_dir = if a.dry_run {
        tempfile_dir()?
    } else {
        dir.clone()
    };
    let mut written_mask = None;
    if let (Some(src), Some(m)) = (&a.mask, &mask_name) {
        let bytes = std::fs::read(src).with_context(|| format!("cannot read {}", src.display()))?;
        let to = check_dir.join(m);
        write_atomic(&to, &bytes).with_context(|| format!("cannot write {}", to.display()))?;
        written_mask = Some(to);
    }
    let registry = Registry::read_only(&folders.state);
    let checked = prepare(
        text.as_bytes(),
        &check_dir,
        &folders,
        &cfg.live,
        &registry,
        None,
    );
    let prepared = match checked {
        Ok(p) => p,
        Err(e) => {
            if a.dry_run {
                let _ = std::fs::remove_dir_all(&check_dir);
            } else if let Some(m) = &written_mask {
                let _ = std::fs::remove_file(m);
            }
            bail!("{e}");
        }
    };
    let targets = prepared.labelled.truth().count_set();
    if a.dry_run {
        let _ = std::fs::remove_dir_all(&check_dir);
        out!("{text}");
        eprintln!(
            "burlwatch: checked; {targets} defect pixel(s) in the labels; nothing written (--dry-run)"
        );
        return Ok(0);
    }
    let path = dir.join(format!("{name}.toml"));
    write_atomic(&path, text.as_bytes())
        .with_context(|| format!("cannot write {}", path.display()))?;
    out!("{}", path.display());
    eprintln!(
        "burlwatch: correction of {} (record of {}, model version {}) written; {targets} defect pixel(s) in its labels",
        record.frame, record.time, record.model_version
    );
    Ok(0)
}

/// A private folder for a dry run's mask copy.
fn tempfile_dir() -> Result<PathBuf> {
    let d = std::env::temp_dir().join(format!("burlwatch-mark-{}", std::process::id()));
    std::fs::create_dir_all(&d)?;
    Ok(d)
}
