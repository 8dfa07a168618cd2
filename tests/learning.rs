//! The learning loop end to end, through the real binary: the operator's
//! corrections (`mark`, files dropped by hand), changeovers, retraining
//! behind the gate, the registry (`models`), and kills in the middle.
//!
//! Quality is measured on frames of a coarser weave (`LoomParams::
//! alternate`) than the seed data (`standard`): the committed
//! `demo-frames/drifted` set is too close to the seed weave to show a
//! retrain's gain (the seed model already scores object F1 0.79 on it), so
//! the scripted session uses a harder setting of our own generator.
//!
//! These tests wait by polling with generous deadlines; they never assert
//! on how long anything took.

use std::collections::HashSet;
use std::path::PathBuf;
use std::process::Child;
use std::time::Duration;

use burlwatch::codec;
use burlwatch::config;
use burlwatch::daemon::labels::LabelSet;
use burlwatch::daemon::registry::Registry;
use burlwatch::daemon::start;
use burlwatch::frame::LabelledFrame;
use burlwatch::learn::store::LabelStore;
use burlwatch::record::FrameRecord;
use burlwatch::synth::{self, LoomParams};

use crate::util::{
    burlwatch_with, folders_section, rename_in, start_watching, stop, wait_for, Dir, Run,
};

/// Frame side of these tests: small enough for quick training in the test
/// profile, large enough for several defects per frame.
const SIDE: usize = 128;

fn params(base: LoomParams) -> LoomParams {
    LoomParams {
        width: SIDE,
        height: SIDE,
        ..base
    }
}

/// `(name, frame PBM bytes, mask)` of `count` generated frames.
fn generated(
    p: &LoomParams,
    seed: u64,
    count: usize,
    prefix: &str,
) -> Vec<(String, Vec<u8>, LabelledFrame)> {
    synth::generate_set(p, seed, count)
        .into_iter()
        .enumerate()
        .map(|(i, g)| {
            let name = format!("{prefix}-{i:04}.pbm");
            let bytes = codec::encode_pbm(&g.frame);
            (
                name.clone(),
                bytes,
                LabelledFrame::new(name, g.frame, g.mask),
            )
        })
        .collect()
}

/// A box: folders, seed data of the standard weave, a configuration.
struct Box_ {
    dir: Dir,
}

impl Box_ {
    fn new(extra: &str) -> Box_ {
        let dir = Dir::new();
        let b = Box_ { dir };
        let seed = b.dir.join("seed");
        std::fs::create_dir_all(&seed).unwrap();
        for (name, _, lf) in generated(&params(LoomParams::standard()), 1, 40, "seed") {
            let stem = name.trim_end_matches(".pbm");
            burlwatch::fileio::data::write_pair(&seed, stem, &lf.frame, &lf.mask).unwrap();
        }
        let d = b.dir.path();
        // Retraining on request only, unless a test sets the schedule.
        let check = if extra.contains("check_minutes") {
            ""
        } else {
            "check_minutes = 600\n"
        };
        let text = format!(
            "{}[training]\nseed_data = {seed:?}\n\
             [watch]\nsettle_millis = 50\nrescan_seconds = 0.2\n[log]\nsummary_seconds = 0\n\
             [retrain]\n{check}min_line_labels = 6\n{extra}",
            folders_section(d),
        );
        std::fs::write(b.config(), text).unwrap();
        b
    }

    fn config(&self) -> PathBuf {
        self.dir.join("burlwatch.toml")
    }

    fn cfg(&self) -> config::Config {
        config::load(&self.config()).unwrap()
    }

    fn run(&self, args: &[&str]) -> Run {
        burlwatch_with(self.dir.path(), &self.config(), args)
    }

    fn start(&self) -> Child {
        start_watching(
            &self.config(),
            self.dir.path(),
            &self.dir.join("daemon.stderr"),
        )
    }

    fn stderr(&self) -> String {
        std::fs::read_to_string(self.dir.join("daemon.stderr")).unwrap_or_default()
    }

    fn drop_frame(&self, name: &str, bytes: &[u8]) {
        rename_in(&self.dir.join("inbox"), name, bytes);
    }

    fn records(&self) -> Vec<FrameRecord> {
        let text =
            std::fs::read_to_string(self.dir.join("logs/detections.jsonl")).unwrap_or_default();
        crate::util::whole_lines(&text)
            .map(|l| serde_json::from_str(l).unwrap())
            .collect()
    }

    fn feed(&self, frames: &[(String, Vec<u8>, LabelledFrame)]) {
        let before = self.records().len();
        for (n, b, _) in frames {
            self.drop_frame(n, b);
        }
        wait_for("the frames to be logged", 120, || {
            self.records().len() >= before + frames.len()
        });
    }

    fn names_in(&self, folder: &str) -> HashSet<String> {
        std::fs::read_dir(self.dir.join(folder))
            .map(|d| {
                d.filter_map(|e| e.ok())
                    .map(|e| e.file_name().to_string_lossy().into_owned())
                    .filter(|n| !n.starts_with('.'))
                    .collect()
            })
            .unwrap_or_default()
    }

    fn applied(&self) -> usize {
        self.names_in("corrections/applied")
            .iter()
            .filter(|n| n.ends_with(".toml"))
            .count()
    }

    fn rejected(&self) -> usize {
        self.names_in("corrections/rejected")
            .iter()
            .filter(|n| n.ends_with(".toml"))
            .count()
    }

    /// Writes a mask file for `mark --mask`.
    fn mask_file(&self, lf: &LabelledFrame) -> PathBuf {
        let p = self
            .dir
            .join(&format!("masks/{}", lf.name.replace(".pbm", ".mask.pbm")));
        std::fs::create_dir_all(p.parent().unwrap()).unwrap();
        std::fs::write(&p, codec::encode_pbm(&lf.mask)).unwrap();
        p
    }

    fn events(&self) -> Vec<serde_json::Value> {
        std::fs::read_to_string(self.dir.join("logs/events.jsonl"))
            .unwrap_or_default()
            .lines()
            .map(|l| serde_json::from_str(l).unwrap())
            .collect()
    }

    fn state(&self) -> PathBuf {
        self.dir.join("state")
    }
}

fn kill9(mut child: Child) {
    child.kill().unwrap();
    let _ = child.wait();
}

/// Object F1 of a registered model version on labelled frames, under the
/// box's configuration.
fn object_f1(b: &Box_, version: u64, frames: &[LabelledFrame]) -> f64 {
    let reg = Registry::read_only(&b.state());
    let entry = reg.entry(version).unwrap().expect("registered");
    let d = start::detector(reg.model(&entry).unwrap(), &b.cfg().live).unwrap();
    burlwatch::score::score_frames(&d, frames, false, &mut |_, _| {})
        .unwrap()
        .total
        .object
        .f1()
}

fn in_service(b: &Box_) -> (u64, String) {
    let m = burlwatch::fileio::models::read_model(&b.state().join("model.json")).unwrap();
    (m.model_version, burlwatch::detect::model_hash(&m))
}

/// Every labelled frame of the state folder's labels counted once: each
/// line's store equals the one built afresh from the labels' files.
fn labels_consistent(b: &Box_) -> usize {
    let cfg = b.cfg();
    // Read only: the daemon owns the folder.
    let mut set =
        LabelSet::read_only(&b.state(), cfg.live.training.window, &cfg.live.limits).unwrap();
    let names: HashSet<(&str, &str)> = set
        .labels()
        .iter()
        .map(|l| (l.frame.as_str(), l.sha256.as_str()))
        .collect();
    assert_eq!(names.len(), set.labels().len(), "a frame labelled twice");
    let mut lines: Vec<u64> = set.labels().iter().map(|l| l.line).collect();
    lines.sort();
    lines.dedup();
    for line in lines {
        let mut want = LabelStore::new(cfg.live.training.window);
        for f in set
            .frames(&[line], burlwatch::daemon::labels::Role::Train)
            .unwrap()
        {
            want.add_labelled(&f).unwrap();
        }
        // The store as the next retrain will bring it up to date from its
        // file and the changes since (read only: the daemon owns the set).
        let counted = set.store_job(line).count().unwrap();
        assert_eq!(counted, want, "line {line}'s store");
    }
    set.labels().len()
}

/// The scripted operator session: a seed model, a changeover to a coarser
/// weave it cannot read, half the new frames marked with their true masks,
/// a retrain, and the new model in service.
#[test]
fn an_operator_session_retrains_the_box_onto_a_new_weave() {
    let b = Box_::new("");
    let d = b.start();
    let new_weave = generated(&params(LoomParams::alternate()), 5, 20, "coarse");
    b.feed(&new_weave);
    let r = b.run(&["changeover", "--note", "coarse weave"]);
    assert_eq!(r.code, 0, "{}{}", r.stdout, r.stderr);
    assert!(r.stdout.contains("line 2 runs from now"), "{}", r.stdout);
    let (marked, other): (Vec<_>, Vec<_>) =
        new_weave.iter().enumerate().partition(|(i, _)| i % 2 == 0);
    for (_, (name, _, lf)) in &marked {
        let mask = b.mask_file(lf);
        let r = b.run(&["mark", name, "--mask", mask.to_str().unwrap()]);
        assert_eq!(r.code, 0, "{}{}", r.stdout, r.stderr);
    }
    wait_for("the corrections to be applied", 60, || {
        b.applied() == marked.len()
    });
    assert_eq!(labels_consistent(&b), marked.len());
    let r = b.run(&["retrain"]);
    assert_eq!(r.code, 0, "{}{}", r.stdout, r.stderr);
    assert!(
        r.stdout.contains("version 2") && r.stdout.contains("is in service"),
        "{}",
        r.stdout
    );
    wait_for("the new model in service", 30, || {
        b.stderr().contains("model in service")
    });
    // The line's store, now written, agrees with its labels.
    assert_eq!(labels_consistent(&b), marked.len());
    let (version, hash) = in_service(&b);
    assert_eq!(version, 2);
    // Scored on the half nobody labelled. Measured when this test was
    // written: the seed model 0.02, the retrained one 0.51 (object F1;
    // 0.41 when trained on the new line's labels alone).
    let truth: Vec<LabelledFrame> = other.iter().map(|(_, (_, _, lf))| lf.clone()).collect();
    let (old, new) = (object_f1(&b, 1, &truth), object_f1(&b, 2, &truth));
    eprintln!("object F1 on the unlabelled half: seed model {old:.3}, retrained {new:.3}");
    assert!(new > old + 0.25, "retrained {new:.3} vs seed {old:.3}");
    // Records from now on carry the new model's version and hash.
    b.feed(&generated(&params(LoomParams::alternate()), 6, 3, "after"));
    let last = b.records().pop().unwrap();
    assert_eq!((last.model_version, last.model_hash.clone()), (2, hash));
    // The registry and the events log say what happened.
    let r = b.run(&["models", "--json"]);
    let list: Vec<serde_json::Value> = serde_json::from_str(&r.stdout).unwrap();
    assert_eq!(list.len(), 2);
    assert_eq!(list[1]["in_service"], true);
    assert_eq!(list[1]["parent"], 1);
    assert_eq!(list[1]["trained_on"]["line"], 2);
    let ev = b.events();
    let retrain = ev
        .iter()
        .find(|e| e["event"] == "retrain")
        .expect("a retrain event");
    assert_eq!(retrain["decision"], "in-service");
    assert_eq!(retrain["by"], "operator");
    assert!(
        retrain["gate"]["f1"].as_f64().unwrap() > retrain["gate"]["running_f1"].as_f64().unwrap()
    );
    assert!(ev
        .iter()
        .any(|e| e["event"] == "changeover" && e["note"] == "coarse weave"));
    let r = b.run(&["models", "show", "2"]);
    assert!(
        r.stdout.contains("in service") && r.stdout.contains("rule"),
        "{}",
        r.stdout
    );
    stop(d);
}

/// The operator session on the committed demo frames: the daemon trains
/// its first model from `demo-frames/train`, detects `demo-frames/drifted`
/// (a finer, noisier weave), a changeover is recorded, half the drifted
/// frames are marked with their masks, and a retrain is judged at the gate
/// on the 4 of them held out. Which way the gate goes on 4 frames turns on
/// one or two objects (README, "Retraining"), so the test holds the gate
/// to its own scores: the challenger is in service exactly when its
/// object F1 on the gate frames is above the running model's, recomputed
/// here from the two registered models.
#[test]
fn the_demo_session_on_the_drifted_frames_goes_through_the_gate() {
    let b = Box_::new("");
    // The committed seed data, as a fresh box's configuration has it.
    let text = std::fs::read_to_string(b.config()).unwrap();
    let demo = crate::util::repo().join("demo-frames");
    let text = text.replace(
        &format!("seed_data = {:?}", b.dir.join("seed")),
        &format!("seed_data = {:?}", demo.join("train")),
    );
    std::fs::write(b.config(), text).unwrap();
    let d = b.start();
    let folder = burlwatch::fileio::data::read_folder(
        &demo.join("drifted"),
        &burlwatch::codec::DecodeLimits::default(),
        &mut |_, _| {},
    )
    .unwrap();
    let drifted: Vec<(String, Vec<u8>, LabelledFrame)> = folder
        .frames
        .into_iter()
        .map(|f| {
            let name = format!("{}.pbm", f.name);
            let bytes = std::fs::read(demo.join("drifted").join(&name)).unwrap();
            (name.clone(), bytes, LabelledFrame { name, ..f })
        })
        .collect();
    assert_eq!(drifted.len(), 20);
    b.feed(&drifted);
    assert_eq!(b.run(&["changeover", "--note", "drifted"]).code, 0);
    let (marked, other): (Vec<_>, Vec<_>) =
        drifted.iter().enumerate().partition(|(i, _)| i % 2 == 0);
    for (_, (name, _, lf)) in &marked {
        let mask = b.mask_file(lf);
        let r = b.run(&["mark", name, "--mask", mask.to_str().unwrap()]);
        assert_eq!(r.code, 0, "{}{}", r.stdout, r.stderr);
    }
    wait_for("the corrections to be applied", 60, || b.applied() == 10);
    let r = b.run(&["retrain"]);
    assert_eq!(r.code, 0, "{}{}", r.stdout, r.stderr);
    let ev = b.events();
    let e = ev.iter().find(|e| e["event"] == "retrain").unwrap();
    // The gate frames: the marked frames whose role is the gate's.
    let gate_share = b.cfg().live.retrain.gate_share;
    let gate: Vec<LabelledFrame> = marked
        .iter()
        .map(|(_, (_, _, lf))| lf.clone())
        .filter(|lf| {
            burlwatch::daemon::labels::role_of(
                &burlwatch::daemon::labels::role_key(&lf.frame),
                gate_share,
            ) == burlwatch::daemon::labels::Role::Gate
        })
        .collect();
    assert_eq!(gate.len(), 4, "{e}");
    let (seed_gate, new_gate) = (object_f1(&b, 1, &gate), object_f1(&b, 2, &gate));
    let g = &e["gate"];
    assert!((g["f1"].as_f64().unwrap() - new_gate).abs() < 1e-9, "{e}");
    assert!(
        (g["running_f1"].as_f64().unwrap() - seed_gate).abs() < 1e-9,
        "{e}"
    );
    let truth: Vec<LabelledFrame> = other.iter().map(|(_, (_, _, lf))| lf.clone()).collect();
    let (old, new) = (object_f1(&b, 1, &truth), object_f1(&b, 2, &truth));
    eprintln!(
        "demo drifted: gate (4 frames) seed {seed_gate:.3}, retrained {new_gate:.3}; \
         unlabelled half: seed {old:.3}, retrained {new:.3}; {}",
        e["decision"]
    );
    if new_gate > seed_gate {
        assert_eq!(e["decision"], "in-service", "{e}");
        assert!(r.stdout.contains("is in service"), "{}", r.stdout);
        assert_eq!(in_service(&b).0, 2);
    } else {
        assert_eq!(e["decision"], "refused", "{e}");
        assert!(r.stdout.contains("the running model stays"), "{}", r.stdout);
        assert_eq!(in_service(&b).0, 1);
    }
    stop(d);
}

/// Real defects marked as false alarms: the challenger learns to miss
/// them, the gate refuses it, and the running model stays.
///
/// Only frames that fall to training are marked wrongly: a wrong label on
/// a gate frame would reward the challenger for missing that defect, and
/// the gate can only judge by the labels it has (README, the cautions).
/// Which way the gate goes still turns on how many wrong labels outweigh
/// the 40 seed frames, and the figure moved with each change of tuning
/// (with wrong labels on gate frames too: 16 frames fed passed the gate by
/// 0.70 against 0.63, 32 by 0.574 against 0.565, 64 was refused and then
/// passed; marking training frames only, 64 passed by 0.867 against 0.787
/// and 96 is refused). Training is deterministic, so the outcome is too.
#[test]
fn a_wrong_batch_of_corrections_is_refused_by_the_gate() {
    let b = Box_::new("");
    let d = b.start();
    // Enough wrongly marked frames to outweigh the 40 seed frames.
    let same = generated(&params(LoomParams::standard()), 7, 96, "std");
    b.feed(&same);
    let gate_share = b.cfg().live.retrain.gate_share;
    let trains: HashSet<&str> = same
        .iter()
        .filter(|(_, _, lf)| {
            burlwatch::daemon::labels::role_of(
                &burlwatch::daemon::labels::role_key(&lf.frame),
                gate_share,
            ) == burlwatch::daemon::labels::Role::Train
        })
        .map(|(name, _, _)| name.as_str())
        .collect();
    let records = b.records();
    let mut marked = 0;
    for r in records
        .iter()
        .filter(|r| !r.objects.is_empty() && trains.contains(r.frame.as_str()))
    {
        let mut args = vec!["mark".to_string(), r.frame.clone(), "--wrong".to_string()];
        args.extend(r.objects.iter().map(|o| o.id.to_string()));
        let a: Vec<&str> = args.iter().map(String::as_str).collect();
        let out = b.run(&a);
        assert_eq!(out.code, 0, "{}{}", out.stdout, out.stderr);
        marked += 1;
    }
    assert!(marked >= 6, "{marked} frames with objects");
    wait_for("the corrections to be applied", 60, || {
        b.applied() == marked
    });
    let r = b.run(&["retrain"]);
    assert_eq!(r.code, 0, "{}{}", r.stdout, r.stderr);
    assert!(r.stdout.contains("the running model stays"), "{}", r.stdout);
    assert_eq!(in_service(&b).0, 1);
    let ev = b.events();
    let e = ev.iter().find(|e| e["event"] == "retrain").unwrap();
    assert_eq!(e["decision"], "refused", "{e}");
    assert!(e["reason"].as_str().unwrap().contains("not above"), "{e}");
    // The refused model is kept in the registry, and can be put in
    // service by hand (the events log says the operator asked).
    let r = b.run(&["models"]);
    assert!(r.stdout.contains("refused"), "{}", r.stdout);
    let r = b.run(&["models", "use", "2"]);
    assert_eq!(r.code, 0, "{}{}", r.stdout, r.stderr);
    wait_for("version 2 in service", 30, || in_service(&b).0 == 2);
    let ev = b.events();
    let used = ev.iter().find(|e| e["event"] == "use").unwrap();
    assert_eq!(used["by"], "operator");
    stop(d);
}

/// Writes a correction file by hand into the corrections folder.
fn drop_correction(b: &Box_, name: &str, text: &str) {
    let dir = b.dir.join("corrections");
    std::fs::create_dir_all(&dir).unwrap();
    rename_in(&dir, name, text.as_bytes());
}

/// Every kind of bad correction is moved to `rejected/` with its reason;
/// the labels do not change; `mark` refuses the same with the same words.
#[test]
fn bad_corrections_are_rejected_with_their_reason_and_change_nothing() {
    let b = Box_::new("");
    let d = b.start();
    let frames = generated(&params(LoomParams::standard()), 9, 4, "std");
    b.feed(&frames);
    let recs = b.records();
    let r0 = recs
        .iter()
        .find(|r| !r.objects.is_empty())
        .expect("a frame with objects");
    let head = |frame: &str, sha: &str| format!("frame = {frame:?}\nsha256 = {sha:?}\n");
    // A frame that is rejected (not a frame at all).
    b.drop_frame("broken.pbm", b"P4 not a frame");
    wait_for("the bad frame rejected", 30, || {
        b.names_in("rejected").contains("broken.pbm")
    });
    // A frame archived and then gone.
    let gone = &recs[1];
    std::fs::remove_file(b.dir.join("archive").join(&gone.frame)).unwrap();
    // A wrong-size mask beside its correction.
    std::fs::write(
        b.dir.join("corrections/small.truth.pbm"),
        codec::encode_pbm(&burlwatch::BitFrame::new(8, 8)),
    )
    .unwrap();
    // An archived frame changed since it was logged.
    let changed = recs
        .iter()
        .find(|r| r.frame != r0.frame && r.frame != gone.frame)
        .expect("a third frame");
    std::fs::write(
        b.dir.join("archive").join(&changed.frame),
        codec::encode_pbm(&burlwatch::BitFrame::new(SIDE, SIDE)),
    )
    .unwrap();
    // A mask that is a symbolic link, and a correction that is one.
    std::fs::write(
        b.dir.join("elsewhere.pbm"),
        codec::encode_pbm(&burlwatch::BitFrame::new(SIDE, SIDE)),
    )
    .unwrap();
    std::os::unix::fs::symlink(
        b.dir.join("elsewhere.pbm"),
        b.dir.join("corrections/linked.truth.pbm"),
    )
    .unwrap();
    let sha0 = &r0.sha256;
    std::fs::write(
        b.dir.join("real.toml"),
        format!("{}right = true\n", head(&r0.frame, sha0)),
    )
    .unwrap();
    std::os::unix::fs::symlink(b.dir.join("real.toml"), b.dir.join("corrections/link.toml"))
        .unwrap();
    let cases: Vec<(&str, String, &str)> = vec![
        (
            "path.toml",
            format!("{}right = true\n", head("../std-0000.pbm", sha0)),
            "is a path",
        ),
        (
            "abs.toml",
            format!("{}right = true\n", head("/etc/passwd", sha0)),
            "is a path",
        ),
        (
            "id.toml",
            format!("{}wrong = [999]\n", head(&r0.frame, sha0)),
            "no object 999",
        ),
        (
            "box.toml",
            format!("{}missed = [[100, 100, 500, 120]]\n", head(&r0.frame, sha0)),
            "not inside",
        ),
        (
            "gone.toml",
            format!("{}right = true\n", head(&gone.frame, &gone.sha256)),
            "no longer in the archive",
        ),
        (
            "hash.toml",
            format!("{}right = true\n", head(&r0.frame, &"0".repeat(64))),
            "no record",
        ),
        (
            "toml.toml",
            "frame = \"x.pbm\"\nsha256 = [".to_string(),
            "invalid correction",
        ),
        (
            "size.toml",
            format!("{}mask = \"small.truth.pbm\"\n", head(&r0.frame, sha0)),
            "8x8",
        ),
        (
            "rej.toml",
            format!("{}right = true\n", head("broken.pbm", &"1".repeat(64))),
            "was rejected",
        ),
        ("nothing.toml", head(&r0.frame, sha0), "says nothing"),
        (
            "changed.toml",
            format!("{}right = true\n", head(&changed.frame, &changed.sha256)),
            "not the version logged",
        ),
        (
            "linkmask.toml",
            format!("{}mask = \"linked.truth.pbm\"\n", head(&r0.frame, sha0)),
            "symbolic link",
        ),
    ];
    for (name, text, _) in &cases {
        drop_correction(&b, name, text);
    }
    // The reason file is written just after the move.
    wait_for("every bad correction rejected", 60, || {
        b.names_in("corrections/rejected")
            .iter()
            .filter(|n| n.ends_with(".toml.reason.txt"))
            .count()
            == cases.len() + 1
    });
    let reason =
        std::fs::read_to_string(b.dir.join("corrections/rejected/link.toml.reason.txt")).unwrap();
    assert!(reason.contains("symbolic link"), "{reason}");
    for (name, _, want) in &cases {
        let reason = std::fs::read_to_string(
            b.dir
                .join(&format!("corrections/rejected/{name}.reason.txt")),
        )
        .unwrap();
        assert!(
            reason.contains(want) && reason.contains(name),
            "{name}: want {want:?} in {reason:?}"
        );
    }
    // The wrong-size mask went with its correction.
    assert!(b
        .names_in("corrections/rejected")
        .contains("small.truth.pbm"));
    assert_eq!(b.applied(), 0);
    assert_eq!(labels_consistent(&b), 0);
    // mark says the same before writing anything.
    let r = b.run(&["mark", &r0.frame, "--wrong", "999"]);
    assert_ne!(r.code, 0);
    assert!(r.stderr.contains("no object 999"), "{}", r.stderr);
    let r = b.run(&["mark", "../x.pbm", "--right"]);
    assert!(
        r.code != 0 && r.stderr.contains("is a path"),
        "{}",
        r.stderr
    );
    let r = b.run(&["mark", &gone.frame, "--right"]);
    assert!(
        r.code != 0 && r.stderr.contains("no longer in the archive"),
        "{}",
        r.stderr
    );
    let r = b.run(&["mark", "broken.pbm", "--right"]);
    assert!(
        r.code != 0 && r.stderr.contains("was rejected"),
        "{}",
        r.stderr
    );
    let r = b.run(&["mark", &r0.frame, "--missed", "0,0,999,2"]);
    assert!(
        r.code != 0 && r.stderr.contains("not inside"),
        "{}",
        r.stderr
    );
    assert!(b
        .names_in("corrections")
        .iter()
        .all(|n| !n.ends_with(".toml")));
    // A good one still goes through, and a second correction of the same
    // frame replaces the first.
    let r = b.run(&["mark", &r0.frame, "--right"]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    wait_for("the correction applied", 30, || b.applied() == 1);
    let r = b.run(&["mark", &r0.frame, "--only", "0,0,3,3"]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    wait_for("the second correction applied", 30, || b.applied() == 2);
    assert_eq!(labels_consistent(&b), 1);
    // A new line with no labels: the running daemon says why it does not
    // retrain, and keeps running.
    assert_eq!(b.run(&["changeover"]).code, 0);
    let r = b.run(&["retrain"]);
    assert_eq!(r.code, 1, "{}{}", r.stdout, r.stderr);
    assert!(
        r.stdout.contains("no retrain: line 2 has 0"),
        "{}",
        r.stdout
    );
    stop(d);
}

/// `models use` while frames stream: every frame logged once, each with the
/// model in service when it was detected (versions switch once, in order).
#[test]
fn switching_models_while_frames_stream_logs_every_frame_once() {
    let b = Box_::new("");
    let d = b.start();
    // A second model to switch to: retrain on the seed line with its own
    // labels ("right" on a few frames), whatever the gate says.
    let first = generated(&params(LoomParams::standard()), 11, 8, "a");
    b.feed(&first);
    for r in b.records() {
        let out = b.run(&["mark", &r.frame, "--right"]);
        assert_eq!(out.code, 0, "{}", out.stderr);
    }
    wait_for("the corrections applied", 60, || b.applied() == 8);
    let r = b.run(&["retrain"]);
    assert_eq!(r.code, 0, "{}{}", r.stdout, r.stderr);
    let reg = Registry::read_only(&b.state());
    assert_eq!(reg.entries().unwrap().len(), 2);
    let target = if in_service(&b).0 == 2 { 1 } else { 2 };
    let before = b.records().len();
    let stream = generated(&params(LoomParams::standard()), 12, 60, "s");
    let feeder = {
        let inbox = b.dir.join("inbox");
        let stream = stream.clone();
        std::thread::spawn(move || {
            for (n, bytes, _) in &stream {
                rename_in(&inbox, n, bytes);
                std::thread::sleep(Duration::from_millis(10));
            }
        })
    };
    std::thread::sleep(Duration::from_millis(200));
    let r = b.run(&["models", "use", &target.to_string()]);
    assert_eq!(r.code, 0, "{}{}", r.stdout, r.stderr);
    feeder.join().unwrap();
    wait_for("the stream logged", 120, || {
        b.records().len() >= before + stream.len()
    });
    let recs = &b.records()[before..];
    let names: Vec<&str> = recs.iter().map(|r| r.frame.as_str()).collect();
    let unique: HashSet<&str> = names.iter().copied().collect();
    assert_eq!(names.len(), stream.len());
    assert_eq!(unique.len(), stream.len(), "a frame logged twice");
    // The versions switch once, from the old model to the target.
    let versions: Vec<u64> = recs.iter().map(|r| r.model_version).collect();
    let switches = versions.windows(2).filter(|w| w[0] != w[1]).count();
    assert!(switches <= 1, "{versions:?}");
    assert_eq!(*versions.last().unwrap(), target);
    let hashes: HashSet<(u64, &str)> = recs
        .iter()
        .map(|r| (r.model_version, r.model_hash.as_str()))
        .collect();
    for (v, h) in hashes {
        assert!(
            reg.find(v, h).unwrap().is_some(),
            "record of unregistered model {v} {h}"
        );
    }
    stop(d);
}

/// kill -9 while corrections are applied, while a retrain runs and right
/// after a switch is asked for: after each restart the labels, their stores
/// and the registry agree, no correction is lost or counted twice, and the
/// daemon runs a registered model.
#[test]
fn kills_during_intake_training_and_switching_leave_the_state_consistent() {
    let b = Box_::new("");
    let d = b.start();
    let frames = generated(&params(LoomParams::alternate()), 21, 24, "k");
    b.feed(&frames);
    let changed = b.run(&["changeover"]);
    assert_eq!(changed.code, 0);
    // Corrections dropped by hand, all at once, each with its true mask.
    let recs = b.records();
    for (r, (_, _, lf)) in recs.iter().zip(&frames) {
        let mask = format!("{}.truth.pbm", r.frame);
        std::fs::write(
            b.dir.join("corrections").join(&mask),
            codec::encode_pbm(&lf.mask),
        )
        .unwrap();
        let text = format!(
            "frame = {:?}\nsha256 = {:?}\nmask = {mask:?}\n",
            r.frame, r.sha256
        );
        drop_correction(&b, &format!("{}.toml", r.frame), &text);
    }
    // Killed while they are being applied.
    wait_for("some corrections applied", 60, || b.applied() >= 3);
    kill9(d);
    let check = |b: &Box_| {
        let labelled = labels_consistent(b);
        let left = b
            .names_in("corrections")
            .iter()
            .filter(|n| n.ends_with(".toml"))
            .count();
        assert_eq!(b.rejected(), 0);
        (labelled, left)
    };
    let (labelled, left) = check(&b);
    assert!(
        labelled + left >= recs.len(),
        "{labelled} labelled + {left} waiting"
    );
    let d = b.start();
    wait_for("every correction applied", 60, || b.applied() == recs.len());
    assert_eq!(check(&b).0, recs.len());
    // Killed while a retrain runs.
    let req = burlwatch::daemon::requests::send(
        &b.state(),
        &burlwatch::daemon::requests::Request {
            ask: burlwatch::daemon::requests::Ask::Retrain,
            by: "operator".into(),
        },
    )
    .unwrap();
    wait_for("the retrain to start", 30, || {
        b.stderr().contains("retrain started")
    });
    assert!(
        !burlwatch::daemon::requests::answer_path(&req).exists(),
        "answered only when the retrain ends"
    );
    kill9(d);
    let reg = Registry::read_only(&b.state());
    for e in reg.entries().unwrap() {
        reg.model(&e).unwrap();
    }
    let serving = in_service(&b);
    assert!(reg.find(serving.0, &serving.1).unwrap().is_some());
    // Restarted, retrained to the end, then killed right after a switch
    // back to version 1 is asked for.
    let d = b.start();
    let r = b.run(&["retrain"]);
    assert_eq!(r.code, 0, "{}{}", r.stdout, r.stderr);
    let req = burlwatch::daemon::requests::send(
        &b.state(),
        &burlwatch::daemon::requests::Request {
            ask: burlwatch::daemon::requests::Ask::Use { version: 1 },
            by: "operator".into(),
        },
    )
    .unwrap();
    // Killed as soon as the daemon claims the request: before, during or
    // just after the switch.
    wait_for("the switch to be claimed", 30, || !req.exists());
    kill9(d);
    let serving = in_service(&b);
    assert!(Registry::read_only(&b.state())
        .find(serving.0, &serving.1)
        .unwrap()
        .is_some());
    let d = b.start();
    b.feed(&generated(&params(LoomParams::alternate()), 22, 2, "end"));
    let last = b.records().pop().unwrap();
    assert_eq!((last.model_version, last.model_hash), in_service(&b));
    assert_eq!(check(&b).0, recs.len());
    stop(d);
}

/// The retrain's events and decisions need a running daemon only to be
/// reached: with none, `retrain`, `changeover` and `models use` take the
/// state lock and do the work themselves.
#[test]
fn the_learning_commands_work_without_a_daemon() {
    let b = Box_::new("");
    let d = b.start();
    b.feed(&generated(&params(LoomParams::standard()), 13, 3, "o"));
    stop(d);
    // Line 1's labels are the seed data: the challenger grown from them is
    // the seed model itself (training is deterministic), and a tie keeps
    // the running model.
    let r = b.run(&["retrain"]);
    assert_eq!(r.code, 0, "{}{}", r.stdout, r.stderr);
    assert!(
        r.stdout.contains("the running model stays") && r.stdout.contains("not above"),
        "{}",
        r.stdout
    );
    assert_eq!(in_service(&b).0, 1);
    // After a changeover, line 2 has no labels yet.
    let r = b.run(&["changeover"]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    let r = b.run(&["retrain"]);
    assert_eq!(r.code, 1, "{}{}", r.stdout, r.stderr);
    assert!(
        r.stdout.contains("no retrain: line 2 has 0"),
        "{}",
        r.stdout
    );
    let r = b.run(&["changeover", "--note", "plain"]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert!(r.stdout.contains("line 3"), "{}", r.stdout);
    let r = b.run(&["models", "use", "7"]);
    assert_ne!(r.code, 0);
    assert!(
        r.stderr.contains("no model version 7") && r.stderr.contains("versions: 1"),
        "{}",
        r.stderr
    );
    let r = b.run(&["models", "use", "1"]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert_eq!(b.events().iter().filter(|e| e["event"] == "use").count(), 1);
}

/// The schedule: enough new labels, and the daemon retrains by itself.
#[test]
fn the_daemon_retrains_on_its_schedule_when_enough_labels_are_new() {
    // A retrain is worth it once all twelve frames are labelled.
    let b = Box_::new("check_minutes = 0.005\nmin_new_labels = 12\n");
    let d = b.start();
    let frames = generated(&params(LoomParams::alternate()), 5, 12, "sched");
    b.feed(&frames);
    assert_eq!(b.run(&["changeover"]).code, 0);
    for (name, _, lf) in &frames {
        let mask = b.mask_file(lf);
        let r = b.run(&["mark", name, "--mask", mask.to_str().unwrap()]);
        assert_eq!(r.code, 0, "{}", r.stderr);
    }
    wait_for("a scheduled retrain's decision", 120, || {
        b.events()
            .iter()
            .any(|e| e["event"] == "retrain" && e["by"] == "schedule")
    });
    let ev = b.events();
    let e = ev.iter().find(|e| e["event"] == "retrain").unwrap();
    assert!(
        e["decision"] == "in-service" || e["decision"] == "refused",
        "{e}"
    );
    assert_eq!(e["line"], 2);
    // With the same labels it is not tried again.
    std::thread::sleep(Duration::from_secs(2));
    assert_eq!(
        b.events()
            .iter()
            .filter(|e| e["event"] == "retrain")
            .count(),
        1
    );
    stop(d);
}

/// Issue 14, a full disk for the state folder while the operator corrects
/// and the box retrains (the state folder on a 16 MiB tmpfs, filled; needs
/// the right to mount, skipped otherwise). Corrections that cannot be
/// stored stay in the corrections folder; that is said once, and once when
/// it works again, and each is then applied once. A retrain whose decision
/// cannot be recorded leaves the running model in service (detection goes
/// on) and is tried again at the next check once there is room; before,
/// it waited for new labels.
#[test]
fn a_full_state_folder_keeps_corrections_waiting_and_retries_the_retrain() {
    let b = Box_::new("check_minutes = 0.005\nmin_new_labels = 12\nenabled = false\n");
    let Some(_mounted) = crate::util::Mounted::tmpfs(&b.state(), "16m") else {
        return;
    };
    let d = b.start();
    let frames = generated(&params(LoomParams::alternate()), 7, 12, "full");
    b.feed(&frames);
    assert_eq!(b.run(&["changeover"]).code, 0);
    let running = in_service(&b);
    let filler = b.state().join(".filler");
    crate::util::fill(&filler);
    for (name, _, lf) in &frames {
        let mask = b.mask_file(lf);
        let r = b.run(&["mark", name, "--mask", mask.to_str().unwrap()]);
        assert_eq!(r.code, 0, "{}", r.stderr);
    }
    let storing = "storing corrections in the state folder";
    wait_for("the daemon to say it cannot store corrections", 60, || {
        b.stderr().contains(&format!("{storing} fails"))
    });
    assert_eq!(b.applied(), 0);
    assert_eq!(
        b.names_in("corrections")
            .iter()
            .filter(|n| n.ends_with(".toml"))
            .count(),
        12
    );
    std::fs::remove_file(&filler).unwrap();
    wait_for(
        "every correction to be applied once there is room",
        120,
        || b.applied() == 12,
    );
    let err = b.stderr();
    assert_eq!(err.matches(&format!("{storing} fails")).count(), 1, "{err}");
    assert_eq!(
        err.matches(&format!("{storing} works again")).count(),
        1,
        "{err}"
    );
    assert_eq!(b.rejected(), 0);

    // Full again, and the retrain switched on: its decision cannot be
    // recorded.
    crate::util::fill(&filler);
    let text = std::fs::read_to_string(b.config()).unwrap();
    std::fs::write(
        b.config(),
        text.replace("enabled = false", "enabled = true"),
    )
    .unwrap();
    // SAFETY: a signal to the daemon this test started.
    unsafe { libc::kill(d.id() as i32, libc::SIGHUP) };
    let deadline = std::time::Instant::now() + Duration::from_secs(120);
    while !b.stderr().contains("retraining fails") {
        assert!(
            std::time::Instant::now() < deadline,
            "no failed retrain within 120 s: {}",
            b.stderr()
        );
        std::thread::sleep(Duration::from_millis(50));
    }
    assert_eq!(in_service(&b), running, "the running model changed");
    assert!(!b.events().iter().any(|e| e["event"] == "retrain"));
    let more = generated(&params(LoomParams::alternate()), 8, 1, "meanwhile");
    b.feed(&more);
    std::fs::remove_file(&filler).unwrap();
    wait_for("the retrain to be tried again and decided", 180, || {
        b.events()
            .iter()
            .any(|e| e["event"] == "retrain" && e["by"] == "schedule")
    });
    stop(d);
    let err = b.stderr();
    // Tried at every check (0.3 s) while full, said once.
    assert_eq!(err.matches("retraining fails").count(), 1, "{err}");
    assert_eq!(err.matches("retraining works again").count(), 1, "{err}");
    assert_eq!(labels_consistent(&b), 12);
}
