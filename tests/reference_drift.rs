//! The drift statistics against outside references, from the fixture
//! `tests/reference/drift.json` made once by `tests/reference/drift_reference.py`
//! (library versions recorded in it):
//! - the Jensen-Shannon divergence against
//!   `scipy.spatial.distance.jensenshannon(p, q, base=2) ** 2`;
//! - the Population Stability Index of a window's counts against
//!   reference shares, smoothed as the monitors smooth them
//!   (`drift::compare`), against `scipy.special.rel_entr` summed both
//!   ways;
//! - the Page-Hinkley test's and the Drift Detection Method's detection
//!   indices against `river.drift.PageHinkley` and
//!   `river.drift.binary.DDM` with the same parameters on the same streams.

use burlwatch::drift::{
    compare, js_divergence, Ddm, DdmParams, DdmState, Direction, PageHinkley, PageHinkleyParams,
};
use serde_json::Value;

fn fixture() -> Value {
    serde_json::from_str(include_str!("reference/drift.json")).unwrap()
}

fn floats(v: &Value) -> Vec<f64> {
    v.as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_f64().unwrap())
        .collect()
}

fn indices(v: &Value) -> Vec<usize> {
    v.as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_u64().unwrap() as usize)
        .collect()
}

#[test]
fn jensen_shannon_matches_scipy() {
    let f = fixture();
    let cases = f["jensen_shannon"].as_array().unwrap();
    assert_eq!(cases.len(), 9);
    for c in cases {
        let (p, q) = (floats(&c["p"]), floats(&c["q"]));
        let want = c["divergence"].as_f64().unwrap();
        let got = js_divergence(&p, &q);
        assert!((got - want).abs() < 1e-12, "{got} vs scipy {want}");
    }
}

#[test]
fn psi_of_smoothed_windows_matches_scipy() {
    let f = fixture();
    let cases = f["psi"].as_array().unwrap();
    assert_eq!(cases.len(), 8);
    for c in cases {
        let reference = floats(&c["reference"]);
        let counts: Vec<u64> = indices(&c["counts"]).iter().map(|&n| n as u64).collect();
        // Empty bins in every window (and in the larger references), yet
        // finite.
        assert!(counts.contains(&0));
        let (psi, js) = compare(&reference, &counts);
        let (want_psi, want_js) = (c["psi"].as_f64().unwrap(), c["js"].as_f64().unwrap());
        assert!((psi - want_psi).abs() < 1e-12, "{psi} vs scipy {want_psi}");
        assert!((js - want_js).abs() < 1e-12, "{js} vs scipy {want_js}");
    }
}

#[test]
fn page_hinkley_detects_where_river_does() {
    let f = fixture();
    let cases = f["page_hinkley"].as_array().unwrap();
    assert_eq!(cases.len(), 9);
    let mut any = 0;
    for c in cases {
        let p = &c["params"];
        let params = PageHinkleyParams {
            min_instances: p["min_instances"].as_u64().unwrap(),
            delta: p["delta"].as_f64().unwrap(),
            threshold: p["threshold"].as_f64().unwrap(),
            alpha: p["alpha"].as_f64().unwrap(),
            direction: match p["mode"].as_str().unwrap() {
                "up" => Direction::Up,
                "down" => Direction::Down,
                _ => Direction::Both,
            },
        };
        let mut ph = PageHinkley::new(params);
        let found: Vec<usize> = floats(&c["stream"])
            .into_iter()
            .enumerate()
            .filter_map(|(i, x)| ph.update(x).then_some(i))
            .collect();
        assert_eq!(found, indices(&c["detections"]), "{params:?}");
        any += found.len();
    }
    assert!(any > 0, "the fixture has detections to match");
}

#[test]
fn ddm_warns_and_drifts_where_river_does() {
    let f = fixture();
    let cases = f["ddm"].as_array().unwrap();
    assert_eq!(cases.len(), 6);
    for c in cases {
        let p = &c["params"];
        let params = DdmParams {
            warm_start: p["warm_start"].as_u64().unwrap(),
            warning: p["warning_threshold"].as_f64().unwrap(),
            drift: p["drift_threshold"].as_f64().unwrap(),
            // The published method, as the library has it.
            laplace: false,
        };
        let mut d = Ddm::new(params);
        let (mut warnings, mut drifts) = (Vec::new(), Vec::new());
        for (i, x) in floats(&c["stream"]).into_iter().enumerate() {
            match d.update(x != 0.0) {
                DdmState::Warning => warnings.push(i),
                DdmState::Drift => drifts.push(i),
                DdmState::Stable => {}
            }
        }
        assert_eq!(warnings, indices(&c["warnings"]), "{params:?} warnings");
        assert_eq!(drifts, indices(&c["drifts"]), "{params:?} drifts");
    }
}
