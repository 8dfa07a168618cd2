//! The learning loop's state-folder side: the registry, the labels, the
//! lines and the events log together, and the operations on them that the
//! daemon's learner thread and the offline commands (`retrain`,
//! `changeover`, `models use` with no daemon running) share. Whoever holds
//! the state lock holds the one `Learning` of a state folder.

use std::path::Path;

use tracing::info;

use super::events::{Event, EventsLog, ModelRef};
use super::labels::{self, LabelSet, Line};
use super::registry::{self, Entry, Origin, Registry, TrainedOn};
use super::retrain::{Challenge, Plan};
use crate::config::{Folders, LiveConfig};
use crate::detect::model_hash;
use crate::error::{Error, ErrorKind, Result};
use crate::model::Model;

/// The state folder's learning side, held by the holder of the lock.
#[derive(Debug)]
pub struct Learning {
    pub folders: Folders,
    pub registry: Registry,
    pub labels: LabelSet,
    pub events: EventsLog,
}

/// A model reference for the events log.
pub fn model_ref(m: &Model) -> ModelRef {
    ModelRef {
        version: m.model_version,
        hash: model_hash(m),
    }
}

impl Learning {
    /// Opens the registry, labels and events log of `folders` (absolute,
    /// existing), for a model of `window`.
    pub fn open(
        folders: &Folders,
        live: &LiveConfig,
        window: crate::window::Window,
    ) -> Result<Learning> {
        Ok(Learning {
            folders: folders.clone(),
            registry: Registry::open(&folders.state)?,
            labels: LabelSet::open(&folders.state, window, &live.limits)?,
            events: EventsLog::new(&folders.logs),
        })
    }

    fn state(&self) -> &Path {
        &self.folders.state
    }

    /// Registers the model in service if it is not yet (see
    /// [`registry::register_in_service`]), with an event when it is new.
    pub fn in_service(
        &self,
        model: Model,
        origin: Origin,
        trained_on: TrainedOn,
    ) -> Result<(Model, Entry)> {
        let known = self
            .registry
            .find(model.model_version, &model_hash(&model))?
            .is_some();
        let (model, entry) =
            registry::register_in_service(self.state(), &self.registry, model, origin, trained_on)?;
        if known {
            self.reconcile(&model)?;
        } else {
            self.events.append(Event {
                event: "registered".into(),
                by: "start".into(),
                decision: "in-service".into(),
                reason: entry.reason.clone(),
                model: Some(model_ref(&model)),
                line: Some(entry.trained_on.line),
                ..Event::default()
            })?;
            info!(version = entry.version, hash = %entry.hash, "model registered");
        }
        Ok((model, entry))
    }

    /// Writes the events a crash kept from being written: a registered
    /// model no event names (the daemon stopped between the registry entry
    /// and its decision: it was not put in service), and a model put in
    /// service (`model.json` switched) whose decision is not in the log.
    fn reconcile(&self, model: &Model) -> Result<()> {
        let events = self.events.read()?;
        let now = model_ref(model);
        let named = |v: u64, h: &str| {
            events.iter().any(|e| {
                [&e.model, &e.running]
                    .iter()
                    .any(|m| m.as_ref().is_some_and(|m| m.version == v && m.hash == h))
            })
        };
        for e in self.registry.entries()? {
            let serving = e.version == now.version && e.hash == now.hash;
            if !serving && !named(e.version, &e.hash) {
                self.events.append(Event {
                    event: "recovered".into(),
                    by: "start".into(),
                    decision: "refused".into(),
                    reason: format!(
                        "version {} was registered but the daemon stopped before its decision; it was not put in service",
                        e.version
                    ),
                    model: Some(ModelRef {
                        version: e.version,
                        hash: e.hash.clone(),
                    }),
                    ..Event::default()
                })?;
            }
        }
        let last = events
            .iter()
            .rev()
            .find(|e| e.decision == "in-service")
            .and_then(|e| e.model.clone());
        if last.as_ref().is_some_and(|m| *m != now) {
            self.events.append(Event {
                event: "recovered".into(),
                by: "start".into(),
                decision: "in-service".into(),
                reason: format!(
                    "version {} was put in service just before the daemon stopped, and its decision was not logged",
                    now.version
                ),
                model: Some(now),
                running: last,
                ..Event::default()
            })?;
        }
        Ok(())
    }

    /// The entry of the model in service (registered by `in_service`).
    pub fn entry_of(&self, model: &Model) -> Result<Entry> {
        self.registry
            .find(model.model_version, &model_hash(model))?
            .ok_or_else(|| {
                Error::new(ErrorKind::Data(format!(
                    "the model in service (version {}) is not in the registry",
                    model.model_version
                )))
                .with_path(self.state().join(registry::DIR))
            })
    }

    /// Labelled frames added since `entry`'s model was trained and since
    /// label generation `since` (the last retrain tried, or the last model
    /// put in service by hand).
    pub fn new_labels(&self, entry: &Entry, since: u64) -> u64 {
        let from = entry.trained_on.labels_generation.max(since);
        self.labels
            .labels()
            .iter()
            .filter(|l| l.generation > from)
            .count() as u64
    }

    /// The label generation of the latest retrain tried or model put in
    /// service by hand, from the events log (so a restart does not retry
    /// what was tried).
    pub fn last_decided_generation(&self) -> Option<u64> {
        self.events
            .read()
            .ok()?
            .iter()
            .filter(|e| e.event == "retrain" || e.event == "use")
            .filter_map(|e| e.generation)
            .max()
    }

    /// Whether a changeover happened since `entry`'s model was trained:
    /// it was trained for an older line than the one now running.
    pub fn changeover_since(&self, entry: &Entry) -> Result<bool> {
        let lines = labels::read_lines(self.state())?;
        Ok(lines.last().map_or(1, |l| l.line) > entry.trained_on.line)
    }

    /// Registers a retrain's challenger, puts it in service when it passed
    /// the gate, and writes the decision to the events log. Returns the
    /// model now to run when it changed.
    pub fn decide(
        &mut self,
        plan: &Plan,
        ch: Challenge,
        running: &Model,
        by: &str,
    ) -> Result<Option<Model>> {
        let running_entry = self.entry_of(running)?;
        for u in &ch.stores {
            if let Err(e) = self.labels.commit_store(u) {
                tracing::warn!(
                    "cannot record the updated label store: {e}; it is rebuilt next time"
                );
            }
        }
        let mut event = Event {
            event: "retrain".into(),
            by: by.into(),
            running: Some(model_ref(running)),
            gate: Some(ch.gate.clone()),
            line: Some(plan.line),
            reason: ch.reason.clone(),
            generation: Some(plan.generation),
            ..Event::default()
        };
        let Ok(mut model) = ch.model else {
            event.decision = "kept".into();
            self.events.append(event)?;
            return Ok(None);
        };
        model.model_version = self.registry.next_version(Some(running.model_version))?;
        let names = plan.train.iter().map(|f| f.name.clone()).collect();
        let entry = self.registry.add(
            &model,
            Entry {
                version: 0,
                hash: String::new(),
                parent: Some(running_entry.version),
                time: crate::record::rfc3339(std::time::SystemTime::now()),
                origin: Origin::Retrain,
                trained_on: TrainedOn {
                    line: plan.line,
                    frames: plan.train.len() as u64,
                    pixels: ch.pixels,
                    names,
                    labels_generation: plan.generation,
                },
                passed: ch.passed,
                reason: ch.reason.clone(),
                gate: Some(ch.gate.clone()),
            },
        )?;
        event.model = Some(ModelRef {
            version: entry.version,
            hash: entry.hash.clone(),
        });
        if ch.passed {
            registry::put_in_service(self.state(), &model)?;
            event.decision = "in-service".into();
            self.events.append(event)?;
            Ok(Some(model))
        } else {
            event.decision = "refused".into();
            self.events.append(event)?;
            Ok(None)
        }
    }

    /// Puts registered `version` in service by hand (an earlier or a
    /// refused model). Returns it.
    pub fn use_version(
        &mut self,
        version: u64,
        running: Option<&Model>,
        by: &str,
        live: &LiveConfig,
    ) -> Result<Model> {
        let entry = self.registry.entry(version)?.ok_or_else(|| {
            let known: Vec<String> = self
                .registry
                .entries()
                .unwrap_or_default()
                .iter()
                .map(|e| e.version.to_string())
                .collect();
            Error::new(ErrorKind::Data(format!(
                "no model version {version} in the registry (versions: {})",
                if known.is_empty() {
                    "none".into()
                } else {
                    known.join(", ")
                }
            )))
        })?;
        let model = self.registry.model(&entry)?;
        // It must run under this configuration before anything changes.
        super::start::check_window(&model, live)?;
        super::start::detector(model.clone(), live)?;
        registry::put_in_service(self.state(), &model)?;
        self.events.append(Event {
            event: "use".into(),
            by: by.into(),
            decision: "in-service".into(),
            reason: format!("version {version} put in service by hand"),
            running: running.map(model_ref),
            model: Some(model_ref(&model)),
            line: Some(entry.trained_on.line),
            generation: Some(self.labels.generation()),
            ..Event::default()
        })?;
        Ok(model)
    }

    /// Records a changeover, with an event.
    pub fn changeover(&mut self, note: Option<String>, by: &str) -> Result<Line> {
        let now = crate::record::rfc3339(std::time::SystemTime::now());
        let line = labels::changeover(self.state(), &now, note.clone())?;
        self.events.append(Event {
            time: now,
            event: "changeover".into(),
            by: by.into(),
            decision: "recorded".into(),
            reason: format!("line {} runs from now; the running model keeps running until a retrained one passes the gate", line.line),
            line: Some(line.line),
            note,
            ..Event::default()
        })?;
        Ok(line)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn learning(d: &Path) -> (Learning, LiveConfig) {
        let mut cfg = crate::config::Config::default();
        for (sub, f) in [
            ("inbox", &mut cfg.start.folders.inbox),
            ("archive", &mut cfg.start.folders.archive),
            ("rejected", &mut cfg.start.folders.rejected),
            ("corrections", &mut cfg.start.folders.corrections),
            ("state", &mut cfg.start.folders.state),
            ("logs", &mut cfg.start.folders.logs),
        ] {
            *f = d.join(sub);
            std::fs::create_dir_all(&*f).unwrap();
        }
        let model = model();
        let l = Learning::open(&cfg.start.folders, &cfg.live, model.tree.window()).unwrap();
        (l, cfg.live)
    }

    fn model() -> Model {
        Model::from_json(include_str!("../../tests/data/model-v2.json")).unwrap()
    }

    #[test]
    fn decisions_a_crash_kept_out_of_the_events_log_are_recorded_at_start() {
        let d = tempfile::tempdir().unwrap();
        let (l, _) = learning(d.path());
        let (v1, _) = l
            .in_service(model(), Origin::Adopted, TrainedOn::default())
            .unwrap();
        // A retrain registered version 2, then the daemon stopped before
        // its decision was logged.
        let mut m2 = model();
        m2.threshold = (m2.threshold + 0.01).min(1.0);
        m2.model_version = 2;
        let e2 = l
            .registry
            .add(
                &m2,
                Entry {
                    version: 0,
                    hash: String::new(),
                    parent: Some(1),
                    time: String::new(),
                    origin: Origin::Retrain,
                    trained_on: TrainedOn::default(),
                    passed: true,
                    reason: String::new(),
                    gate: None,
                },
            )
            .unwrap();
        l.in_service(v1.clone(), Origin::Adopted, TrainedOn::default())
            .unwrap();
        let ev = l.events.read().unwrap();
        let last = ev.last().unwrap();
        assert_eq!(
            (last.event.as_str(), last.decision.as_str()),
            ("recovered", "refused")
        );
        assert_eq!(last.model.as_ref().unwrap().version, e2.version);
        // Then it went in service (model.json switched) and again the
        // decision was not logged.
        registry::put_in_service(&l.folders.state, &m2).unwrap();
        l.in_service(m2.clone(), Origin::Adopted, TrainedOn::default())
            .unwrap();
        let ev = l.events.read().unwrap();
        let last = ev.last().unwrap();
        assert_eq!(
            (last.event.as_str(), last.decision.as_str()),
            ("recovered", "in-service")
        );
        assert_eq!(last.model, Some(model_ref(&m2)));
        // Nothing more to record on the next start.
        let before = ev.len();
        l.in_service(m2, Origin::Adopted, TrainedOn::default())
            .unwrap();
        assert_eq!(l.events.read().unwrap().len(), before);
    }
}
