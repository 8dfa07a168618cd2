"""Expected values for the drift statistics' tests (tests/reference/drift.json).

Run once, by hand, to (re)make the fixture; CI does not run it:

    python3 -m venv /tmp/refenv
    /tmp/refenv/bin/pip install scipy river
    /tmp/refenv/bin/python tests/reference/drift_reference.py > tests/reference/drift.json

Sources: scipy.spatial.distance.jensenshannon (base 2; squared, it is the
Jensen-Shannon divergence), scipy.special.rel_entr for the Population
Stability Index (PSI = sum rel_entr(a, e) + rel_entr(e, a), the symmetric
Kullback-Leibler sum), river.drift.PageHinkley and
river.drift.binary.DDM with the parameters written beside each stream.
The streams are written into the fixture, so the Rust tests need no
generator of their own.
"""

import json
import random

import river
import scipy
from river import drift
from river.drift import binary
from scipy.spatial.distance import jensenshannon
from scipy.special import rel_entr


def js_cases():
    cases = []
    rng = random.Random(11)
    for k in (4, 16, 64):
        for _ in range(3):
            p = [rng.random() for _ in range(k)]
            q = [rng.random() + (0.5 if i % 3 == 0 else 0.0) for i in range(k)]
            sp, sq = sum(p), sum(q)
            p = [x / sp for x in p]
            q = [x / sq for x in q]
            d = float(jensenshannon(p, q, base=2)) ** 2
            cases.append({"p": p, "q": q, "divergence": d})
    return cases


def psi_cases():
    """Window counts (some bins empty) against reference shares, both
    smoothed as the monitors do: a pseudo-count of 0.5 per bin at the
    window's size, then PSI by scipy."""
    cases = []
    rng = random.Random(14)
    for k in (4, 16):
        for _ in range(4):
            ref = [rng.random() * (0.0 if i % 5 == 4 else 1.0) for i in range(k)]
            total = sum(ref)
            ref = [x / total for x in ref]
            counts = [rng.randrange(0, 500) if i % 4 != 1 else 0 for i in range(k)]
            n = sum(counts)
            e = [(r * n + 0.5) / (n + 0.5 * k) for r in ref]
            a = [(c + 0.5) / (n + 0.5 * k) for c in counts]
            psi = float(sum(rel_entr(a, e)) + sum(rel_entr(e, a)))
            js = float(jensenshannon(e, a, base=2)) ** 2
            cases.append({"reference": ref, "counts": counts, "psi": psi, "js": js})
    return cases


def page_hinkley_cases():
    cases = []
    rng = random.Random(12)
    streams = [
        [rng.gauss(0.0, 1.0) for _ in range(300)] + [rng.gauss(3.0, 1.0) for _ in range(300)],
        [rng.gauss(5.0, 1.0) for _ in range(300)] + [rng.gauss(1.0, 1.0) for _ in range(300)],
        [rng.gauss(2.0, 0.5) for _ in range(600)],
    ]
    for params in (
        dict(min_instances=30, delta=0.005, threshold=50.0, alpha=1 - 0.0001, mode="both"),
        dict(min_instances=20, delta=0.1, threshold=10.0, alpha=0.999, mode="up"),
        dict(min_instances=20, delta=0.1, threshold=10.0, alpha=0.999, mode="down"),
    ):
        for s in streams:
            ph = drift.PageHinkley(**params)
            found = []
            for i, x in enumerate(s):
                ph.update(x)
                if ph.drift_detected:
                    found.append(i)
            cases.append({"params": params, "stream": s, "detections": found})
    return cases


def ddm_cases():
    cases = []
    rng = random.Random(13)
    streams = [
        [int(rng.random() < 0.1) for _ in range(500)] + [int(rng.random() < 0.5) for _ in range(300)],
        [int(rng.random() < 0.2) for _ in range(800)],
        [int(rng.random() < 0.3) for _ in range(200)] + [int(rng.random() < 0.05) for _ in range(200)]
        + [int(rng.random() < 0.4) for _ in range(300)],
    ]
    for params in (
        dict(warm_start=30, warning_threshold=2.0, drift_threshold=3.0),
        dict(warm_start=10, warning_threshold=1.5, drift_threshold=2.5),
    ):
        for s in streams:
            d = binary.DDM(**params)
            warnings, drifts = [], []
            for i, x in enumerate(s):
                d.update(x)
                if d.warning_detected:
                    warnings.append(i)
                if d.drift_detected:
                    drifts.append(i)
            cases.append({"params": params, "stream": s, "warnings": warnings, "drifts": drifts})
    return cases


print(
    json.dumps(
        {
            "versions": {"scipy": scipy.__version__, "river": river.__version__},
            "jensen_shannon": js_cases(),
            "psi": psi_cases(),
            "page_hinkley": page_hinkley_cases(),
            "ddm": ddm_cases(),
        }
    )
)
