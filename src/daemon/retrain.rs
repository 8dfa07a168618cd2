//! Retraining: which labelled frames a challenger is grown on and judged
//! on ([`plan`]), growing it and scoring it against the model in service
//! ([`challenge`], pure computation, run on a background thread at low
//! priority with a time budget), and the decision
//! ([`super::learning::Learning::decide`]):
//! registered either way, put in service only if it passed the gate,
//! one line in the events log either way.
//!
//! The gate: both models are scored, with the detection settings of the
//! live configuration, on the held-out frames of the line now running
//! (role [`Role::Gate`]: chosen by content hash, never trained on by either,
//! since every model the daemon trains leaves them out). The challenger
//! goes in service only if its object F1 there is at least the running
//! model's plus `retrain.margin`, and higher (a tie keeps the running
//! model); and, when the running model was trained for the line now
//! running (no changeover since it was trained), if it loses at most
//! `retrain.tolerance` on the older lines' held-out frames.
//!
//! Which labels: those of the line now running (the seed data counts as
//! line 1's), and, with `retrain.older_lines` (the default), older lines'
//! training frames and the seed data too. "Enough" is `retrain.min_line_labels` labelled frames of the
//! line, at least one held out with a defect and one to train on with a
//! defect.

use std::path::Path;

use crate::config::LiveConfig;
use crate::error::{Error, ErrorKind, Result};
use crate::frame::LabelledFrame;
use crate::learn;
use crate::learn::store::LabelStore;
use crate::model::Model;
use crate::score;

use super::labels::{self, role_key, role_of, LabelSet, Role, StoreJob, UpdatedStore};
use super::registry::GateScores;

/// What a retrain will train on and be judged on.
#[derive(Debug)]
pub struct Plan {
    /// The line now running.
    pub line: u64,
    pub train: Vec<LabelledFrame>,
    /// How to bring the label stores of the lines trained on up to date;
    /// with `seed`, they hold exactly `train`.
    pub stores: Vec<StoreJob>,
    /// The seed frames among `train` (no store holds them).
    pub seed: Vec<usize>,
    /// Held-out frames of the line now running.
    pub gate: Vec<LabelledFrame>,
    /// Held-out frames of older lines.
    pub older_gate: Vec<LabelledFrame>,
    /// The label set's generation the plan was made at.
    pub generation: u64,
}

/// The seed data's frames with their roles (line 1's first labels); an
/// empty list without seed data.
pub fn seed_frames(live: &LiveConfig) -> Result<Vec<(LabelledFrame, Role)>> {
    let Some(seed) = &live.seed_data else {
        return Ok(Vec::new());
    };
    if !seed.is_dir() {
        return Ok(Vec::new());
    }
    let folder = crate::fileio::data::read_folder(seed, &live.limits, &mut |_, _| {})?;
    if let Some(p) = folder.problems.first() {
        return Err(Error::new(ErrorKind::Data(format!(
            "seed data has {} bad file(s), first: {p}",
            folder.problems.len()
        ))));
    }
    Ok(folder
        .frames
        .into_iter()
        .map(|mut f| {
            let role = role_of(&role_key(&f.frame), live.retrain.gate_share);
            f.name = format!("seed:{}", f.name);
            (f, role)
        })
        .collect())
}

/// What a retrain of the line now running will read, decided from the
/// label index alone (quick, on the thread that owns the labels; the store
/// jobs it hands out keep their files until committed or released). Its
/// [`PlanJob::read`] reads the frames, anywhere.
#[derive(Debug)]
pub struct PlanJob {
    line: u64,
    train: Vec<super::labels::Label>,
    gate: Vec<super::labels::Label>,
    older_gate: Vec<super::labels::Label>,
    stores: Vec<StoreJob>,
    /// Labels on the line now running.
    on_line: u64,
    generation: u64,
    reader: super::labels::LabelReader,
}

/// Decides what a retrain will read (see [`PlanJob`]).
pub fn plan_job(state: &Path, labels: &mut LabelSet, live: &LiveConfig) -> Result<PlanJob> {
    let lines = labels::read_lines(state)?;
    let line = lines.last().map_or(1, |l| l.line);
    let older: Vec<u64> = lines.iter().map(|l| l.line).filter(|&l| l < line).collect();
    let mut train = labels.labels_of(&[line], Role::Train);
    let mut store_lines = vec![line];
    if live.retrain.older_lines {
        train.extend(labels.labels_of(&older, Role::Train));
        store_lines.extend(&older);
    }
    Ok(PlanJob {
        line,
        train,
        gate: labels.labels_of(&[line], Role::Gate),
        older_gate: labels.labels_of(&older, Role::Gate),
        on_line: labels.labels().iter().filter(|l| l.line == line).count() as u64,
        stores: store_lines.iter().map(|&l| labels.store_job(l)).collect(),
        generation: labels.generation(),
        reader: labels.reader(),
    })
}

impl PlanJob {
    /// Reads the frames (and the seed data) and says whether there are
    /// enough: the plan, or why not.
    pub fn read(self, live: &LiveConfig) -> Result<std::result::Result<Plan, String>> {
        let line = self.line;
        let read = |ls: &[super::labels::Label]| -> Result<Vec<LabelledFrame>> {
            ls.iter().map(|l| self.reader.read(l)).collect()
        };
        let mut train = read(&self.train)?;
        let mut gate = read(&self.gate)?;
        let mut older_gate = read(&self.older_gate)?;
        let mut seed_idx = Vec::new();
        let mut on_line = self.on_line;
        for (f, role) in seed_frames(live)? {
            if line == 1 {
                on_line += 1;
            }
            match (role, line == 1) {
                (Role::Gate, true) => gate.push(f),
                (Role::Gate, false) => older_gate.push(f),
                (Role::Train, true) => {
                    seed_idx.push(train.len());
                    train.push(f);
                }
                (Role::Train, false) if live.retrain.older_lines => {
                    seed_idx.push(train.len());
                    train.push(f);
                }
                (Role::Train, false) => {}
            }
        }
        let has_targets = |v: &[LabelledFrame]| v.iter().any(|f| f.truth().count_set() > 0);
        let why = if on_line < live.retrain.min_line_labels {
            Some(format!(
                "line {line} has {on_line} labelled frame(s); retrain.min_line_labels is {}",
                live.retrain.min_line_labels
            ))
        } else if !has_targets(&gate) {
            Some(format!(
                "no held-out frame of line {line} has a defect to judge a model on (label more frames with defects)"
            ))
        } else if !has_targets(&train) {
            Some(format!(
                "no training frame of line {line} has a defect (label more frames with defects)"
            ))
        } else {
            None
        };
        Ok(match why {
            Some(w) => Err(w),
            None => Ok(Plan {
                line,
                stores: self.stores,
                seed: seed_idx,
                train,
                gate,
                older_gate,
                generation: self.generation,
            }),
        })
    }

    /// The label generation it was decided at.
    pub fn generation(&self) -> u64 {
        self.generation
    }
}

/// The frames a retrain of the line now running would use, or why there
/// are not enough yet: [`plan_job`] and [`PlanJob::read`] in one go (the
/// offline command; the daemon reads on its retrain thread). When there
/// are not enough, the store jobs are let go.
pub fn plan(
    state: &Path,
    labels: &mut LabelSet,
    live: &LiveConfig,
) -> Result<std::result::Result<Plan, String>> {
    let job = plan_job(state, labels, live)?;
    let planned = job.read(live);
    if !matches!(planned, Ok(Ok(_))) {
        labels.release_jobs();
    }
    planned
}

/// A grown challenger and how it fared at the gate.
#[derive(Debug)]
pub struct Challenge {
    /// The challenger (its version not yet set), or why none was grown.
    pub model: std::result::Result<Model, String>,
    pub gate: GateScores,
    pub passed: bool,
    pub reason: String,
    /// Labelled pixels it was grown on.
    pub pixels: u64,
    /// The label stores brought up to date on the way, for
    /// [`LabelSet::commit_store`].
    pub stores: Vec<UpdatedStore>,
}

/// The label stores of the plan brought up to date, and one store of every
/// training frame (theirs merged, with the seed frames added).
fn training_store(
    plan: &Plan,
    window: crate::window::Window,
) -> Result<(LabelStore, Vec<UpdatedStore>)> {
    let mut updated = Vec::new();
    let mut all: Option<LabelStore> = None;
    for job in &plan.stores {
        let mut u = job.clone().run()?;
        let s = u.store.take().expect("just counted");
        // The first store is taken as it is, the others added to it.
        match all.as_mut() {
            None => all = Some(s),
            Some(a) => a.merge(&s)?,
        }
        updated.push(u);
    }
    let mut all = all.unwrap_or_else(|| LabelStore::new(window));
    for &i in &plan.seed {
        all.add_labelled(&plan.train[i])?;
    }
    Ok((all, updated))
}

/// Object F1 of `model` (under the live overrides) on `frames`.
fn object_f1(model: &Model, live: &LiveConfig, frames: &[LabelledFrame]) -> Result<f64> {
    let detector = super::start::detector(model.clone(), live)?;
    let r = score::score_frames(&detector, frames, false, &mut |_, _| {})?;
    Ok(r.total.object.f1())
}

/// Grows a challenger on the plan's training frames and judges it against
/// `running` at the gate (see the module docs). `stop` is asked while
/// growing (the time budget). `changeover_since` says whether `running`
/// was trained for an older line than the one now running.
pub fn challenge(
    plan: &Plan,
    running: &Model,
    live: &LiveConfig,
    changeover_since: bool,
    stop: &(dyn Fn() -> bool + Sync),
) -> Result<Challenge> {
    let running_f1 = object_f1(running, live, &plan.gate)?;
    let running_older = if plan.older_gate.is_empty() {
        None
    } else {
        Some(object_f1(running, live, &plan.older_gate)?)
    };
    let mut gate = GateScores {
        line: plan.line,
        frames: plan.gate.len() as u64,
        f1: 0.0,
        running_f1,
        older_frames: plan.older_gate.len() as u64,
        older_f1: None,
        running_older_f1: running_older,
    };
    let pixels = plan.train.iter().map(|f| f.known_pixels()).sum();
    let mut params = live.training.clone();
    params.window = running.tree.window();
    if let Some(w) = live.window {
        params.window = w;
    }
    // The stores count windows of the model in service's size; training
    // for another size (detection.window changed) extracts its own.
    let (grown, stores) = if plan.stores.iter().all(|j| j.window() == params.window) {
        let (store, stores) = training_store(plan, params.window)?;
        // The store is written either way: the next retrain starts from it.
        let grown = if stop() {
            Err(crate::error::Error::training(learn::STOPPED))
        } else {
            learn::train_from_store(&plan.train, store, &params, &mut |_| {}, stop)
        };
        (grown, stores)
    } else {
        (
            learn::train_with(&plan.train, &params, &mut |_| {}, stop),
            Vec::new(),
        )
    };
    let model = match grown {
        Ok(m) => m,
        Err(e) => {
            return Ok(Challenge {
                reason: format!("no challenger: {}", e.kind()),
                model: Err(e.kind().to_string()),
                gate,
                passed: false,
                pixels,
                stores,
            })
        }
    };
    gate.f1 = object_f1(&model, live, &plan.gate)?;
    if !plan.older_gate.is_empty() {
        gate.older_f1 = Some(object_f1(&model, live, &plan.older_gate)?);
    }
    let m = live.retrain.margin;
    let (passed, reason) = if gate.f1 <= running_f1 {
        (
            false,
            format!(
                "object F1 {:.3} on line {}'s {} held-out frame(s) is not above the running model's {:.3}",
                gate.f1, plan.line, gate.frames, running_f1
            ),
        )
    } else if gate.f1 < running_f1 + m {
        (
            false,
            format!(
                "object F1 {:.3} on line {}'s held-out frames gains less than retrain.margin {m} over the running model's {:.3}",
                gate.f1, plan.line, running_f1
            ),
        )
    } else {
        match (gate.older_f1, running_older, changeover_since) {
            (Some(new), Some(old), false) if new < old - live.retrain.tolerance => (
                false,
                format!(
                    "object F1 {new:.3} on older lines' {} held-out frame(s) loses more than retrain.tolerance {} against the running model's {old:.3}",
                    gate.older_frames, live.retrain.tolerance
                ),
            ),
            _ => (
                true,
                format!(
                    "object F1 {:.3} on line {}'s {} held-out frame(s) beats the running model's {:.3}",
                    gate.f1, plan.line, gate.frames, running_f1
                ),
            ),
        }
    };
    Ok(Challenge {
        model: Ok(model),
        gate,
        passed,
        reason,
        pixels,
        stores,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::synth::{self, LoomParams};

    fn frames(seed: u64, n: usize) -> Vec<LabelledFrame> {
        let p = LoomParams {
            width: 64,
            height: 64,
            ..LoomParams::standard()
        };
        synth::generate_set(&p, seed, n)
            .into_iter()
            .enumerate()
            .map(|(i, g)| LabelledFrame::new(format!("seed:f{i}"), g.frame, g.mask))
            .collect()
    }

    fn plan(train: Vec<LabelledFrame>, gate: Vec<LabelledFrame>) -> Plan {
        Plan {
            line: 1,
            seed: (0..train.len()).collect(),
            train,
            stores: Vec::new(),
            gate,
            older_gate: Vec::new(),
            generation: 0,
        }
    }

    #[test]
    fn a_retrain_over_its_budget_is_abandoned_and_ties_keep_the_running_model() {
        let live = crate::config::Config::default().live;
        let params = learn::TrainParams {
            window: crate::window::Window::new(5).unwrap(),
            ..live.training.clone()
        };
        let train = frames(1, 8);
        let running = learn::train(&train, &params, &mut |_| {}).unwrap();
        // Over budget: no challenger, nothing passes.
        let p = plan(frames(2, 8), frames(3, 4));
        let ch = challenge(&p, &running, &live, false, &|| true).unwrap();
        assert!(ch.model.is_err() && !ch.passed, "{}", ch.reason);
        assert!(ch.reason.contains("time budget"), "{}", ch.reason);
        // The same frames grow the same model: a tie, which keeps it.
        let p = plan(train, frames(3, 4));
        let ch = challenge(&p, &running, &live, false, &|| false).unwrap();
        let grown = ch.model.as_ref().unwrap();
        assert_eq!(grown.tree, running.tree);
        assert!(
            !ch.passed && ch.reason.contains("not above"),
            "{}",
            ch.reason
        );
        assert_eq!(ch.gate.f1, ch.gate.running_f1);
        assert_eq!(ch.gate.frames, 4);
    }

    /// A retrain whose trees would not fit `training.memory_mb` grows no
    /// challenger and says why: the error is the retrain's outcome, which
    /// passes nothing (so the model in service stays), not a failure.
    #[test]
    fn a_retrain_over_the_memory_limit_grows_no_challenger_and_says_why() {
        // The default 11x11 window: nearly every pixel of these frames is
        // a pattern of its own, so 8 frames of 64x64 need over 1 MiB.
        let mut live = crate::config::Config::default().live;
        let running = learn::train(&frames(1, 8), &live.training, &mut |_| {}).unwrap();
        live.training.memory_limit = Some(1 << 20);
        let p = plan(frames(2, 8), frames(3, 4));
        let ch = challenge(&p, &running, &live, false, &|| false).unwrap();
        assert!(ch.model.is_err() && !ch.passed, "{}", ch.reason);
        assert!(
            ch.reason.starts_with("no challenger")
                && ch.reason.contains("memory limit of 1 MiB")
                && ch.reason.contains("training.memory_mb"),
            "{}",
            ch.reason
        );
    }
}
