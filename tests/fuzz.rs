//! Fuzzing the readers of outside input, on the stable toolchain: the PBM
//! decoder, the PNG front end, model files, the configuration file and
//! correction files each get their committed corpus (`tests/data/fuzz/`,
//! plus the project's own sample files) and mutations of it: bit flips,
//! bytes set to edge values, inserted, deleted and repeated runs, pieces of
//! other inputs spliced in, and numbers replaced by huge ones. Every input
//! must come back as a value or an error: no panic, no hang (each must
//! finish within a generous bound), and no more heap than the limits allow
//! (counted by this binary's allocator, `reference_images::counting`).
//!
//! A fixed, seeded number of inputs per target runs with `cargo test`;
//! `BURLWATCH_FUZZ_SECONDS=N` runs each target for N seconds instead
//! (`.ci/fuzz` does, with the release profile). An input that fails is
//! written to `target/fuzz-failures/` and named in the panic: add it to
//! the corpus once fixed.

use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

use burlwatch::codec::{self, DecodeLimits};
use burlwatch::synth::Rng;

use crate::reference_images::counting::held_at_most;
use crate::util::repo;

/// The frame limits of the decoding targets: small, so that the heap bound
/// below is a real check (2048 x 2048 is 512 KiB of bits).
fn limits() -> DecodeLimits {
    DecodeLimits {
        max_width: 2048,
        max_height: 2048,
        ..DecodeLimits::default()
    }
}

struct Target {
    name: &'static str,
    /// Extra seeds beside `tests/data/fuzz/NAME/`.
    extra: &'static [&'static str],
    /// Heap an input may take at most, beyond twice its own size.
    max_heap: i64,
    run: fn(&[u8]),
}

const TARGETS: [Target; 5] = [
    Target {
        name: "pbm",
        extra: &[],
        max_heap: 8 << 20,
        run: |b| {
            let _ = codec::decode_pbm(b, &limits());
        },
    },
    Target {
        name: "png",
        extra: &[],
        max_heap: 8 << 20,
        run: |b| {
            let _ = codec::decode(b, &limits());
        },
    },
    Target {
        name: "model",
        extra: &["tests/data/model-v2.json"],
        max_heap: 64 << 20,
        run: |b| {
            let _ = burlwatch::model::Model::from_json(&String::from_utf8_lossy(b));
        },
    },
    Target {
        name: "config",
        extra: &["config/burlwatch.toml", "config/system.toml"],
        max_heap: 8 << 20,
        run: |b| {
            let _ = burlwatch::config::from_str(&String::from_utf8_lossy(b));
        },
    },
    Target {
        name: "correction",
        extra: &["config/correction-example.toml"],
        max_heap: 8 << 20,
        run: |b| {
            let text = String::from_utf8_lossy(b);
            if let Ok(c) = burlwatch::correct::Correction::parse(&text) {
                let _ = c.check_statements();
            }
        },
    },
];

fn seeds(t: &Target) -> Vec<Vec<u8>> {
    let dir = repo().join("tests/data/fuzz").join(t.name);
    let mut files: Vec<PathBuf> = std::fs::read_dir(&dir)
        .map(|d| d.filter_map(|e| e.ok()).map(|e| e.path()).collect())
        .unwrap_or_default();
    files.sort();
    files.extend(t.extra.iter().map(|p| repo().join(p)));
    let seeds: Vec<Vec<u8>> = files.iter().map(|p| std::fs::read(p).unwrap()).collect();
    assert!(!seeds.is_empty(), "no corpus for {}", t.name);
    seeds
}

/// One mutation of `input`, some of them using `other` (another seed).
fn mutate(rng: &mut Rng, input: &mut Vec<u8>, other: &[u8]) {
    const EDGE: &[u8] = b"\x00\xff\x7f\x80 \n#0123456789-.\"[]{}=";
    let at = |rng: &mut Rng, len: usize| rng.range(0, len.max(1));
    match rng.range(0, 8) {
        0 if !input.is_empty() => {
            let i = at(rng, input.len());
            input[i] ^= 1 << rng.range(0, 8);
        }
        1 if !input.is_empty() => {
            let i = at(rng, input.len());
            input[i] = EDGE[rng.range(0, EDGE.len())];
        }
        2 => {
            let i = at(rng, input.len() + 1).min(input.len());
            let n = rng.range(1, 16);
            for _ in 0..n {
                input.insert(i, rng.next_u64() as u8);
            }
        }
        3 if !input.is_empty() => {
            let i = at(rng, input.len());
            let n = rng.range(1, 64).min(input.len() - i);
            input.drain(i..i + n);
        }
        4 if !input.is_empty() => {
            let i = at(rng, input.len());
            let n = rng.range(1, 64).min(input.len() - i);
            let piece = input[i..i + n].to_vec();
            let j = at(rng, input.len());
            input.splice(
                j..j,
                piece.iter().cycle().take(n * rng.range(1, 8)).copied(),
            );
        }
        5 if !other.is_empty() => {
            let i = at(rng, other.len());
            let n = rng.range(1, 256).min(other.len() - i);
            let j = at(rng, input.len() + 1).min(input.len());
            input.splice(j..j, other[i..i + n].iter().copied());
        }
        6 => {
            // A number made huge, negative or odd: sizes, counts, offsets.
            let digits: Vec<usize> = (0..input.len())
                .filter(|&k| input[k].is_ascii_digit())
                .collect();
            if let Some(&k) = digits.get(at(rng, digits.len())) {
                let mut end = k;
                while end < input.len() && input[end].is_ascii_digit() {
                    end += 1;
                }
                let by: &[u8] = [
                    &b"4294967296"[..],
                    b"18446744073709551616",
                    b"-1",
                    b"0",
                    b"1e308",
                    b"99999",
                ][rng.range(0, 6)];
                input.splice(k..end, by.iter().copied());
            }
        }
        _ if input.len() > 1 => {
            let n = at(rng, input.len());
            input.truncate(n);
        }
        _ => input.push(rng.next_u64() as u8),
    }
}

/// Runs `t.run` on `input`, failing (with the input saved) on a panic, a
/// hang past the bound, or more heap than allowed.
fn check(t: &Target, input: &[u8], k: u64) {
    let keep = |why: &str| -> ! {
        let dir = repo().join("target/fuzz-failures");
        let _ = std::fs::create_dir_all(&dir);
        let path = dir.join(format!("{}-{k}.bin", t.name));
        let _ = std::fs::write(&path, input);
        panic!("{} input {k} {why}; saved as {}", t.name, path.display());
    };
    let started = Instant::now();
    let run = t.run;
    let (outcome, heap) = held_at_most(|| std::panic::catch_unwind(|| run(input)));
    if outcome.is_err() {
        keep("panicked");
    }
    // Not a speed check: a bound far beyond any real input's time, so an
    // endless loop is caught rather than waited for.
    if started.elapsed() > Duration::from_secs(20) {
        keep("ran for over 20 s");
    }
    if heap > t.max_heap + 2 * input.len() as i64 {
        keep(&format!("took {heap} bytes of heap"));
    }
}

fn fuzz(t: &Target) {
    let seeds = seeds(t);
    let budget: Option<Duration> = std::env::var("BURLWATCH_FUZZ_SECONDS")
        .ok()
        .and_then(|s| s.parse().ok())
        .map(Duration::from_secs);
    let default_runs = if t.name == "model" { 300 } else { 3000 };
    let mut rng = Rng::new(0x5eed ^ t.name.len() as u64);
    let started = Instant::now();
    for (k, s) in seeds.iter().enumerate() {
        check(t, s, k as u64);
    }
    let mut k = seeds.len() as u64;
    loop {
        let done = match budget {
            Some(b) => started.elapsed() >= b,
            None => k >= default_runs,
        };
        if done {
            break;
        }
        let mut input = seeds[rng.range(0, seeds.len())].clone();
        let other = &seeds[rng.range(0, seeds.len())];
        for _ in 0..rng.range(1, 6) {
            mutate(&mut rng, &mut input, other);
        }
        check(t, &input, k);
        k += 1;
    }
    if budget.is_some() {
        use std::io::Write as _;
        let _ = writeln!(
            std::io::stderr(),
            "fuzz {}: {k} inputs in {:.0} s, none failed",
            t.name,
            started.elapsed().as_secs_f64()
        );
    }
}

fn target(name: &str) -> &'static Target {
    TARGETS.iter().find(|t| t.name == name).unwrap()
}

#[test]
fn the_pbm_decoder_survives_mutated_frames() {
    fuzz(target("pbm"));
}

#[test]
fn the_png_front_end_survives_mutated_frames() {
    fuzz(target("png"));
}

#[test]
fn the_model_reader_survives_mutated_models() {
    fuzz(target("model"));
}

#[test]
fn the_configuration_reader_survives_mutated_files() {
    fuzz(target("config"));
}

#[test]
fn the_correction_reader_survives_mutated_files() {
    fuzz(target("correction"));
}

/// The committed corpus is where the harness looks for it.
#[test]
fn every_target_has_a_corpus() {
    for t in &TARGETS {
        let dir: &Path = &repo().join("tests/data/fuzz").join(t.name);
        assert!(dir.is_dir(), "{}", dir.display());
    }
}
