//! The `burlwatch` binary end to end: generate, train, scan, eval and rules on
//! temporary folders, bad input, and the committed demo data and model.

use crate::util::{burlwatch, repo, Dir};

use burlwatch::record::FrameRecord;

/// Small loom frames (64x64) so training in the test profile stays quick.
fn small_data(dir: &Dir, name: &str, count: &str, seed: &str) {
    let out = dir.join(name);
    let r = burlwatch(
        dir.path(),
        &[
            "generate",
            "--out",
            out.to_str().unwrap(),
            "--count",
            count,
            "--seed",
            seed,
            "--width",
            "96",
            "--height",
            "96",
        ],
    );
    assert_eq!(r.code, 0, "generate failed: {}", r.stderr);
}

fn trained(dir: &Dir) -> std::path::PathBuf {
    small_data(dir, "train", "12", "5");
    let model = dir.join("model.json");
    let r = burlwatch(
        dir.path(),
        &["train", "--data", "train", "--out", model.to_str().unwrap()],
    );
    assert_eq!(r.code, 0, "train failed: {}", r.stderr);
    assert!(r.stdout.contains("wrote"), "{}", r.stdout);
    model
}

#[test]
fn train_scan_eval_rules_round_trip() {
    let dir = Dir::new();
    let model = trained(&dir);
    let m = model.to_str().unwrap();
    small_data(&dir, "test", "4", "6");

    // eval: human table and JSON with confusion counts.
    let r = burlwatch(dir.path(), &["eval", "--data", "test", "--model", m]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert!(r.stdout.contains("pixels") && r.stdout.contains("objects"));
    // The per-frame columns say they count objects.
    let r = burlwatch(
        dir.path(),
        &["eval", "--data", "test", "--model", m, "--per-frame"],
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert!(
        r.stdout.contains("obj TP") && r.stdout.contains("obj FN"),
        "{}",
        r.stdout
    );
    let r = burlwatch(
        dir.path(),
        &[
            "eval",
            "--data",
            "test",
            "--model",
            m,
            "--json",
            "--per-frame",
        ],
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    let v: serde_json::Value = serde_json::from_str(&r.stdout).expect("eval JSON");
    assert_eq!(v["frames"], 4);
    for level in ["pixel", "object"] {
        for k in ["tp", "fp", "fn", "precision", "recall", "f1"] {
            assert!(v[level][k].is_number(), "{level}.{k} missing: {v}");
        }
    }
    assert_eq!(v["per_frame"].as_array().unwrap().len(), 4);
    // The counts are the library's score of the same frames.
    let folder = burlwatch::fileio::data::read_folder(
        &dir.join("test"),
        &burlwatch::codec::DecodeLimits::default(),
        &mut |_, _| {},
    )
    .unwrap();
    let m_read =
        burlwatch::model::Model::from_json(&std::fs::read_to_string(&model).unwrap()).unwrap();
    let settings = m_read.settings();
    let detector = burlwatch::detect::Detector::new(m_read, settings);
    let want =
        burlwatch::score::score_frames(&detector, &folder.frames, true, &mut |_, _| {}).unwrap();
    let counts = |level: &serde_json::Value| ["tp", "fp", "fn"].map(|k| level[k].as_u64().unwrap());
    let c = |c: &burlwatch::score::Confusion| [c.tp, c.fp, c.fn_];
    assert_eq!(counts(&v["pixel"]), c(&want.total.pixel));
    assert_eq!(v["pixel"]["tn"].as_u64(), Some(want.total.pixel.tn));
    assert_eq!(counts(&v["object"]), c(&want.total.object));
    for (line, f) in v["per_frame"]
        .as_array()
        .unwrap()
        .iter()
        .zip(&want.per_frame)
    {
        assert_eq!(line["frame"].as_str(), Some(f.name.as_str()));
        assert_eq!(counts(&line["pixel"]), c(&f.scores.pixel));
        assert_eq!(counts(&line["object"]), c(&f.scores.object));
    }

    // scan --json: one record per frame, hash of the file's bytes.
    let frames: Vec<String> = (0..4)
        .map(|i| format!("test/loom-standard-{i:04}.pbm"))
        .collect();
    let mut args = vec!["scan", "--model", m, "--json"];
    args.extend(frames.iter().map(String::as_str));
    let r = burlwatch(dir.path(), &args);
    assert_eq!(r.code, 0, "{}", r.stderr);
    let lines: Vec<&str> = r.stdout.lines().collect();
    assert_eq!(lines.len(), 4);
    for (line, f) in lines.iter().zip(&frames) {
        let rec: FrameRecord = serde_json::from_str(line).expect("record");
        let bytes = std::fs::read(dir.join(f)).unwrap();
        assert_eq!(rec.sha256, burlwatch::record::sha256_hex(&bytes));
        assert_eq!((rec.width, rec.height), (96, 96));
        assert_eq!(rec.model_version, 1);
        assert!(rec.time.ends_with('Z'), "UTC RFC 3339: {}", rec.time);
        for (k, o) in rec.objects.iter().enumerate() {
            assert_eq!(o.id as usize, k + 1);
            assert!(o.bbox[0] <= o.bbox[2] && o.bbox[2] < 96);
            assert!((0.0..=1.0).contains(&o.score));
        }
    }

    // rules: offsets, never bare indices.
    let r = burlwatch(dir.path(), &["rules", "--model", m]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert!(r.stdout.contains("rule    1:"), "{}", r.stdout);
    assert!(r.stdout.contains(" is set") || r.stdout.contains(" is clear"));
    let r = burlwatch(dir.path(), &["rules", "--model", m, "--json"]);
    let rules: serde_json::Value = serde_json::from_str(&r.stdout).expect("rules JSON");
    let rules = rules.as_array().unwrap();
    assert!(!rules.is_empty());
    assert!(rules.iter().any(|r| r["detects"] == true));
    for rule in rules {
        for c in rule["conditions"].as_array().unwrap() {
            assert!(c["dx"].as_i64().unwrap().abs() <= 5 && c["dy"].as_i64().unwrap().abs() <= 5);
        }
    }
}

#[test]
fn settings_can_be_overridden() {
    let dir = Dir::new();
    let model = trained(&dir);
    let m = model.to_str().unwrap();
    let frame = "train/loom-standard-0000.pbm";
    let r = burlwatch(
        dir.path(),
        &[
            "scan",
            "--model",
            m,
            "--json",
            "--threshold",
            "0",
            "--min-area",
            "1",
            frame,
        ],
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    let rec: FrameRecord = serde_json::from_str(r.stdout.trim()).unwrap();
    // Threshold 0 detects every pixel: one object covering the frame.
    assert_eq!(rec.objects.len(), 1);
    assert_eq!(rec.objects[0].area, 96 * 96);
    let r = burlwatch(
        dir.path(),
        &["scan", "--model", m, "--threshold", "1.5", frame],
    );
    assert_eq!(r.code, 1);
    assert!(r.stderr.contains("threshold"), "{}", r.stderr);
}

#[test]
fn bad_files_are_named_and_can_be_skipped() {
    let dir = Dir::new();
    small_data(&dir, "data", "6", "9");
    dir.write("data/garbage.pbm", b"this is not an image");
    dir.write("data/garbage.mask.pbm", b"P4\n4 4\n\0\0\0\0");
    dir.write("data/short.pbm", b"P4\n64 64\n\x00\x01");
    dir.write("data/short.mask.pbm", b"P4\n64 64\n\x00\x01");
    dir.write("data/huge.pbm", b"P4\n90000 90000\n");
    dir.write("data/huge.mask.pbm", b"P4\n90000 90000\n");
    dir.write("data/lonely.pbm", b"P1\n2 2\n0 1 1 0\n");
    dir.write("data/orphan.mask.pbm", b"P1\n2 2\n0 1 1 0\n");
    dir.write("data/empty.pbm", b"");
    dir.write("data/empty.mask.pbm", b"P1\n1 1\n0\n");
    let frame0 = std::fs::read(dir.join("data/loom-standard-0000.pbm")).unwrap();
    dir.write("data/sized.pbm", &frame0);
    dir.write("data/sized.mask.pbm", b"P1\n3 3\n000000000\n");
    dir.write(
        "data/pngmask.png",
        &burlwatch::codec::encode_png(&burlwatch::BitFrame::new(4, 4)).unwrap(),
    );
    dir.write(
        "data/pngmask.mask.png",
        &burlwatch::codec::encode_png(&burlwatch::BitFrame::new(4, 4)).unwrap(),
    );
    dir.write("data/disguised.pbm", b"P1\n4 4\n0000000000000000\n");
    dir.write(
        "data/disguised.mask.pbm",
        &burlwatch::codec::encode_png(&burlwatch::BitFrame::new(4, 4)).unwrap(),
    );
    dir.write("data/.hidden.pbm", b"ignored");
    dir.write("data/notes.txt", b"ignored");

    let r = burlwatch(dir.path(), &["train", "--data", "data", "--out", "m.json"]);
    assert_eq!(r.code, 1, "{}", r.stdout);
    for (name, why) in [
        ("garbage.pbm", "not a PBM or PNG"),
        ("short.pbm", "truncated"),
        // When both files of a pair are bad, both are named.
        ("short.mask.pbm", "truncated"),
        ("huge.mask.pbm", "over the limit"),
        ("huge.pbm", "over the limit"),
        ("lonely.pbm", "no mask"),
        ("orphan.mask.pbm", "mask without a frame"),
        ("empty.pbm", "empty"),
        ("sized.mask.pbm", "mask is 3x3 but its frame is 96x96"),
        ("pngmask.mask.png", "masks must be PBM"),
        ("pngmask.png", "no mask"),
        ("disguised.mask.pbm", "masks must be PBM"),
    ] {
        let line = r
            .stderr
            .lines()
            .find(|l| l.contains(name))
            .unwrap_or_else(|| panic!("no error for {name}:\n{}", r.stderr));
        assert!(line.contains(why), "{name}: {line}");
    }
    assert!(!r.stderr.contains("panicked"), "{}", r.stderr);
    assert!(!dir.join("m.json").exists());

    let r = burlwatch(
        dir.path(),
        &["train", "--data", "data", "--out", "m.json", "--skip-bad"],
    );
    // 3: finished, but bad files were passed over (2 is a usage error).
    assert_eq!(r.code, 3, "{}", r.stderr);
    assert!(r.stdout.contains("skipped 12 bad file(s)"), "{}", r.stdout);
    assert!(r.stderr.contains("warning: skipped"), "{}", r.stderr);
    assert!(dir.join("m.json").exists());

    // scan keeps going past a bad frame and names it.
    let r = burlwatch(
        dir.path(),
        &[
            "scan",
            "--model",
            "m.json",
            "data/garbage.pbm",
            "data/loom-standard-0001.pbm",
            "data/missing.pbm",
        ],
    );
    assert_eq!(r.code, 3);
    assert!(r.stdout.contains("loom-standard-0001.pbm"), "{}", r.stdout);
    assert!(
        r.stderr.contains("garbage.pbm: not a PBM or PNG"),
        "{}",
        r.stderr
    );
    assert!(r.stderr.contains("missing.pbm"), "{}", r.stderr);
}

#[test]
fn untuned_training_warns_and_folder_out_is_refused() {
    let dir = Dir::new();
    small_data(&dir, "train", "4", "3");
    let r = burlwatch(
        dir.path(),
        &[
            "train",
            "--data",
            "train",
            "--out",
            "m.json",
            "--folds",
            "0",
            "--holdout",
            "0",
        ],
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert!(
        r.stderr.contains("warning: no frame was held out"),
        "{}",
        r.stderr
    );
    let r = burlwatch(dir.path(), &["train", "--data", "train", "--out", "train"]);
    assert_eq!(r.code, 1);
    assert!(r.stderr.contains("is a folder"), "{}", r.stderr);
}

/// `--symmetry` trains on the frames mirrored and turned, says so and
/// records it; a symmetry not known is refused, naming the choices.
#[test]
fn training_under_a_symmetry_says_so() {
    let dir = Dir::new();
    small_data(&dir, "train", "6", "3");
    let r = burlwatch(
        dir.path(),
        &[
            "train",
            "--data",
            "train",
            "--out",
            "m.json",
            "--symmetry",
            "square",
        ],
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert!(
        r.stdout.contains("symmetry: square") && r.stdout.contains("with their transforms"),
        "{}",
        r.stdout
    );
    let model = std::fs::read_to_string(dir.join("m.json")).unwrap();
    assert!(model.contains("\"symmetry\": \"square\""), "{model}");
    let r = burlwatch(
        dir.path(),
        &[
            "train",
            "--data",
            "train",
            "--out",
            "n.json",
            "--symmetry",
            "round",
        ],
    );
    assert_eq!(r.code, 2, "{}", r.stderr);
    assert!(
        r.stderr.contains("none, mirrors, square or choose"),
        "{}",
        r.stderr
    );
    // `choose`: training tries each, keeps one, and says what each scored.
    let r = burlwatch(
        dir.path(),
        &[
            "train",
            "--data",
            "train",
            "--out",
            "c.json",
            "--symmetry",
            "choose",
            "--json",
        ],
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    let j: serde_json::Value = serde_json::from_str(&r.stdout).unwrap();
    let tried = j["symmetry_tried"].as_array().unwrap();
    let names: Vec<&str> = tried
        .iter()
        .map(|t| t["symmetry"].as_str().unwrap())
        .collect();
    assert_eq!(names, ["none", "mirrors", "square"]);
    let kept: Vec<&serde_json::Value> = tried.iter().filter(|t| t["kept"] == true).collect();
    assert_eq!(kept.len(), 1);
    let model: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(dir.join("c.json")).unwrap()).unwrap();
    assert_eq!(model["format_version"], 5);
    assert_eq!(model["training"]["symmetry_tried"], j["symmetry_tried"]);
    let trained = model["training"]["symmetry"].as_str().unwrap_or("none");
    assert_eq!(kept[0]["symmetry"], trained);
    let text = burlwatch(
        dir.path(),
        &[
            "train",
            "--data",
            "train",
            "--out",
            "d.json",
            "--symmetry",
            "choose",
        ],
    );
    assert_eq!(text.code, 0, "{}", text.stderr);
    assert!(
        text.stdout
            .contains("symmetry chosen on the held-out frames")
            && text.stdout.contains(" kept"),
        "{}",
        text.stdout
    );
}

/// Training over `--memory-mb` stops before it grows, with the bound, the
/// limit and how to change it; a limit outside 16..=1048576 MiB is a usage
/// error; and a limit that only one tree at a time fits is said. (Four
/// frames of 256x256 under `square`: 288 bytes for each of 262,144 pixels
/// in the final tree's store alone, over 16 MiB. Six of 96x96: the trees'
/// bound is 21 MB, the final store's 20 MB and a fold's 19 MB, so 45 MiB
/// fits one at a time and not two.)
#[test]
fn training_over_its_memory_limit_stops_before_growing() {
    let dir = Dir::new();
    let r = burlwatch(
        dir.path(),
        &[
            "generate", "--out", "big", "--count", "4", "--seed", "2", "--width", "256",
            "--height", "256",
        ],
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    let train = |extra: &[&str]| {
        let mut args = vec![
            "train",
            "--data",
            "big",
            "--out",
            "m.json",
            "--symmetry",
            "square",
        ];
        args.extend_from_slice(extra);
        burlwatch(dir.path(), &args)
    };
    let r = train(&["--memory-mb", "16"]);
    assert_eq!(r.code, 1, "{}", r.stderr);
    assert!(
        r.stderr.contains("over the memory limit of 16 MiB")
            && r.stderr.contains("--memory-mb")
            && r.stderr.contains("8 transforms"),
        "{}",
        r.stderr
    );
    assert!(!dir.join("m.json").exists());
    let r = train(&["--memory-mb", "8"]);
    assert_eq!(r.code, 2, "{}", r.stderr);
    assert!(r.stderr.contains("from 16 to 1048576"), "{}", r.stderr);
    small_data(&dir, "small", "6", "3");
    let r = burlwatch(
        dir.path(),
        &[
            "train",
            "--data",
            "small",
            "--out",
            "s.json",
            "--memory-mb",
            "45",
        ],
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    if std::thread::available_parallelism().map_or(1, |n| n.get()) > 1 {
        assert!(
            r.stdout.contains("the trees grew one at a time")
                && r.stdout.contains("limit of 45 MiB"),
            "{}",
            r.stdout
        );
    }
}

#[test]
fn bad_models_and_options_are_clear_errors() {
    let dir = Dir::new();
    dir.write("broken.json", b"{ \"format\": \"burlwatch-model\" ");
    let r = burlwatch(dir.path(), &["rules", "--model", "broken.json"]);
    assert_eq!(r.code, 1);
    assert!(
        r.stderr.contains("broken.json") && r.stderr.contains("invalid model"),
        "{}",
        r.stderr
    );
    let r = burlwatch(dir.path(), &["rules", "--model", "absent.json"]);
    assert_eq!(r.code, 1);
    assert!(r.stderr.contains("absent.json"), "{}", r.stderr);
    let r = burlwatch(
        dir.path(),
        &[
            "train",
            "--data",
            ".",
            "--out",
            "m.json",
            "--criterion",
            "purity",
        ],
    );
    assert_eq!(r.code, 1);
    assert!(
        r.stderr.contains("gini, entropy or gain-ratio"),
        "{}",
        r.stderr
    );
    let r = burlwatch(
        dir.path(),
        &["train", "--data", ".", "--out", "m.json", "--window", "4"],
    );
    assert_eq!(r.code, 1);
    assert!(r.stderr.contains("3, 5, 7, 9, 11"), "{}", r.stderr);
    let r = burlwatch(
        dir.path(),
        &["train", "--data", "nowhere", "--out", "m.json"],
    );
    assert_eq!(r.code, 1);
    assert!(r.stderr.contains("nowhere"), "{}", r.stderr);
}

#[test]
fn generate_is_deterministic() {
    let dir = Dir::new();
    small_data(&dir, "a", "3", "42");
    small_data(&dir, "b", "3", "42");
    for i in 0..3 {
        for suffix in ["pbm", "mask.pbm"] {
            let name = format!("loom-standard-{i:04}.{suffix}");
            assert_eq!(
                std::fs::read(dir.join(&format!("a/{name}"))).unwrap(),
                std::fs::read(dir.join(&format!("b/{name}"))).unwrap(),
                "{name}"
            );
        }
    }
}

/// The `burlwatch generate` commands README.md gives for `demo-frames/`,
/// each as its arguments after `burlwatch`.
fn readme_demo_commands() -> Vec<Vec<String>> {
    let readme = std::fs::read_to_string(repo().join("README.md")).unwrap();
    readme
        .lines()
        .filter(|l| l.starts_with("burlwatch generate --out demo-frames/"))
        .map(|l| l.split_whitespace().skip(1).map(str::to_string).collect())
        .collect()
}

#[test]
fn committed_demo_frames_regenerate_bit_for_bit() {
    let dir = Dir::new();
    let demo = repo().join("demo-frames");
    let commands = readme_demo_commands();
    let mut made = Vec::new();
    for mut args in commands {
        // Into the temporary folder instead of the committed one.
        let out = args.iter().position(|a| a == "--out").unwrap() + 1;
        let set = args[out].trim_start_matches("demo-frames/").to_string();
        args[out] = dir.join(&set).to_str().unwrap().to_string();
        let args: Vec<&str> = args.iter().map(String::as_str).collect();
        let r = burlwatch(dir.path(), &args);
        assert_eq!(r.code, 0, "{args:?}: {}", r.stderr);
        made.push(set);
    }
    // Every committed set has its command, and every file is the same.
    let mut sets: Vec<String> = std::fs::read_dir(&demo)
        .unwrap()
        .map(|e| e.unwrap().file_name().into_string().unwrap())
        .collect();
    sets.sort();
    made.sort();
    assert_eq!(made, sets, "README.md's generate commands for demo-frames/");
    let names = |d: &std::path::Path| {
        let mut v: Vec<String> = std::fs::read_dir(d)
            .unwrap()
            .map(|e| e.unwrap().file_name().into_string().unwrap())
            .collect();
        v.sort();
        v
    };
    for set in &sets {
        let (committed, again) = (demo.join(set), dir.join(set));
        let files = names(&committed);
        assert_eq!(names(&again), files, "{set}: other files");
        for f in &files {
            assert!(
                std::fs::read(committed.join(f)).unwrap() == std::fs::read(again.join(f)).unwrap(),
                "demo-frames/{set}/{f} differs when regenerated"
            );
        }
    }
}

#[test]
fn committed_demo_frames_are_clean_pairs() {
    for set in ["train", "test", "drifted"] {
        let dir = repo().join("demo-frames").join(set);
        let (pairs, problems) = burlwatch::fileio::data::list_pairs(&dir).expect("demo folder");
        assert!(problems.is_empty(), "{set}: {:?}", problems);
        assert!(pairs.len() >= 10, "{set} has {} pairs", pairs.len());
    }
}

#[test]
fn committed_model_keeps_loading_and_finding_the_same_objects() {
    // A model file written by this format version, kept to guard
    // compatibility, with a frame and the objects it found when committed.
    let data = repo().join("tests").join("data");
    let text = std::fs::read_to_string(data.join("model-v2.json")).unwrap();
    let model = burlwatch::model::Model::from_json(&text).expect("committed model loads");
    let frame = burlwatch::fileio::data::read_frame(
        &data.join("golden-0000.pbm"),
        &burlwatch::codec::DecodeLimits::default(),
    )
    .unwrap();
    let got = burlwatch::detect::walker::run(&model.tree, &model.settings(), &frame);
    let want: Vec<burlwatch::record::ObjectRecord> = serde_json::from_str(
        &std::fs::read_to_string(data.join("golden-0000.objects.json")).unwrap(),
    )
    .unwrap();
    let got: Vec<_> = got
        .objects
        .iter()
        .map(burlwatch::record::ObjectRecord::from_object)
        .collect();
    assert_eq!(got, want);
}

#[test]
fn bench_reports_the_capacity_of_this_box() {
    let dir = Dir::new();
    let model = repo().join("tests/data/model-v2.json");
    let m = model.to_str().unwrap();
    let r = burlwatch(
        dir.path(),
        &[
            "bench", "--model", m, "--size", "96x64", "--runs", "1", "--json",
        ],
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    let v: serde_json::Value = serde_json::from_str(&r.stdout).expect("bench JSON");
    assert_eq!(
        (v["width"].as_u64(), v["height"].as_u64()),
        (Some(96), Some(64))
    );
    for k in [
        "compiled_mpx_per_s",
        "portable_mpx_per_s",
        "walker_mpx_per_s",
        "frame_ms",
        "frames_per_s",
    ] {
        assert!(v[k].as_f64().is_some_and(|x| x > 0.0), "{k}: {v}");
    }
    assert!(v["program_ops"].as_u64().unwrap() <= v["tree_nodes"].as_u64().unwrap());
    assert!(!v["backend"].as_str().unwrap().is_empty());
    let r = burlwatch(dir.path(), &["bench", "--model", m, "--size", "12x12"]);
    assert_eq!(r.code, 1);
    assert!(r.stderr.contains("between 32 and 8192"), "{}", r.stderr);
    let golden = repo().join("tests/data/golden-0000.pbm");
    let r = burlwatch(
        dir.path(),
        &[
            "bench",
            "--model",
            m,
            "--frame",
            golden.to_str().unwrap(),
            "--runs",
            "1",
        ],
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert!(r.stdout.contains("frame 128x128"), "{}", r.stdout);
}

/// Issue "First run and everyday use", point 2: a shell glob over a data
/// folder names the masks too; they are skipped, with one line, and only
/// the frames are scanned.
#[test]
fn scan_skips_masks_named_by_a_glob() {
    let test = repo().join("demo-frames/test");
    let mut files: Vec<String> = std::fs::read_dir(&test)
        .unwrap()
        .map(|e| e.unwrap().path().to_string_lossy().into_owned())
        .filter(|p| p.ends_with(".pbm"))
        .collect();
    files.sort();
    let masks = files.iter().filter(|p| p.ends_with(".mask.pbm")).count();
    assert!(masks > 0 && masks < files.len());
    let model = repo().join("tests/data/model-v2.json");
    let mut args = vec!["scan", "--json", "--model", model.to_str().unwrap()];
    args.extend(files.iter().map(String::as_str));
    let d = Dir::new();
    let r = burlwatch(d.path(), &args);
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert_eq!(r.stdout.lines().count(), files.len() - masks);
    assert!(!r.stdout.contains(".mask.pbm"), "a mask was scanned");
    assert!(
        r.stderr.contains(&format!("skipped {masks} label file(s)")),
        "{}",
        r.stderr
    );
    // Masks alone: nothing to scan is an error that says why.
    let only: Vec<&str> = files
        .iter()
        .filter(|p| p.ends_with(".mask.pbm"))
        .map(String::as_str)
        .collect();
    let mut args = vec!["scan", "--model", model.to_str().unwrap()];
    args.extend(only);
    let r = burlwatch(d.path(), &args);
    assert_eq!(r.code, 1);
    assert!(
        r.stderr.contains("every file given is a mask"),
        "{}",
        r.stderr
    );
}

/// Issue "First run and everyday use", point 6: a wrong command line exits
/// with 2 (the argument parser's convention), which no longer also means
/// "some input files were bad" (3).
#[test]
fn a_usage_error_has_its_own_exit_status() {
    let d = Dir::new();
    let r = burlwatch(d.path(), &["scan"]);
    assert_eq!(r.code, 2, "{}", r.stderr);
    assert!(r.stderr.to_lowercase().contains("usage"), "{}", r.stderr);
    let r = burlwatch(d.path(), &["train", "--no-such-option"]);
    assert_eq!(r.code, 2, "{}", r.stderr);
}

/// Issue "First run and everyday use", point 5: a frame or a configuration
/// given where a model belongs is named for what it is.
#[test]
fn a_wrong_file_given_as_the_model_is_named() {
    let d = Dir::new();
    let frame = repo().join("demo-frames/test/loom-standard-0000.pbm");
    let config = repo().join("config/burlwatch.toml");
    for (model, what) in [(&frame, "a PBM image"), (&config, "configuration-style")] {
        let r = burlwatch(
            d.path(),
            &[
                "scan",
                "--model",
                model.to_str().unwrap(),
                frame.to_str().unwrap(),
            ],
        );
        assert_eq!(r.code, 1, "{}", r.stderr);
        assert!(
            r.stderr.contains(model.to_str().unwrap())
                && r.stderr.contains(what)
                && r.stderr.contains("not a model file"),
            "{}",
            r.stderr
        );
    }
}

/// Issue "First run and everyday use", point 8: `train` and `generate` do
/// not overwrite or mix into earlier output without `--force`; an empty
/// data folder's error says what a pair is; `rules` says "background" and
/// "defect" for training pixels, keeping "clear" for pixel tests.
#[test]
fn earlier_output_is_kept_unless_forced() {
    let d = Dir::new();
    let gen = |extra: &[&str]| {
        let mut args = vec![
            "generate", "--out", "data", "--count", "4", "--width", "64", "--height", "64",
        ];
        args.extend_from_slice(extra);
        burlwatch(d.path(), &args)
    };
    assert_eq!(gen(&[]).code, 0);
    let again = gen(&["--seed", "2"]);
    assert_eq!(again.code, 1);
    assert!(
        again.stderr.contains("not empty") && again.stderr.contains("--force"),
        "{}",
        again.stderr
    );
    assert_eq!(gen(&["--force"]).code, 0);
    let train = |extra: &[&str]| {
        let mut args = vec![
            "train",
            "--data",
            "data",
            "--out",
            "m.json",
            "--holdout",
            "0.25",
        ];
        args.extend_from_slice(extra);
        burlwatch(d.path(), &args)
    };
    assert_eq!(train(&[]).code, 0, "{}", train(&[]).stderr);
    let before = std::fs::read(d.join("m.json")).unwrap();
    let again = train(&["--max-depth", "3"]);
    assert_eq!(again.code, 1);
    assert!(
        again.stderr.contains("exists") && again.stderr.contains("--force"),
        "{}",
        again.stderr
    );
    assert_eq!(
        std::fs::read(d.join("m.json")).unwrap(),
        before,
        "the model was kept"
    );
    assert_eq!(train(&["--max-depth", "3", "--force"]).code, 0);
    let rules = burlwatch(d.path(), &["rules", "--model", "m.json"]);
    assert!(
        rules.stdout.contains("background and") && rules.stdout.contains("defect training pixels"),
        "{}",
        rules.stdout
    );
    std::fs::create_dir_all(d.join("empty")).unwrap();
    let r = burlwatch(d.path(), &["train", "--data", "empty", "--out", "e.json"]);
    assert_eq!(r.code, 1);
    assert!(r.stderr.contains("NAME.mask.pbm"), "{}", r.stderr);
}

/// The evaluation suite: per-setting results and their macro average
/// (each setting weighs the same: macro-averaging as defined by Sokolova
/// and Lapalme, "A systematic analysis of performance measures for
/// classification tasks", 2009), and every figure reproduced by hand with
/// the frames `--out` writes, `train` and `eval`.
#[test]
fn the_suite_scores_each_setting_and_its_figures_are_reproducible() {
    let d = Dir::new();
    let out = d.join("suite");
    let r = burlwatch(
        d.path(),
        &[
            "suite",
            "--only",
            "twill,small-defects",
            "--train",
            "3",
            "--test",
            "2",
            "--size",
            "128",
            "--json",
            "--out",
            out.to_str().unwrap(),
        ],
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
    let v: serde_json::Value = serde_json::from_str(&r.stdout).unwrap();
    let settings = v["settings"].as_array().unwrap();
    let names: Vec<&str> = settings
        .iter()
        .map(|s| s["setting"].as_str().unwrap())
        .collect();
    assert_eq!(names, ["twill", "small-defects"]);
    let f1 = |s: &serde_json::Value, level: &str| s[format!("{level}_f1")].as_f64().unwrap();
    let mean = |level: &str| settings.iter().map(|s| f1(s, level)).sum::<f64>() / 2.0;
    assert!((v["macro_object_f1"].as_f64().unwrap() - mean("object")).abs() < 1e-12);
    assert!((v["macro_pixel_f1"].as_f64().unwrap() - mean("pixel")).abs() < 1e-12);
    for s in settings {
        let name = s["setting"].as_str().unwrap();
        // F1 = 2 TP / (2 TP + FP + FN) (van Rijsbergen's F-measure with
        // beta = 1), from the counts printed beside it.
        let o = &s["object"];
        let (tp, fp, fn_) = (
            o["tp"].as_f64().unwrap(),
            o["fp"].as_f64().unwrap(),
            o["fn"].as_f64().unwrap(),
        );
        if tp + fp + fn_ > 0.0 {
            assert!((f1(s, "object") - 2.0 * tp / (2.0 * tp + fp + fn_)).abs() < 1e-9);
        }
        // Every object error is of exactly one kind.
        let e = &s["errors"];
        let n = |k: &str| e[k].as_f64().unwrap();
        assert_eq!(n("missed") + n("unmatched"), fn_, "{name}: {e}");
        assert_eq!(n("partial") + n("false_alarms"), fp, "{name}: {e}");
        assert!(s["object_f1_se"].as_f64().unwrap() >= 0.0);
        // The same figure by hand: train on the written training frames,
        // evaluate on the written test frames.
        let model = d.join(&format!("{name}.json"));
        let train_dir = out.join(name).join("train");
        let t = burlwatch(
            d.path(),
            &[
                "train",
                "--data",
                train_dir.to_str().unwrap(),
                "--out",
                model.to_str().unwrap(),
            ],
        );
        assert_eq!(t.code, 0, "{}", t.stderr);
        let test_dir = out.join(name).join("test");
        let e = burlwatch(
            d.path(),
            &[
                "eval",
                "--data",
                test_dir.to_str().unwrap(),
                "--model",
                model.to_str().unwrap(),
                "--json",
            ],
        );
        assert_eq!(e.code, 0, "{}", e.stderr);
        let ev: serde_json::Value = serde_json::from_str(&e.stdout).unwrap();
        assert_eq!(ev["object"]["tp"], o["tp"], "{name}: {}", e.stdout);
        assert_eq!(ev["object"]["fp"], o["fp"], "{name}");
        assert_eq!(ev["object"]["fn"], o["fn"], "{name}");
        assert_eq!(ev["pixel"]["tp"], s["pixel"]["tp"], "{name}");
    }
    // A name that is not a setting is refused, naming the settings.
    let bad = burlwatch(d.path(), &["suite", "--only", "satin"]);
    assert_ne!(bad.code, 0);
    assert!(bad.stderr.contains("plain-fine"), "{}", bad.stderr);
}

/// Several draws: each draw is the single-draw suite of its own seeds, the
/// draws' frames are written apart, and the summary is the mean and the
/// sample standard deviation (divisor n - 1: NIST/SEMATECH e-Handbook of
/// Statistical Methods, section 1.3.5.6) of the draws' figures.
#[test]
fn the_suite_over_several_draws_gives_each_draw_and_their_spread() {
    let d = Dir::new();
    let out = d.join("draws");
    let run = |extra: &[&str]| {
        let mut a = vec![
            "suite", "--only", "twill", "--train", "3", "--test", "2", "--size", "64", "--json",
        ];
        a.extend_from_slice(extra);
        let r = burlwatch(d.path(), &a);
        assert_eq!(r.code, 0, "{}", r.stderr);
        serde_json::from_str::<serde_json::Value>(&r.stdout).unwrap()
    };
    let both = run(&["--draws", "2", "--out", out.to_str().unwrap()]);
    let draws = both["draws"].as_array().unwrap();
    assert_eq!(draws.len(), 2);
    let f1 = |v: &serde_json::Value| v["settings"][0]["object_f1"].as_f64().unwrap();
    for (draw, seed) in draws.iter().zip(["1", "3"]) {
        assert_eq!(draw["seed"].to_string(), seed);
        // The same figures as the suite run once from that seed.
        let single = run(&["--seed", seed]);
        assert_eq!(single["seed"].to_string(), seed);
        assert_eq!(
            draw["settings"][0]["object"],
            single["settings"][0]["object"]
        );
        assert_eq!(draw["settings"][0]["pixel"], single["settings"][0]["pixel"]);
        assert!(out.join(format!("seed-{seed}/twill/train")).is_dir());
        assert!(out.join(format!("seed-{seed}/twill/test")).is_dir());
    }
    // Nothing outside the draws' folders.
    assert!(!out.join("twill").exists());
    // Draw 2's test frames are the test seed's (4) frames, as `generate`
    // writes them.
    let gen = d.join("gen");
    let g = burlwatch(
        d.path(),
        &[
            "generate",
            "--out",
            gen.to_str().unwrap(),
            "--count",
            "2",
            "--seed",
            "4",
            "--preset",
            "twill",
            "--width",
            "64",
            "--height",
            "64",
        ],
    );
    assert_eq!(g.code, 0, "{}", g.stderr);
    let first = |dir: &std::path::Path| {
        let mut names: Vec<_> = std::fs::read_dir(dir)
            .unwrap()
            .map(|e| e.unwrap().path())
            .filter(|p| p.to_string_lossy().ends_with("0000.pbm"))
            .collect();
        names.sort();
        std::fs::read(&names[0]).unwrap()
    };
    assert_eq!(first(&out.join("seed-3/twill/test")), first(&gen));
    let (a, b) = (f1(&draws[0]), f1(&draws[1]));
    // The two draws differ, so the spread below is not zero by accident.
    assert_ne!(a, b);
    let s = &both["summary"];
    assert_eq!(s["draws"], 2);
    let spread = &s["settings"][0]["object_f1"];
    assert!((spread["mean"].as_f64().unwrap() - (a + b) / 2.0).abs() < 1e-12);
    // Two values: the sample standard deviation is |a - b| / sqrt(2).
    let sd = (a - b).abs() / 2f64.sqrt();
    assert!((spread["sd"].as_f64().unwrap() - sd).abs() < 1e-12);
    assert_eq!(spread["min"].as_f64().unwrap(), a.min(b));
    assert_eq!(spread["max"].as_f64().unwrap(), a.max(b));
    // One setting: the macro figure of a draw is that setting's; its
    // standard error is the spread over the square root of the draws.
    let m = &s["macro_object_f1"];
    assert!((m["sd"].as_f64().unwrap() - sd).abs() < 1e-12);
    assert!((m["se"].as_f64().unwrap() - sd / 2f64.sqrt()).abs() < 1e-12);
    // The text form ends with the summary.
    let text = burlwatch(
        d.path(),
        &[
            "suite", "--only", "twill", "--train", "3", "--test", "2", "--size", "64", "--draws",
            "2",
        ],
    );
    assert_eq!(text.code, 0, "{}", text.stderr);
    assert!(
        text.stdout
            .contains("draw 2 of 2: training seed 3, test seed 4"),
        "{}",
        text.stdout
    );
    assert!(text.stdout.contains("over 2 draws"), "{}", text.stdout);
    // Out of range.
    for n in ["0", "21"] {
        let bad = burlwatch(
            d.path(),
            &[
                "suite", "--only", "twill", "--train", "1", "--test", "1", "--size", "32",
                "--draws", n,
            ],
        );
        assert_ne!(bad.code, 0);
        assert!(bad.stderr.contains("--draws"), "{}", bad.stderr);
    }
}

/// Two trainings on the same draws: each side of each draw is the suite run
/// alone with that side's configuration, and the comparison is the spread
/// of the differences draw by draw (a paired comparison; the paired
/// standard error is the differences' sample standard deviation over the
/// square root of the draws: NIST/SEMATECH e-Handbook of Statistical
/// Methods, section 1.3.5.6 for the deviation, common practice for the
/// pairing).
#[test]
fn the_suite_compares_two_trainings_draw_by_draw() {
    let d = Dir::new();
    let gini = d.join("gini.toml");
    std::fs::write(&gini, "[training]\ncriterion = \"gini\"\n").unwrap();
    let base_args = [
        "suite", "--only", "twill", "--train", "3", "--test", "2", "--size", "64",
    ];
    let run = |extra: &[&str]| {
        let mut a = base_args.to_vec();
        a.push("--json");
        a.extend_from_slice(extra);
        let r = burlwatch(d.path(), &a);
        assert_eq!(r.code, 0, "{}", r.stderr);
        serde_json::from_str::<serde_json::Value>(&r.stdout).unwrap()
    };
    let both = run(&["--draws", "2", "--compare", gini.to_str().unwrap()]);
    let draws = both["draws"].as_array().unwrap();
    assert_eq!(draws.len(), 2);
    let f1 = |v: &serde_json::Value| v["settings"][0]["object_f1"].as_f64().unwrap();
    let mut diffs = Vec::new();
    for (draw, seed) in draws.iter().zip(["1", "3"]) {
        let alone = run(&["--seed", seed]);
        let gini_alone = run(&["--seed", seed, "--config", gini.to_str().unwrap()]);
        assert_eq!(
            draw["settings"][0]["object"],
            alone["settings"][0]["object"]
        );
        assert_eq!(
            draw["compared"]["settings"][0]["object"],
            gini_alone["settings"][0]["object"]
        );
        assert_eq!(
            draw["compared"]["settings"][0]["pixel"],
            gini_alone["settings"][0]["pixel"]
        );
        diffs.push(f1(&draw["compared"]) - f1(draw));
        assert_eq!(draw["settings"][0]["symmetry"], "none");
    }
    // The two trainings differ somewhere, so the comparison is not of a
    // training with itself.
    assert!(
        draws
            .iter()
            .any(|x| x["settings"][0]["pixel"] != x["compared"]["settings"][0]["pixel"]),
        "{both}"
    );
    let c = &both["comparison"];
    assert_eq!(c["draws"], 2);
    let p = &c["settings"][0]["object_f1"];
    let mean = (diffs[0] + diffs[1]) / 2.0;
    let sd = (diffs[0] - diffs[1]).abs() / 2f64.sqrt();
    assert!((p["difference"]["mean"].as_f64().unwrap() - mean).abs() < 1e-12);
    assert!((p["difference"]["sd"].as_f64().unwrap() - sd).abs() < 1e-12);
    assert!((p["difference"]["se"].as_f64().unwrap() - sd / 2f64.sqrt()).abs() < 1e-12);
    let gains = diffs.iter().filter(|&&x| x > 0.0).count();
    let losses = diffs.iter().filter(|&&x| x < 0.0).count();
    assert_eq!(p["gains"], gains);
    assert_eq!(p["losses"], losses);
    // One setting: the macro comparison is that setting's.
    assert_eq!(c["macro_object_f1"], *p);
    // Each side has its summary, with what its models cost.
    let nodes: Vec<f64> = draws
        .iter()
        .map(|x| x["compared"]["settings"][0]["nodes"].as_f64().unwrap())
        .collect();
    let s = &both["compared_summary"]["settings"][0];
    assert!((s["nodes"]["mean"].as_f64().unwrap() - (nodes[0] + nodes[1]) / 2.0).abs() < 1e-9);
    assert!(both["summary"]["settings"][0]["errors"]["missed"].is_number());
    // One draw compared: the draws' form, with the comparison.
    let one = run(&["--compare", gini.to_str().unwrap()]);
    assert_eq!(one["draws"].as_array().unwrap().len(), 1);
    assert_eq!(one["comparison"]["draws"], 1);
    // The text form ends with the comparison table.
    let mut a = base_args.to_vec();
    a.extend_from_slice(&["--draws", "2", "--compare", gini.to_str().unwrap()]);
    let text = burlwatch(d.path(), &a);
    assert_eq!(text.code, 0, "{}", text.stderr);
    assert!(text.stdout.contains("compared twill"), "{}", text.stdout);
    assert!(
        text.stdout.contains("over 2 draws, compared"),
        "{}",
        text.stdout
    );
    assert!(
        text.stdout.contains("compared against base over 2 draws"),
        "{}",
        text.stdout
    );
    // A compared configuration that is missing or bad is refused before
    // anything is trained, naming the file.
    let bad = d.join("bad.toml");
    std::fs::write(&bad, "[training]\ncriterion = \"coin toss\"\n").unwrap();
    for file in [bad, d.join("missing.toml")] {
        let mut a = base_args.to_vec();
        a.extend_from_slice(&["--compare", file.to_str().unwrap()]);
        let r = burlwatch(d.path(), &a);
        assert_ne!(r.code, 0);
        let name = file.file_name().unwrap().to_str().unwrap();
        assert!(r.stderr.contains(name), "{}", r.stderr);
        assert!(r.stdout.is_empty(), "{}", r.stdout);
    }
}

/// A draw that fails stops the suite without losing the draws before it:
/// their JSON is printed with the failure, and the exit status says it.
#[test]
fn a_failing_draw_keeps_the_finished_ones() {
    let d = Dir::new();
    let out = d.join("frames");
    std::fs::create_dir_all(&out).unwrap();
    // Draw 2 (seed 3) cannot write its frames: a file stands where its
    // folder goes.
    std::fs::write(out.join("seed-3"), b"in the way").unwrap();
    let args = [
        "suite", "--only", "twill", "--train", "3", "--test", "2", "--size", "64", "--draws", "3",
        "--json", "--out",
    ];
    let mut a = args.to_vec();
    a.push(out.to_str().unwrap());
    let r = burlwatch(d.path(), &a);
    assert_eq!(r.code, 1, "{}", r.stderr);
    assert!(r.stderr.contains("draw 2 of 3"), "{}", r.stderr);
    assert!(r.stderr.contains("seed-3"), "{}", r.stderr);
    let j: serde_json::Value = serde_json::from_str(&r.stdout).unwrap();
    assert_eq!(j["draws"].as_array().unwrap().len(), 1);
    assert_eq!(j["draws"][0]["seed"], 1);
    assert_eq!(j["summary"]["draws"], 1);
    assert_eq!(j["failed"]["draw"], 2);
    assert_eq!(j["failed"]["seed"], 3);
    assert!(j["failed"]["error"].as_str().unwrap().contains("seed-3"));
    // The finished draw is the one a run of it alone gives.
    let alone = burlwatch(
        d.path(),
        &[
            "suite", "--only", "twill", "--train", "3", "--test", "2", "--size", "64", "--json",
        ],
    );
    let alone: serde_json::Value = serde_json::from_str(&alone.stdout).unwrap();
    for part in ["object", "pixel", "errors", "nodes"] {
        assert_eq!(
            j["draws"][0]["settings"][0][part],
            alone["settings"][0][part]
        );
    }
    // The first draw failing leaves nothing to report but the error.
    std::fs::remove_dir_all(out.join("seed-1")).unwrap();
    std::fs::write(out.join("seed-1"), b"in the way").unwrap();
    let r = burlwatch(d.path(), &a);
    assert_eq!(r.code, 1);
    assert!(r.stdout.is_empty(), "{}", r.stdout);
    assert!(r.stderr.contains("seed-1"), "{}", r.stderr);
}
