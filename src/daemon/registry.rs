//! The model registry: every model ever put in service, or refused, kept in
//! `state/models/` with its version, parent, what it was trained on, its
//! scores and the time.
//!
//! Files, one pair per model:
//! - `NNNNNN-HASH.json`: the model file (its `model_version` is `NNNNNN`,
//!   `HASH` is [`crate::detect::model_hash`] of it);
//! - `NNNNNN-HASH.entry.json`: the [`Entry`], written after the model file:
//!   it is the commit point. A model file without its entry (a crash
//!   between the two) is not part of the registry and is removed at open.
//!
//! Entries are never rewritten: whether a model is in service is not
//! stored in them but read from `state/model.json` (its version and
//! hash), which [`put_in_service`] replaces atomically (a synced temporary
//! file renamed over it), so a crash leaves the old model or the new one
//! in service, never a mix. Versions only grow: the next is one more than
//! the largest in the registry or in service.

use std::fs;
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use crate::detect::model_hash;
use crate::error::{Error, ErrorKind, Result};
use crate::fileio::durable::write_atomic;
use crate::model::Model;

/// The registry's folder inside the state folder.
pub const DIR: &str = "models";

/// Where a model came from.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Origin {
    /// Trained by the daemon from `training.seed_data` on a fresh box.
    Seed,
    /// Found in `state/model.json` without an entry (put there by hand).
    Adopted,
    /// Grown by a retrain from the operator's labels.
    Retrain,
}

/// What a registered model was trained on.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct TrainedOn {
    /// The line (see `labels`) whose labels it was trained for.
    pub line: u64,
    /// Labelled frames it was grown and tuned on.
    pub frames: u64,
    /// Labelled pixels of those frames.
    pub pixels: u64,
    /// The labelled frames' names (archived frame names; seed frames as
    /// `seed:NAME`).
    pub names: Vec<String>,
    /// The label set's generation when training started: labels added
    /// later are new to this model.
    pub labels_generation: u64,
}

/// A gate's scores: object F1 of the challenger and of the model then in
/// service, on held-out frames neither was trained on.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct GateScores {
    /// The line now running, and how many of its held-out frames.
    pub line: u64,
    pub frames: u64,
    pub f1: f64,
    pub running_f1: f64,
    /// Older lines' held-out frames (none when there are none).
    pub older_frames: u64,
    pub older_f1: Option<f64>,
    pub running_older_f1: Option<f64>,
}

/// One registered model.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Entry {
    pub version: u64,
    pub hash: String,
    /// The version in service when it was made.
    pub parent: Option<u64>,
    /// RFC 3339, UTC.
    pub time: String,
    pub origin: Origin,
    pub trained_on: TrainedOn,
    /// Whether the gate let it in service (`true` for seed and adopted
    /// models, which no gate judged).
    pub passed: bool,
    /// Why it was put in service or refused.
    pub reason: String,
    pub gate: Option<GateScores>,
}

/// The registry in one state folder.
#[derive(Clone, Debug)]
pub struct Registry {
    dir: PathBuf,
}

fn data_err(path: &Path, msg: impl Into<String>) -> Error {
    Error::new(ErrorKind::Data(msg.into())).with_path(path)
}

impl Registry {
    /// The registry of `state` (created if missing); removes model files a
    /// crash left without their entry.
    pub fn open(state: &Path) -> Result<Registry> {
        let dir = state.join(DIR);
        fs::create_dir_all(&dir).map_err(|e| Error::from(e).with_path(&dir))?;
        let r = Registry { dir };
        for (stem, path) in r.files()? {
            let entry = r.dir.join(format!("{stem}.entry.json"));
            if path.extension().is_some_and(|e| e == "json")
                && !stem.ends_with(".entry")
                && !entry.exists()
            {
                let _ = fs::remove_file(&path);
            }
        }
        Ok(r)
    }

    /// The registry of `state` for reading only (nothing created or
    /// removed); empty when there is none.
    pub fn read_only(state: &Path) -> Registry {
        Registry {
            dir: state.join(DIR),
        }
    }

    /// `(stem, path)` of every visible file in the folder.
    fn files(&self) -> Result<Vec<(String, PathBuf)>> {
        let rd = match fs::read_dir(&self.dir) {
            Ok(rd) => rd,
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(Vec::new()),
            Err(e) => return Err(Error::from(e).with_path(&self.dir)),
        };
        let mut out = Vec::new();
        for e in rd.flatten() {
            let name = e.file_name().to_string_lossy().into_owned();
            if name.starts_with('.') {
                continue;
            }
            if let Some(stem) = name.strip_suffix(".json") {
                out.push((stem.to_string(), e.path()));
            }
        }
        Ok(out)
    }

    fn stem(version: u64, hash: &str) -> String {
        format!("{version:06}-{hash}")
    }

    /// Every entry, oldest version first. An entry that does not parse is
    /// an error naming its file.
    pub fn entries(&self) -> Result<Vec<Entry>> {
        let mut out = Vec::new();
        for (stem, path) in self.files()? {
            if !stem.ends_with(".entry") {
                continue;
            }
            let text = fs::read_to_string(&path).map_err(|e| Error::from(e).with_path(&path))?;
            let e: Entry = serde_json::from_str(&text)
                .map_err(|e| data_err(&path, format!("not a registry entry: {e}")))?;
            out.push(e);
        }
        out.sort_by_key(|e| e.version);
        Ok(out)
    }

    /// The entry of `version`, if registered.
    pub fn entry(&self, version: u64) -> Result<Option<Entry>> {
        Ok(self.entries()?.into_iter().find(|e| e.version == version))
    }

    /// The entry of the model with this version and hash, if registered.
    pub fn find(&self, version: u64, hash: &str) -> Result<Option<Entry>> {
        Ok(self
            .entries()?
            .into_iter()
            .find(|e| e.version == version && e.hash == hash))
    }

    /// The model file of a registered version, checked against its hash.
    pub fn model(&self, entry: &Entry) -> Result<Model> {
        let path = self
            .dir
            .join(format!("{}.json", Self::stem(entry.version, &entry.hash)));
        let m = crate::fileio::models::read_model(&path)?;
        if model_hash(&m) != entry.hash || m.model_version != entry.version {
            return Err(data_err(
                &path,
                format!(
                    "holds another model than its entry says (version {}, hash {})",
                    entry.version, entry.hash
                ),
            ));
        }
        Ok(m)
    }

    /// The next free version, given the one in service.
    pub fn next_version(&self, in_service: Option<u64>) -> Result<u64> {
        let top = self.entries()?.iter().map(|e| e.version).max().unwrap_or(0);
        Ok(top.max(in_service.unwrap_or(0)) + 1)
    }

    /// Stores a model under its own version (already set by the caller)
    /// and its entry; returns the entry as stored. The model file first,
    /// then the entry, each written atomically: the entry commits.
    pub fn add(&self, model: &Model, mut entry: Entry) -> Result<Entry> {
        entry.version = model.model_version;
        entry.hash = model_hash(model);
        let stem = Self::stem(entry.version, &entry.hash);
        let mpath = self.dir.join(format!("{stem}.json"));
        write_atomic(&mpath, model.to_json().as_bytes())
            .map_err(|e| Error::from(e).with_path(&mpath))?;
        let epath = self.dir.join(format!("{stem}.entry.json"));
        let mut text = serde_json::to_string_pretty(&entry).expect("entry serialises");
        text.push('\n');
        write_atomic(&epath, text.as_bytes()).map_err(|e| Error::from(e).with_path(&epath))?;
        Ok(entry)
    }
}

/// Puts `model` in service: `state/model.json` replaced atomically.
pub fn put_in_service(state: &Path, model: &Model) -> Result<()> {
    let path = state.join(super::files::MODEL);
    write_atomic(&path, model.to_json().as_bytes()).map_err(|e| Error::from(e).with_path(&path))
}

/// Makes sure the model in service is registered: a model without an
/// entry is registered as `origin` (keeping its version when that is free
/// and above every registered one, else taking the next and being written
/// back to `state/model.json` with it). Returns the model as in service
/// and its entry.
pub fn register_in_service(
    state: &Path,
    registry: &Registry,
    mut model: Model,
    origin: Origin,
    trained_on: TrainedOn,
) -> Result<(Model, Entry)> {
    if let Some(e) = registry.find(model.model_version, &model_hash(&model))? {
        return Ok((model, e));
    }
    let next = registry.next_version(None)?;
    if model.model_version < next {
        model.model_version = next;
        put_in_service(state, &model)?;
    }
    let reason = match origin {
        Origin::Seed => "trained from the seed data on a fresh box",
        Origin::Adopted => "found in service without a registry entry",
        Origin::Retrain => "retrained",
    };
    let entry = registry.add(
        &model,
        Entry {
            version: 0,
            hash: String::new(),
            parent: None,
            time: crate::record::rfc3339(std::time::SystemTime::now()),
            origin,
            trained_on,
            passed: true,
            reason: reason.into(),
            gate: None,
        },
    )?;
    Ok((model, entry))
}
