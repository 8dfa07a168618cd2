//! What the daemon needs before it watches anything: its folders made and
//! made absolute, and the model in service (the state folder's, or one
//! trained from the seed data on a fresh box). The lock is taken between
//! the two, in `run_with`, and held for the run.

use std::path::PathBuf;

use tracing::info;

use super::{files, registry};
use crate::config::{Folders, LiveConfig};
use crate::detect::Detector;
use crate::error::{Error, ErrorKind, Result};
use crate::learn;
use crate::model::Model;

/// Where the model in service lives.
pub fn model_path(folders: &Folders) -> PathBuf {
    folders.state.join(files::MODEL)
}

/// Loads the model in service from `folders.state`, checking it against
/// the live configuration (`detection.window`).
pub fn load_model(folders: &Folders, live: &LiveConfig) -> Result<Model> {
    let path = model_path(folders);
    let m = crate::fileio::models::read_model(&path)?;
    check_window(&m, live).map_err(|e| e.with_path(&path))?;
    Ok(m)
}

/// Whether a model has the window `detection.window` asks for, if any.
pub fn check_window(m: &Model, live: &LiveConfig) -> Result<()> {
    match live.window {
        Some(w) if m.tree.window() != w => Err(Error::new(ErrorKind::BadModel(format!(
            "the model uses a {0}x{0} window but detection.window is {1}",
            m.tree.window().size(),
            w.size()
        )))),
        _ => Ok(()),
    }
}

/// The detector for a model under the live configuration's overrides.
pub fn detector(model: Model, live: &LiveConfig) -> Result<Detector> {
    let settings = live.overrides.settings_for(model.settings())?;
    Ok(Detector::new(model, settings))
}

/// The model in service: the state folder's, or, on a fresh box, one
/// trained from `training.seed_data` and stored there as version 1; with
/// where it came from and what it was trained on, for the registry. The
/// seed frames the gate holds out (by content hash) are left out of
/// training, so a later retrain's gate judges both models on frames
/// neither saw.
pub fn load_or_train(
    folders: &Folders,
    live: &LiveConfig,
) -> Result<(Model, registry::Origin, registry::TrainedOn)> {
    let path = model_path(folders);
    if path.exists() {
        return Ok((
            load_model(folders, live)?,
            registry::Origin::Adopted,
            registry::TrainedOn {
                line: 1,
                ..Default::default()
            },
        ));
    }
    if live.seed_data.is_none() {
        return Err(Error::new(ErrorKind::Data(format!(
            "no model at {} and no training.seed_data to train one from",
            path.display()
        ))));
    }
    let seed = live.seed_data.as_ref().expect("checked");
    info!(seed = %seed.display(), "no model yet: training one from the seed data");
    if !seed.is_dir() {
        return Err(Error::new(ErrorKind::Data(format!(
            "training.seed_data {} is not a folder",
            seed.display()
        ))));
    }
    let frames: Vec<_> = super::retrain::seed_frames(live)?
        .into_iter()
        .filter(|(_, role)| *role == super::labels::Role::Train)
        .map(|(f, _)| f)
        .collect();
    let mut m = learn::train(&frames, &live.training, &mut |_| {})?;
    m.model_version = 1;
    files::write_atomic(&path, m.to_json().as_bytes())
        .map_err(|e| Error::from(e).with_path(&path))?;
    info!(path = %path.display(), leaves = m.tree.leaves(), "stored model version 1");
    let trained_on = registry::TrainedOn {
        line: 1,
        frames: frames.len() as u64,
        pixels: frames.iter().map(|f| f.known_pixels()).sum(),
        names: frames.iter().map(|f| f.name.clone()).collect(),
        labels_generation: 0,
    };
    Ok((
        load_model(folders, live)?,
        registry::Origin::Seed,
        trained_on,
    ))
}

/// Creates the folders the daemon writes to and returns them made
/// absolute (file events name absolute paths, and a path must have one
/// spelling to be recognised in flight).
pub fn make_folders(folders: &Folders) -> Result<Folders> {
    for (_, d) in folders.named() {
        std::fs::create_dir_all(d).map_err(|e| Error::from(e).with_path(d))?;
    }
    folders.absolute().map_err(Error::from)
}
